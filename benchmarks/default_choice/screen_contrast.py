"""Contrast-test screening pass on the cached cross-fits of screen.py (harness only).

For every cached replicate (the same cross-fits as every earlier candidate, so still paired):
the prediction-loss stacking (PLS) estimate, the stacked-column riesz estimates at tie-break
scales c = 0.25, 0.5, 1 and 2, and the riesz search without the column at c = 0.5, each with
its influence function, and the paired influence-function SE of each one's difference from PLS.
``contrast_table.py`` then applies the rules (contrast test at z, positive-part shrinkage) to
this table and writes the paired comparison with PLS. Usage (environment as in README.md):

    python benchmarks/default_choice/screen_contrast.py --seed 2007   # then --seed 2027
    python benchmarks/default_choice/contrast_table.py <results>/contrast_seed2007.csv
"""

from __future__ import annotations

import os

for _v in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_v, "1")
import argparse  # noqa: E402
import sys  # noqa: E402
import warnings  # noqa: E402

import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
import screen  # noqa: E402
import screen_extra  # noqa: E402
from stackdr.estimator import MAIN  # noqa: E402
from stackdr.pairtable import blend_estimate  # noqa: E402


def riesz_analysis(cell, rep):
    """The cached cross-fit of one replicate, analysed by the harness's riesz estimator (c =
    0.5): ``(data, result)``."""
    data, est0, prepared, target, cf, _, seeds = screen.fit_replicate(cell, rep)
    design, n, library = screen.CELLS[cell]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        est = screen.make_estimator(data, library, seeds.estimator, blend="riesz")
        return data, est.analyse(prepared, target, cf, bootstrap=False)


def run_cached(seed: int, row_fn, name: str) -> None:
    """``row_fn(cell, rep)`` over every cached replicate of every cell of study seed ``seed``;
    the rows go to ``<results>/name``, rewritten after each cell."""
    screen.configure(seed)
    rows = []
    for cell in screen.CELLS:
        d = screen.CACHE / cell
        if not d.exists():
            continue
        reps = sorted(int(q.stem) for q in d.glob("*.pkl"))
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            rows += [row_fn(cell, rep) for rep in reps]
        print(cell, len(reps), flush=True)
        pd.DataFrame(rows).to_csv(screen.RESULTS / name, index=False)


def replicate_setup(cell, rep):
    """The cached replicate analysed by :func:`riesz_analysis`: ``(data, result, analysis,
    inputs of the first repeat, the search's row)``."""
    data, res = riesz_analysis(cell, rep)
    an = res.analysis
    return data, res, an, an.inputs[0], next(r for r in res.estimators if r.name == MAIN)


def pls_fit(an, inp_aug):
    """PLS's estimate on the column-augmented inputs: the stacked column's vertex with the NNLS
    outcome weights."""
    K1 = inp_aug.shape[0] - 1
    return blend_estimate(inp_aug, np.eye(K1 + 1)[K1], an.stack_beta, "riesz")


def searched_propensity_fit(an, c):
    """The default's rule before its test: the stacked-column search's propensity weights at
    tie-break scale c with PLS's least-squares outcome weights: ``(fit, column-augmented
    inputs)``."""
    a, _, _, _, inp_aug = screen_extra.pls_vertex_riesz(an, c)
    return blend_estimate(inp_aug, a, an.stack_beta, "riesz"), inp_aug


def add_paired(out, fits, pls, n, se=True):
    """PLS's estimate and SE, then per fit its estimate (and SE when ``se``) and the paired
    influence-function SE of its difference from PLS, as columns of ``out``."""
    out["est_pls"], out["se_pls"] = pls.estimate, pls.se
    for k, f in fits.items():
        out[f"est_{k}"] = f.estimate
        if se:
            out[f"se_{k}"] = f.se
        d = f.influence - pls.influence
        out[f"sed_{k}"] = float(np.sqrt(np.mean(d**2) / n))
    return out


def row(cell, rep):
    data, res, an, inp, main_row = replicate_setup(cell, rep)
    out = {"cell": cell, "rep": rep, "truth": float(data.truth), "n": inp.n}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fits = {"r05": blend_estimate(inp, main_row.alpha, main_row.beta, "riesz")}
        for c in (0.25, 0.5, 1.0, 2.0):
            a, b, _, _, inp_aug = screen_extra.pls_vertex_riesz(an, c)
            fits[f"v{c:g}"] = blend_estimate(inp_aug, a, b, "riesz")
            out[f"colw_v{c:g}"] = float(a[-1])
        pls = pls_fit(an, inp_aug)
    return add_paired(out, fits, pls, inp.n)


def cached_main(row_fn, stem: str) -> None:
    """Command line of a screen over the cached cross-fits: ``--seed`` picks the study seed, rows
    go to ``<results>/<stem>_seed<seed>.csv``."""
    p = argparse.ArgumentParser()
    p.add_argument("--seed", type=int, default=2007)
    args = p.parse_args()
    run_cached(args.seed, row_fn, f"{stem}_seed{args.seed}.csv")


def main():
    cached_main(row, "contrast")


if __name__ == "__main__":
    sys.exit(main())
