"""Markdown table of the contrast-test screening (paired on the cached cross-fits).

Each cell: RMSE ratio to PLS; paired squared-error difference rule minus PLS (MC SE), * beyond
2 MC SE. Contrast test at z: the rule's estimate where |estimate - PLS| > z x paired IF SE, else
PLS. Positive-part shrinkage: PLS + max(0, 1 - SE^2 / d^2) d.
"""

import sys

import numpy as np
import pandas as pd

ROWS = [
    ("v1", None, "stacked column, c = 1 (the previous default)"),
    ("v0.5", None, "stacked column, c = 0.5, no contrast test"),
    ("v0.25", None, "stacked column, c = 0.25, no contrast test"),
    ("v1", 2.0, "c = 1, contrast test z = 2"),
    ("v0.5", 1.5, "c = 0.5, contrast test z = 1.5"),
    ("v0.5", 2.0, "**c = 0.5, contrast test z = 2 (adopted)**"),
    ("v0.5", 2.5, "c = 0.5, contrast test z = 2.5"),
    ("v0.25", 2.0, "c = 0.25, contrast test z = 2"),
    ("v0.5", "js", "c = 0.5, positive-part shrinkage towards PLS"),
    ("r05", 2.0, "riesz without the column, c = 0.5, contrast test z = 2"),
]
NAMES = {
    "ksate_n200_param": "P-ATE 200",
    "ksate_n1000_param": "P-ATE 1000",
    "ksmean_n200_param": "P-mean 200",
    "ksmean_n1000_param": "P-mean 1000",
    "ksate_n200_default": "D-ATE 200",
    "ksate_n1000_default": "D-ATE 1000",
    "ld_n1000_default": "LD 1000",
    "sparse_n1000_default": "sparse 1000",
    "smooth_n500_default": "smooth 500",
    "overlap_n1000_default": "overlap 1000",
    "nsw_n1000_default": "NSW 1000",
}


def est(g, base, rule):
    e = g[f"est_{base}"].values
    if rule is None:
        return e
    pls = g.est_pls.values
    s = g[f"sed_{base}"].values
    d = e - pls
    if rule == "js":
        return pls + np.clip(1 - s**2 / np.maximum(d**2, 1e-300), 0, 1) * d
    return np.where(np.abs(d) > rule * s, e, pls)


def cellfmt(x):
    return f"{x:.3g}"


f = pd.read_csv(sys.argv[1])
cells = [c for c in NAMES if c in set(f.cell)]
head = "| rule | " + " | ".join(f"{NAMES[c]} (R={int((f.cell == c).sum())})" for c in cells) + " |"
print(head)
print("|---" * (len(cells) + 1) + "|")
for base, rule, label in ROWS:
    out = []
    for c in cells:
        g = f[f.cell == c]
        t = g.truth.values
        p2 = (g.est_pls.values - t) ** 2
        e2 = (est(g, base, rule) - t) ** 2
        diff = e2 - p2
        m, se = diff.mean(), diff.std(ddof=1) / np.sqrt(len(diff))
        star = "*" if abs(m) > 2 * se and se > 0 else ""
        out.append(f"{np.sqrt(e2.mean() / p2.mean()):.3f}; {m:+.3g} ({se:.2g}){star}")
    print(f"| {label} | " + " | ".join(out) + " |")
