"""The exact path of the weight search (DESIGN.md section 5): for the riesz blend each half of
the mixed-minimax risk is ``min over the simplex of range(a @ V)``, a small LP solved by HiGHS
(:func:`minimise_range_lp`), with a readable cvxpy reference (:func:`minimise_range_cvxpy`)."""

from __future__ import annotations

import functools
import time
import warnings

import cvxpy as cp
import numpy as np
from numpy.typing import ArrayLike

from stackdr.errors import warn_user
from stackdr.search._external_solvers import CLARABEL_TIGHT, CVXPY_SOLVED, highs_range_lp
from stackdr.search._records import (
    SolveResult,
    clean_simplex,
    select_columns,
    since,
    standardised,
    value_matrix,
)

__all__ = ["minimise_range_cvxpy", "minimise_range_lp"]


def _vertex_fallback(
    Vm: np.ndarray, method: str, reason: str, started: float, details: dict
) -> SolveResult:
    warn_user(
        f"{method} failed ({reason}); falling back to the best single learner (vertex)",
        RuntimeWarning,
    )
    ranges = np.ptp(Vm, axis=1)
    k = int(np.argmin(ranges))
    weights = np.zeros(Vm.shape[0])
    weights[k] = 1.0
    details = {**details, "failure": reason}
    return SolveResult(weights, float(ranges[k]), "fallback", method, since(started), details)


def _quiet_solve(problem: cp.Problem, **kwargs) -> None:
    """Solve without cvxpy's "may be inaccurate" warning: that status is recorded instead."""
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="Solution may be inaccurate")
        problem.solve(**kwargs)


def _trivial_single(Vm: np.ndarray, method: str, started: float) -> SolveResult:
    return SolveResult(
        np.ones(1), float(np.ptp(Vm[0])), "optimal", method, since(started), {"trivial": True}
    )


# ---------------------------------------------------------------------------------------------
# Exact path: range of a linear map over the simplex


@functools.lru_cache(maxsize=64)
def range_lp_template(K: int, J: int) -> tuple[np.ndarray, ...]:
    # Variables x = (a_1..a_K, upper, lower): minimise upper - lower subject to
    # V_j' a <= upper, V_j' a >= lower, sum(a) = 1, a >= 0. Only the V blocks change per call.
    cost = np.zeros(K + 2)
    cost[K], cost[K + 1] = 1.0, -1.0
    A_ub = np.zeros((2 * J, K + 2))
    A_ub[:J, K] = -1.0
    A_ub[J:, K + 1] = 1.0
    b_ub = np.zeros(2 * J)
    A_eq = np.zeros((1, K + 2))
    A_eq[0, :K] = 1.0
    bounds = np.array([(0.0, np.inf)] * K + [(-np.inf, np.inf)] * 2)
    for array in (cost, A_ub, b_ub, A_eq, bounds):
        array.setflags(write=False)
    return cost, A_ub, b_ub, A_eq, bounds


def range_rows(Vs: np.ndarray) -> np.ndarray:
    """The rows ``(a @ Vs)_j - upper <= 0`` and ``lower - (a @ Vs)_j <= 0`` over the variables
    (a, upper, lower), shared by the range LP and the tie-break QP."""
    K, J = Vs.shape
    rows = range_lp_template(K, J)[1].copy()
    rows[:J, :K] = Vs.T
    rows[J:, :K] = -Vs.T
    return rows


def minimise_range_lp(V: ArrayLike, mask: ArrayLike | None = None) -> SolveResult:
    """Minimise ``range_j (a @ V)_j`` over the simplex by linear programming (HiGHS).

    Parameters
    ----------
    V : array_like, shape (K, J)
        Row k holds the values at vertex ``e_k`` (e.g. the pair table ``Psi`` for the
        propensity-side weights, ``Psi.T`` for the outcome-side weights).
    mask : array_like of bool, shape (J,), optional
        Columns whose range counts (the direction learners). Default: all.

    Returns
    -------
    SolveResult
        ``weights`` of length K; ``objective`` is the range at those weights. If HiGHS fails the
        best vertex is returned with status ``"fallback"`` and a ``RuntimeWarning``.

    Notes
    -----
    Values are centred and scaled before solving (the range is translation-invariant and
    positively homogeneous) and the constraint template is cached per shape; one solve took
    about 2 ms (median) for K <= 20 in ``benchmarks/bench_solvers.py``, most of it scipy's
    wrapper overhead (HiGHS called through highspy directly took about 0.5 ms).

    Examples
    --------
    >>> res = minimise_range_lp([[0.0, 2.0], [2.0, 0.0]])
    >>> res.weights.round(6).tolist(), round(res.objective, 9)
    ([0.5, 0.5], 0.0)
    """
    started = time.perf_counter()
    Vm = select_columns(value_matrix(V), mask)
    K, J = Vm.shape
    if K == 1:
        return _trivial_single(Vm, "range_lp", started)
    Vs, _ = standardised(Vm)
    cost, _, b_ub, A_eq, bounds = range_lp_template(K, J)
    A_ub = range_rows(Vs)
    try:
        ok, x, message, iterations = highs_range_lp(cost, A_ub, b_ub, A_eq, bounds)
    except Exception as exc:  # noqa: BLE001 - a crashing LP must not end the run silently
        return _vertex_fallback(
            Vm, "range_lp", f"{type(exc).__name__}: {exc}", started, {"n_columns": J}
        )
    details = {"message": message, "n_columns": J, "iterations": iterations}
    if not ok or x is None or not np.all(np.isfinite(x)):
        return _vertex_fallback(Vm, "range_lp", f"HiGHS status {message}", started, details)
    weights = clean_simplex(x[:K])
    return SolveResult(
        weights, float(np.ptp(weights @ Vm)), "optimal", "range_lp", since(started), details
    )


def minimise_range_cvxpy(
    V: ArrayLike, mask: ArrayLike | None = None, solver: str = "CLARABEL"
) -> SolveResult:
    """Readable reference for :func:`minimise_range_lp`, written in cvxpy.

    Parameters
    ----------
    V : array_like, shape (K, J)
        Values at the vertices (rows).
    mask : array_like of bool, shape (J,), optional
        Columns whose range counts. Default: all.
    solver : str, default "CLARABEL"
        cvxpy solver name; Clarabel runs with tightened tolerances.

    Returns
    -------
    SolveResult
        As :func:`minimise_range_lp`; method ``"range_cvxpy"``.
    """
    started = time.perf_counter()
    Vm = select_columns(value_matrix(V), mask)
    K = Vm.shape[0]
    if K == 1:
        return _trivial_single(Vm, "range_cvxpy", started)
    Vs, _ = standardised(Vm)
    a = cp.Variable(K, nonneg=True)
    values = a @ Vs
    problem = cp.Problem(cp.Minimize(cp.max(values) - cp.min(values)), [cp.sum(a) == 1])
    options = CLARABEL_TIGHT if solver == "CLARABEL" else {}
    try:
        _quiet_solve(problem, solver=solver, **options)
    except cp.error.SolverError as exc:
        return _vertex_fallback(Vm, "range_cvxpy", str(exc), started, {})
    details = {"solver_status": problem.status, "solver": solver}
    if problem.status not in CVXPY_SOLVED or a.value is None:
        return _vertex_fallback(Vm, "range_cvxpy", f"status {problem.status}", started, details)
    weights = clean_simplex(a.value)
    status = CVXPY_SOLVED[problem.status]
    return SolveResult(
        weights, float(np.ptp(weights @ Vm)), status, "range_cvxpy", since(started), details
    )
