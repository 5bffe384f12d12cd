"""Tie-breaks: among weights whose pseudo-risk is within a tolerance of the minimum, the ones
closest to an anchor (the prediction-loss stacking weights). :func:`tie_break_range` solves a QP
for ranges of linear maps, :func:`tie_break_general` runs SLSQP for nonlinear objectives, and
:func:`vertex_tie_break` picks among vertices for discrete selection."""

from __future__ import annotations

import functools
import math
import time
from collections.abc import Callable, Sequence

import clarabel
import numpy as np
from numpy.typing import ArrayLike
from scipy.optimize import minimize
from scipy.sparse import csc_matrix

from stackdr.errors import InputError, warn_user
from stackdr.search._external_solvers import CLARABEL_SOLVED, CLARABEL_TIGHT
from stackdr.search._lattice import CountedObjective, simplex_lattice
from stackdr.search._range_lp import range_lp_template, range_rows
from stackdr.search._records import (
    Objective,
    SolveResult,
    block_slices,
    checked_dims,
    checked_tolerance,
    checked_weights,
    clean_simplex,
    select_columns,
    since,
    standardised,
    value_matrix,
)

__all__ = ["tie_break_general", "tie_break_range"]

# Weights further than this from the pure minimiser count as "moved" by a tie-break.
_MOVED_ATOL = 1e-9
# Tie-break feasibility is judged up to this fraction of the objective's scale.
_FEASIBILITY_SLACK = 1e-9


def _segment_point(f: Callable, start: np.ndarray, target: np.ndarray, bound: float) -> np.ndarray:
    """Feasible point nearest ``target`` on the segment from the feasible ``start``.

    The distance to the target falls along the segment, so this is the largest feasible step:
    found on a 65-point grid, then by zooming into the gap after the last feasible grid point
    (six rounds: step precision about 1e-11). For a convex objective the feasible steps form an
    interval and the answer is exact to that precision.
    """
    lo, hi = 0.0, 1.0
    for _ in range(6):
        theta = np.linspace(lo, hi, 65)
        points = start[None, :] + theta[:, None] * (target - start)[None, :]
        feasible = np.flatnonzero(f(points) <= bound)
        last = int(feasible[-1]) if feasible.size else 0
        if last == 64:
            lo = theta[last]
            break
        lo, hi = theta[last], theta[last + 1]
    return start + lo * (target - start)


def _tie_break_record(
    weights: np.ndarray,
    objective: float,
    status: str,
    method: str,
    started: float,
    pure: np.ndarray,
    anchor: np.ndarray,
    tolerance: float,
    bound: float,
    anchor_feasible: bool,
    **extra,
) -> SolveResult:
    details = {
        "tolerance": tolerance,
        "bound": bound,
        "anchor_feasible": anchor_feasible,
        "moved": bool(np.max(np.abs(weights - pure)) > _MOVED_ATOL),
        "distance_to_anchor": float(np.linalg.norm(weights - anchor)),
        "pure_distance_to_anchor": float(np.linalg.norm(pure - anchor)),
        **extra,
    }
    return SolveResult(weights, objective, status, method, since(started), details)


def _tie_break_setup(
    dims: Sequence[int],
    optimum: float,
    tolerance: float,
    anchor: ArrayLike,
    start: ArrayLike,
    started: float,
) -> tuple[float, np.ndarray, np.ndarray, float, Callable[..., SolveResult]]:
    """Checked inputs of a tie-break, its bound and a record maker with the shared details."""
    tolerance = checked_tolerance(tolerance)
    anchor = checked_weights(anchor, dims, "anchor")
    start = checked_weights(start, dims, "start (the pure minimiser)")
    bound = float(optimum) + tolerance
    record = functools.partial(
        _tie_break_record,
        started=started,
        pure=start,
        anchor=anchor,
        tolerance=tolerance,
        bound=bound,
    )
    return tolerance, anchor, start, bound, record


def tie_break_range(
    V: ArrayLike,
    pure: SolveResult,
    tolerance: float,
    anchor: ArrayLike,
    mask: ArrayLike | None = None,
) -> SolveResult:
    """Weights closest to ``anchor`` among those within ``tolerance`` of the minimal range.

    Solves ``min ||a - anchor||^2`` subject to a on the simplex and
    ``range_j (a @ V)_j <= pure.objective + tolerance`` (a QP, passed to Clarabel directly with
    a fresh solver per call, so concurrent calls from several threads share no state). When the
    anchor already satisfies the bound it is returned as is.

    Parameters
    ----------
    V : array_like, shape (K, J)
        Values at the vertices, as for :func:`minimise_range_lp`.
    pure : SolveResult
        The pure minimiser (its ``weights`` and ``objective`` are used).
    tolerance : float
        Allowed excess range (>= 0) on the scale of the values.
    anchor : array_like, shape (K,)
        Target weights on the simplex (the prediction-loss stacking weights).
    mask : array_like of bool, shape (J,), optional
        Columns whose range counts.

    Returns
    -------
    SolveResult
        Method ``"tie_break_qp"``. ``details``: ``tolerance``, ``bound``, ``anchor_feasible``,
        ``moved`` (weights differ from the pure minimiser), ``distance_to_anchor`` and
        ``pure_distance_to_anchor``.

    Notes
    -----
    Feasibility is judged up to 1e-9 of the spread of ``V`` (the LP that found ``pure`` is itself
    accurate to about 1e-10 of it; without this slack a tolerance of 0 could never leave the
    pure minimiser). A QP solution outside that slack is mixed with the pure minimiser just
    enough to meet the bound: the range is convex, so the mixture is feasible, and it is no
    farther from the anchor than the pure minimiser.
    """
    started = time.perf_counter()
    Vm = select_columns(value_matrix(V), mask)
    K, J = Vm.shape
    tolerance, anchor, start, bound, record = _tie_break_setup(
        [K], pure.objective, tolerance, anchor, pure.weights, started
    )
    r_pure = float(np.ptp(start @ Vm))
    Vs, scale = standardised(Vm)
    slack = _FEASIBILITY_SLACK * scale
    r_anchor = float(np.ptp(anchor @ Vm))
    if r_anchor <= bound + slack:
        return record(anchor, r_anchor, "optimal", "tie_break_qp", anchor_feasible=True)

    w, status = _solve_projection(Vs, anchor, max(bound / scale, 0.0))
    failure = None if w is not None else f"QP status {status}"
    if w is not None:
        r_w = float(np.ptp(w @ Vm))
        if r_w > bound + slack and r_w > r_pure:
            theta = min(1.0, (r_w - bound) / (r_w - r_pure))
            w = clean_simplex((1 - theta) * w + theta * start)
            r_w = float(np.ptp(w @ Vm))
        excess = np.linalg.norm(w - anchor) - np.linalg.norm(start - anchor)
        if excess > _MOVED_ATOL:
            failure = f"QP solution ({status}) farther from the anchor than the pure minimiser"
        elif excess > 0:  # round-off: the pure minimiser is the projection
            w, r_w = start, r_pure
    if failure is not None:
        warn_user(
            f"tie-break failed: {failure}; stepping from the pure minimiser towards the anchor",
            RuntimeWarning,
        )
        w = _segment_point(lambda W: np.ptp(W @ Vm, axis=1), start, anchor, bound)
        return record(w, float(np.ptp(w @ Vm)), "fallback", "tie_break_qp", anchor_feasible=False)
    return record(w, r_w, status, "tie_break_qp", anchor_feasible=False)


def _projection_qp(Vs: np.ndarray, anchor: np.ndarray, bound: float) -> tuple:
    """The tie-break QP in Clarabel's standard form, ``min x'Px / 2 + q'x`` subject to
    ``Ax + s = b`` with s in the cones, over x = (a, upper, lower).

    ``||a - anchor||^2`` is ``a'a - 2 anchor'a`` up to a constant, so P is 2 I on the a-block and
    q is -2 anchor. Row 0 is ``sum(a) = 1`` (zero cone); the nonnegative cone holds ``a >= 0``,
    the range rows and ``upper - lower <= bound``.
    """
    K, J = Vs.shape
    sum_row = range_lp_template(K, J)[3]
    width_row = np.zeros((1, K + 2))
    width_row[0, K], width_row[0, K + 1] = 1.0, -1.0
    A = csc_matrix(np.vstack([sum_row, -np.eye(K, K + 2), range_rows(Vs), width_row]))
    b = np.r_[1.0, np.zeros(K + 2 * J), bound]
    # Built from CSC arrays (column k holds row k; the last two columns are empty): about 20 us
    # against 45 us for the coordinate form, on a solve of a few hundred microseconds.
    P = csc_matrix(
        (np.full(K, 2.0), np.arange(K), np.r_[np.arange(K + 1), K, K]), shape=(K + 2, K + 2)
    )
    q = np.r_[-2.0 * anchor, 0.0, 0.0]
    cones = [clarabel.ZeroConeT(1), clarabel.NonnegativeConeT(K + 2 * J + 1)]
    return P, q, A, b, cones


def _solve_projection(
    Vs: np.ndarray, anchor: np.ndarray, bound: float
) -> tuple[np.ndarray | None, str]:
    """Solve the tie-break QP on standardised values; tight Clarabel settings first, its
    defaults if those fail (degenerate faces occasionally defeat the tight ones).

    Returns the weights and the status to record (``"optimal"`` or ``"inaccurate"``), or None
    and Clarabel's last status (or the error it raised) when both attempts fail.
    """
    K = Vs.shape[0]
    qp = _projection_qp(Vs, anchor, bound)
    for options in (CLARABEL_TIGHT, {}):
        settings = clarabel.DefaultSettings()
        settings.verbose = False
        for name, value in options.items():
            setattr(settings, name, value)
        try:
            solution = clarabel.DefaultSolver(*qp, settings).solve()
        except (KeyboardInterrupt, SystemExit):
            raise
        except BaseException as exc:  # noqa: BLE001 - a Rust panic is a BaseException in Python
            status = f"solver error: {type(exc).__name__}: {exc}"
            continue
        status = str(solution.status)
        x = np.asarray(solution.x, dtype=float)
        if status in CLARABEL_SOLVED and x.shape == (K + 2,) and np.all(np.isfinite(x)):
            return clean_simplex(x[:K]), CLARABEL_SOLVED[status]
    return None, status


def _forward_jacobian(fun: Callable, w: np.ndarray, h: float = 1e-7) -> np.ndarray:
    """Forward-difference Jacobian of a batch function at w, in one batched call."""
    rows = np.vstack([w, w + h * np.eye(w.size)])
    values = np.asarray(fun(rows), dtype=float).reshape(w.size + 1, -1)
    return ((values[1:] - values[0]) / h).T


def tie_break_general(
    objective: Objective,
    dims: Sequence[int] | int,
    optimum: float,
    tolerance: float,
    anchor: ArrayLike,
    start: ArrayLike,
    *,
    pieces: Callable[[np.ndarray], np.ndarray] | None = None,
    max_iter: int = 200,
) -> SolveResult:
    """Weights closest to ``anchor`` among those with ``objective <= optimum + tolerance``.

    For nonlinear objectives over a product of simplices: SLSQP on ``||w - anchor||^2`` subject
    to the bound, started at ``start`` (the feasible pure optimum). When the objective is a
    maximum of smooth pieces (a range is ``max_{i,j} (phi_i - phi_j)``), passing ``pieces``
    turns the nonsmooth scalar constraint into smooth ones, ``piece <= bound``, which SLSQP
    handles reliably. SLSQP can still stop slightly infeasible, so its answer is pulled back
    along the segment from ``start`` until feasible and compared with the best feasible point on
    the segment from ``start`` to the anchor; the closest feasible candidate (``start``
    included) is returned. The result is therefore always feasible and never farther from the
    anchor than ``start``. Feasibility is judged up to 1e-9 of the larger objective value at
    ``anchor`` and ``start`` (or of ``tolerance``), as in :func:`tie_break_range`.

    Parameters
    ----------
    objective : callable
        Batch objective as for :func:`grid_refine`.
    dims : sequence of int or int
        Block sizes.
    optimum : float
        Objective value at the pure optimum.
    tolerance : float
        Allowed excess (>= 0).
    anchor, start : array_like, shape (sum(dims),)
        Anchor weights and the pure optimum (both on the product of simplices).
    pieces : callable, optional
        Maps (m, sum(dims)) to (m, P) with ``objective == pieces.max(axis=1)``.
    max_iter : int, default 200
        SLSQP iteration cap.

    Returns
    -------
    SolveResult
        Method ``"tie_break_slsqp"``; ``details`` as :func:`tie_break_range` plus ``slsqp_status``
        and ``source`` (``"start"``, ``"segment"`` or ``"slsqp"``).
    """
    started = time.perf_counter()
    dims = checked_dims(dims)
    tolerance, anchor, start, bound, record = _tie_break_setup(
        dims, optimum, tolerance, anchor, start, started
    )
    f = CountedObjective(objective, sum(dims))
    f_anchor, f_start = f(np.vstack([anchor, start]))
    slack = _FEASIBILITY_SLACK * max(abs(f_anchor), abs(f_start), tolerance)
    if f_anchor <= bound + slack:
        return record(anchor, float(f_anchor), "optimal", "tie_break_slsqp", anchor_feasible=True)
    if f_start > bound + slack:
        raise InputError(
            f"start is not feasible: objective {f_start} exceeds optimum + tolerance = {bound}"
        )
    if pieces is None:

        def margin(W: np.ndarray) -> np.ndarray:
            return bound - f(W)
    else:
        top = np.max(pieces(start[None]), axis=1)[0]
        if not np.isclose(top, f_start, rtol=1e-9, atol=1e-12):
            raise InputError(f"pieces must have maximum equal to the objective: {top} vs {f_start}")

        def margin(W: np.ndarray) -> np.ndarray:
            return bound - np.asarray(pieces(W), dtype=float)

    constraints = [
        {
            "type": "ineq",
            "fun": lambda w: margin(w[None]).ravel(),
            "jac": lambda w: _forward_jacobian(margin, w),
        }
    ]
    for block in block_slices(dims):
        row = np.zeros(sum(dims))
        row[block] = 1.0
        constraints.append(
            {"type": "eq", "fun": lambda w, row=row: row @ w - 1.0, "jac": lambda w, row=row: row}
        )
    res = minimize(
        lambda w: float(np.sum((w - anchor) ** 2)),
        start,
        jac=lambda w: 2 * (w - anchor),
        method="SLSQP",
        bounds=[(0.0, 1.0)] * sum(dims),
        constraints=constraints,
        options={"maxiter": max_iter, "ftol": 1e-14},
    )
    sources = ["start", "segment"]
    candidates = [start, _segment_point(f, start, anchor, bound + slack)]
    if np.all(np.isfinite(res.x)):
        sources.append("slsqp")
        candidates.append(_segment_point(f, start, clean_simplex(res.x, dims), bound + slack))
    candidates = clean_simplex(np.array(candidates), dims)
    values = f(candidates)
    feasible = values <= bound + slack
    distances = np.where(feasible, np.linalg.norm(candidates - anchor, axis=1), np.inf)
    pick = int(np.argmin(distances))
    return record(
        candidates[pick],
        float(values[pick]),
        "optimal",
        "tie_break_slsqp",
        anchor_feasible=False,
        slsqp_status=f"{res.status}: {res.message}",
        source=sources[pick],
    )


def vertex_tie_break(
    objective: Objective,
    dims: Sequence[int],
    pure: SolveResult,
    tolerance: float,
    anchor: np.ndarray,
) -> SolveResult:
    """Discrete tie-break: the vertex (combination) within tolerance closest to the anchor."""
    started = time.perf_counter()
    vertices = np.hstack(
        [
            lat[p]
            for lat, p in zip(
                [simplex_lattice(k, 1) for k in dims],
                np.unravel_index(np.arange(math.prod(dims)), dims),
            )
        ]
    )
    values = np.asarray(objective(vertices), dtype=float)
    bound = pure.objective + tolerance
    distances = np.where(values <= bound, np.linalg.norm(vertices - anchor, axis=1), np.inf)
    pick = int(np.argmin(distances))
    return _tie_break_record(
        vertices[pick],
        float(values[pick]),
        "optimal",
        "tie_break_vertices",
        started,
        pure=pure.weights,
        anchor=anchor,
        tolerance=tolerance,
        bound=bound,
        anchor_feasible=False,
    )
