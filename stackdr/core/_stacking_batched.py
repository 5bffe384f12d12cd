"""Prediction-loss stacking weights for many row-weight vectors at once.

The reweighting bootstrap recomputes the prediction-loss stacking weights
(:func:`~stackdr.core.nnls_stack`, :func:`~stackdr.core.logloss_stack`) under many row-weight
vectors. Both problems depend on the row weights only through weighted sums of per-row terms, so
they have batched forms that work from those sums:

* :func:`nnls_stack_from_moments` solves the NNLS problem exactly from the weighted Gram matrix and
  cross-products of each replicate;
* :func:`logloss_moment_features` gives per-row gradient and Hessian terms of the log-loss at a
  reference weight vector, and :func:`logloss_stack_from_moments` takes one exact projected Newton
  step per replicate from there (a one-step approximation to re-solving);
* :func:`logloss_stack_batch` re-solves the log-loss problem exactly for a whole batch of row
  weight vectors, with the same projected Newton method as :func:`~stackdr.core.logloss_stack`.
"""

from __future__ import annotations

import warnings
from typing import Any

import numpy as np
from scipy.optimize import nnls

from stackdr.core._simplex_qp import batched_problem, simplex_qp
from stackdr.core._stacking import (
    blend_derivatives,
    logloss_newton,
    probability_inputs,
    warn_fallback,
)
from stackdr.errors import InputError

__all__ = [
    "logloss_moment_features",
    "logloss_stack_batch",
    "logloss_stack_from_moments",
    "nnls_stack_from_moments",
]


def nnls_stack_from_moments(gram: Any, cross: Any) -> np.ndarray:
    """NNLS stacking weights from weighted sufficient statistics, batched over replicates.

    With row weights ``w`` (for instance one reweighting-bootstrap replicate), NNLS of ``y`` on
    the prediction matrix ``b`` minimises ``x' G x - 2 c' x`` with ``G = sum_i w_i b_i b_i'`` and
    ``c = sum_i w_i b_i y_i``, so these moments determine the weights. Each replicate is solved
    exactly by scipy's NNLS on a square-root factor of ``G``; the result equals
    :func:`nnls_stack` with the same row weights up to rounding. The all-zero fallback picks the
    learner minimising ``G_kk - 2 c_k`` (its weighted squared error up to a constant).

    Parameters
    ----------
    gram : array_like of shape (B, K, K) or (K, K)
        Weighted Gram matrices of the predictions.
    cross : array_like of shape (B, K) or (K,)
        Weighted cross-products of the predictions with the outcome.

    Returns
    -------
    ndarray of shape (B, K) or (K,)
        Weights on the simplex, one row per replicate.
    """
    g, c, single = batched_problem(gram, cross, "gram", "cross")
    nb, k = c.shape
    if k == 1:
        out = np.ones((nb, 1))
        return out[0] if single else out
    # G = V diag(ev) V', so R = diag(sqrt ev) V' and d = diag(1/sqrt ev) V' c turn
    # x'Gx - 2c'x into ||R x - d||^2 minus a constant; directions with (numerically) zero
    # eigenvalue carry no information because c lies in the range of G.
    ev, vecs = np.linalg.eigh(0.5 * (g + np.swapaxes(g, 1, 2)))
    keep = ev > k * np.finfo(float).eps * np.maximum(ev[:, -1:], np.finfo(float).tiny)
    root = np.sqrt(np.where(keep, ev, 0.0))
    factor = root[:, :, None] * np.swapaxes(vecs, 1, 2)
    rhs = np.where(keep, np.einsum("bkj,bk->bj", vecs, c) / np.where(keep, root, 1.0), 0.0)
    coef = np.stack([nnls(factor[i], rhs[i])[0] for i in range(nb)])
    total = coef.sum(axis=1)
    zero = total <= 0
    weights = np.divide(coef, total[:, None], out=np.zeros_like(coef), where=~zero[:, None])
    if zero.any():
        warn_fallback(int(zero.sum()), nb)
        best = np.argmin(np.diagonal(g, axis1=1, axis2=2) - 2.0 * c, axis=1)
        weights[zero] = np.eye(k)[best[zero]]
    return weights[0] if single else weights


def logloss_stack_batch(
    probs: Any,
    a: Any,
    row_weights: Any,
    eps: float = 1e-6,
    *,
    max_iter: int = 100,
) -> np.ndarray:
    """Exact log-loss stacking weights for many row-weight vectors at once.

    Runs the projected Newton method of :func:`logloss_stack` on all replicates together (each
    iteration is a few (B, n) x (n, K*K) matrix products and one batched :func:`simplex_qp`), so
    a reweighting bootstrap can re-solve instead of using the one-step approximation of
    :func:`logloss_stack_from_moments`. Memory is a few arrays of shape (B, n): pass replicates
    in chunks.

    Parameters
    ----------
    probs : array_like of shape (n, K)
        Out-of-fold probabilities in [0, 1], one column per learner.
    a : array_like of shape (n,)
        Observed binary indicator.
    row_weights : array_like of shape (B, n)
        Non-negative row weights of each replicate; each row needs a positive sum.
    eps : float, default 1e-6
        Clipping level for the probabilities.
    max_iter : int, default 100
        Maximum number of Newton steps.

    Returns
    -------
    ndarray of shape (B, K)
        Weights on the simplex, one row per replicate; row ``b`` equals
        ``logloss_stack(probs, a, row_weights[b]).weights``.
    """
    p, aa, _ = probability_inputs(probs, a, None, eps)
    rows = np.asarray(row_weights, dtype=float)
    if rows.ndim != 2 or rows.shape[1] != p.shape[0]:
        raise InputError(f"row_weights must have shape (B, {p.shape[0]}), got {rows.shape}")
    totals = rows.sum(axis=1)
    bad = ~np.isfinite(rows).all(axis=1) | (rows < 0).any(axis=1) | (totals <= 0)
    if bad.any():
        raise InputError(
            f"row_weights must be finite, non-negative and sum to a positive value; "
            f"bad replicates {np.flatnonzero(bad)}"
        )
    if p.shape[1] == 1:
        return np.ones((rows.shape[0], 1))
    x, _, _, converged = logloss_newton(p, aa, rows / totals[:, None], eps, max_iter)
    if not converged.all():
        warnings.warn(
            f"log-loss stacking stopped after {max_iter} Newton steps before converging in "
            f"{int((~converged).sum())} of {rows.shape[0]} replicates",
            RuntimeWarning,
            stacklevel=2,
        )
    return x


def logloss_moment_features(
    probs: Any, a: Any, weights: Any, eps: float = 1e-6
) -> tuple[np.ndarray, np.ndarray]:
    """Per-row gradient and Hessian terms of the log-loss of the blend at ``weights``.

    For row weights ``r`` the weighted sums ``r @ grad_rows`` and
    ``np.tensordot(r, hess_rows, axes=1)`` are ``sum(r)`` times the gradient and Hessian of the
    ``r``-weighted mean log-loss at ``weights``; the common factor does not change the Newton
    step of :func:`logloss_stack_from_moments`. A matrix of replicate row weights ``R`` of shape
    (B, n) gives all replicates at once: ``R @ grad_rows`` and
    ``np.tensordot(R, hess_rows, axes=1)``.

    Parameters
    ----------
    probs : array_like of shape (n, K)
        Out-of-fold probabilities in [0, 1]; clipped to [eps, 1 - eps] as in
        :func:`logloss_stack`.
    a : array_like of shape (n,)
        Observed binary indicator.
    weights : array_like of shape (K,)
        Reference weights on the simplex, usually the full-sample :func:`logloss_stack` weights.
    eps : float, default 1e-6
        Clipping level for the probabilities.

    Returns
    -------
    grad_rows : ndarray of shape (n, K)
        ``l'(blend_i) probs_i``.
    hess_rows : ndarray of shape (n, K, K)
        ``l''(blend_i) probs_i probs_i'``.
    """
    p, aa, _ = probability_inputs(probs, a, None, eps)
    x = _simplex_vector(weights, p.shape[1], "weights")
    first, second = blend_derivatives(p, aa, x, eps)
    return p * first[:, None], second[:, None, None] * p[:, :, None] * p[:, None, :]


def _simplex_vector(values: Any, k: int, name: str) -> np.ndarray:
    x = np.asarray(values, dtype=float)
    if x.shape[-1:] != (k,) or x.ndim > 2:
        raise InputError(f"{name} must have shape ({k},) or (B, {k}), got {x.shape}")
    if not np.isfinite(x).all() or (x < -1e-12).any() or np.abs(x.sum(axis=-1) - 1.0).max() > 1e-8:
        raise InputError(f"{name} must be non-negative and sum to one")
    return x


def logloss_stack_from_moments(grad: Any, hess: Any, start: Any) -> np.ndarray:
    """One projected Newton step for the log-loss weights, batched over replicates.

    Given the gradient and Hessian of a replicate's log-loss at ``start`` (weighted sums of
    :func:`logloss_moment_features`), returns the exact minimiser over the simplex of the local
    quadratic model ``grad'(x - start) + (x - start)' hess (x - start) / 2``. This is a
    one-step approximation to re-solving :func:`logloss_stack` with the replicate's row weights:
    from a start at distance ``d`` of the replicate's optimum its error is of order ``d**2``
    (a full Newton step, with the simplex handled exactly). :func:`logloss_stack_batch` (or
    ``logloss_stack(..., sample_weight=r)``) re-solves exactly.

    Parameters
    ----------
    grad : array_like of shape (B, K) or (K,)
        Gradients at ``start`` (any positive multiple per replicate, shared with ``hess``).
    hess : array_like of shape (B, K, K) or (K, K)
        Hessians at ``start``.
    start : array_like of shape (K,) or (B, K)
        Weights where the derivatives were taken.

    Returns
    -------
    ndarray of shape (B, K) or (K,)
        Weights on the simplex.
    """
    h, g, single = batched_problem(hess, grad, "hess", "grad")
    x0 = _simplex_vector(start, g.shape[1], "start")
    if x0.ndim == 2 and x0.shape[0] != g.shape[0]:
        raise InputError(f"start has {x0.shape[0]} rows but grad has {g.shape[0]} replicates")
    out = simplex_qp(h, g - np.einsum("bkl,bl->bk", h, np.broadcast_to(x0, g.shape)))
    return out[0] if single else out
