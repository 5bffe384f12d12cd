"""Paired table of the fold-wise contrast screen (``screen_fold_contrast.py``): RMSE ratio to
PLS per cell, * / - beyond +/- 2 MC SE, for each search kept when the IF test (z = 2), the
fold t-test (|t| > 2.776, the 0.975 quantile of t with 4 df, or 4.6) or both reject; "keep" is
the share of data sets where both reject. Usage:
python benchmarks/default_choice/fold_contrast_table.py <results>/default_choice_fold_contrast_seed2007.csv
"""

import sys, numpy as np, pandas as pd


def rules(g):
    K = 5
    out, stat = {}, {}
    for k in ("r05", "v0.5", "v0.25"):
        dk = g[[f"d{j}_{k}" for j in range(K)]].to_numpy()
        d = g[f"est_{k}"] - g.est_pls
        t = dk.mean(1) / (dk.std(1, ddof=1) / np.sqrt(K))
        zi = np.abs(d) / g[f"sed_{k}"]
        stat[k] = zi, t
        out[f"{k} raw"] = g[f"est_{k}"]
        out[f"{k} IF z2"] = np.where(zi > 2, g[f"est_{k}"], g.est_pls)
        for c in (2.776, 4.6):
            out[f"{k} foldt {c}"] = np.where(np.abs(t) > c, g[f"est_{k}"], g.est_pls)
        out[f"{k} IFz2&foldt2.776"] = np.where(
            (zi > 2) & (np.abs(t) > 2.776), g[f"est_{k}"], g.est_pls
        )
        out[f"{k} keep"] = (zi > 2) & (np.abs(t) > 2.776)
    # cascade
    v = out["v0.5 IF z2"]
    zi, t = stat["r05"]
    out["cascade r05(IFz2&t)->v0.5 z2"] = np.where((zi > 2) & (np.abs(t) > 2.776), g.est_r05, v)
    return out


for f in sys.argv[1:]:
    d = pd.read_csv(f)
    print("##", f)
    tab = {}
    for cell, g in d.groupby("cell", sort=False):
        e0 = (g.est_pls - g.truth) ** 2
        for name, est in rules(g).items():
            if name.endswith("keep"):
                tab.setdefault(name, {})[cell] = f"{np.mean(est):.2f}"
                continue
            e1 = (np.asarray(est) - g.truth) ** 2
            diff = e1 - e0
            m, se = diff.mean(), diff.std(ddof=1) / np.sqrt(len(g))
            star = "*" if m > 2 * se else ("-" if m < -2 * se else " ")
            tab.setdefault(name, {})[cell] = f"{np.sqrt(e1.mean() / e0.mean()):.3f}{star}"
    print(pd.DataFrame(tab).T.to_string())
