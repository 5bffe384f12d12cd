"""Paired table of the variance-guard screen (``screen_variance_guard.py``).

Rules on the searched weights "pa c" (c = tie-break scale): "test z" keeps them when
|est - est_PLS| > z x paired SE (the current default at c = 0.25, z = 1.5); "none" always keeps
them; "guard k" keeps them when their IF SE is at most k x PLS's, else PLS; "guard k + test z"
keeps them when either holds. Same layout as ``outcome_side_table.py``.
Usage: python benchmarks/default_choice/variance_guard_table.py <results>/default_choice_variance_guard_seed2007.csv
"""

import sys

import numpy as np
import pandas as pd
from outcome_side_table import paired_cell, print_tables

RULES = [
    ("pa0.25", "test", 1.5, None),
    ("pa0.25", "none", None, None),
    ("pa0.25", "guard", None, 1.0),
    ("pa0.25", "guard", None, 1.05),
    ("pa0.25", "guard", None, 1.1),
    ("pa0.25", "guard+test", 1.5, 1.0),
    ("pa0.25", "guard+test", 1.5, 1.05),
    ("pa0.5", "guard", None, 1.0),
    ("pa0.5", "guard+test", 1.5, 1.0),
]


def estimate(g, key, kind, z, k):
    e = g[f"est_{key}"].to_numpy()
    p = g.est_pls.to_numpy()
    test = np.abs(e - p) > (z or 0) * g[f"sed_{key}"].to_numpy()
    guard = g[f"se_{key}"].to_numpy() <= (k or 0) * g.se_pls.to_numpy()
    keep = {"test": test, "none": np.ones_like(test), "guard": guard, "guard+test": guard | test}[
        kind
    ]
    return np.where(keep, e, p), keep.mean()


def table(frame):
    out = {}
    for cell, g in frame.groupby("cell", sort=False):
        e0 = (g.est_pls - g.truth) ** 2
        label = f"{cell} (R={len(g)})"
        for key, kind, z, k in RULES:
            est, kept = estimate(g, key, kind, z, k)
            name = f"{key} {kind}" + (f" z={z:g}" if z else "") + (f" k={k:g}" if k else "")
            out.setdefault(name, {})[label] = (
                f"{paired_cell((est - g.truth) ** 2, e0)}; kept {kept:.2f}"
            )
    return pd.DataFrame(out).T


if __name__ == "__main__":
    print_tables(table, sys.argv[1:])
