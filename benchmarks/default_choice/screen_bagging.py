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
import argparse, dataclasses, sys, warnings
import numpy as np
from screen_contrast import riesz_analysis, run_cached
from stackdr.estimator import Analysis, noise_floor_function
from stackdr.pairtable import blend_estimate, pair_rows, pair_standard_errors, pair_table
from stackdr.selection import SearchSettings, run_search

M = int(os.environ.get("BAG_M", "50"))


def row(cell, rep):
    data, res = riesz_analysis(cell, rep)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        an = res.analysis
        inp = an.inputs[0]
        n = inp.n
        K1 = inp.shape[0]
        pi_pls = inp.pi @ an.stack_alpha
        P_aug = [np.hstack([P, np.asarray(t(pi_pls[:, None]), dtype=float)]) for P, t in zip(inp.P, inp.transforms)]
        inp_aug = dataclasses.replace(inp, P=P_aug, pi=np.hstack([inp.pi, pi_pls[:, None]]))
        Psi_aug = pair_table(inp_aug)
        H = np.stack([pair_rows(inp_aug, k) for k in range(K1 + 1)], axis=1)
        d = inp.d
        anchor = np.eye(K1 + 1)[K1]
        specs = {}
        s05 = SearchSettings(blend="riesz", tie_break=True, tie_break_scale=0.5)
        specs["r05"] = (slice(0, K1), s05, (an.stack_alpha, an.stack_beta), noise_floor_function(an, s05), an.masks)
        st = SearchSettings(blend="riesz", tie_break=True, tie_break_scale=0.5)
        an_aug = Analysis([inp_aug], Psi_aug, pair_standard_errors(inp_aug), an.losses, anchor, an.stack_beta, (None, None), st)
        specs["v0.5"] = (slice(0, K1 + 1), st, (anchor, an.stack_beta), noise_floor_function(an_aug, st), (None, None))
        out = {"cell": cell, "rep": rep, "truth": float(data.truth)}
        pls = blend_estimate(inp_aug, anchor, an.stack_beta, "riesz")
        out["est_pls"] = pls.estimate
        rng = np.random.default_rng([rep, 91])
        W = rng.multinomial(n, np.full(n, 1.0 / n), size=M).astype(float)
        num = np.einsum("bi,ikj->bkj", W, H)
        Psi_b = num / (W @ d)[:, None, None]
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
    p = argparse.ArgumentParser()
    p.add_argument("--seed", type=int, default=2007)
    args = p.parse_args()
    run_cached(args.seed, row, f"bagging_seed{args.seed}.csv")


if __name__ == "__main__":
    sys.exit(main())
