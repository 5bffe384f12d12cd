"""Paired table of the outcome-side screen (``screen_outcome_side.py``).

Per cell: RMSE ratio to prediction-loss stacking (PLS) and the paired squared-error difference
rule minus PLS in units of its Monte Carlo SE (* beyond +2, - below -2). Rules: "v c" the
stacked-column search at tie-break scale c (both sides searched; "z" with the contrast test at
z paired IF SEs, as in ``contrast_table.py``), "ob c" PLS's propensity with the search's outcome
weights, "pa c" the search's propensity weights with PLS's least-squares outcome weights.
Usage: python benchmarks/default_choice/outcome_side_table.py <results>/default_choice_outcome_side_seed2007.csv
"""

import sys

import numpy as np
import pandas as pd

RULES = [
    ("v0.5", 2),
    ("v0.5", None),
    ("v0.25", None),
    ("ob0.5", None),
    ("ob0.25", None),
    ("pa0.5", None),
    ("pa0.25", None),
    ("pa0.5", 2),
    ("pa0.5", 1.5),
    ("pa0.5", 1),
    ("pa0.25", 2),
    ("pa0.25", 1.5),
    ("pa0.25", 1),
]


def estimate(g, key, z):
    e = g[f"est_{key}"].to_numpy()
    if z is None:
        return e
    keep = np.abs(e - g.est_pls) > z * g[f"sed_{key}"]
    return np.where(keep, e, g.est_pls)


def paired_cell(e1, e0) -> str:
    """ "ratio; t": RMSE ratio of squared errors e1 to e0 and their paired difference in MC SEs
    (``*`` beyond +2, ``-`` below -2)."""
    diff = e1 - e0
    se = diff.std(ddof=1) / np.sqrt(len(diff))
    t = diff.mean() / se if se > 0 else 0.0
    mark = "*" if t > 2 else ("-" if t < -2 else "")
    return f"{np.sqrt(e1.mean() / e0.mean()):.3f}; {t:+.1f}{mark}"


def table(frame: pd.DataFrame) -> pd.DataFrame:
    out = {}
    for cell, g in frame.groupby("cell", sort=False):
        e0 = (g.est_pls - g.truth) ** 2
        label = f"{cell} (R={len(g)})"
        for key, z in RULES:
            name = key if z is None else f"{key}, z = {z:g}"
            out.setdefault(name, {})[label] = paired_cell((estimate(g, key, z) - g.truth) ** 2, e0)
    return pd.DataFrame(out).T


def print_tables(table_fn, paths) -> None:
    """Markdown table ``table_fn(rows)`` of every rows file in ``paths``."""
    for path in paths:
        frame = table_fn(pd.read_csv(path))
        print(f"## {path}\n")
        print("| rule | " + " | ".join(frame.columns) + " |")
        print("|---" * (len(frame.columns) + 1) + "|")
        for name, r in frame.iterrows():
            print(f"| {name} | " + " | ".join(r) + " |")
        print()


if __name__ == "__main__":
    print_tables(table, sys.argv[1:])
