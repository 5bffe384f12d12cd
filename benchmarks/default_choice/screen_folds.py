"""Screen: the number of cross-fitting folds at small n (issue 10, eighth round).

Question: with flexible libraries at n = 200, does fitting each learner on more rows (K = 10 or
20 folds instead of 5) move the target-aimed default closer to the goal of 0.92 x PLS? Common
practice for super learner stacking is to use more folds at small effective sample sizes (e.g.
V = 20 below an effective n of 500, Phillips et al. 2023, Int J Epidemiol 52(4); the thresholds
recalled from memory).

Per replicate of a grid cell (data and estimator seeds ``replicate_seeds(seed, design, n, rep)``
as in ``study_default_grid.py``), the default fit with each fold count on the same data set and
estimator seed, bootstrap 0; of each, the headline, the searched weights before the contrast
test and PLS. Rows: ``results/screen_folds_{design}_{n}_{libraries}_{seed}.csv``; the printed
table is recorded in ``results/default_choice_folds.md``.

Usage: python benchmarks/default_choice/screen_folds.py DESIGN N LIBRARIES SEED REPS JOBS 5,10,20
"""

import os

for _v in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_v, "1")
import sys
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
from joblib import Parallel, delayed

from screen_repeats import OUT, ROWS, fit_rows


def one(design: str, n: int, libraries: str, rep: int, seed: int, counts: list[int]) -> dict:
    return fit_rows(design, n, libraries, rep, seed, {f"k{k}": {"folds": k} for k in counts})


def table(df: pd.DataFrame, counts: list[int]) -> str:
    """Markdown rows: RMSE, bias, SD of each row per fold count, and the ratios to PLS."""
    t = df["truth"]
    lines = [
        "| folds | row | RMSE | bias | SD | RMSE / PLS (same folds) | paired sq. error diff vs PLS (MC SE) |",
        "|---|---|---|---|---|---|---|",
    ]
    for k in counts:
        pls = (df[f"pls_k{k}"] - t) ** 2
        for key in ROWS:
            err = df[f"{key}_k{k}"] - t
            d = err**2 - pls
            se = d.std(ddof=1) / np.sqrt(len(d))
            lines.append(
                f"| {k} | {key} | {np.sqrt((err**2).mean()):.3f} | {err.mean():.3f} | "
                f"{err.std(ddof=1):.3f} | {np.sqrt((err**2).mean() / pls.mean()):.3f} | "
                f"{d.mean():+.3g} ({se:.2g}) |"
            )
    return "\n".join(lines)


if __name__ == "__main__":
    design, n, lib = sys.argv[1], int(sys.argv[2]), sys.argv[3]
    seed, reps, jobs = int(sys.argv[4]), int(sys.argv[5]), int(sys.argv[6])
    counts = [int(x) for x in sys.argv[7].split(",")]
    path = OUT / f"screen_folds_{design}_{n}_{lib}_{seed}.csv"
    if path.exists():
        frame = pd.read_csv(path)
    else:
        rows = Parallel(n_jobs=jobs)(
            delayed(one)(design, n, lib, r, seed, counts) for r in range(reps)
        )
        frame = pd.DataFrame(rows)
        frame.to_csv(path, index=False)
    print(table(frame, counts))
