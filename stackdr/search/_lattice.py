"""The lattice stage of :func:`~stackdr.search.grid_refine`: the simplex lattice and its size,
the batched scan of a product lattice, the choice of diverse starting points and the pairwise
mass-transfer pattern search that refines them."""

from __future__ import annotations

import functools
import itertools
import math
from collections.abc import Sequence

import numpy as np

from stackdr.errors import InputError
from stackdr.search._records import Objective, block_slices, checked_dims, clean_simplex

__all__ = ["lattice_resolution", "lattice_size", "simplex_lattice"]

# Default lattice settings of grid_refine (documented there).
DEFAULT_RESOLUTION = 20
DEFAULT_MAX_POINTS = 20_000


@functools.lru_cache(maxsize=128)
def cached_lattice(k: int, resolution: int) -> np.ndarray:
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
    max_points: int = DEFAULT_MAX_POINTS,
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
    dims = checked_dims(dims)
    r = DEFAULT_RESOLUTION if resolution is None else int(resolution)
    if r < 1:
        raise InputError(f"resolution must be >= 1, got {resolution}")
    while r > 1 and lattice_size(dims, r) > max_points:
        r -= 1
    return r


class CountedObjective:
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


def scan_lattice(
    f: CountedObjective, lattices: list[np.ndarray], pool: int, batch_size: int
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


def diverse_starts(points: np.ndarray, values: np.ndarray, n: int, spacing: float) -> np.ndarray:
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
        for block in block_slices(dims)
        for i in range(block.start, block.stop)
        for j in range(block.start, block.stop)
        if i != j
    ]
    src, dst = (np.array(v, dtype=int) for v in zip(*pairs)) if pairs else (np.zeros(0, int),) * 2
    return src, dst


def pattern_search(
    f: CountedObjective,
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
        X[winners] = clean_simplex(cand[improved, best[improved]], dims)
        F[winners] = best_val[improved]
        steps[live[~improved]] /= 2
    return X, F, max_iter
