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
from screen_contrast import add_paired, cached_main, pls_fit, replicate_setup
from stackdr.pairtable import blend_estimate


def row(cell, rep):
    data, res, an, inp, main_row = replicate_setup(cell, rep)
    folds = np.asarray(res.crossfit.fold_labels)[0]
    K = int(folds.max()) + 1
    out = {"cell": cell, "rep": rep, "truth": float(data.truth), "n": inp.n}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fits = {"r05": blend_estimate(inp, main_row.alpha, main_row.beta, "riesz")}
        for c in (0.25, 0.5):
            a, b, _, _, inp_aug = screen_extra.pls_vertex_riesz(an, c)
            fits[f"v{c:g}"] = blend_estimate(inp_aug, a, b, "riesz")
        pls = pls_fit(an, inp_aug)
    add_paired(out, fits, pls, inp.n)
    # fold-wise differences from PLS: the difference plus the fold mean of the paired IF difference
    for k, f in fits.items():
        d = f.influence - pls.influence
        for j in range(K):
            out[f"d{j}_{k}"] = float(f.estimate - pls.estimate + d[folds == j].mean())
    return out


if __name__ == "__main__":
    sys.exit(cached_main(row, "fold_contrast"))
