"""Exact minimisation of ``0.5 x'Qx + q'x`` over the probability simplex, for one problem or a
batch (:func:`simplex_qp`): the solver behind the projected Newton steps of log-loss stacking."""

from __future__ import annotations

import itertools
from typing import Any

import numpy as np

from stackdr.errors import InputError

__all__ = ["simplex_qp"]

# The enumeration solver tries all 2**K - 1 supports. Measured per problem in batches of 300:
# both solvers about 0.2 ms at K = 8; at K = 10 enumeration 1.5 ms, the active-set loop 0.4 ms.
_MAX_ENUMERATE = 8


def batched_problem(mat: Any, vec: Any, mat_name: str, vec_name: str):
    """Matrices (B, K, K) and vectors (B, K) from one problem or a batch, plus a single flag."""
    m = np.asarray(mat, dtype=float)
    v = np.asarray(vec, dtype=float)
    single = v.ndim == 1
    if single:
        m, v = m[None], v[None]
    if v.ndim != 2 or m.shape != (*v.shape, v.shape[1]):
        raise InputError(
            f"{mat_name} must have shape (B, K, K) or (K, K) matching {vec_name} (B, K) or (K,); "
            f"got {np.shape(mat)} and {np.shape(vec)}"
        )
    if not (np.isfinite(m).all() and np.isfinite(v).all()):
        raise InputError(f"{mat_name} and {vec_name} must be finite")
    return m, v, single


def _simplex_qp_enumerate(quad: np.ndarray, lin: np.ndarray) -> np.ndarray:
    """Exact simplex QP for a batch by trying every support.

    For a convex objective, an optimum with the smallest support has a non-singular KKT system on
    that support (a singular one would give a flat direction inside the face, along which a
    smaller support is reached). Each support's KKT system is solved and, among the feasible
    candidates, the one with the smallest Frank-Wolfe gap ``g'x - min_k g_k`` (``g`` the
    gradient) is kept. The gap is zero exactly at the optimum and bounds the excess objective;
    unlike the objective itself it grows linearly, not quadratically, with the distance from the
    optimum, so it separates near-optimal candidates to full precision.
    """
    nb, k = lin.shape
    best_x = np.zeros((nb, k))
    best_gap = np.full(nb, np.inf)
    scale = 1.0 + np.abs(quad).max(axis=(1, 2)) + np.abs(lin).max(axis=1)
    for size in range(1, k + 1):
        for support in itertools.combinations(range(k), size):
            s = list(support)
            kkt = np.zeros((nb, size + 1, size + 1))
            kkt[:, :size, :size] = quad[:, s][:, :, s]
            kkt[:, :size, size] = 1.0
            kkt[:, size, :size] = 1.0
            rhs = np.concatenate([-lin[:, s], np.ones((nb, 1))], axis=1)[..., None]
            # Singular or badly scaled systems may give non-finite or infeasible solutions; they
            # are simply not candidates.
            with np.errstate(all="ignore"):
                try:
                    xs = np.linalg.solve(kkt, rhs)[:, :size, 0]
                except np.linalg.LinAlgError:
                    xs = (np.linalg.pinv(kkt) @ rhs)[:, :size, 0]
            ok = np.isfinite(xs).all(axis=1) & (xs >= -1e-12).all(axis=1)
            if not ok.any():
                continue
            cand = np.zeros((ok.sum(), k))
            cand[:, s] = np.clip(xs[ok], 0.0, None)
            cand /= cand.sum(axis=1, keepdims=True)
            grad = np.einsum("bkl,bl->bk", quad[ok], cand) + lin[ok]
            gap = np.einsum("bk,bk->b", grad, cand) - grad.min(axis=1)
            # Smaller supports come first; a larger one replaces them only on a real improvement.
            better = gap < best_gap[ok] - 1e-15 * scale[ok]
            rows = np.flatnonzero(ok)[better]
            best_gap[rows] = gap[better]
            best_x[rows] = cand[better]
    return best_x


def _simplex_qp_active_set(quad: np.ndarray, lin: np.ndarray, max_iter: int) -> np.ndarray:
    """Primal active-set method for one simplex QP (Nocedal & Wright 2006, Algorithm 16.3).

    The free set starts at the best vertex. Each iteration solves for the minimiser of the
    objective on the affine hull of the current face. If it is feasible the point moves there
    and the KKT multipliers of the bounds decide whether to free one more learner; otherwise the
    point moves towards it until a bound blocks. A singular, inconsistent KKT system signals a
    flat descent direction, which is followed to the nearest bound.
    """
    k = lin.shape[0]
    scale = 1.0 + np.abs(quad).max() + np.abs(lin).max()
    start = int(np.argmin(0.5 * np.diag(quad) + lin))
    x = np.zeros(k)
    x[start] = 1.0
    free = np.zeros(k, dtype=bool)
    free[start] = True
    for _ in range(max_iter):
        idx = np.flatnonzero(free)
        m = idx.size
        kkt = np.zeros((m + 1, m + 1))
        kkt[:m, :m] = quad[np.ix_(idx, idx)]
        kkt[:m, m] = 1.0
        kkt[m, :m] = 1.0
        rhs = np.append(-lin[idx], 1.0)
        sol = np.linalg.lstsq(kkt, rhs, rcond=None)[0]
        if np.abs(kkt @ sol - rhs).max() <= 1e-9 * scale:
            target, nu = sol[:m], sol[m]
            if (target >= 0).all():
                x = np.zeros(k)
                x[idx] = target / target.sum()
                bound_mult = quad @ x + lin + nu
                bound_mult[free] = np.inf
                j = int(np.argmin(bound_mult))
                if bound_mult[j] >= -1e-12 * scale:
                    return x
                free[j] = True
                continue
            step, longest = target - x[idx], 1.0
        else:
            step, longest = np.linalg.svd(kkt)[2][-1, :m], np.inf
            step = -step if (quad @ x + lin)[idx] @ step > 0 else step
        shrinking = step < 0
        ratios = np.full(m, np.inf)
        ratios[shrinking] = -x[idx][shrinking] / step[shrinking]
        blocking = int(np.argmin(ratios))
        alpha = min(longest, ratios[blocking])
        x[idx] += alpha * step
        if alpha == ratios[blocking]:
            x[idx[blocking]] = 0.0
            free[idx[blocking]] = False
        x = np.clip(x, 0.0, None)
        x /= x.sum()
    raise RuntimeError(f"simplex QP active-set method did not converge in {max_iter} steps")


def simplex_qp(quad: Any, lin: Any, *, max_enumerate: int = _MAX_ENUMERATE) -> np.ndarray:
    """Minimise ``0.5 x'Qx + q'x`` over the probability simplex, for one problem or a batch.

    Parameters
    ----------
    quad : array_like of shape (K, K) or (B, K, K)
        Symmetric positive semi-definite matrices ``Q``.
    lin : array_like of shape (K,) or (B, K)
        Linear terms ``q``.
    max_enumerate : int, default 8
        Largest K solved by vectorised enumeration of all supports; larger problems run a
        primal active-set method one problem at a time. Both are exact for convex problems.

    Returns
    -------
    ndarray of shape (K,) or (B, K)
        Minimisers: non-negative, summing to one.
    """
    q_arr, l_arr, single = batched_problem(quad, lin, "quad", "lin")
    q_arr = 0.5 * (q_arr + np.swapaxes(q_arr, 1, 2))
    if l_arr.shape[1] <= max_enumerate:
        out = _simplex_qp_enumerate(q_arr, l_arr)
    else:
        max_iter = 50 * l_arr.shape[1]
        out = np.stack(
            [_simplex_qp_active_set(qb, lb, max_iter) for qb, lb in zip(q_arr, l_arr, strict=True)]
        )
    return out[0] if single else out
