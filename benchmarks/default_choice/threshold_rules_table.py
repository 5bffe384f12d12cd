"""Keep-or-shrink rules on the searched weights, applied offline to the variance-guard screen's rows.

Question (issue 10, eighth round): can a different rule for moving from PLS to the searched
weights reach the flexible-library goal at n = 200 (RMSE <= 0.92 x PLS) without a loss elsewhere?
Each rule sees, per replicate, the searched estimate e (c = 0.25, outcome side at least squares:
the default's search), PLS's estimate p, the paired IF SE s of e - p and the two rows' own IF SEs;
d = e - p. With the variance guard (searched SE <= k x PLS's SE) every rule keeps e.

- ``test z``: e when |d| > z s, else p (the default is z = 1.5, k = 1.05);
- ``positive part z``: p + max(0, 1 - (z s / d)^2) d (James-Stein-type shrinkage towards PLS);
- ``soft z``: p + sign(d) max(0, |d| - z s);
- ``variance cost a``: the default test, but a data set kept by the test alone (not by the
  guard) keeps e only when d^2 > s^2 + a (SE_e^2 - SE_p^2): the estimated squared bias removed
  (d^2 less its noise s^2) must exceed the variance the searched weights add;
- ``none``: e always (the search's own ceiling).

Rows: ``results/default_choice_variance_guard_seed{2007,2027}.csv`` (written by
``screen_variance_guard.py``). Usage::

    python benchmarks/default_choice/threshold_rules_table.py \
        benchmarks/results/default_choice_variance_guard_seed2007.csv ...
"""

import sys

import numpy as np
import pandas as pd
from outcome_side_table import paired_cell, print_tables

KEY = "pa0.25"
RULES = [
    ("test", 1.5, 1.05),
    ("test", 1.25, 1.05),
    ("test", 1.0, 1.05),
    ("test", 1.5, 1.2),
    ("positive part", 1.25, 1.05),
    ("positive part", 1.0, 1.05),
    ("positive part", 0.75, 1.05),
    ("soft", 0.5, 1.05),
    ("variance cost", 1.0, 1.05),
    ("variance cost", 2.0, 1.05),
    ("none", None, None),
]


def estimate(g: pd.DataFrame, kind: str, z: float | None, k: float | None) -> np.ndarray:
    e = g[f"est_{KEY}"].to_numpy()
    p = g.est_pls.to_numpy()
    if kind == "none":
        return e
    d, s = e - p, g[f"sed_{KEY}"].to_numpy()
    guard = g[f"se_{KEY}"].to_numpy() <= k * g.se_pls.to_numpy()
    if kind == "test":
        moved = np.where(np.abs(d) > z * s, d, 0.0)
    elif kind == "variance cost":
        cost = g[f"se_{KEY}"].to_numpy() ** 2 - g.se_pls.to_numpy() ** 2
        moved = np.where((np.abs(d) > 1.5 * s) & (d**2 > s**2 + z * cost), d, 0.0)
    elif kind == "positive part":
        with np.errstate(divide="ignore", invalid="ignore"):
            moved = np.where(d != 0, np.maximum(0.0, 1.0 - (z * s) ** 2 / d**2) * d, 0.0)
    else:
        moved = np.sign(d) * np.maximum(0.0, np.abs(d) - z * s)
    return p + np.where(guard, d, moved)


def table(frame: pd.DataFrame) -> pd.DataFrame:
    out: dict[str, dict[str, str]] = {}
    for cell, g in frame.groupby("cell", sort=False):
        e0 = (g.est_pls - g.truth) ** 2
        for kind, z, k in RULES:
            label = "a" if kind == "variance cost" else "z"
            name = kind + (f" {label} = {z:g}, guard {k:g}" if z is not None else "")
            e1 = (estimate(g, kind, z, k) - g.truth) ** 2
            out.setdefault(name, {})[f"{cell} (R={len(g)})"] = paired_cell(e1, e0)
    return pd.DataFrame(out).T


if __name__ == "__main__":
    print_tables(table, sys.argv[1:])
