"""Outcome-side screen (issue 10, fifth round; harness as in README.md of this folder): per
cached replicate of seeds 2007 and 2027, the stacked-column riesz search at tie-break scales
c = 0.25 and 0.5 (both sides searched, "v"), PLS's propensity column with the search's outcome
weights ("ob"), the search's propensity weights with PLS's least-squares outcome weights ("pa"),
and the pure minimiser over the augmented table, each with the paired influence-function SE of
its difference from PLS. Rows: ``results/default_choice_outcome_side_seed{2007,2027}.csv``;
table: ``outcome_side_table.py``."""

from __future__ import annotations
import os

for _v in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_v, "1")
import sys
import numpy as np
import screen_extra
from screen_contrast import add_paired, cached_main, pls_fit, replicate_setup
from stackdr.pairtable import blend_estimate


def row(cell, rep):
    data, res, an, inp, _ = replicate_setup(cell, rep)
    out = {"cell": cell, "rep": rep, "truth": float(data.truth)}
    fits = {}
    for c in (0.25, 0.5):
        a, b, ap, bp, inp_aug = screen_extra.pls_vertex_riesz(an, c)
        e = np.eye(inp_aug.shape[0])[-1]
        fits[f"v{c:g}"] = blend_estimate(inp_aug, a, b, "riesz")
        fits[f"ob{c:g}"] = blend_estimate(inp_aug, e, b, "riesz")
        fits[f"pa{c:g}"] = blend_estimate(inp_aug, a, an.stack_beta, "riesz")
        out[f"bdist{c:g}"] = float(np.abs(b - an.stack_beta).sum())
        out[f"colw{c:g}"] = float(a[-1])
    fits["pure_aug"] = blend_estimate(inp_aug, ap, bp, "riesz")
    pls = pls_fit(an, inp_aug)
    return add_paired(out, fits, pls, inp.n, se=False)


if __name__ == "__main__":
    sys.exit(cached_main(row, "outcome_side"))
