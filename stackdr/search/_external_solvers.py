"""Calls into the external solvers: HiGHS through highspy (one solver per thread and kind,
its start-up banner silenced), Clarabel's tight settings, and the solver statuses whose solution
is used."""

from __future__ import annotations

import os
import sys
import threading

import cvxpy as cp
import numpy as np
from scipy.sparse import csc_matrix

# Clarabel's defaults (1e-8) leave projections about 1e-5 off in the weights; these settings give
# agreement with an active-set QP to about 1e-8 at no measurable cost for problems this small.
# The names are Clarabel's own settings (attributes of clarabel.DefaultSettings), which cvxpy
# passes through unchanged.
CLARABEL_TIGHT = {
    "tol_gap_abs": 1e-12,
    "tol_gap_rel": 1e-12,
    "tol_feas": 1e-12,
    "tol_ktratio": 1e-10,
}
# cvxpy statuses whose solution is used, and the status recorded for them.
CVXPY_SOLVED = {cp.OPTIMAL: "optimal", cp.OPTIMAL_INACCURATE: "inaccurate"}
# The same for Clarabel called directly (its status names, as ``str(solution.status)``).
CLARABEL_SOLVED = {"Solved": "optimal", "AlmostSolved": "inaccurate"}


_HIGHS = threading.local()


def _quiet(factory):
    """Call ``factory`` with file descriptor 1 sent to /dev/null: the first HiGHS object of a
    process prints a banner from C before any option can be set."""
    sys.stdout.flush()
    try:
        saved = os.dup(1)
    except OSError:
        return factory()
    null = os.open(os.devnull, os.O_WRONLY)
    try:
        os.dup2(null, 1)
        return factory()
    finally:
        os.dup2(saved, 1)
        os.close(saved)
        os.close(null)


def highs_range_lp(cost, A_ub, b_ub, A_eq, bounds) -> tuple[bool, np.ndarray, str, int]:
    """Solve min cost'x s.t. A_ub x <= b_ub, A_eq x = 1, bounds, with HiGHS through highspy.

    One solver object per thread is reused (thread-safe, and it avoids scipy's per-call wrapper
    overhead, about 1.3 ms of a 1.8 ms solve). HiGHS' default 1e-7 tolerances let it stop up to
    ~1e-7 (of the scaled values) above the optimum, and without presolve its bound perturbations
    can leave weights of 1e-7 that cost ~1e-6 in range (both seen on sparse tables); tight
    tolerances with presolve matched cvxpy to 1e-9 on such tables.
    Returns (optimal?, x, model status text, simplex iterations).
    """
    return highs_lp("range", cost, A_ub, b_ub, A_eq, np.ones(A_eq.shape[0]), bounds)


# Options of the thread-local HiGHS solvers: "range" for the range LP (see highs_range_lp);
# "model" for the cutting-plane model LP of the polish: dual simplex and default tolerances as
# scipy's linprog(method="highs") sets them (used before), presolve off. On these LPs (at most
# 10 (D + 1) cuts) presolve cost more than the solve: the riesz/minimax bootstrap search went
# from 133 to 36 ms per replicate with only this option changed. The minimax local search can
# then take a different path now and then (weights 5e-8, objectives 2e-8 apart in one replicate
# of tests/test_bootstrap_speed_paths.py; identical in the others).
_HIGHS_OPTIONS = {
    "range": {"primal_feasibility_tolerance": 1e-10, "dual_feasibility_tolerance": 1e-10},
    "model": {"simplex_strategy": 1, "presolve": "off"},
}


def highs_lp(kind, cost, A_ub, b_ub, A_eq, b_eq, bounds) -> tuple[bool, np.ndarray, str, int]:
    """Solve min cost'x s.t. A_ub x <= b_ub, A_eq x = b_eq, bounds, with the thread's HiGHS
    solver for ``kind`` (a key of ``_HIGHS_OPTIONS``).

    Returns (optimal?, x, model status text, simplex iterations).
    """
    import highspy

    h = getattr(_HIGHS, kind, None)
    if h is None:
        h = _quiet(highspy.Highs)
        h.setOptionValue("output_flag", False)
        for name, value in _HIGHS_OPTIONS[kind].items():
            h.setOptionValue(name, value)
        setattr(_HIGHS, kind, h)
    inf = highspy.kHighsInf
    matrix = csc_matrix(np.vstack([A_ub, A_eq]))
    lp = highspy.HighsLp()
    lp.num_col_, lp.num_row_ = cost.size, matrix.shape[0]
    lp.col_cost_ = cost
    lp.col_lower_ = np.where(np.isfinite(bounds[:, 0]), bounds[:, 0], -inf)
    lp.col_upper_ = np.where(np.isfinite(bounds[:, 1]), bounds[:, 1], inf)
    lp.row_lower_ = np.r_[np.full(b_ub.size, -inf), b_eq]
    lp.row_upper_ = np.r_[b_ub, b_eq]
    lp.a_matrix_.format_ = highspy.MatrixFormat.kColwise
    lp.a_matrix_.start_ = matrix.indptr
    lp.a_matrix_.index_ = matrix.indices
    lp.a_matrix_.value_ = matrix.data
    h.passModel(lp)
    h.run()
    status = h.getModelStatus()
    x = np.asarray(h.getSolution().col_value, dtype=float)
    return (
        status == highspy.HighsModelStatus.kOptimal,
        x,
        h.modelStatusToString(status),
        int(h.getInfo().simplex_iteration_count),
    )
