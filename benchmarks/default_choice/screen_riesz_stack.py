"""Riesz-loss stacking screen (issue 10, sixth round; harness as in README.md of this folder).

Prediction-loss stacking (PLS) fits the propensity weights by log loss, which does not aim at
the error of the weight-side values p - p0 that enters the DR bias E[h1 (b - b0)(p - p0)]. The
Riesz loss does: for component c with row functions h1_c, h2_c, the loss

    L(w) = mean_i sum_c s_c [ h1_c P_c(w)^2 + 2 h2_c P_c(w) ],   s_c = sign(mean h1_c),

is minimised at the weight-side values p0 (e.g. 1/pi0 for the treated arm of the ATE) and
equals E[|h1| (P - p0)^2] up to a constant (the automatic debiasing loss of Chernozhukov, Newey
and Singh 2022, Econometrica 90(3)). Under the riesz blend P_c(w) = P_c w is linear in the
propensity weights w, so L is a convex quadratic on the simplex.

Per cached replicate of seeds 2007 and 2027: PLS; the current default's searched weights
("pa0.25"); the Riesz-stacked weights w_R with PLS's least-squares outcome weights ("rs"); and
the riesz search whose tie-break anchor is w_R instead of PLS's column ("ra" at c = 0.25, 0.5,
outcome weights fixed at least squares); each with the paired influence-function SE of its
difference from PLS. Rows: ``results/default_choice_riesz_stack_seed{2007,2027}.csv``."""

from __future__ import annotations
import os

for _v in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_v, "1")
import sys
import cvxpy as cp
import numpy as np
from screen_contrast import add_paired, cached_main, pls_fit, replicate_setup, searched_propensity_fit
from stackdr.estimator import Analysis, noise_floor_function
from stackdr.pairtable import blend_estimate, pair_standard_errors
from stackdr.selection import SearchSettings, run_search


def riesz_stack(inp) -> np.ndarray:
    """Propensity weights on the simplex minimising the Riesz loss under the riesz blend."""
    K1 = inp.shape[0]
    Q = np.zeros((K1, K1))
    q = np.zeros(K1)
    for P, h1, h2 in zip(inp.P, inp.h1, inp.h2):
        s = np.sign(h1.mean()) or 1.0
        Q += s * (P * h1[:, None]).T @ P
        q += 2 * s * (h2 @ P)
    Q, q = Q / inp.n, q / inp.n
    Q = 0.5 * (Q + Q.T)
    scale = max(np.abs(np.diag(Q)).max(), 1e-12)
    w = cp.Variable(K1)
    prob = cp.Problem(
        cp.Minimize(cp.quad_form(w, cp.psd_wrap(Q / scale)) + (q / scale) @ w),
        [w >= 0, cp.sum(w) == 1],
    )
    prob.solve(solver=cp.CLARABEL)
    a = np.clip(np.asarray(w.value, dtype=float), 0, None)
    return a / a.sum()


def anchored_search(an, anchor, c):
    """Riesz search on the original table with the propensity tie-break anchor ``anchor``."""
    inp = an.inputs[0]
    settings = SearchSettings(blend="riesz", tie_break=True, tie_break_scale=c)
    an2 = Analysis(
        [inp], an.Psi, pair_standard_errors(inp), an.losses, anchor, an.stack_beta,
        (None, None), settings,
    )
    s = run_search(
        an.Psi, settings, phi=None, anchors=(anchor, an.stack_beta),
        tolerance=noise_floor_function(an2, settings), masks=(None, None),
    )
    return s.alpha


def row(cell, rep):
    data, res, an, inp, _ = replicate_setup(cell, rep)
    out = {"cell": cell, "rep": rep, "truth": float(data.truth)}
    fits = {}
    fits["pa0.25"], inp_aug = searched_propensity_fit(an, 0.25)
    wr = riesz_stack(inp)
    fits["rs"] = blend_estimate(inp, wr, an.stack_beta, "riesz")
    for j, v in enumerate(wr):
        out[f"wr{j}"] = float(v)
    for c in (0.25, 0.5):
        fits[f"ra{c:g}"] = blend_estimate(inp, anchored_search(an, wr, c), an.stack_beta, "riesz")
    return add_paired(out, fits, pls_fit(an, inp_aug), inp.n, se=False)


if __name__ == "__main__":
    sys.exit(cached_main(row, "riesz_stack"))
