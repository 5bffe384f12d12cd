"""Weight solvers for the pseudo-risks (DESIGN.md section 5).

- :func:`minimise_range_lp` / :func:`minimise_range_cvxpy`: the exact path. For the riesz blend
  each half of the mixed-minimax risk is ``min over the simplex of range(a @ V)``, a small LP.
- :func:`grid_refine`: any objective over a product of simplices (nonlinear blends, the minimax
  risk): simplex lattice, a pairwise mass-transfer pattern search, then a cutting-plane polish.
- :func:`tie_break_range` / :func:`tie_break_general`: among near-optimal weights, the ones closest
  to an anchor (the prediction-loss stacking weights).
- :func:`search_weights`: the whole weight search for a pair table.

Every solve returns a :class:`SolveResult` record. Weight vectors are returned exactly on their
simplex (tiny negatives clipped, blocks renormalised) and objectives are recomputed at the
returned weights, so a record never reports a value the weights do not attain.
"""

from __future__ import annotations

import functools
import itertools
import math
import os
import sys
import threading
import time
import warnings
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field

import clarabel
import cvxpy as cp
import numpy as np
from numpy.typing import ArrayLike
from scipy.optimize import minimize
from scipy.sparse import csc_matrix

from stackdr.core import checked_mask, pairwise_gaps, swap_deviations, value_range
from stackdr.errors import InputError

__all__ = [
    "SolveResult",
    "WeightSearch",
    "minimise_range_lp",
    "minimise_range_cvxpy",
    "simplex_lattice",
    "lattice_size",
    "lattice_resolution",
    "grid_refine",
    "tie_break_range",
    "tie_break_general",
    "search_weights",
]

Objective = Callable[[np.ndarray], np.ndarray]

# Clarabel's defaults (1e-8) leave projections about 1e-5 off in the weights; these settings give
# agreement with an active-set QP to about 1e-8 at no measurable cost for problems this small.
# The names are Clarabel's own settings (attributes of clarabel.DefaultSettings), which cvxpy
# passes through unchanged.
_CLARABEL_TIGHT = {
    "tol_gap_abs": 1e-12,
    "tol_gap_rel": 1e-12,
    "tol_feas": 1e-12,
    "tol_ktratio": 1e-10,
}
# cvxpy statuses whose solution is used, and the status recorded for them.
_CVXPY_SOLVED = {cp.OPTIMAL: "optimal", cp.OPTIMAL_INACCURATE: "inaccurate"}
# The same for Clarabel called directly (its status names, as ``str(solution.status)``).
_CLARABEL_SOLVED = {"Solved": "optimal", "AlmostSolved": "inaccurate"}
# Weights further than this from the pure minimiser count as "moved" by a tie-break.
_MOVED_ATOL = 1e-9
# Tie-break feasibility is judged up to this fraction of the objective's scale.
_FEASIBILITY_SLACK = 1e-9
# Default lattice settings of grid_refine (documented there).
_DEFAULT_RESOLUTION = 20
_DEFAULT_MAX_POINTS = 20_000


@dataclass
class SolveResult:
    """Record of one solve.

    Attributes
    ----------
    weights : numpy.ndarray
        The weights found (stacked blocks for a product of simplices), exactly on the simplex.
    objective : float
        Objective value recomputed at ``weights``.
    status : str
        ``"optimal"`` (exact solver succeeded), ``"inaccurate"`` (the conic solver, through
        cvxpy or directly, reported an inaccurate optimum; weights still used), ``"converged"``
        (grid refinement met its stopping rule), ``"lattice"`` (best lattice point, no
        refinement), other stopping reasons of :func:`grid_refine`, or ``"fallback"`` (solver
        failure; a warning names it).
    method : str
        Which solver produced the weights.
    time : float
        Wall-clock seconds spent.
    details : dict
        Solver-specific diagnostics (iterations, lattice size, tie-break flags, ...).
    """

    weights: np.ndarray
    objective: float
    status: str
    method: str
    time: float
    details: dict = field(default_factory=dict)


@dataclass
class WeightSearch:
    """Result of :func:`search_weights`.

    Attributes
    ----------
    alpha, beta : numpy.ndarray
        Propensity-side (K1) and outcome-side (K2) weights.
    s_out, s_ps : float
        Outcome-direction and weight-direction sensitivities at the chosen weights.
    risk : float
        The criterion at the chosen weights (``R_mix`` or ``R_mm``, squared scale).
    estimate : float
        The blended estimate ``phi(alpha) @ beta``.
    criterion : str
        ``"mixed"`` or ``"minimax"``.
    records : dict of str to SolveResult
        One record per step (``"alpha"``, ``"beta"``, ``"joint"``, and ``"..._tie_break"``).
    """

    alpha: np.ndarray
    beta: np.ndarray
    s_out: float
    s_ps: float
    risk: float
    estimate: float
    criterion: str
    records: dict[str, SolveResult]


# ---------------------------------------------------------------------------------------------
# Validation and simplex helpers


def _value_matrix(V: ArrayLike, name: str = "V") -> np.ndarray:
    V = np.asarray(V, dtype=float)
    if V.ndim != 2 or V.shape[0] == 0 or V.shape[1] == 0:
        raise InputError(f"{name} must be a non-empty 2-D array, got shape {V.shape}")
    bad = np.argwhere(~np.isfinite(V))
    if bad.size:
        k, j = bad[0]
        raise InputError(f"{name}[{k}, {j}] = {V[k, j]} is not finite")
    return V


def _select_columns(V: np.ndarray, mask: ArrayLike | None, name: str = "mask") -> np.ndarray:
    mask = checked_mask(mask, V.shape[1], name)
    return V if mask is None else V[:, mask]


def _block_slices(dims: Sequence[int]) -> list[slice]:
    edges = np.cumsum([0, *dims])
    return [slice(int(a), int(b)) for a, b in zip(edges[:-1], edges[1:])]


def _checked_dims(dims: Sequence[int] | int) -> list[int]:
    dims = [int(dims)] if np.isscalar(dims) else [int(d) for d in dims]
    if not dims or min(dims) < 1:
        raise InputError(f"dims must be a non-empty list of positive block sizes, got {dims}")
    return dims


def _clean_simplex(weights: np.ndarray, dims: Sequence[int] | None = None) -> np.ndarray:
    """Clip solver round-off below zero and renormalise each block to sum exactly one."""
    w = np.clip(np.asarray(weights, dtype=float), 0.0, None)
    dims = [w.shape[-1]] if dims is None else dims
    for block in _block_slices(dims):
        w[..., block] /= w[..., block].sum(axis=-1, keepdims=True)
    return w


def _checked_weights(w: ArrayLike, dims: Sequence[int], name: str) -> np.ndarray:
    w = np.asarray(w, dtype=float)
    if w.shape != (sum(dims),):
        raise InputError(f"{name} must have shape ({sum(dims)},), got {w.shape}")
    if not np.all(np.isfinite(w)) or w.min() < -1e-9:
        raise InputError(f"{name} must be finite and non-negative, got {w}")
    for block in _block_slices(dims):
        if abs(w[block].sum() - 1.0) > 1e-6:
            raise InputError(
                f"{name} block {block.start}:{block.stop} sums to {w[block].sum()}, not 1"
            )
    return _clean_simplex(w, dims)


def _checked_tolerance(tolerance: float, name: str = "tolerance") -> float:
    tolerance = float(tolerance)
    if not np.isfinite(tolerance) or tolerance < 0:
        raise InputError(f"{name} must be a finite number >= 0, got {tolerance}")
    return tolerance


def _standardised(V: np.ndarray) -> tuple[np.ndarray, float]:
    """Centre and scale values: the range is translation-invariant and scales linearly, and
    O(1) entries keep solver tolerances meaningful whatever the estimate's units."""
    lo, hi = V.min(), V.max()
    scale = hi - lo if hi > lo else 1.0
    return (V - 0.5 * (lo + hi)) / scale, scale


def _vertex_fallback(
    Vm: np.ndarray, method: str, reason: str, started: float, details: dict
) -> SolveResult:
    warnings.warn(
        f"{method} failed ({reason}); falling back to the best single learner (vertex)",
        RuntimeWarning,
        stacklevel=3,
    )
    ranges = np.ptp(Vm, axis=1)
    k = int(np.argmin(ranges))
    weights = np.zeros(Vm.shape[0])
    weights[k] = 1.0
    details = {**details, "failure": reason}
    return SolveResult(weights, float(ranges[k]), "fallback", method, _since(started), details)


def _since(started: float) -> float:
    return time.perf_counter() - started


def _quiet_solve(problem: cp.Problem, **kwargs) -> None:
    """Solve without cvxpy's "may be inaccurate" warning: that status is recorded instead."""
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="Solution may be inaccurate")
        problem.solve(**kwargs)


def _trivial_single(Vm: np.ndarray, method: str, started: float) -> SolveResult:
    return SolveResult(
        np.ones(1), float(np.ptp(Vm[0])), "optimal", method, _since(started), {"trivial": True}
    )


# ---------------------------------------------------------------------------------------------
# Exact path: range of a linear map over the simplex


@functools.lru_cache(maxsize=64)
def _range_lp_template(K: int, J: int) -> tuple[np.ndarray, ...]:
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


def _range_rows(Vs: np.ndarray) -> np.ndarray:
    """The rows ``(a @ Vs)_j - upper <= 0`` and ``lower - (a @ Vs)_j <= 0`` over the variables
    (a, upper, lower), shared by the range LP and the tie-break QP."""
    K, J = Vs.shape
    rows = _range_lp_template(K, J)[1].copy()
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
    Vm = _select_columns(_value_matrix(V), mask)
    K, J = Vm.shape
    if K == 1:
        return _trivial_single(Vm, "range_lp", started)
    Vs, _ = _standardised(Vm)
    cost, _, b_ub, A_eq, bounds = _range_lp_template(K, J)
    A_ub = _range_rows(Vs)
    try:
        ok, x, message, iterations = _highs_range_lp(cost, A_ub, b_ub, A_eq, bounds)
    except Exception as exc:  # noqa: BLE001 - a crashing LP must not end the run silently
        return _vertex_fallback(
            Vm, "range_lp", f"{type(exc).__name__}: {exc}", started, {"n_columns": J}
        )
    details = {"message": message, "n_columns": J, "iterations": iterations}
    if not ok or x is None or not np.all(np.isfinite(x)):
        return _vertex_fallback(Vm, "range_lp", f"HiGHS status {message}", started, details)
    weights = _clean_simplex(x[:K])
    return SolveResult(
        weights, float(np.ptp(weights @ Vm)), "optimal", "range_lp", _since(started), details
    )


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


def _highs_range_lp(cost, A_ub, b_ub, A_eq, bounds) -> tuple[bool, np.ndarray, str, int]:
    """Solve min cost'x s.t. A_ub x <= b_ub, A_eq x = 1, bounds, with HiGHS through highspy.

    One solver object per thread is reused (thread-safe, and it avoids scipy's per-call wrapper
    overhead, about 1.3 ms of a 1.8 ms solve). HiGHS' default 1e-7 tolerances let it stop up to
    ~1e-7 (of the scaled values) above the optimum, and without presolve its bound perturbations
    can leave weights of 1e-7 that cost ~1e-6 in range (both seen on sparse tables); tight
    tolerances with presolve matched cvxpy to 1e-9 on such tables.
    Returns (optimal?, x, model status text, simplex iterations).
    """
    return _highs_lp("range", cost, A_ub, b_ub, A_eq, np.ones(A_eq.shape[0]), bounds)


# Options of the thread-local HiGHS solvers: "range" for the range LP (see _highs_range_lp);
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


def _highs_lp(kind, cost, A_ub, b_ub, A_eq, b_eq, bounds) -> tuple[bool, np.ndarray, str, int]:
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
    Vm = _select_columns(_value_matrix(V), mask)
    K = Vm.shape[0]
    if K == 1:
        return _trivial_single(Vm, "range_cvxpy", started)
    Vs, _ = _standardised(Vm)
    a = cp.Variable(K, nonneg=True)
    values = a @ Vs
    problem = cp.Problem(cp.Minimize(cp.max(values) - cp.min(values)), [cp.sum(a) == 1])
    options = _CLARABEL_TIGHT if solver == "CLARABEL" else {}
    try:
        _quiet_solve(problem, solver=solver, **options)
    except cp.error.SolverError as exc:
        return _vertex_fallback(Vm, "range_cvxpy", str(exc), started, {})
    details = {"solver_status": problem.status, "solver": solver}
    if problem.status not in _CVXPY_SOLVED or a.value is None:
        return _vertex_fallback(Vm, "range_cvxpy", f"status {problem.status}", started, details)
    weights = _clean_simplex(a.value)
    status = _CVXPY_SOLVED[problem.status]
    return SolveResult(
        weights, float(np.ptp(weights @ Vm)), status, "range_cvxpy", _since(started), details
    )


# ---------------------------------------------------------------------------------------------
# Grid plus refinement for any objective over a product of simplices


@functools.lru_cache(maxsize=128)
def _cached_lattice(k: int, resolution: int) -> np.ndarray:
    lattice = simplex_lattice(k, resolution)
    lattice.setflags(write=False)
    return lattice


def simplex_lattice(k: int, resolution: int) -> np.ndarray:
    """All points of the k-simplex with coordinates in ``{0, 1/r, ..., 1}``.

    Parameters
    ----------
    k : int
        Number of coordinates.
    resolution : int
        Denominator ``r >= 1``; ``r = 1`` gives the vertices.

    Returns
    -------
    numpy.ndarray, shape (C(r + k - 1, k - 1), k)
        Rows in decreasing lexicographic order (so ``e_1`` comes first).

    Examples
    --------
    >>> simplex_lattice(3, 2).tolist()  # doctest: +NORMALIZE_WHITESPACE
    [[1.0, 0.0, 0.0], [0.5, 0.5, 0.0], [0.5, 0.0, 0.5],
     [0.0, 1.0, 0.0], [0.0, 0.5, 0.5], [0.0, 0.0, 1.0]]
    """
    if k < 1 or resolution < 1:
        raise InputError(f"simplex_lattice needs k >= 1 and resolution >= 1, got {k}, {resolution}")
    # Stars and bars: k - 1 bar positions among r + k - 1 slots fix the counts between bars.
    combos = list(itertools.combinations(range(resolution + k - 1), k - 1))
    bars = np.array(combos, dtype=int).reshape(len(combos), k - 1)
    ends = np.full((bars.shape[0], 1), -1), np.full((bars.shape[0], 1), resolution + k - 1)
    counts = np.diff(np.hstack([ends[0], bars, ends[1]]), axis=1) - 1
    return counts[::-1] / resolution


def lattice_size(dims: Sequence[int], resolution: int) -> int:
    """Number of points of the product lattice ``prod_b C(r + K_b - 1, K_b - 1)``."""
    return math.prod(math.comb(resolution + k - 1, k - 1) for k in dims)


def lattice_resolution(
    dims: Sequence[int] | int,
    resolution: int | None = None,
    max_points: int = _DEFAULT_MAX_POINTS,
) -> int:
    """The lattice denominator :func:`grid_refine` uses for these settings.

    Parameters
    ----------
    dims : sequence of int or int
        Block sizes.
    resolution : int, optional
        Requested denominator (default 20).
    max_points : int, default 20000
        Cap on the product lattice size; the denominator is lowered until the lattice fits,
        never below 1.

    Returns
    -------
    int

    Examples
    --------
    >>> lattice_resolution([4]), lattice_resolution([4, 4])
    (20, 7)
    """
    dims = _checked_dims(dims)
    r = _DEFAULT_RESOLUTION if resolution is None else int(resolution)
    if r < 1:
        raise InputError(f"resolution must be >= 1, got {resolution}")
    while r > 1 and lattice_size(dims, r) > max_points:
        r -= 1
    return r


class _CountedObjective:
    """Wraps a batch objective: checks its output, maps NaN to +inf, counts evaluated rows."""

    def __init__(self, objective: Objective, dim: int):
        self.objective = objective
        self.dim = dim
        self.rows = 0

    def __call__(self, W: np.ndarray) -> np.ndarray:
        values = np.asarray(self.objective(W), dtype=float)
        if values.shape != (W.shape[0],):
            raise InputError(
                f"objective must map an array of shape (m, {self.dim}) to shape (m,), "
                f"got {values.shape} for m = {W.shape[0]}"
            )
        self.rows += W.shape[0]
        return np.where(np.isnan(values), np.inf, values)


def _scan_lattice(
    f: _CountedObjective, lattices: list[np.ndarray], pool: int, batch_size: int
) -> tuple[np.ndarray, np.ndarray]:
    """Evaluate the product lattice in batches; return the ``pool`` best points and values."""
    sizes = [len(lat) for lat in lattices]
    total = math.prod(sizes)
    best_idx = np.zeros(0, dtype=np.int64)
    best_val = np.zeros(0)
    for start in range(0, total, batch_size):
        flat = np.arange(start, min(start + batch_size, total))
        parts = np.unravel_index(flat, sizes)
        idx = np.concatenate([best_idx, flat])
        val = np.concatenate([best_val, f(np.hstack([lat[p] for lat, p in zip(lattices, parts)]))])
        keep = np.lexsort((idx, val))[:pool]  # ties go to the earlier lattice point
        best_idx, best_val = idx[keep], val[keep]
    parts = np.unravel_index(best_idx, sizes)
    return np.hstack([lat[p] for lat, p in zip(lattices, parts)]), best_val


def _diverse_starts(points: np.ndarray, values: np.ndarray, n: int, spacing: float) -> np.ndarray:
    """Indices of up to n best points, skipping lattice neighbours of points already chosen
    (neighbours would refine into the same local minimum); topped up with the next best."""
    chosen: list[int] = []
    for i in range(len(points)):
        if len(chosen) == n:
            break
        if all(np.max(np.abs(points[i] - points[c])) > spacing * 1.5 for c in chosen):
            chosen.append(i)
    rest = [i for i in range(len(points)) if i not in chosen]
    return np.array(chosen + rest[: n - len(chosen)], dtype=int)


def _transfer_moves(dims: Sequence[int]) -> tuple[np.ndarray, np.ndarray]:
    pairs = [
        (i, j)
        for block in _block_slices(dims)
        for i in range(block.start, block.stop)
        for j in range(block.start, block.stop)
        if i != j
    ]
    src, dst = (np.array(v, dtype=int) for v in zip(*pairs)) if pairs else (np.zeros(0, int),) * 2
    return src, dst


def _pattern_search(
    f: _CountedObjective,
    X: np.ndarray,
    F: np.ndarray,
    dims: Sequence[int],
    step: float,
    min_step: float,
    ftol: float,
    max_iter: int,
) -> tuple[np.ndarray, np.ndarray, int]:
    """Pairwise mass transfer (move up to ``step`` of weight from coordinate i to j within a
    block), best move per start, step halved when no move improves; all starts in one batch."""
    src, dst = _transfer_moves(dims)
    steps = np.full(len(X), step)
    if src.size == 0:
        return X, F, 0
    cols = np.arange(src.size)
    for iteration in range(max_iter):
        live = np.flatnonzero(steps >= min_step)
        if live.size == 0:
            return X, F, iteration
        base = X[live]
        moved = np.minimum(steps[live, None], base[:, src])
        cand = np.repeat(base[:, None, :], src.size, axis=1)
        cand[:, cols, src] -= moved
        cand[:, cols, dst] += moved
        vals = f(cand.reshape(-1, X.shape[1])).reshape(live.size, src.size)
        vals[moved <= 0] = np.inf
        best = np.argmin(vals, axis=1)
        best_val = vals[np.arange(live.size), best]
        improved = best_val < F[live] - ftol
        winners = live[improved]
        X[winners] = _clean_simplex(cand[improved, best[improved]], dims)
        F[winners] = best_val[improved]
        steps[live[~improved]] /= 2
    return X, F, max_iter


def _jittered(x: np.ndarray, dims: Sequence[int], scales: np.ndarray, rng) -> np.ndarray:
    """Points ``(1 - s) x + s w`` with w uniform on each simplex: inside the product of simplices
    and off the kinks through x with probability one. Then, at the smallest scale, one point
    (nearly) towards each vertex: these stay close to the faces through x, where a boundary
    optimum's pieces live and uniform jitter, which raises every zero coordinate, may step past
    them. Exactly vertex-directed points could slide along a kink (when the vertex ties the
    same pieces as x), so 0.1% of uniform jitter is mixed in."""
    n = len(scales) + x.size
    W = np.hstack([rng.dirichlet(np.ones(k), size=n) for k in dims])
    for block in _block_slices(dims):
        rows = slice(len(scales) + block.start, len(scales) + block.stop)
        W[rows, block] = 0.999 * np.eye(block.stop - block.start) + 0.001 * W[rows, block]
    s = np.concatenate([scales, np.full(x.size, scales[0])])[:, None]
    return (1 - s) * x[None, :] + s * W


def _sampled_cuts(
    f: _CountedObjective, Y: np.ndarray, dims: Sequence[int], h: np.ndarray, scale: float
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Linear models ``f(y) + g'(z - y)`` at sample points y, by forward differences towards each
    vertex of the point's own block (which keeps every difference point on the simplex).

    With f linear near y the slope towards vertex e_k of block b is g_k - g_b'y_b, and that vector
    is a valid gradient representative for moves that keep each block's sum. A second difference
    flags a difference that crossed a kink (or drowned in round-off); such samples are marked
    invalid (their slopes would belong to no single linear piece and could cut off the optimum).
    ``h`` holds one step per point. A kink inside a step of 1e-8 moves the second difference by
    about 1e-8 of the objective's ``scale``; curvature moves it by h^2 f'', so second
    differences up to 1e-14 of the scale are accepted. Returns slopes, intercepts and flags
    (slopes of invalid samples are zeroed).
    """
    m, D = Y.shape
    same_block = np.zeros((D, D))
    for block in _block_slices(dims):
        same_block[block, block] = 1.0

    def shifted(steps: np.ndarray) -> np.ndarray:  # (m, D, D): row q moves y towards vertex q
        s = steps[:, None, None]
        return Y[:, None, :] * (1 - s * same_block[None]) + s * np.eye(D)[None]

    values = f(np.vstack([Y, shifted(h).reshape(-1, D), shifted(2 * h).reshape(-1, D)]))
    f0 = values[:m]
    f1 = values[m : m + m * D].reshape(m, D)
    f2 = values[m + m * D :].reshape(m, D)
    first = f1 - f0[:, None]
    second = f2 - 2 * f1 + f0[:, None]
    largest = np.max(np.abs(values[np.isfinite(values)]), initial=0.0)
    noise = 1e3 * np.finfo(float).eps * largest + 1e-14 * scale
    valid = np.all(np.isfinite(second), axis=1) & np.all(
        np.abs(second) <= 1e-3 * np.abs(first) + noise, axis=1
    )
    grads = np.where(valid[:, None], first / h[:, None], 0.0)
    intercepts = f0 - np.sum(grads * Y, axis=1)
    return grads, intercepts, valid


def _model_minimum(
    grads: np.ndarray,
    intercepts: np.ndarray,
    x: np.ndarray,
    fx: float,
    radius: float,
    dims: Sequence[int],
    lower_bound: float | None,
) -> tuple[np.ndarray, float] | None:
    """Minimise the cutting-plane model ``max_i (c_i + g_i'z)`` over the product of simplices
    intersected with the box ``|z - x| <= radius`` (an LP).

    Solved in local units, ``z = x + radius u`` and ``t = fx + radius tau``, so that the box is
    ``|u| <= 1`` whatever the radius: with raw coordinates a box narrower than HiGHS' 1e-7
    feasibility tolerance makes the LP fail.
    """
    D = x.size
    cost = np.zeros(D + 1)
    cost[D] = 1.0
    A_ub = np.hstack([grads, -np.ones((len(grads), 1))])
    b_ub = (fx - intercepts - grads @ x) / radius
    A_eq = np.zeros((len(dims), D + 1))
    for row, block in enumerate(_block_slices(dims)):
        A_eq[row, block] = 1.0
    tau_floor = -np.inf if lower_bound is None else (lower_bound - fx) / radius
    lower = np.append(np.maximum(-x / radius, -1.0), tau_floor)
    upper = np.append(np.minimum((1.0 - x) / radius, 1.0), np.inf)
    ok, solution, _, _ = _highs_lp(
        "model", cost, A_ub, b_ub, A_eq, np.zeros(len(dims)), np.column_stack([lower, upper])
    )
    if not ok or not np.all(np.isfinite(solution)):
        return None
    return _clean_simplex(x + radius * solution[:D], dims), fx + radius * float(solution[D])


def _cutting_plane_polish(
    f: _CountedObjective,
    x: np.ndarray,
    fx: float,
    dims: Sequence[int],
    rng,
    radius: float,
    ftol: float,
    scale: float,
    lower_bound: float | None,
    n_samples: int,
    max_iter: int,
) -> tuple[np.ndarray, float, int, str]:
    """Trust-region cutting-plane (Kelley / bundle type) refinement.

    Pairwise transfers stall at kinks of piecewise-linear objectives such as max - min, where no
    single transfer descends although a multi-coordinate move does. Here linear pieces are
    sampled around the current point at several scales, the piecewise-linear model they define
    is minimised by an LP inside a box, and the true objective decides acceptance. For a convex
    piecewise-linear objective the model is a lower bound and its minimiser lands exactly on the
    optimal vertex once the pieces active there are sampled, so the LP optimum is reproduced to
    round-off; a predicted decrease below 1e-9 of the objective's scale then certifies the
    optimum. For nonconvex objectives the box keeps the model local and cuts contradicted by
    evaluated points are dropped, so it is a local search.
    """

    def cuts_near(point: np.ndarray, largest: float) -> tuple[np.ndarray, np.ndarray]:
        # Jitter at scales from min(1e-6, radius / 100) up to ``largest``: the finest follow the
        # trust region down when the model is loose at the point (pieces that switch within
        # 1e-7 of it). Difference step min(1e-8, jitter / 100) gives exact slopes, also for
        # curved pieces; where round-off in the objective (estimates near 210 that differ by
        # 1e-4) makes such a sample fail the kink test, a step of 1% of the jitter replaces it.
        smallest = min(1e-6, radius / 100)
        Y = _jittered(point, dims, np.geomspace(smallest, max(largest, smallest), n_samples), rng)
        jitter = np.linalg.norm(Y - point, axis=1)
        Y, jitter = Y[jitter > 0.5 * smallest], jitter[jitter > 0.5 * smallest]  # y = x: a kink
        steps = np.concatenate([np.minimum(1e-8, jitter / 100), jitter / 100])
        grads, intercepts, valid = _sampled_cuts(f, np.vstack([Y, Y]), dims, steps, scale)
        fine, coarse = valid[: len(Y)], valid[len(Y) :]
        use = np.concatenate([fine, coarse & ~fine])
        return grads[use], intercepts[use]

    grads, intercepts = cuts_near(x, radius)
    max_cuts = 10 * (x.size + 1)  # most recent cuts; older ones lie far behind the iterate
    # Difference quotients carry relative errors of 1e-8 or more, so the model cannot certify
    # decreases much below 1e-9 of the objective's scale; asking for more only shrinks the
    # trust region in vain.
    model_tol = max(ftol, 1e-9 * scale)
    cut_tol = 1e-9 * scale
    for iteration in range(1, max_iter + 1):
        if radius < 1e-10:  # no improving point down to this scale: locally optimal
            return x, fx, iteration, "converged"
        if grads.shape[0] == 0:
            return x, fx, iteration, "no_valid_cuts"
        solved = _model_minimum(grads, intercepts, x, fx, radius, dims, lower_bound)
        if solved is None:
            return x, fx, iteration, "model_lp_failed"
        z, t = solved
        predicted = fx - t
        reached = lower_bound is not None and fx <= lower_bound + ftol
        if predicted <= model_tol or reached:
            return x, fx, iteration, "converged"
        # Cuts come from jittered points only: at z itself (typically a kink, being an LP
        # vertex) one-sided differences mix pieces, which no second difference can detect.
        new_g, new_c = cuts_near(z, radius / 2)
        fz = float(f(z[None])[0])
        step = float(np.max(np.abs(z - x)))
        # Trust-region update on the ratio of achieved to predicted decrease (a null step has
        # ratio <= 0: its new cuts refine the model around z). A poor model shrinks the region
        # towards the step, but at most 16-fold: when z is (nearly) x the model was merely
        # loose at x, and collapsing the region would end the search there.
        ratio = (fx - fz) / predicted
        if fz < fx - ftol:
            x, fx = z, fz
        if ratio > 0.75 and step > 0.9 * radius:
            radius = min(2 * radius, 1.0)
        elif ratio < 0.25:
            radius = max(step, radius / 8) / 2
        grads = np.vstack([grads, new_g])[-max_cuts:]
        intercepts = np.concatenate([intercepts, new_c])[-max_cuts:]
        # A cut lying above an evaluated value is not a lower model there: drop it.
        consistent = (grads @ x + intercepts <= fx + cut_tol) & (
            grads @ z + intercepts <= fz + cut_tol
        )
        grads, intercepts = grads[consistent], intercepts[consistent]
    return x, fx, max_iter, "iteration_limit"


def grid_refine(
    objective: Objective,
    dims: Sequence[int] | int,
    resolution: int | None = None,
    *,
    max_points: int = _DEFAULT_MAX_POINTS,
    n_starts: int = 3,
    refine: bool = True,
    lower_bound: float | None = None,
    batch_size: int = 4096,
    max_iter: int = 200,
    seed: int = 0,
) -> SolveResult:
    """Minimise a batch objective over a product of simplices: lattice, then local refinement.

    Parameters
    ----------
    objective : callable
        Maps an array of shape (m, sum(dims)) of stacked weight blocks (each block on its own
        simplex) to objective values of shape (m,). NaN counts as +inf.
    dims : sequence of int or int
        Block sizes, e.g. ``[K1]`` or ``[K1, K2]``.
    resolution : int, optional
        Lattice denominator r: every block takes all vectors with coordinates in
        ``{0, 1/r, ..., 1}`` (C(r + K - 1, K - 1) points per block, Cartesian product over
        blocks). Default: the largest r <= 20 whose product lattice has at most ``max_points``
        points. An explicit r is lowered the same way if its lattice exceeds the cap; r never
        drops below 1, so the vertices are always evaluated. ``resolution=1`` evaluates vertices
        only (discrete selection; combine with ``refine=False``).
    max_points : int, default 20000
        Cap on the lattice size.
    n_starts : int, default 3
        Number of best lattice points refined (lattice neighbours of a chosen point are skipped
        in favour of the next best distinct point).
    refine : bool, default True
        Refine the best lattice points; ``False`` returns the best lattice point.
    lower_bound : float, optional
        A known lower bound of the objective (0 for ranges); stops refinement early when reached
        and bounds the cutting-plane model.
    batch_size : int, default 4096
        Rows per objective call during the lattice scan (bounds memory).
    max_iter : int, default 200
        Iteration cap for each refinement stage, per start.
    seed : int, default 0
        Seed of the sampling inside the polish; results are deterministic for a given seed.

    Returns
    -------
    SolveResult
        Method ``"grid_refine"``. ``details`` records ``lattice_size``, ``resolution``,
        ``requested_resolution``, ``lattice_best`` (objective at the best lattice point),
        ``starts``, ``pattern_iterations``, ``polish_iterations`` and ``polish_stops`` (per
        start) and ``evaluations`` (objective rows evaluated). ``status`` is the best start's
        stopping reason: ``"converged"``, ``"iteration_limit"``, ``"no_valid_cuts"`` or
        ``"model_lp_failed"`` (the last two keep the pattern-search point); ``"lattice"`` when
        ``refine=False``.

    Notes
    -----
    Refinement has two stages per start. (1) Pattern search: move up to ``step`` of weight from
    one coordinate to another of the same block, take the best move, halve ``step`` when none
    improves (from 1/(2r) down to 1/(64 r)). (2) Cutting-plane polish: sample the objective's
    linear pieces near the current point by finite differences at jittered points (several
    scales, plus points near the faces through the current point), minimise the
    piecewise-linear model by an LP within a trust region, accept if the true objective drops.
    Stage 2 is what reaches LP accuracy on max-minus-min objectives, whose kinks stall stage 1:
    on random riesz ranges (K up to 20, also with values near 210 that differ by 1e-4) it
    matched the LP to about 1e-9 of the value spread (worst 1e-6). On smooth objectives the
    objective is matched to about 1e-10 and the weights to about 1e-5. Every random draw comes
    from ``seed``, so results are reproducible.

    Examples
    --------
    >>> V = np.array([[0.0, 2.0], [2.0, 0.0]])
    >>> res = grid_refine(lambda W: np.ptp(W @ V, axis=1), [2])
    >>> round(res.objective, 9)
    0.0
    """
    started = time.perf_counter()
    dims = _checked_dims(dims)
    requested = _DEFAULT_RESOLUTION if resolution is None else int(resolution)
    r = lattice_resolution(dims, requested, max_points)
    f = _CountedObjective(objective, sum(dims))
    lattices = [_cached_lattice(k, r) for k in dims]
    n_starts = max(1, int(n_starts))
    points, values = _scan_lattice(f, lattices, 32 * n_starts, batch_size)
    details = {
        "lattice_size": lattice_size(dims, r),
        "resolution": r,
        "requested_resolution": requested,
        "lattice_best": float(values[0]),
    }
    reached = lower_bound is not None and values[0] <= lower_bound
    if not refine or reached or sum(dims) == len(dims):
        details["evaluations"] = f.rows
        status = "lattice" if not refine else "converged"
        return SolveResult(
            points[0], float(values[0]), status, "grid_refine", _since(started), details
        )

    # The objective's scale near the optimum, from the best lattice values (the largest values
    # can be huge, e.g. a log-loss at the simplex boundary, and would loosen every tolerance).
    scale = float(np.max(np.abs(values[np.isfinite(values)]), initial=0.0)) or 1.0
    ftol = 1e-12 * scale
    starts = _diverse_starts(points, values, n_starts, 1.0 / r)
    X, F = points[starts].copy(), values[starts].copy()
    X, F, pattern_iterations = _pattern_search(
        f, X, F, dims, step=0.5 / r, min_step=1 / (64 * r), ftol=ftol, max_iter=max_iter
    )
    rng = np.random.default_rng(seed)
    polish_iterations, polish_stops = [], []
    for i in range(len(X)):
        if lower_bound is not None and F[i] <= lower_bound:
            polish_iterations.append(0)
            polish_stops.append("converged")
            continue
        X[i], F[i], its, stop = _cutting_plane_polish(
            f,
            X[i],
            F[i],
            dims,
            rng,
            radius=1.0 / r,
            ftol=ftol,
            scale=scale,
            lower_bound=lower_bound,
            n_samples=sum(dims) + 1,
            max_iter=max_iter,
        )
        polish_iterations.append(its)
        polish_stops.append(stop)
    X = _clean_simplex(X, dims)
    F = f(X)
    best = int(np.argmin(F))
    details.update(
        starts=len(X),
        pattern_iterations=pattern_iterations,
        polish_iterations=polish_iterations,
        polish_stops=polish_stops,
        evaluations=f.rows,
    )
    status = polish_stops[best]
    return SolveResult(X[best], float(F[best]), status, "grid_refine", _since(started), details)


# ---------------------------------------------------------------------------------------------
# Tie-breaks: closest to an anchor among near-optimal weights


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
    return SolveResult(weights, objective, status, method, _since(started), details)


def _tie_break_setup(
    dims: Sequence[int],
    optimum: float,
    tolerance: float,
    anchor: ArrayLike,
    start: ArrayLike,
    started: float,
) -> tuple[float, np.ndarray, np.ndarray, float, Callable[..., SolveResult]]:
    """Checked inputs of a tie-break, its bound and a record maker with the shared details."""
    tolerance = _checked_tolerance(tolerance)
    anchor = _checked_weights(anchor, dims, "anchor")
    start = _checked_weights(start, dims, "start (the pure minimiser)")
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
    Vm = _select_columns(_value_matrix(V), mask)
    K, J = Vm.shape
    tolerance, anchor, start, bound, record = _tie_break_setup(
        [K], pure.objective, tolerance, anchor, pure.weights, started
    )
    r_pure = float(np.ptp(start @ Vm))
    Vs, scale = _standardised(Vm)
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
            w = _clean_simplex((1 - theta) * w + theta * start)
            r_w = float(np.ptp(w @ Vm))
        excess = np.linalg.norm(w - anchor) - np.linalg.norm(start - anchor)
        if excess > _MOVED_ATOL:
            failure = f"QP solution ({status}) farther from the anchor than the pure minimiser"
        elif excess > 0:  # round-off: the pure minimiser is the projection
            w, r_w = start, r_pure
    if failure is not None:
        warnings.warn(
            f"tie-break failed: {failure}; stepping from the pure minimiser towards the anchor",
            RuntimeWarning,
            stacklevel=2,
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
    sum_row = _range_lp_template(K, J)[3]
    width_row = np.zeros((1, K + 2))
    width_row[0, K], width_row[0, K + 1] = 1.0, -1.0
    A = csc_matrix(np.vstack([sum_row, -np.eye(K, K + 2), _range_rows(Vs), width_row]))
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
    for options in (_CLARABEL_TIGHT, {}):
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
        if status in _CLARABEL_SOLVED and x.shape == (K + 2,) and np.all(np.isfinite(x)):
            return _clean_simplex(x[:K]), _CLARABEL_SOLVED[status]
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
    dims = _checked_dims(dims)
    tolerance, anchor, start, bound, record = _tie_break_setup(
        dims, optimum, tolerance, anchor, start, started
    )
    f = _CountedObjective(objective, sum(dims))
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
    for block in _block_slices(dims):
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
        candidates.append(_segment_point(f, start, _clean_simplex(res.x, dims), bound + slack))
    candidates = _clean_simplex(np.array(candidates), dims)
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


# ---------------------------------------------------------------------------------------------
# The weight search for a pair table


def _vertex_tie_break(
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


def _side_tolerance(tolerance, side: str, weights: np.ndarray) -> float:
    if callable(tolerance):
        return _checked_tolerance(tolerance(side, weights), f"tolerance({side!r}, ...)")
    if not isinstance(tolerance, Mapping) or side not in tolerance:
        raise InputError(
            'tolerance must be a callable or a dict with keys "propensity" and "outcome", '
            f"got {tolerance!r}"
        )
    return _checked_tolerance(tolerance[side], f"tolerance[{side!r}]")


def search_weights(
    Psi: ArrayLike,
    *,
    phi: Objective | None = None,
    criterion: str = "mixed",
    tolerance: Mapping[str, float] | Callable[[str, np.ndarray], float] | None = None,
    anchors: tuple[ArrayLike, ArrayLike] | None = None,
    masks: tuple[ArrayLike | None, ArrayLike | None] | None = None,
    resolution: int | None = None,
    seed: int = 0,
) -> WeightSearch:
    """Choose propensity-side weights alpha and outcome-side weights beta for a pair table.

    Parameters
    ----------
    Psi : array_like, shape (K1, K2)
        Pair table: ``Psi[k, j]`` is the DR estimate for propensity learner k and outcome
        learner j.
    phi : callable, optional
        ``phi(A)`` maps propensity weights of shape (m, K1) to ``phi(alpha)`` of shape (m, K2)
        for a nonlinear blend; must satisfy ``phi(e_k) = Psi[k]``. Default: the riesz blend,
        ``phi(A) = A @ Psi``.
    criterion : {"mixed", "minimax"}
        ``"mixed"``: minimise ``R_mix = S_out(alpha)^2 + S_ps(beta)^2`` side by side (an LP per
        side for the riesz blend; alpha by :func:`grid_refine` for a nonlinear blend, beta still
        by LP since ``S_ps`` is linear in beta for any blend). ``"minimax"``: minimise ``R_mm``
        jointly over (alpha, beta) by :func:`grid_refine` (on the ``sqrt(R_mm)`` scale).
    tolerance : dict or callable, optional
        Enables the tie-break. Either ``{"propensity": tau_alpha, "outcome": tau_beta}`` or a
        callable ``tolerance(side, weights) -> float`` evaluated at the pure optimum of that side
        (side is ``"propensity"`` for alpha, ``"outcome"`` for beta). Tolerances are on the
        sensitivity scale (not squared); for ``"minimax"`` the larger of the two sides applies
        to ``sqrt(R_mm)``.
    anchors : (array_like, array_like), optional
        ``(alpha_anchor, beta_anchor)``, required with ``tolerance``.
    masks : (array_like or None, array_like or None), optional
        ``(propensity_mask, outcome_mask)``: boolean masks of length K1 and K2 selecting the
        direction learners of ``S_ps`` and ``S_out``.
    resolution : int, optional
        ``1``: discrete selection among single learners/pairs (vertices only, for every step,
        replacing the LP; a tie-break then picks among vertices too). Otherwise passed to
        :func:`grid_refine` for the grid-based steps (the LP steps ignore it).
    seed : int, default 0
        Seed for :func:`grid_refine`.

    Returns
    -------
    WeightSearch
    """
    table = _value_matrix(Psi, "Psi")
    K1, K2 = table.shape
    if criterion not in ("mixed", "minimax"):
        raise InputError(f'criterion must be "mixed" or "minimax", got {criterion!r}')
    if resolution is not None and int(resolution) < 1:
        raise InputError(f"resolution must be >= 1, got {resolution}")
    vertices_only = resolution is not None and int(resolution) == 1
    ps_mask, out_mask = (None, None) if masks is None else masks
    pair = _PairObjectives(
        table,
        phi,
        checked_mask(out_mask, K2, "outcome mask"),
        checked_mask(ps_mask, K1, "propensity mask"),
    )
    anchor = None
    if tolerance is not None:
        if anchors is None:
            raise InputError("anchors (alpha_anchor, beta_anchor) are required with a tolerance")
        anchor = np.concatenate(
            [
                _checked_weights(anchors[0], [K1], "alpha anchor"),
                _checked_weights(anchors[1], [K2], "beta anchor"),
            ]
        )
    search = _search_mixed if criterion == "mixed" else _search_minimax
    records = search(pair, vertices_only, resolution, seed, tolerance, anchor)
    # Tie-break records come after the pure ones, so they overwrite them here.
    final = {key.removesuffix("_tie_break"): rec.weights for key, rec in records.items()}
    if criterion == "mixed":
        alpha, beta = final["alpha"], final["beta"]
    else:
        alpha, beta = final["joint"][:K1], final["joint"][K1:]
    out_sens = float(pair.s_out(alpha[None])[0])
    ps_sens = float(pair.s_ps(beta[None])[0])
    if criterion == "mixed":
        risk = out_sens**2 + ps_sens**2
    else:
        risk = float(pair.root_minimax(np.concatenate([alpha, beta])[None])[0] ** 2)
    return WeightSearch(
        alpha=alpha,
        beta=beta,
        s_out=out_sens,
        s_ps=ps_sens,
        risk=risk,
        estimate=float(pair.phi(alpha[None])[0] @ beta),
        criterion=criterion,
        records=records,
    )


class _PairObjectives:
    """Batch objectives of a pair table: S_out over alpha, S_ps over beta, sqrt(R_mm) jointly,
    plus the smooth pieces whose maximum each nonsmooth objective is (for the tie-break)."""

    def __init__(self, table: np.ndarray, phi: Objective | None, out_mask, ps_mask):
        self.table, self.out_mask, self.ps_mask = table, out_mask, ps_mask
        self.K1, self.K2 = table.shape
        self.riesz = phi is None
        self._phi = phi
        if phi is not None:
            at_vertices = self.phi(np.eye(self.K1))
            if not np.allclose(at_vertices, table, rtol=1e-6, atol=1e-9 * np.abs(table).max()):
                raise InputError(
                    "phi(e_k) must equal Psi[k] (a vertex of the propensity side is that "
                    f"learner); largest mismatch {np.abs(at_vertices - table).max():.3g}"
                )

    def phi(self, A: np.ndarray) -> np.ndarray:
        if self._phi is None:
            return A @ self.table
        values = np.asarray(self._phi(A), dtype=float)
        if values.shape != (A.shape[0], self.K2):
            raise InputError(f"phi must return shape (m, {self.K2}), got {values.shape}")
        return values

    def s_out(self, A: np.ndarray) -> np.ndarray:
        return value_range(self.phi(A), self.out_mask)

    def s_out_pieces(self, A: np.ndarray) -> np.ndarray:
        return pairwise_gaps(self.phi(A), self.out_mask)

    def s_ps(self, B: np.ndarray) -> np.ndarray:
        return value_range(B @ self.table.T, self.ps_mask)

    def minimax_pieces(self, W: np.ndarray) -> np.ndarray:
        A, B = W[:, : self.K1], W[:, self.K1 :]
        phis = self.phi(A)
        psi = np.sum(phis * B, axis=1)
        return swap_deviations(phis, B @ self.table.T, psi, self.out_mask, self.ps_mask)

    def root_minimax(self, W: np.ndarray) -> np.ndarray:
        return self.minimax_pieces(W).max(axis=1)


def _search_mixed(
    pair: _PairObjectives,
    vertices_only: bool,
    resolution: int | None,
    seed: int,
    tolerance,
    anchor: np.ndarray | None,
) -> dict[str, SolveResult]:
    """R_mix separates: alpha minimises S_out, beta minimises S_ps (linear in beta for any
    blend, hence always an LP unless vertices only)."""
    K1, K2 = pair.table.shape
    records: dict[str, SolveResult] = {}
    if vertices_only:
        records["alpha"] = grid_refine(pair.s_out, [K1], 1, refine=False)
        records["beta"] = grid_refine(pair.s_ps, [K2], 1, refine=False)
    else:
        records["alpha"] = (
            minimise_range_lp(pair.table, pair.out_mask)
            if pair.riesz
            else grid_refine(pair.s_out, [K1], resolution, lower_bound=0.0, seed=seed)
        )
        records["beta"] = minimise_range_lp(pair.table.T, pair.ps_mask)
    if tolerance is None:
        return records

    alpha_pure, beta_pure = records["alpha"], records["beta"]
    tau = _side_tolerance(tolerance, "propensity", alpha_pure.weights)
    if vertices_only:
        records["alpha_tie_break"] = _vertex_tie_break(
            pair.s_out, [K1], alpha_pure, tau, anchor[:K1]
        )
    elif pair.riesz:
        records["alpha_tie_break"] = tie_break_range(
            pair.table, alpha_pure, tau, anchor[:K1], pair.out_mask
        )
    else:
        records["alpha_tie_break"] = tie_break_general(
            pair.s_out,
            [K1],
            alpha_pure.objective,
            tau,
            anchor[:K1],
            alpha_pure.weights,
            pieces=pair.s_out_pieces,
        )
    tau = _side_tolerance(tolerance, "outcome", beta_pure.weights)
    if vertices_only:
        records["beta_tie_break"] = _vertex_tie_break(pair.s_ps, [K2], beta_pure, tau, anchor[K1:])
    else:
        records["beta_tie_break"] = tie_break_range(
            pair.table.T, beta_pure, tau, anchor[K1:], pair.ps_mask
        )
    return records


def _search_minimax(
    pair: _PairObjectives,
    vertices_only: bool,
    resolution: int | None,
    seed: int,
    tolerance,
    anchor: np.ndarray | None,
) -> dict[str, SolveResult]:
    """R_mm does not separate: one joint search over (alpha, beta) on the sqrt(R_mm) scale."""
    K1, K2 = pair.table.shape
    joint = grid_refine(
        pair.root_minimax,
        [K1, K2],
        resolution,
        refine=not vertices_only,
        lower_bound=0.0,
        seed=seed,
    )
    records = {"joint": joint}
    if tolerance is None:
        return records
    tau = max(
        _side_tolerance(tolerance, "propensity", joint.weights[:K1]),
        _side_tolerance(tolerance, "outcome", joint.weights[K1:]),
    )
    if vertices_only:
        records["joint_tie_break"] = _vertex_tie_break(
            pair.root_minimax, [K1, K2], joint, tau, anchor
        )
    else:
        records["joint_tie_break"] = tie_break_general(
            pair.root_minimax,
            [K1, K2],
            joint.objective,
            tau,
            anchor,
            joint.weights,
            pieces=pair.minimax_pieces,
        )
    return records
