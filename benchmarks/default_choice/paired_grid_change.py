"""Paired comparison of two runs of ``study_default_grid.py`` on the same study seed (same data
sets, folds and learner fits; only the package code differs): per cell, the new headline minus
the old headline and each minus PLS, as paired squared-error differences with MC SEs, plus RMSE
ratios to PLS. Usage:

    python benchmarks/default_choice/paired_grid_change.py OLD_FOLDER NEW_FOLDER
"""

import sqlite3
import sys
from pathlib import Path

import numpy as np
import pandas as pd

MAIN, PLS = "target-aimed stacking", "prediction-loss stacking"


def rows(path: Path) -> pd.DataFrame:
    with sqlite3.connect(path) as con:
        f = pd.read_sql("select rep, estimator, estimate, truth from results", con)
    return f.pivot_table(index="rep", columns="estimator", values="estimate").join(
        f.groupby("rep")["truth"].first()
    )


def paired(e1, e0):
    d = e1 - e0
    se = d.std(ddof=1) / np.sqrt(len(d))
    t = d.mean() / se if se > 0 else 0.0
    mark = "*" if t > 2 else ("-" if t < -2 else "")
    return f"{d.mean():+.3g} ({se:.2g}), {t:+.1f}{mark}"


def table(old: Path, new: Path) -> pd.DataFrame:
    out = []
    for p in sorted(new.glob("grid_*.sqlite")):
        q = old / p.name
        if not q.exists():
            continue
        a, b = rows(q), rows(p)
        reps = a.index.intersection(b.index)
        a, b = a.loc[reps], b.loc[reps]
        assert np.allclose(a[PLS], b[PLS]), f"{p.name}: PLS differs, not the same fits"
        err = {k: (f[MAIN] - f["truth"]) ** 2 for k, f in (("old", a), ("new", b))}
        pls = (b[PLS] - b["truth"]) ** 2
        out.append(
            {
                "cell": p.stem.replace("grid_", ""),
                "pairs": len(reps),
                "new - old": paired(err["new"], err["old"]),
                "new - PLS": paired(err["new"], pls),
                "old - PLS": paired(err["old"], pls),
                "ratio new": f"{np.sqrt(err['new'].mean() / pls.mean()):.3f}",
                "ratio old": f"{np.sqrt(err['old'].mean() / pls.mean()):.3f}",
            }
        )
    return pd.DataFrame(out)


if __name__ == "__main__":
    t = table(Path(sys.argv[1]), Path(sys.argv[2]))
    print("| " + " | ".join(t.columns) + " |")
    print("|---" * len(t.columns) + "|")
    for _, r in t.iterrows():
        print("| " + " | ".join(str(v) for v in r) + " |")
