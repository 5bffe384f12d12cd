"""Minimisation of any batch objective over a product of simplices (nonlinear blends, the
minimax risk): :func:`grid_refine` scans a simplex lattice, runs the pattern search from the best
points and finishes with a trust-region cutting-plane polish, which this module also holds."""

from __future__ import annotations

import time
from collections.abc import Sequence

import numpy as np

from stackdr.search._external_solvers import highs_lp
from stackdr.search._lattice import (
    DEFAULT_MAX_POINTS,
    DEFAULT_RESOLUTION,
    CountedObjective,
    cached_lattice,
    diverse_starts,
    lattice_resolution,
    lattice_size,
    pattern_search,
    scan_lattice,
)
from stackdr.search._records import (
    Objective,
    SolveResult,
    block_slices,
    checked_dims,
    clean_simplex,
    since,
)

__all__ = ["grid_refine"]


def _jittered(x: np.ndarray, dims: Sequence[int], scales: np.ndarray, rng) -> np.ndarray:
    """Points ``(1 - s) x + s w`` with w uniform on each simplex: inside the product of simplices
    and off the kinks through x with probability one. Then, at the smallest scale, one point
    (nearly) towards each vertex: these stay close to the faces through x, where a boundary
    optimum's pieces live and uniform jitter, which raises every zero coordinate, may step past
    them. Exactly vertex-directed points could slide along a kink (when the vertex ties the
    same pieces as x), so 0.1% of uniform jitter is mixed in."""
    n = len(scales) + x.size
    W = np.hstack([rng.dirichlet(np.ones(k), size=n) for k in dims])
    for block in block_slices(dims):
        rows = slice(len(scales) + block.start, len(scales) + block.stop)
        W[rows, block] = 0.999 * np.eye(block.stop - block.start) + 0.001 * W[rows, block]
    s = np.concatenate([scales, np.full(x.size, scales[0])])[:, None]
    return (1 - s) * x[None, :] + s * W


def _sampled_cuts(
    f: CountedObjective, Y: np.ndarray, dims: Sequence[int], h: np.ndarray, scale: float
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
    for block in block_slices(dims):
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
    for row, block in enumerate(block_slices(dims)):
        A_eq[row, block] = 1.0
    tau_floor = -np.inf if lower_bound is None else (lower_bound - fx) / radius
    lower = np.append(np.maximum(-x / radius, -1.0), tau_floor)
    upper = np.append(np.minimum((1.0 - x) / radius, 1.0), np.inf)
    ok, solution, _, _ = highs_lp(
        "model", cost, A_ub, b_ub, A_eq, np.zeros(len(dims)), np.column_stack([lower, upper])
    )
    if not ok or not np.all(np.isfinite(solution)):
        return None
    return clean_simplex(x + radius * solution[:D], dims), fx + radius * float(solution[D])


def _cutting_plane_polish(
    f: CountedObjective,
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
    max_points: int = DEFAULT_MAX_POINTS,
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
    dims = checked_dims(dims)
    requested = DEFAULT_RESOLUTION if resolution is None else int(resolution)
    r = lattice_resolution(dims, requested, max_points)
    f = CountedObjective(objective, sum(dims))
    lattices = [cached_lattice(k, r) for k in dims]
    n_starts = max(1, int(n_starts))
    points, values = scan_lattice(f, lattices, 32 * n_starts, batch_size)
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
            points[0], float(values[0]), status, "grid_refine", since(started), details
        )

    # The objective's scale near the optimum, from the best lattice values (the largest values
    # can be huge, e.g. a log-loss at the simplex boundary, and would loosen every tolerance).
    scale = float(np.max(np.abs(values[np.isfinite(values)]), initial=0.0)) or 1.0
    ftol = 1e-12 * scale
    starts = diverse_starts(points, values, n_starts, 1.0 / r)
    X, F = points[starts].copy(), values[starts].copy()
    X, F, pattern_iterations = pattern_search(
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
    X = clean_simplex(X, dims)
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
    return SolveResult(X[best], float(F[best]), status, "grid_refine", since(started), details)
