"""Shared benchmark plumbing: timing, peak memory, table printing and JSON output."""

from __future__ import annotations

import json
import os
import platform
import time
import tracemalloc
from pathlib import Path

# Where the JSON files go: benchmarks/results, or the folder named by STACKDR_BENCH_RESULTS
# (run_all.py --quick points it elsewhere so small runs do not replace the recorded numbers).
RESULTS = Path(
    os.environ.get("STACKDR_BENCH_RESULTS") or Path(__file__).resolve().parent / "results"
)


def measure(fn, *args, **kwargs):
    """Run fn once; return (result, seconds, peak traced MiB). numpy reports its buffers to
    tracemalloc, so the peak covers array allocations made inside fn."""
    tracemalloc.start()
    start = time.perf_counter()
    out = fn(*args, **kwargs)
    seconds = time.perf_counter() - start
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    return out, seconds, peak / 2**20


def print_table(rows: list[dict], title: str) -> None:
    print(f"\n{title}")
    if not rows:
        return
    cols = list(rows[0])
    widths = [max(len(c), *(len(_fmt(r[c])) for r in rows)) for c in cols]
    print("  ".join(c.rjust(w) for c, w in zip(cols, widths)))
    for r in rows:
        print("  ".join(_fmt(r[c]).rjust(w) for c, w in zip(cols, widths)))


def _fmt(v) -> str:
    if isinstance(v, float):
        return f"{v:.4g}"
    return str(v)


def write_json(name: str, payload: dict) -> Path:
    RESULTS.mkdir(parents=True, exist_ok=True)
    payload = {"machine": platform.platform(), "python": platform.python_version(), **payload}
    path = RESULTS / f"{name}.json"
    path.write_text(json.dumps(payload, indent=2))
    print(f"\nwrote {path}")
    return path
