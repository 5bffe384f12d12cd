"""Fold-wise contrast screen (issue 10, fifth round; rejected; harness as in README.md of this
folder): per cached replicate, PLS, the riesz search without the column (c = 0.5) and the
stacked-column searches (c = 0.25, 0.5), with the fold-wise differences d_k from PLS (the
difference plus the fold mean of the paired influence-function difference), for a t-test on
the K = 5 fold differences (self-normalised, so heavy-tailed inverse weights and the fold
models' refitting noise enter its variance). Rows:
``results/default_choice_fold_contrast_seed{2007,2027}.csv``; table: ``fold_contrast_table.py``."""

from __future__ import annotations
import os

for _v in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_v, "1")
import sys, warnings
import numpy as np
import screen_extra
from screen_contrast import cached_main, riesz_analysis
from stackdr.estimator import MAIN
from stackdr.pairtable import blend_estimate


def row(cell, rep):
    data, res = riesz_analysis(cell, rep)
    import screen

    _, _, prepared, _, cf, _, _ = screen.fit_replicate(cell, rep)
    folds = np.asarray(cf.fold_labels)[0]
    K = int(folds.max()) + 1
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        an = res.analysis
        inp = an.inputs[0]
        out = {"cell": cell, "rep": rep, "truth": float(data.truth), "n": inp.n}
        main_row = next(r for r in res.estimators if r.name == MAIN)
        fits = {"r05": blend_estimate(inp, main_row.alpha, main_row.beta, "riesz")}
        for c in (0.25, 0.5):
            a, b, _, _, inp_aug = screen_extra.pls_vertex_riesz(an, c)
            fits[f"v{c:g}"] = blend_estimate(inp_aug, a, b, "riesz")
        K1 = inp_aug.shape[0] - 1
        pls = blend_estimate(inp_aug, np.eye(K1 + 1)[K1], an.stack_beta, "riesz")
    out["est_pls"], out["se_pls"] = pls.estimate, pls.se
    for k, f in fits.items():
        out[f"est_{k}"], out[f"se_{k}"] = f.estimate, f.se
        d = f.influence - pls.influence
        out[f"sed_{k}"] = float(np.sqrt(np.mean(d**2) / inp.n))
        dd = f.estimate - pls.estimate
        for j in range(K):
            out[f"d{j}_{k}"] = float(dd + d[folds == j].mean())
    return out


if __name__ == "__main__":
    sys.exit(cached_main(row, "fold_contrast"))
