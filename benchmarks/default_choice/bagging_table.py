"""Paired table of the bagging screen (``screen_bagging.py``): RMSE ratio to PLS per cell for the
default rule, the untested column search, the bagged weights with and without the contrast test,
the mean of the bagged replicate estimates, and the search without the column (plain and
bagged). * = paired squared-error difference above PLS by more than 2 MC SE, - = below.
Usage: python benchmarks/default_choice/bagging_table.py <results>/default_choice_bagging_seed2007.csv
"""
import sys
import numpy as np, pandas as pd
def rule(fr, est, sed, z):
    e = fr[est].to_numpy(); p = fr.est_pls.to_numpy()
    if sed is None: return e
    keep = np.abs(e - p) > z * fr[sed].to_numpy()
    return np.where(keep, e, p)
for path in sys.argv[1:]:
    fr = pd.read_csv(path)
    print(path)
    cands = {
        "default(v0.5,z2)": ("est_v0.5", "sed_v0.5", 2),
        "v0.5 untested": ("est_v0.5", None, 0),
        "bag v0.5": ("est_bag_v0.5", None, 0),
        "bag v0.5 z2": ("est_bag_v0.5", "sed_bag_v0.5", 2),
        "bag v0.5 z1.5": ("est_bag_v0.5", "sed_bag_v0.5", 1.5),
        "bage v0.5": ("est_bage_v0.5", None, 0),
        "r05": ("est_r05", None, 0),
        "bag r05": ("est_bag_r05", None, 0),
        "bag r05 z2": ("est_bag_r05", "sed_bag_r05", 2),
    }
    rows = []
    for cell, c in fr.groupby("cell", sort=False):
        t = c.truth.to_numpy(); ep = (c.est_pls.to_numpy() - t) ** 2
        row = {"cell": cell, "n": len(c)}
        for name, (e, s, z) in cands.items():
            v = rule(c, e, s, z); se2 = (v - t) ** 2; dd = se2 - ep
            flag = "*" if dd.mean() > 2 * dd.std(ddof=1) / np.sqrt(len(dd)) else (" -" if dd.mean() < -2 * dd.std(ddof=1) / np.sqrt(len(dd)) else "")
            row[name] = f"{np.sqrt(se2.mean() / ep.mean()):.3f}{flag}"
        rows.append(row)
    print(pd.DataFrame(rows).to_string(index=False))
