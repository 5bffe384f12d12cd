"""Reweighting-bootstrap speed on the settings off the default path.

The default (riesz blend, mixed criterion) solves two LPs per replicate. The other blends
(``probability``, ``logit``) search alpha on a simplex lattice with refinement in every replicate,
and the ``minimax`` criterion searches (alpha, beta) jointly; this benchmark times those paths.

Setting: the demo scenario of ``stackdr demo`` (:func:`stackdr.studies.simulate_demo`, n = 2000,
seed 2026, default learner libraries), cross-fitted once; then for every blend in {riesz,
probability, logit} and criterion in {mixed, minimax} the analysis is rerun with B = 200
multinomial replicates on one worker (``BlendEstimator.analyse``). Reported: bootstrap seconds,
ms per replicate (whole bootstrap and its weight-search stage) and the main estimate with its
interval (a check that the runs did the same thing before and after a change).

Usage: .venv/bin/python benchmarks/bench_slow_paths.py [--replicates 200] [--label after]
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
import warnings
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from common import RESULTS, print_table, write_json  # noqa: E402

from stackdr import BlendEstimator  # noqa: E402
from stackdr.core import get_target  # noqa: E402
from stackdr.estimation import prepare_data  # noqa: E402
from stackdr.studies import simulate_demo  # noqa: E402

BLENDS = ("riesz", "probability", "logit")
CRITERIA = ("mixed", "minimax")
N = 2000
SEED = 2026  # the demo command's default seed


def demo_crossfit():
    """The demo data, validated and cross-fitted once with the default libraries."""
    frame, _ = simulate_demo(N, SEED)
    target = get_target("ate")
    prepared = prepare_data(frame, "programme", "sbp_change", None, target=target, folds=5)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cf = BlendEstimator("ate", seed=SEED).cross_fit(prepared, target)
    return prepared, target, cf


def time_setting(prepared, target, cf, blend: str, criterion: str, replicates: int) -> dict:
    estimator = BlendEstimator(
        "ate", blend=blend, criterion=criterion, bootstrap=replicates, seed=SEED, n_jobs=1
    )
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = estimator.analyse(prepared, target, cf)
    seconds = result.timings["bootstrap"]
    low, high = result.interval
    return {
        "blend": blend,
        "criterion": criterion,
        "B": replicates,
        "bootstrap_seconds": seconds,
        "ms_per_replicate": 1e3 * seconds / replicates,
        "search_ms_per_replicate": 1e3 * result.bootstrap.seconds["search"] / replicates,
        "estimate": result.estimate,
        "low": low,
        "high": high,
        "bootstrap_se": result.bootstrap.standard_errors["target-aimed stacking"],
    }


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--replicates", type=int, default=200)
    parser.add_argument("--label", default="current", help="key of this run in the JSON file")
    args = parser.parse_args()
    started = time.perf_counter()
    prepared, target, cf = demo_crossfit()
    rows = [
        time_setting(prepared, target, cf, blend, criterion, args.replicates)
        for blend in BLENDS
        for criterion in CRITERIA
    ]
    print_table(
        rows, f"Reweighting bootstrap off the default path: demo scenario, n = {N}, one worker"
    )
    # Runs under other labels (e.g. before a change) are kept beside this one.
    path = RESULTS / "slow_paths.json"
    payload = json.loads(path.read_text()) if path.exists() else {}
    runs = payload.get("runs", {})
    runs[args.label] = {
        "rows": rows,
        "wall_seconds": time.perf_counter() - started,
        "load_average_at_end": os.getloadavg(),
    }
    write_json("slow_paths", {"n": N, "seed": SEED, "runs": runs})


if __name__ == "__main__":
    main()
