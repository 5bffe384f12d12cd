"""Second pass on the cached cross-fits: further variants of candidate 6 (harness only).

Reads ``cache/<cell>/<r>.pkl`` written by screen.py (the same cross-fits, so still paired with
every candidate there) and appends rows to ``results/<cell>_extra.csv``.

Candidates:

- ``capped_d0``: :func:`screen.capped_riesz` with delta = 0 (blended riesz inverse weights no
  heavier, in second moment, than PLS's own probability-scale inverse weights).
- ``fnanchor_c0.5``, ``fnanchor_c1``: :func:`function_anchor_riesz`.
- ``plsvertex_c0.5``, ``plsvertex_c1``: :func:`pls_vertex_riesz`.
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import json  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402
import warnings  # noqa: E402

import cvxpy as cp  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402

import screen  # noqa: E402
import dataclasses  # noqa: E402

from stackdr.estimator import MAIN, PURE, Analysis, noise_floor_function  # noqa: E402
from stackdr.pairtable import (  # noqa: E402
    blend_estimate,
    pair_standard_errors,
    pair_table,
)
from stackdr.selection import pure_weights, run_search  # noqa: E402
from stackdr.risks import value_range  # noqa: E402
from stackdr.selection import SearchSettings  # noqa: E402

FN_SCALES = (0.5, 1.0)
VERTEX_SCALES = (0.5, 1.0)


def pls_vertex_riesz(an, scale: float):
    """Riesz search over the propensity library augmented by the PLS propensity itself.

    The prediction-loss stacking propensity pi_PLS = sum_k a_k pi_k (probability scale, the
    super learner's own weights a) is added as one more propensity "learner" (column K1 + 1;
    its weight-side values are 1/pi_PLS etc., exactly what PLS uses). The riesz blend, its pair
    table, the mixed pseudo-risk search and the tie-break then run unchanged on the K1 + 1
    columns, with the tie-break anchor on the propensity side set to the vertex of the new
    column (and to the NNLS outcome weights on the outcome side, as in the estimator). So
    whenever the perturbation ranges cannot be told apart from noise (within c x SE), the
    tie-break can return exactly the PLS nuisances and hence exactly the PLS estimate, instead of
    the riesz blend at the PLS weights (heavier inverse weights by Jensen's inequality, the
    mechanism of issue 10). When a riesz combination reduces the range by more than the noise
    floor, the search keeps it. Returns (alpha_tb, beta_tb, alpha_pure, beta_pure, inputs).
    """
    inp = an.inputs[0]
    K1 = inp.shape[0]
    pi_pls = inp.pi @ an.stack_alpha
    P_aug = [
        np.hstack([P, np.asarray(t(pi_pls[:, None]), dtype=float)])
        for P, t in zip(inp.P, inp.transforms)
    ]
    inp_aug = dataclasses.replace(inp, P=P_aug, pi=np.hstack([inp.pi, pi_pls[:, None]]))
    Psi = pair_table(inp_aug)
    anchor = np.eye(K1 + 1)[K1]
    settings = SearchSettings(blend="riesz", tie_break=True, tie_break_scale=scale)
    an_aug = Analysis(
        [inp_aug],
        Psi,
        pair_standard_errors(inp_aug),
        an.losses,
        anchor,
        an.stack_beta,
        (None, None),
        settings,
    )
    search = run_search(
        Psi,
        settings,
        phi=None,
        anchors=(anchor, an.stack_beta),
        tolerance=noise_floor_function(an_aug, settings),
        masks=(None, None),
    )
    a_pure, b_pure = pure_weights(search, K1 + 1)
    return search.alpha, search.beta, a_pure, b_pure, inp_aug


def function_anchor_riesz(an, alpha_pure: np.ndarray, scale: float) -> np.ndarray:
    """Riesz search whose tie-break measures closeness to PLS in the weight-side FUNCTION.

    The estimator's tie-break takes, among riesz weights within tau = c x SE of the optimal
    range, the alpha closest to the PLS weights alpha_PLS in the coordinates of alpha. But
    PLS blends on the probability scale, and the riesz blend at alpha_PLS is a different, heavier
    weight function (sum_k a_k / pi_k >= 1 / sum_k a_k pi_k, Jensen): moving towards alpha_PLS
    under the riesz blend does not move towards the inverse weights PLS uses. Here the
    tie-break minimises instead

        mean_i ( w_alpha(O_i) - w_PLS(O_i) )^2,

    w_alpha = observed-arm riesz inverse weight sum_c |h1_c| p_c(alpha) (linear in alpha) and
    w_PLS the same under the probability blend at alpha_PLS, subject to range_j (alpha' Psi)_j <=
    t* + tau and alpha in the simplex (a convex QP). t* and the pure minimiser are the
    estimator's (riesz LP); tau is the estimator's noise floor at the pure minimiser with
    c = ``scale``. The outcome side is the estimator's.
    """
    inp = an.inputs[0]
    Psi = an.Psi
    K1 = Psi.shape[0]
    G = sum(np.abs(h1)[:, None] * P for h1, P in zip(inp.h1, inp.P))  # (n, K1)
    w_pls = screen.observed_arm_weights(inp, an.stack_alpha, "probability")
    sw = max(float(np.std(w_pls)), 1e-12)
    t_star = float(value_range(alpha_pure @ Psi))
    settings = SearchSettings(blend="riesz", tie_break=True, tie_break_scale=scale)
    tau = noise_floor_function(an, settings)("propensity", alpha_pure)
    D = screen._range_constraints(Psi)
    s = max(float(np.ptp(Psi)), 1e-12)
    b = cp.Variable(K1, nonneg=True)
    cons = [cp.sum(b) == 1, (D / s) @ b <= (t_star + tau) / s + 1e-9]
    prob = cp.Problem(cp.Minimize(cp.sum_squares((G @ b - w_pls) / sw) / inp.n), cons)
    screen._solve(prob)
    if b.value is None:
        return alpha_pure
    alpha = np.clip(np.asarray(b.value, dtype=float), 0, None)
    return alpha / alpha.sum()


def run_replicate(cell: str, rep: int) -> list[dict]:
    data, est0, prepared, target, cf, _, seeds = screen.fit_replicate(cell, rep)
    design, n, library = screen.CELLS[cell]
    truth = float(data.truth)
    rows = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        est = screen.make_estimator(data, library, seeds.estimator, blend="riesz")
        res = est.analyse(prepared, target, cf, bootstrap=False)
    an = res.analysis
    inp = an.inputs[0]
    main_row = next(r for r in res.estimators if r.name == MAIN)
    pure_row = next(r for r in res.estimators if r.name == PURE)

    def add(cand, name, alpha, beta, seconds, extra):
        fit = blend_estimate(inp, alpha, beta, "riesz")
        w = screen.observed_arm_weights(inp, alpha, "riesz")
        rows.append(
            {
                "cell": cell,
                "rep": rep,
                "candidate": cand,
                "estimator": name,
                "estimate": fit.estimate,
                "se": fit.se,
                "truth": truth,
                "alpha": json.dumps([round(float(x), 5) for x in alpha]),
                "fit_seconds": 0.0,
                "analyse_seconds": seconds,
                "extra": json.dumps(
                    {"w_sd": float(np.std(w)), "w_max": float(np.max(w)), **(extra or {})}
                ),
            }
        )

    t0 = time.perf_counter()
    a_pure, a_tb, binding, raised = screen.capped_riesz(an, 0.0)
    sec = time.perf_counter() - t0
    add("capped_d0", MAIN, a_tb, main_row.beta, sec, {"binding": binding, "raised": raised})
    add("capped_d0", PURE, a_pure, pure_row.beta, sec, {"binding": binding, "raised": raised})
    for c in FN_SCALES:
        t0 = time.perf_counter()
        alpha = function_anchor_riesz(an, pure_row.alpha, c)
        sec = time.perf_counter() - t0
        add(f"fnanchor_c{c:g}", MAIN, alpha, main_row.beta, sec, None)
    rows += vertex_rows(cell, rep, an, truth, VERTEX_SCALES)
    return rows


def vertex_rows(cell: str, rep: int, an, truth: float, scales) -> list[dict]:
    """Rows of the PLS-column candidate (pls_vertex_riesz) at each tie-break scale in ``scales``,
    on the riesz analysis ``an`` (estimator defaults, c = 0.5; the PLS-column search does not
    use ``an``'s own tie-break scale). Shared by run_replicate and screen.run_replicate."""
    rows = []
    for c in scales:
        t0 = time.perf_counter()
        a_tb, b_tb, a_pure, b_pure, inp_aug = pls_vertex_riesz(an, c)
        sec = time.perf_counter() - t0
        for name, a, b in ((MAIN, a_tb, b_tb), (PURE, a_pure, b_pure)):
            fit = blend_estimate(inp_aug, a, b, "riesz")
            w = screen.observed_arm_weights(inp_aug, a, "riesz")
            rows.append(
                {
                    "cell": cell,
                    "rep": rep,
                    "candidate": f"plsvertex_c{c:g}",
                    "estimator": name,
                    "estimate": fit.estimate,
                    "se": fit.se,
                    "truth": truth,
                    # weights on the K1 learners followed by the weight on the PLS column
                    "alpha": json.dumps([round(float(x), 5) for x in a]),
                    "fit_seconds": 0.0,
                    "analyse_seconds": sec,
                    "extra": json.dumps(
                        {
                            "w_sd": float(np.std(w)),
                            "w_max": float(np.max(w)),
                            "pls_column_weight": float(a[-1]),
                        }
                    ),
                }
            )
    return rows


def run_replicate_vertex(cell: str, rep: int, scales=(0.25,)) -> list[dict]:
    """Third pass: only the PLS-column candidate, at further tie-break scales."""
    global VERTEX_SCALES, FN_SCALES
    saved = VERTEX_SCALES
    VERTEX_SCALES = scales
    try:
        rows = run_replicate(cell, rep)
    finally:
        VERTEX_SCALES = saved
    return [r for r in rows if r["candidate"].startswith("plsvertex")]


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--cell", choices=list(screen.CELLS), required=True)
    parser.add_argument(
        "--vertex-only", action="store_true", help="PLS-column candidate at c = 0.25 only"
    )
    args = parser.parse_args()
    if args.vertex_only:
        run_replicate_fn = run_replicate_vertex
        path = screen.RESULTS / f"{args.cell}_extra2.csv"
    else:
        run_replicate_fn = run_replicate
        path = screen.RESULTS / f"{args.cell}_extra.csv"
    have = set(pd.read_csv(path)["rep"]) if path.exists() else set()
    reps = sorted(int(p.stem) for p in (screen.CACHE / args.cell).glob("*.pkl"))
    for rep in reps:
        if rep in have:
            continue
        frame = pd.DataFrame(run_replicate_fn(args.cell, rep))
        frame.to_csv(path, mode="a", header=not path.exists(), index=False)
    print(f"{args.cell}: extra pass over {len(reps)} cached replicates", flush=True)


if __name__ == "__main__":
    sys.exit(main())
