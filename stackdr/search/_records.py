"""Records of the weight solvers and the input checks and simplex helpers they share.

Every solve returns a :class:`SolveResult` record; :func:`~stackdr.search.search_weights`
returns a :class:`WeightSearch`. Weight vectors are returned exactly on their simplex (tiny
negatives clipped, blocks renormalised) and objectives are recomputed at the returned weights,
so a record never reports a value the weights do not attain.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import ArrayLike

from stackdr.core import checked_mask
from stackdr.errors import InputError

__all__ = ["SolveResult", "WeightSearch"]

Objective = Callable[[np.ndarray], np.ndarray]


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


def value_matrix(V: ArrayLike, name: str = "V") -> np.ndarray:
    V = np.asarray(V, dtype=float)
    if V.ndim != 2 or V.shape[0] == 0 or V.shape[1] == 0:
        raise InputError(f"{name} must be a non-empty 2-D array, got shape {V.shape}")
    bad = np.argwhere(~np.isfinite(V))
    if bad.size:
        k, j = bad[0]
        raise InputError(f"{name}[{k}, {j}] = {V[k, j]} is not finite")
    return V


def select_columns(V: np.ndarray, mask: ArrayLike | None, name: str = "mask") -> np.ndarray:
    mask = checked_mask(mask, V.shape[1], name)
    return V if mask is None else V[:, mask]


def block_slices(dims: Sequence[int]) -> list[slice]:
    edges = np.cumsum([0, *dims])
    return [slice(int(a), int(b)) for a, b in zip(edges[:-1], edges[1:])]


def checked_dims(dims: Sequence[int] | int) -> list[int]:
    dims = [int(dims)] if np.isscalar(dims) else [int(d) for d in dims]
    if not dims or min(dims) < 1:
        raise InputError(f"dims must be a non-empty list of positive block sizes, got {dims}")
    return dims


def clean_simplex(weights: np.ndarray, dims: Sequence[int] | None = None) -> np.ndarray:
    """Clip solver round-off below zero and renormalise each block to sum exactly one."""
    w = np.clip(np.asarray(weights, dtype=float), 0.0, None)
    dims = [w.shape[-1]] if dims is None else dims
    for block in block_slices(dims):
        w[..., block] /= w[..., block].sum(axis=-1, keepdims=True)
    return w


def checked_weights(w: ArrayLike, dims: Sequence[int], name: str) -> np.ndarray:
    w = np.asarray(w, dtype=float)
    if w.shape != (sum(dims),):
        raise InputError(f"{name} must have shape ({sum(dims)},), got {w.shape}")
    if not np.all(np.isfinite(w)) or w.min() < -1e-9:
        raise InputError(f"{name} must be finite and non-negative, got {w}")
    for block in block_slices(dims):
        if abs(w[block].sum() - 1.0) > 1e-6:
            raise InputError(
                f"{name} block {block.start}:{block.stop} sums to {w[block].sum()}, not 1"
            )
    return clean_simplex(w, dims)


def checked_tolerance(tolerance: float, name: str = "tolerance") -> float:
    tolerance = float(tolerance)
    if not np.isfinite(tolerance) or tolerance < 0:
        raise InputError(f"{name} must be a finite number >= 0, got {tolerance}")
    return tolerance


def standardised(V: np.ndarray) -> tuple[np.ndarray, float]:
    """Centre and scale values: the range is translation-invariant and scales linearly, and
    O(1) entries keep solver tolerances meaningful whatever the estimate's units."""
    lo, hi = V.min(), V.max()
    scale = hi - lo if hi > lo else 1.0
    return (V - 0.5 * (lo + hi)) / scale, scale


def since(started: float) -> float:
    return time.perf_counter() - started
