"""Run the benchmark scripts, each printing its table and writing its JSON file.

The scripts: bench_pairtable.py, bench_solvers.py, bench_bootstrap.py and bench_slow_paths.py.
The Monte Carlo studies (coverage_study.py, study_kang_schafer.py) run for hours and are started
on their own.

``--quick`` runs each script with its small options (a check that they work, not numbers to
keep): bench_pairtable and bench_solvers with their ``--quick``, bench_bootstrap at n = 1e4
without the pipeline part, bench_slow_paths with 20 replicates. Its JSON files go to a scratch
folder (``--results``, default ``stackdr-bench-quick`` in the system temporary folder) so the
numbers recorded in benchmarks/results stay as they are.

Usage: .venv/bin/python benchmarks/run_all.py [--quick] [--results DIR] [NAME ...]
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent

# Script name: (arguments of a full run, arguments of a quick run).
SCRIPTS = {
    "bench_pairtable": ([], ["--quick"]),
    "bench_solvers": ([], ["--quick"]),
    "bench_bootstrap": ([], ["--sizes", "10000", "--skip-pipeline"]),
    "bench_slow_paths": ([], ["--replicates", "20", "--label", "quick"]),
}


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="small sizes, scratch JSON")
    parser.add_argument("--results", type=Path, help="folder for the JSON files")
    parser.add_argument("names", nargs="*", help=f"some of {', '.join(SCRIPTS)} (default all)")
    args = parser.parse_args()
    unknown = [name for name in args.names if name not in SCRIPTS]
    if unknown:
        parser.error(f"unknown benchmark {unknown[0]!r}; choose from {', '.join(SCRIPTS)}")
    results = args.results
    if results is None and args.quick:
        results = Path(tempfile.gettempdir()) / "stackdr-bench-quick"
    env = dict(os.environ)
    if results is not None:
        env["STACKDR_BENCH_RESULTS"] = str(results.resolve())
    failed = []
    for name in args.names or SCRIPTS:
        full, quick = SCRIPTS[name]
        command = [sys.executable, str(HERE / f"{name}.py"), *(quick if args.quick else full)]
        print(f"\n=== {name} {' '.join(command[2:])}", flush=True)
        start = time.perf_counter()
        code = subprocess.run(command, env=env, cwd=HERE.parent).returncode
        print(f"=== {name}: exit {code} after {time.perf_counter() - start:.0f} s", flush=True)
        if code != 0:
            failed.append(name)
    if failed:
        print(f"\nfailed: {', '.join(failed)}", file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
