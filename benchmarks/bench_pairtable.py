"""Pair-table step versus learner fitting, n = 1e4, 1e5 (real fits) and 1e6 (precomputed
predictions), K1 = K2 = 5. Target: the pair-table step stays linear in n and under 2% of fitting
time at n = 1e5.

Usage: .venv/bin/python benchmarks/bench_pairtable.py [--quick]
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from common import measure, print_table, write_json  # noqa: E402

from stackdr.core import (  # noqa: E402
    get_target,  # noqa: E402
    pair_inputs,
    pair_standard_errors,
    pair_table,
)
from stackdr.estimation import (  # noqa: E402
    CrossFitResult,
    cross_fit,
    make_learner,  # noqa: E402
    prepare_data,  # noqa: E402
)
from stackdr.studies import get_design  # noqa: E402


def libraries():
    prop = {
        name: make_learner(name)
        for name in (
            "logistic",
            "spline-logistic",
            "quadratic-logistic",
            "boosting-classifier",
            "constant-classifier",
        )
    }
    outc = {
        name: make_learner(name)
        for name in (
            "linear",
            "spline-ridge",
            "quadratic-ridge",
            "boosting-regressor",
            "constant-regressor",
        )
    }
    return prop, outc


def pair_step(target, cf, A, Y):
    inp = pair_inputs(target, cf, A, Y)
    return pair_table(inp), pair_standard_errors(inp)


def synthetic_crossfit(n, rng):
    K = 5
    pi = rng.uniform(0.05, 0.95, size=(1, n, K))
    outcome = {h: rng.normal(size=(1, n, K)) for h in ("mu1", "mu0")}
    return CrossFitResult(
        np.zeros((1, n), dtype=np.int64),
        pi,
        pi,
        outcome,
        outcome["mu1"],
        np.ones(n, bool),
        [f"p{k}" for k in range(K)],
        [f"o{k}" for k in range(K)],
        0.01,
        np.zeros((1, K, 2), dtype=np.int64),
        False,
        "classifier",
        "separate",
    )


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--quick", action="store_true", help="n = 1e3 and 1e4 only")
    args = parser.parse_args()
    target = get_target("ate")
    design = get_design("lunceford-davidian")
    rows = []
    sizes = [1_000, 10_000] if args.quick else [10_000, 100_000, 1_000_000]
    for n in sizes:
        rng = np.random.default_rng(n)
        if n <= 100_000:
            sim = design.simulate(n, rng)
            data = prepare_data(
                sim.frame, sim.treatment, sim.outcome, sim.covariates, target=target
            )
            prop, outc = libraries()
            cf, fit_s, _ = measure(cross_fit, data, target, prop, outc, n_jobs=2)
            A, Y = data.A, data.Y
        else:
            cf, fit_s = synthetic_crossfit(n, rng), float("nan")
            A = rng.binomial(1, 0.5, n).astype(float)
            Y = rng.normal(size=n)
        pair_step(target, cf, A, Y)  # warm-up
        _, pair_s, peak = measure(pair_step, target, cf, A, Y)
        rows.append(
            {
                "n": n,
                "fit_seconds": fit_s,
                "pair_table_seconds": pair_s,
                "pair_share_of_fit": pair_s / fit_s if np.isfinite(fit_s) else float("nan"),
                "pair_peak_MiB": peak,
                "pair_us_per_row": 1e6 * pair_s / n,
            }
        )
    print_table(rows, "Pair table (Psi + all pair SEs) vs learner fitting, K1 = K2 = 5, 2 workers")
    write_json("pairtable", {"rows": rows, "note": "1e6 row uses precomputed predictions"})


if __name__ == "__main__":
    main()
