"""Screen: repeated cross-fitting (``repeats`` = R fold assignments, pair tables and estimates
combined by the median) as a way to cut the weight search's selection noise at small n
(issue 10, seventh round).

Per replicate of a grid cell (data and estimator seeds ``replicate_seeds(seed, design, n, rep)``
as in ``study_default_grid.py``), the default fit with repeats = 1 and with repeats = R on the
same data set and estimator seed, bootstrap 0; of each, the headline, the searched weights
before the contrast test and PLS. Squared errors are paired within the replicate. Rows:
``results/screen_repeats_{design}_{n}_{libraries}_{seed}.csv``; ``--table`` writes the paired
table of every such file to ``results/default_choice_repeats_table.md`` (the reading is in
``results/default_choice_repeats.md``).

Usage: python benchmarks/default_choice/screen_repeats.py DESIGN N LIBRARIES SEED REPS [R]
       python benchmarks/default_choice/screen_repeats.py --table
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

from stackdr import BlendEstimator
from stackdr.reporting import markdown_table
from stackdr.search import MAIN, PLS, UNTESTED
from stackdr.studies import build_libraries, get_design, replicate_seeds

OUT = Path(__file__).resolve().parents[1] / "results"
ROWS = {"main": MAIN, "untested": UNTESTED, "pls": PLS}


def fit_rows(design: str, n: int, libraries: str, rep: int, seed: int, variants: dict) -> dict:
    """One replicate: the default fit once per variant (suffix -> extra estimator settings) on
    the same data set and estimator seed, bootstrap 0; columns ``{row}_{suffix}`` for the
    headline, the searched weights before the test and PLS."""
    seeds = replicate_seeds(seed, design, n, rep)
    data = get_design(design).simulate(n, np.random.default_rng(seeds.data))
    out = {"rep": rep, "truth": data.truth}
    for suffix, settings in variants.items():
        plib, olib = build_libraries(libraries)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            res = BlendEstimator(
                data.target,
                plib,
                olib,
                seed=int(seeds.estimator),
                bootstrap=0,
                n_jobs=1,
                **settings,
            ).fit(data.frame, data.treatment, data.outcome, data.covariates)
        by = {e.name: e.estimate for e in res.estimators}
        for key, name in ROWS.items():
            out[f"{key}_{suffix}"] = by[name]
    return out


def one(design: str, n: int, libraries: str, rep: int, seed: int, repeats: int) -> dict:
    return fit_rows(
        design, n, libraries, rep, seed, {f"r{r}": {"repeats": r} for r in (1, repeats)}
    )


def paired(df: pd.DataFrame, a: str, b: str) -> tuple[float, str]:
    """RMSE ratio of column a to b and their paired squared-error difference (MC SE)."""
    t = df["truth"].to_numpy()
    da, db = (df[a] - t) ** 2, (df[b] - t) ** 2
    d = da - db
    se = d.std(ddof=1) / np.sqrt(len(d))
    star = "*" if abs(d.mean()) > 2 * se else ""
    return float(np.sqrt(da.mean() / db.mean())), f"{d.mean():+.3g} ({se:.2g}){star}"


COMPARISONS = [
    ("main_r1", "pls_r1", "default vs PLS, R = 1"),
    ("main_rR", "pls_rR", "default vs PLS, R"),
    ("untested_r1", "pls_r1", "search before the test vs PLS, R = 1"),
    ("untested_rR", "pls_rR", "search before the test vs PLS, R"),
    ("main_rR", "main_r1", "default, R vs R = 1"),
    ("pls_rR", "pls_r1", "PLS, R vs R = 1"),
]


def comparisons(df: pd.DataFrame, R: int):
    """(label, RMSE ratio, paired difference) of every comparison, R filled in."""
    for a, b, label in COMPARISONS:
        yield (label, *paired(df, a.replace("rR", f"r{R}"), b.replace("rR", f"r{R}")))


def table() -> pd.DataFrame:
    rows = []
    for path in sorted(OUT.glob("screen_repeats_*.csv")):
        design, n, libraries, seed = path.stem.removeprefix("screen_repeats_").rsplit("_", 3)
        df = pd.read_csv(path)
        R = max(int(c.split("_r")[1]) for c in df.columns if c.startswith("main_r"))
        for label, ratio, diff in comparisons(df, R):
            rows.append(
                {
                    "libraries": libraries,
                    "design": design,
                    "n": int(n),
                    "seed": int(seed),
                    "reps": len(df),
                    "R": R,
                    "comparison": label,
                    "RMSE ratio": round(ratio, 3),
                    "paired sq. error diff (MC SE)": diff,
                }
            )
    return pd.DataFrame(rows)


if __name__ == "__main__":
    if sys.argv[1:] == ["--table"]:
        frame = table()
        text = markdown_table(frame)
        print(text)
        (OUT / "default_choice_repeats_table.md").write_text(text + "\n")
        sys.exit(0)
    design, n, libraries = sys.argv[1], int(sys.argv[2]), sys.argv[3]
    seed, reps = int(sys.argv[4]), int(sys.argv[5])
    repeats = int(sys.argv[6]) if len(sys.argv) > 6 else 3
    path = OUT / f"screen_repeats_{design}_{n}_{libraries}_{seed}.csv"
    rows = Parallel(n_jobs=2)(
        delayed(one)(design, n, libraries, r, seed, repeats) for r in range(reps)
    )
    df = pd.DataFrame(rows)
    df.to_csv(path, index=False)
    for label, ratio, diff in comparisons(df, repeats):
        print(f"{label}: RMSE ratio {ratio:.3f}, paired diff {diff}")
