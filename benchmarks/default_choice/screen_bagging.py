"""Bagged weights screen (research only, harness as in README.md of this folder): per cached
replicate, the searched weights averaged over M = 100 (env BAG_M) reweighting replicates that
rerun the search (Breiman 1996 bagging; Efron 2014 bootstrap smoothing), evaluated on the full
sample, with the paired IF SE of the difference from PLS for the contrast test; for the
stacked-column search (c = 0.5) and the search without the column. Run on seeds 2007 and 2027;
stopped after the four parametric Kang-Schafer cells, which already rejected every variant
(``bagging_table.py``; DEVELOPERS.md)."""
from __future__ import annotations
import os
for _v in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_v, "1")
import sys, warnings
import numpy as np
from screen_contrast import cached_main, riesz_analysis
from screen_contrast_boot import column_setup
from stackdr.pairtable import blend_estimate
from stackdr.selection import run_search

M = int(os.environ.get("BAG_M", "100"))


def row(cell, rep):
    data, res = riesz_analysis(cell, rep)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        an = res.analysis
        n = an.inputs[0].n
        K1 = an.inputs[0].shape[0]
        inp_aug, Psi_aug, specs, pls, Psi_b = column_setup(an, (0.5,), np.random.default_rng([rep, 91]), M)
        out = {"cell": cell, "rep": rep, "truth": float(data.truth)}
        out["est_pls"] = pls.estimate
        for name, (sel, st, anchors, tol, masks) in specs.items():
            search = run_search(Psi_aug[sel], st, anchors=anchors, tolerance=tol, masks=masks)
            a_full = np.zeros(K1 + 1); a_full[sel] = search.alpha
            f = blend_estimate(inp_aug, a_full, search.beta, "riesz")
            out[f"est_{name}"] = f.estimate
            out[f"sed_{name}"] = float(np.sqrt(np.mean((f.influence - pls.influence) ** 2) / n))
            A = np.zeros(K1 + 1); B = np.zeros_like(search.beta); reps_e = []
            for bb in range(M):
                sb = run_search(Psi_b[bb][sel], st, anchors=anchors, tolerance=tol, masks=masks)
                A[sel] += sb.alpha / M; B += sb.beta / M
                reps_e.append(float(sb.alpha @ Psi_b[bb][sel] @ sb.beta))
            g = blend_estimate(inp_aug, A, B, "riesz")
            out[f"est_bag_{name}"] = g.estimate
            out[f"sed_bag_{name}"] = float(np.sqrt(np.mean((g.influence - pls.influence) ** 2) / n))
            out[f"est_bage_{name}"] = float(np.mean(reps_e))
    return out


def main():
    cached_main(row, "bagging")


if __name__ == "__main__":
    sys.exit(main())
