"""Reweighting-bootstrap speed and memory, and its share of the whole pipeline.

Part 1: B = 1000 reweighting-bootstrap replicates with K1 = K2 = 5 learners on precomputed
out-of-fold predictions (a synthetic cross-fit of an ATE with noisy, biased learners around known
nuisances), n = 1e5 and 1e6, through ``BlendEstimator.analyse``. Each n runs in a fresh
subprocess so that its peak resident memory (``ru_maxrss``) is its own. Reported: total time,
bootstrap time, per-stage split (``result.bootstrap.seconds``), ms per replicate of the weight
search, peak memory. Targets: n = 1e5 under 10 s; n = 1e6 under 60 s and 3 GB. The default path
has the stacked propensity column (``stacked_propensity``); ``--stacked both`` adds a row per size
without it, for comparison.

Part 2: (total pipeline time) / (learner fitting time) for the default pipeline (default
libraries, B = 1000) at n = 1e5 on the Lunceford & Davidian design. Target <= 1.10.

Usage: .venv/bin/python benchmarks/bench_bootstrap.py [--sizes 100000 1000000] [--skip-pipeline]
       [--stacked {on,off,both}]
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import time
import warnings
from pathlib import Path

import numpy as np  # noqa: E402
from scipy.special import expit, logit  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent))
from common import RESULTS, print_table, write_json  # noqa: E402

from stackdr import BlendEstimator  # noqa: E402
from stackdr.core import get_target  # noqa: E402
from stackdr.estimation import CrossFitResult, PreparedData  # noqa: E402
from stackdr.studies import get_design  # noqa: E402

K = 5
B = 1000


def synthetic_problem(n: int, seed: int = 0):
    """Data with known nuisances and K learners per side that are the truth plus a learner-
    specific bias and row noise (as from an imperfect fit), stored as a cross-fit result."""
    rng = np.random.default_rng(seed)
    x = rng.standard_normal(n)
    pi = expit(0.8 * x)
    A = (rng.random(n) < pi).astype(float)
    mu0 = 1 + x
    mu1 = mu0 + 2
    Y = np.where(A == 1, mu1, mu0) + rng.standard_normal(n)
    shift = np.linspace(-0.4, 0.4, K)
    props = expit(logit(pi)[:, None] + shift + 0.3 * rng.standard_normal((n, K)))
    props = np.clip(props, 0.01, 0.99)
    outcome = {
        head: (mu[:, None] + shift + 0.5 * rng.standard_normal((n, K)))[None]
        for head, mu in (("mu1", mu1), ("mu0", mu0))
    }
    observed = np.where(A[:, None] == 1, outcome["mu1"][0], outcome["mu0"][0])[None]
    cf = CrossFitResult(
        fold_labels=(np.arange(n) % 5)[None],
        propensity=props[None],
        propensity_raw=props[None],
        outcome=outcome,
        observed=observed,
        observed_mask=np.ones(n, dtype=bool),
        propensity_names=[f"p{k}" for k in range(K)],
        outcome_names=[f"o{k}" for k in range(K)],
        clip=0.01,
        clip_counts=np.zeros((1, K, 2), dtype=np.int64),
        in_sample=False,
        propensity_kind="classifier",
        outcome_mode="separate",
    )
    data = PreparedData(x[:, None], A, Y, ["x"], "A", "Y")
    return data, cf


def one_size(n: int, stacked: bool = True) -> dict:
    """Run in a fresh process: analyse with B = 1000 and report times and peak memory."""
    data, cf = synthetic_problem(n)
    estimator = BlendEstimator("ate", bootstrap=B, seed=1, stacked_propensity=stacked)
    start, cpu = time.perf_counter(), time.process_time()
    result = estimator.analyse(data, get_target("ate"), cf)
    total, cpu = time.perf_counter() - start, time.process_time() - cpu
    stages = dict(result.bootstrap.seconds)
    return {
        "n": n,
        "B": B,
        "stacked_propensity": stacked,
        "analyse_seconds": total,
        "analyse_cpu_seconds": cpu,
        "bootstrap_seconds": result.timings["bootstrap"],
        **{f"stage_{k}": v for k, v in stages.items()},
        "search_ms_per_replicate": 1e3 * stages["search"] / B,
        "chunk_size": result.bootstrap.chunk_size,
        "peak_rss_MiB": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
        "estimate": result.estimate,
        "interval": list(result.interval),
    }


def pipeline_ratio(n: int = 100_000) -> dict:
    """Default libraries and B = 1000 on the Lunceford-Davidian design: total over fitting."""
    sim = get_design("lunceford-davidian").simulate(n, np.random.default_rng(2))
    estimator = BlendEstimator("ate", bootstrap=B, seed=3, n_jobs=1)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cpu = time.process_time()
        result = estimator.fit(sim.frame, sim.treatment, sim.outcome, sim.covariates)
        total_cpu = time.process_time() - cpu
        # CPU time is robust to other jobs on a shared machine; the post-fit part is rerun on
        # the same predictions (deterministic) to split it off.
        cpu = time.process_time()
        estimator.analyse(result.data, result.target, result.crossfit)
        after_fit_cpu = time.process_time() - cpu
    t = result.timings
    return {
        "n": n,
        "B": B,
        "cross_fit_seconds": t["cross_fit"],
        "analysis_seconds": t["analysis"],
        "bootstrap_seconds": t["bootstrap"],
        "total_seconds": t["total"],
        "total_over_fitting": t["total"] / t["cross_fit"],
        "total_cpu_seconds": total_cpu,
        "after_fit_cpu_seconds": after_fit_cpu,
        "total_over_fitting_cpu": total_cpu / (total_cpu - after_fit_cpu),
        "bootstrap_stages": dict(result.bootstrap.seconds),
    }


def report_sizes(rows: list[dict]) -> None:
    targets = {100_000: (10.0, None), 1_000_000: (60.0, 3 * 1024.0)}
    for row in rows:
        seconds, memory = targets.get(row["n"], (None, None))
        row["target_seconds"] = seconds
        row["meets_time"] = None if seconds is None else row["bootstrap_seconds"] < seconds
        row["target_MiB"] = memory
        row["meets_memory"] = None if memory is None else row["peak_rss_MiB"] < memory
    columns = (
        "n",
        "stacked_propensity",
        "bootstrap_seconds",
        "analyse_cpu_seconds",
        "stage_features",
        "stage_moments",
        "stage_search",
        "search_ms_per_replicate",
        "peak_rss_MiB",
        "meets_time",
        "meets_memory",
    )
    print_table(
        [{k: r.get(k) for k in columns} for r in rows],
        f"Reweighting bootstrap, B = {B}, K1 = K2 = {K}, one core",
    )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument(
        "--sizes", type=int, nargs="*", default=[100_000, 1_000_000], help="none: skip part 1"
    )
    parser.add_argument("--skip-pipeline", action="store_true")
    parser.add_argument(
        "--stacked",
        choices=("on", "off", "both"),
        default="on",
        help="stacked propensity column in part 1 (default on, the default path)",
    )
    parser.add_argument("--one", type=int, help=argparse.SUPPRESS)
    parser.add_argument("--one-stacked", choices=("on", "off"), help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.one:
        print(json.dumps(one_size(args.one, args.one_stacked != "off")))
        return
    # The two parts may run separately; each keeps the other's recorded results.
    previous = RESULTS / "bootstrap.json"
    payload = json.loads(previous.read_text()) if previous.exists() else {}
    rows = []
    variants = ("on", "off") if args.stacked == "both" else (args.stacked,)
    for n in args.sizes:
        for stacked in variants:
            out = subprocess.run(
                [sys.executable, __file__, "--one", str(n), "--one-stacked", stacked],
                capture_output=True,
                text=True,
                check=True,
            )
            rows.append(json.loads(out.stdout.strip().splitlines()[-1]))
    if rows:
        report_sizes(rows)
        payload["bootstrap"] = rows
    if not args.skip_pipeline:
        ratio = pipeline_ratio()
        print_table(
            [{k: v for k, v in ratio.items() if k != "bootstrap_stages"}],
            "Default pipeline at n = 1e5: total time over learner fitting (target <= 1.10)",
        )
        payload["pipeline"] = ratio
    payload["load_average_at_end"] = os.getloadavg()
    write_json("bootstrap", {k: v for k, v in payload.items() if k not in ("machine", "python")})


if __name__ == "__main__":
    main()
