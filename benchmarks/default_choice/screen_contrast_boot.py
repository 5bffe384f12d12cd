"""Selection-aware threshold for the contrast test (research only).

Per cached replicate: PLS, the riesz search without the column (c = 0.5) and the stacked-column
searches (c = 0.25, 0.5), their paired IF SE of the difference from PLS, and the SD of that
difference over M reweighting replicates that rerun the search on the reweighted pair table
(stacking weights, tolerances and masks held at full-sample values)."""
from __future__ import annotations
import os
for _v in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_v, "1")
import dataclasses, sys, warnings  # noqa: E402
import numpy as np  # noqa: E402
from screen_contrast import cached_main, riesz_analysis  # noqa: E402
from stackdr.estimator import Analysis, noise_floor_function  # noqa: E402
from stackdr.pairtable import blend_estimate, pair_rows, pair_standard_errors, pair_table  # noqa: E402
from stackdr.selection import SearchSettings, run_search  # noqa: E402

M = 50


def column_setup(an, scales, rng, replicates):
    """Shared by the selection-aware and bagging screens: the pair table with the PLS stacked
    column appended, the searches (name -> (Psi selector, settings, anchors, tolerance, masks):
    the riesz search without the column at c = 0.5, and the stacked-column search at each c of
    ``scales``), the PLS fit, and ``replicates`` multinomial reweightings of the pair table.
    Returns (inp_aug, Psi_aug, specs, pls, Psi_b)."""
    inp = an.inputs[0]
    n = inp.n
    K1 = inp.shape[0]
    pi_pls = inp.pi @ an.stack_alpha
    P_aug = [np.hstack([P, np.asarray(t(pi_pls[:, None]), dtype=float)]) for P, t in zip(inp.P, inp.transforms)]
    inp_aug = dataclasses.replace(inp, P=P_aug, pi=np.hstack([inp.pi, pi_pls[:, None]]))
    Psi_aug = pair_table(inp_aug)
    H = np.stack([pair_rows(inp_aug, k) for k in range(K1 + 1)], axis=1)  # n, K1+1, K2
    anchor = np.eye(K1 + 1)[K1]
    specs = {}
    s05 = SearchSettings(blend="riesz", tie_break=True, tie_break_scale=0.5)
    specs["r05"] = (slice(0, K1), s05, (an.stack_alpha, an.stack_beta), noise_floor_function(an, s05), an.masks)
    for c in scales:
        st = SearchSettings(blend="riesz", tie_break=True, tie_break_scale=c)
        an_aug = Analysis([inp_aug], Psi_aug, pair_standard_errors(inp_aug), an.losses, anchor, an.stack_beta, (None, None), st)
        specs[f"v{c:g}"] = (slice(0, K1 + 1), st, (anchor, an.stack_beta), noise_floor_function(an_aug, st), (None, None))
    pls = blend_estimate(inp_aug, anchor, an.stack_beta, "riesz")
    W = rng.multinomial(n, np.full(n, 1.0 / n), size=replicates).astype(float)  # M x n
    num = np.einsum("bi,ikj->bkj", W, H)
    Psi_b = num / (W @ inp.d)[:, None, None]
    return inp_aug, Psi_aug, specs, pls, Psi_b


def row(cell, rep):
    data, res = riesz_analysis(cell, rep)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        an = res.analysis
        n = an.inputs[0].n
        K1 = an.inputs[0].shape[0]
        inp_aug, Psi_aug, specs, pls, Psi_b = column_setup(an, (0.25, 0.5), np.random.default_rng([rep, 77]), M)
        out = {"cell": cell, "rep": rep, "truth": float(data.truth)}
        out["est_pls"] = pls.estimate
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
    cached_main(row, "contrast_boot")


if __name__ == "__main__":
    sys.exit(main())
