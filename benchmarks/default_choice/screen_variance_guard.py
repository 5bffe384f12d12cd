"""Variance-guard screen (issue 10, sixth round; harness as in README.md of this folder).

With the outcome side at least squares, the searched propensity weights without any test are
within 2 MC SE of PLS in every parametric cell of both screening seeds; the cells they lose
are poor overlap (and, less clearly, NSW), where the search leans on a propensity learner with
extreme inverse weights, i.e. a noisier estimate. So the test may only be needed when the
search makes the estimate noisier. Per cached replicate: PLS and the current default's searched
weights at c = 0.25 and 0.5 ("pa"), each with its influence-function SE and the paired SE of
its difference from PLS; ``variance_guard_table.py`` applies the rules.
Rows: ``results/default_choice_variance_guard_seed{2007,2027}.csv``."""

from __future__ import annotations
import os

for _v in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_v, "1")
import sys
from screen_contrast import add_paired, cached_main, pls_fit, replicate_setup, searched_propensity_fit


def row(cell, rep):
    data, res, an, inp, _ = replicate_setup(cell, rep)
    out = {"cell": cell, "rep": rep, "truth": float(data.truth)}
    fits = {}
    for c in (0.25, 0.5):
        fits[f"pa{c:g}"], inp_aug = searched_propensity_fit(an, c)
    return add_paired(out, fits, pls_fit(an, inp_aug), inp.n, se=True)


if __name__ == "__main__":
    sys.exit(cached_main(row, "variance_guard"))
