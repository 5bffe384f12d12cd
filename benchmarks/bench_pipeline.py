"""The whole job, end to end: wall and CPU time of `BlendEstimator.fit` with the default
libraries, alone and with a second identical run at the same time, and what each learner costs.

Each run is a separate process (``--worker``), so the timings include everything a user waits
for and two runs at once really compete for the machine. The data: ``--covariates`` standard
normal covariates (half of them enter the propensity and the outcome non-linearly), simulated
with a fixed seed, so every run fits the same rows.

Prints a table and writes ``results/pipeline.json``. Examples::

    python benchmarks/bench_pipeline.py --sizes 10000 100000 --jobs 1 2 --bootstrap 1000
    python benchmarks/bench_pipeline.py --sizes 20000 --jobs 1 --bootstrap 0 --concurrent
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from common import print_table, write_json  # noqa: E402


def simulate(n: int, p: int, seed: int = 2026):
    """Covariates, treatment and outcome of a confounded design with a known effect of 1."""
    from scipy.special import expit

    rng = np.random.default_rng(seed)
    X = rng.standard_normal((n, p))
    k = max(1, p // 2)
    score = 0.6 * X[:, 0] - 0.4 * X[:, 1] ** 2 + 0.3 * np.sin(2 * X[:, :k].sum(axis=1))
    A = rng.binomial(1, np.clip(expit(score), 0.03, 0.97)).astype(float)
    Y = X[:, :k].sum(axis=1) + np.tanh(X[:, 0] * X[:, 1]) + A + rng.standard_normal(n)
    return X, A, Y


def worker(n: int, p: int, jobs: int, bootstrap: int, threads: int | None) -> dict:
    """One fit in this process; returns its timings and per-learner fit seconds."""
    import warnings

    from stackdr import BlendEstimator

    X, A, Y = simulate(n, p)
    start_wall = time.perf_counter()
    start_cpu = time.process_time()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = BlendEstimator(
            "ate", bootstrap=bootstrap, n_jobs=jobs, threads=threads, seed=0
        ).fit(X, A, Y)
    usage = resource.getrusage(resource.RUSAGE_CHILDREN)
    return {
        "estimate": result.estimate,
        "wall": time.perf_counter() - start_wall,
        "cpu_self": time.process_time() - start_cpu,
        "cpu_children": usage.ru_utime + usage.ru_stime,
        "peak_rss_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
        "timings": {k: float(v) for k, v in result.timings.items()},
        "fit_seconds": {k: float(v) for k, v in result.crossfit.fit_seconds.items()},
    }


def run_processes(count: int, args: list[str]) -> list[dict]:
    """Start ``count`` identical worker processes at once; their results."""
    command = [sys.executable, __file__, "--worker", *args]
    procs = [subprocess.Popen(command, stdout=subprocess.PIPE, text=True) for _ in range(count)]
    out = []
    for proc in procs:
        stdout, _ = proc.communicate()
        if proc.returncode != 0:
            raise RuntimeError(f"worker failed with exit code {proc.returncode}")
        out.append(json.loads(stdout.strip().splitlines()[-1]))
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", type=int, nargs="+", default=[10_000, 100_000])
    parser.add_argument("--jobs", type=int, nargs="+", default=[1, 2])
    parser.add_argument("--covariates", type=int, default=10)
    parser.add_argument("--bootstrap", type=int, default=1000)
    parser.add_argument("--threads", type=int, default=None)
    parser.add_argument(
        "--concurrent", action="store_true", help="also time two runs started together"
    )
    parser.add_argument("--worker", action="store_true", help=argparse.SUPPRESS)
    parser.add_argument("--n", type=int, help=argparse.SUPPRESS)
    parser.add_argument("--j", type=int, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.worker:
        print(json.dumps(worker(args.n, args.covariates, args.j, args.bootstrap, args.threads)))
        return

    rows, learners = [], []
    for n in args.sizes:
        for jobs in args.jobs:
            common = ["--n", str(n), "--j", str(jobs), "--covariates", str(args.covariates)]
            common += ["--bootstrap", str(args.bootstrap)]
            if args.threads is not None:
                common += ["--threads", str(args.threads)]
            for together in (1, 2) if args.concurrent else (1,):
                results = run_processes(together, common)
                first = results[0]
                rows.append(
                    {
                        "n": n,
                        "jobs": jobs,
                        "runs at once": together,
                        "wall s (each)": " / ".join(f"{r['wall']:.1f}" for r in results),
                        "cpu s": round(first["cpu_self"] + first["cpu_children"], 1),
                        "fits s": round(first["timings"].get("cross_fit", float("nan")), 1),
                        "bootstrap s": round(first["timings"].get("bootstrap", 0.0), 1),
                        "peak MB": round(first["peak_rss_mb"]),
                        "same estimate": len({r["estimate"] for r in results}) == 1,
                        "runs": results,
                    }
                )
                if together == 1:
                    total = sum(first["fit_seconds"].values())
                    for key, secs in sorted(first["fit_seconds"].items(), key=lambda kv: -kv[1]):
                        learners.append(
                            {
                                "n": n,
                                "jobs": jobs,
                                "learner": key,
                                "fit s": round(secs, 2),
                                "share": f"{secs / total:.0%}",
                            }
                        )
    print_table([{k: v for k, v in r.items() if k != "runs"} for r in rows], "End to end, per run")
    print()
    print_table(learners, "Fit time per learner (one run alone)")
    write_json("pipeline", {"settings": vars(args), "runs": rows, "learners": learners})


if __name__ == "__main__":
    main()
