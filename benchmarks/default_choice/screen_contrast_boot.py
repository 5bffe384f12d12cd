"""Selection-aware threshold for the contrast test (research only).

Per cached replicate: PLS, the riesz search without the column (c = 0.5) and the stacked-column
searches (c = 0.25, 0.5), their paired IF SE of the difference from PLS, and the SD of that
difference over M reweighting replicates that rerun the search on the reweighted pair table
(stacking weights, tolerances and masks held at full-sample values)."""
from __future__ import annotations
import os
for _v in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_v, "1")
import argparse, dataclasses, sys, warnings  # noqa: E402
import numpy as np  # noqa: E402
from screen_contrast import riesz_analysis, run_cached  # noqa: E402
from stackdr.estimator import Analysis, noise_floor_function  # noqa: E402
from stackdr.pairtable import blend_estimate, pair_rows, pair_standard_errors, pair_table  # noqa: E402
from stackdr.selection import SearchSettings, run_search  # noqa: E402

M = 50


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
        H = np.stack([pair_rows(inp_aug, k) for k in range(K1 + 1)], axis=1)  # n, K1+1, K2
        d = inp.d
        anchor = np.eye(K1 + 1)[K1]
        # searches: name -> (Psi selector, settings, anchors, tolerance, masks)
        specs = {}
        s05 = SearchSettings(blend="riesz", tie_break=True, tie_break_scale=0.5)
        specs["r05"] = (slice(0, K1), s05, (an.stack_alpha, an.stack_beta), noise_floor_function(an, s05), an.masks)
        for c in (0.25, 0.5):
            st = SearchSettings(blend="riesz", tie_break=True, tie_break_scale=c)
            an_aug = Analysis([inp_aug], Psi_aug, pair_standard_errors(inp_aug), an.losses, anchor, an.stack_beta, (None, None), st)
            specs[f"v{c:g}"] = (slice(0, K1 + 1), st, (anchor, an.stack_beta), noise_floor_function(an_aug, st), (None, None))
        out = {"cell": cell, "rep": rep, "truth": float(data.truth)}
        pls = blend_estimate(inp_aug, anchor, an.stack_beta, "riesz")
        out["est_pls"] = pls.estimate
        rng = np.random.default_rng([rep, 77])
        W = rng.multinomial(n, np.full(n, 1.0 / n), size=M).astype(float)  # M x n
        num = np.einsum("bi,ikj->bkj", W, H)
        Psi_b = num / (W @ d)[:, None, None]
        for name, (sel, st, anchors, tol, masks) in specs.items():
            search = run_search(Psi_aug[sel], st, anchors=anchors, tolerance=tol, masks=masks)
            a, b = search.alpha, search.beta
            a_full = np.zeros(K1 + 1); a_full[sel] = a
            f = blend_estimate(inp_aug, a_full, b, "riesz")
            out[f"est_{name}"] = f.estimate
            out[f"sed_{name}"] = float(np.sqrt(np.mean((f.influence - pls.influence) ** 2) / n))
            diffs = []
            for bb in range(M):
                sb = run_search(Psi_b[bb][sel], st, anchors=anchors, tolerance=tol, masks=masks)
                diffs.append(float(sb.alpha @ Psi_b[bb][sel] @ sb.beta - Psi_b[bb][K1] @ an.stack_beta))
            out[f"bsd_{name}"] = float(np.std(diffs, ddof=1))
    return out


def main():
    p = argparse.ArgumentParser()
    p.add_argument("--seed", type=int, default=2007)
    args = p.parse_args()
    run_cached(args.seed, row, f"contrast_boot_seed{args.seed}.csv")


if __name__ == "__main__":
    sys.exit(main())
