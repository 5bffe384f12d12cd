"""Table of the selection-aware contrast-test screening (results/default_choice_contrast_boot.md):
per rule and cell, RMSE ratio to PLS and the paired squared-error difference in MC SEs."""
import sys
import numpy as np, pandas as pd
f = pd.read_csv(sys.argv[1])
out = {}
for cell in dict.fromkeys(f.cell):
    g = f[f.cell == cell]; t = g.truth.values; pls = g.est_pls.values; p2 = (pls - t) ** 2
    for b in ("r05", "v0.25", "v0.5"):
        e = g[f"est_{b}"].values; d = e - pls
        rules = {f"{b}": e, f"{b} IF z=2": np.where(np.abs(d) > 2 * g[f"sed_{b}"].values, e, pls)}
        for z in (1.0, 1.5, 2.0):
            rules[f"{b} boot z={z:g}"] = np.where(np.abs(d) > z * g[f"bsd_{b}"].values, e, pls)
        for name, est in rules.items():
            diff = (est - t) ** 2 - p2
            m, se = diff.mean(), diff.std(ddof=1) / np.sqrt(len(diff))
            out.setdefault(name, {})[cell.replace("_default", "D").replace("_param", "P").replace("_n", "")] = (
                f"{np.sqrt(((est - t) ** 2).mean() / p2.mean()):.3f} {m / se if se > 0 else 0:+.1f}{'*' if m > 2 * se and se > 0 else ''}")
pd.set_option("display.width", 250); pd.set_option("display.max_columns", 20)
print(pd.DataFrame(out).T.to_string())
