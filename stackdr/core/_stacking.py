"""Prediction-loss stacking of nuisance learners (super learner weights).

Super learner stacking (van der Laan, Polley & Hubbard 2007, Statistical Applications in Genetics
and Molecular Biology 6(1), Art. 25) chooses convex weights for a library of learners from their
out-of-fold predictions:

* continuous outcome: non-negative least squares of ``y`` on the predictions, normalised to sum
  to one (:func:`nnls_stack`);
* binary outcome or propensity: the convex weights minimising the Bernoulli log-loss of the
  probability-scale blend ``sum_k w_k probs[:, k]`` (:func:`logloss_stack`), by a projected
  Newton method whose steps :func:`~stackdr.core.simplex_qp` solves.

The per-learner losses (:func:`squared_error_losses`, :func:`log_losses`) are here too. The forms
batched over many row-weight vectors, which the reweighting bootstrap uses
(:func:`~stackdr.core.nnls_stack_from_moments`, :func:`~stackdr.core.logloss_stack_from_moments`,
:func:`~stackdr.core.logloss_stack_batch`), are in their own module.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy.optimize import nnls

from stackdr.core._simplex_qp import simplex_qp
from stackdr.errors import InputError, warn_user

__all__ = [
    "StackResult",
    "log_losses",
    "logloss_stack",
    "nnls_stack",
    "squared_error_losses",
]


@dataclass
class StackResult:
    """Weights from one prediction-loss stacking fit.

    Attributes
    ----------
    weights : ndarray of shape (K,)
        Convex weights (non-negative, summing to one), one per learner column.
    loss : float
        Weighted mean loss of the blend at ``weights`` (squared error or Bernoulli log-loss).
    status : str
        ``"optimal"`` when the solver's optimality conditions hold, ``"fallback"`` when the
        all-zero NNLS solution was replaced by the best single learner, ``"max_iter"`` when the
        log-loss iterations stopped before converging, ``"single"`` when K = 1.
    method : str
        ``"nnls"`` or ``"logloss-newton"``.
    details : dict
        Solver-specific extras (per-learner losses, raw NNLS coefficients, iterations, ...).
    """

    weights: np.ndarray
    loss: float
    status: str
    method: str
    details: dict[str, Any] = field(default_factory=dict)


# --------------------------------------------------------------------------- input checks


def _as_learner_matrix(values: Any, name: str) -> np.ndarray:
    arr = np.asarray(values, dtype=float)
    if arr.ndim != 2:
        raise InputError(f"{name} must be a 2-D array (rows x learners), got shape {arr.shape}")
    if arr.shape[0] == 0 or arr.shape[1] == 0:
        raise InputError(f"{name} needs at least one row and one learner, got shape {arr.shape}")
    bad = ~np.isfinite(arr).all(axis=0)
    if bad.any():
        raise InputError(f"{name} has non-finite values in learner column(s) {np.flatnonzero(bad)}")
    return arr


def _as_row_vector(values: Any, n: int, name: str) -> np.ndarray:
    arr = np.asarray(values, dtype=float)
    if arr.ndim != 1 or arr.shape[0] != n:
        raise InputError(f"{name} must be a 1-D array of length {n}, got shape {arr.shape}")
    if not np.isfinite(arr).all():
        raise InputError(
            f"{name} has non-finite values at rows {np.flatnonzero(~np.isfinite(arr))}"
        )
    return arr


def _row_weights(sample_weight: Any, n: int) -> np.ndarray:
    if sample_weight is None:
        return np.ones(n)
    w = _as_row_vector(sample_weight, n, "sample_weight")
    if (w < 0).any():
        raise InputError(f"sample_weight has negative values at rows {np.flatnonzero(w < 0)}")
    if w.sum() <= 0:
        raise InputError("sample_weight sums to zero; at least one row needs positive weight")
    return w


def _regression_inputs(preds: Any, y: Any, sample_weight: Any):
    b = _as_learner_matrix(preds, "preds")
    yy = _as_row_vector(y, b.shape[0], "y")
    return b, yy, _row_weights(sample_weight, b.shape[0])


def probability_inputs(probs: Any, a: Any, sample_weight: Any, eps: float):
    if not 0.0 < eps < 0.5:
        raise InputError(f"eps must lie in (0, 0.5), got {eps}")
    p = _as_learner_matrix(probs, "probs")
    outside = ((p < 0) | (p > 1)).any(axis=0)
    if outside.any():
        raise InputError(
            f"probs has values outside [0, 1] in learner column(s) {np.flatnonzero(outside)}"
        )
    aa = _as_row_vector(a, p.shape[0], "a")
    if ((aa < 0) | (aa > 1)).any():
        raise InputError(f"a must lie in [0, 1]; bad rows {np.flatnonzero((aa < 0) | (aa > 1))}")
    # Clipping each column (rather than only the blend) keeps every convex blend inside
    # [eps, 1 - eps], so the objective stays smooth and convex on the whole simplex.
    return np.clip(p, eps, 1.0 - eps), aa, _row_weights(sample_weight, p.shape[0])


# --------------------------------------------------------------------------- per-learner losses


def squared_error_losses(preds: Any, y: Any, sample_weight: Any = None) -> np.ndarray:
    """Weighted mean squared error of each learner column.

    Parameters
    ----------
    preds : array_like of shape (n, K)
        Out-of-fold predictions, one column per learner.
    y : array_like of shape (n,)
        Observed outcomes.
    sample_weight : array_like of shape (n,), optional
        Non-negative row weights (default all ones).

    Returns
    -------
    ndarray of shape (K,)
        ``sum_i w_i (y_i - preds[i, k])**2 / sum_i w_i`` for each learner ``k``.
    """
    b, yy, w = _regression_inputs(preds, y, sample_weight)
    return w @ (yy[:, None] - b) ** 2 / w.sum()


def _bernoulli_loss(p: np.ndarray, a: np.ndarray) -> np.ndarray:
    return -(a * np.log(p) + (1.0 - a) * np.log1p(-p))


def log_losses(probs: Any, a: Any, sample_weight: Any = None, eps: float = 1e-6) -> np.ndarray:
    """Weighted mean Bernoulli log-loss of each learner column.

    Parameters
    ----------
    probs : array_like of shape (n, K)
        Out-of-fold probabilities in [0, 1], one column per learner; clipped to [eps, 1 - eps].
    a : array_like of shape (n,)
        Observed binary indicator (values in [0, 1] are accepted).
    sample_weight : array_like of shape (n,), optional
        Non-negative row weights (default all ones).
    eps : float, default 1e-6
        Clipping level for the probabilities.

    Returns
    -------
    ndarray of shape (K,)
        ``-sum_i w_i [a_i log p_ik + (1 - a_i) log(1 - p_ik)] / sum_i w_i`` for each ``k``.
    """
    p, aa, w = probability_inputs(probs, a, sample_weight, eps)
    return w @ _bernoulli_loss(p, aa[:, None]) / w.sum()


# --------------------------------------------------------------------------- NNLS stacking


def warn_fallback(count: int, total: int) -> None:
    warn_user(
        f"NNLS stacking gave all-zero coefficients in {count} of {total} fit(s) (no learner "
        "correlates positively with the outcome); falling back to the single learner with the "
        "lowest weighted squared error",
        RuntimeWarning,
    )


def nnls_stack(preds: Any, y: Any, sample_weight: Any = None) -> StackResult:
    """Super learner weights for a continuous outcome by non-negative least squares.

    Regresses ``y`` on the out-of-fold predictions without intercept under ``w >= 0`` (rows
    scaled by the square root of their weight) and normalises the coefficients to sum to one
    (van der Laan, Polley & Hubbard 2007). If every coefficient is zero the single learner with
    the lowest weighted squared error gets all the weight, with a ``RuntimeWarning``.

    Parameters
    ----------
    preds : array_like of shape (n, K)
        Out-of-fold predictions, one column per learner.
    y : array_like of shape (n,)
        Observed outcomes.
    sample_weight : array_like of shape (n,), optional
        Non-negative row weights (default all ones). Integer weights act as row duplication.

    Returns
    -------
    StackResult
        ``weights`` on the simplex; ``loss`` the weighted mean squared error of the blend;
        ``details`` holds the raw ``coefficients`` and the per-learner ``learner_losses``.

    Examples
    --------
    >>> import numpy as np
    >>> b = np.array([[1.0, 0.0], [2.0, 1.0], [3.0, 1.0], [4.0, 2.0]])
    >>> nnls_stack(b, np.array([1.0, 2.0, 3.0, 4.0])).weights.round(6)
    array([1., 0.])
    """
    b, yy, w = _regression_inputs(preds, y, sample_weight)
    learner_losses = w @ (yy[:, None] - b) ** 2 / w.sum()
    k = b.shape[1]
    if k == 1:
        return StackResult(
            np.ones(1),
            float(learner_losses[0]),
            "single",
            "nnls",
            {"coefficients": np.ones(1), "learner_losses": learner_losses},
        )
    root = np.sqrt(w)
    coef = nnls(b * root[:, None], yy * root)[0]
    if coef.sum() > 0:
        weights, status = coef / coef.sum(), "optimal"
    else:
        warn_fallback(1, 1)
        weights, status = np.eye(k)[np.argmin(learner_losses)], "fallback"
    loss = float(w @ (yy - b @ weights) ** 2 / w.sum())
    return StackResult(
        weights, loss, status, "nnls", {"coefficients": coef, "learner_losses": learner_losses}
    )


# --------------------------------------------------------------------------- log-loss stacking


def blend_derivatives(p: np.ndarray, a: np.ndarray, x: np.ndarray, eps: float):
    """First and second derivatives of each row's log-loss with respect to its blend value.

    ``x`` of shape (K,) gives arrays of shape (n,); a batch (B, K) gives (B, n).
    """
    blend = np.clip(x @ p.T, eps, 1.0 - eps)
    first = (1.0 - a) / (1.0 - blend) - a / blend
    second = a / blend**2 + (1.0 - a) / (1.0 - blend) ** 2
    return first, second


def logloss_newton(p: np.ndarray, a: np.ndarray, rows: np.ndarray, eps: float, max_iter: int):
    """Projected Newton method for a batch of log-loss stacking problems.

    ``rows`` (B, n) holds each problem's row weights, normalised to sum to one. Problems leave
    the batch as they converge. Returns weights, mean losses, iteration counts and convergence
    flags, one per problem.
    """
    nb, k = rows.shape[0], p.shape[1]
    # Products of learner columns, so that every Hessian is one matrix product (B, n) @ (n, K*K).
    outer = (p[:, :, None] * p[:, None, :]).reshape(p.shape[0], k * k)

    def mean_loss(x: np.ndarray, r: np.ndarray) -> np.ndarray:
        return np.einsum("bn,bn->b", r, _bernoulli_loss(np.clip(x @ p.T, eps, 1.0 - eps), a))

    x = np.full((nb, k), 1.0 / k)
    value = mean_loss(x, rows)
    iterations = np.zeros(nb, dtype=int)
    converged = np.zeros(nb, dtype=bool)
    for _ in range(max_iter):
        idx = np.flatnonzero(~converged)
        if idx.size == 0:
            break
        iterations[idx] += 1
        r, xi, vi = rows[idx], x[idx], value[idx]
        first, second = blend_derivatives(p, a, xi, eps)
        grad = (r * first) @ p
        hess = ((r * second) @ outer).reshape(idx.size, k, k)
        step = simplex_qp(hess, grad - np.einsum("bkl,bl->bk", hess, xi)) - xi
        # The model's minimiser makes grad'step <= -step'H step / 2 <= 0. A decrease at rounding
        # level means the start is within rounding of the optimum in loss: the full Newton step is
        # then taken without a line search (the loss cannot resolve it) and ends the iterations.
        decrease = -np.einsum("bk,bk->b", grad, step)
        done = decrease <= 1e-14 * (1.0 + np.abs(vi))
        t = np.ones(idx.size)
        trial = mean_loss(xi + step, r)
        short = ~done & (trial > vi - 1e-4 * t * decrease)
        while short.any():
            t[short] *= 0.5
            trial[short] = mean_loss(xi[short] + t[short, None] * step[short], r[short])
            short &= (trial > vi - 1e-4 * t * decrease) & (t > 1e-12)
        # Backtracking that cannot lower the loss at all also means rounding-level optimality.
        stalled = ~done & (trial >= vi)
        move = ~stalled
        new_x = np.clip(xi[move] + t[move, None] * step[move], 0.0, None)
        x[idx[move]] = new_x / new_x.sum(axis=1, keepdims=True)
        # Clipping and renormalising change x + t * step only by rounding, so the trial loss
        # stands for the new point's loss.
        value[idx[move]] = trial[move]
        converged[idx[done | stalled]] = True
    return x, value, iterations, converged


def logloss_stack(
    probs: Any,
    a: Any,
    sample_weight: Any = None,
    eps: float = 1e-6,
    *,
    max_iter: int = 100,
) -> StackResult:
    """Super learner weights for a binary outcome by minimising the log-loss of the blend.

    Minimises the weighted mean Bernoulli log-loss of ``sum_k w_k probs[:, k]`` over the simplex
    (van der Laan, Polley & Hubbard 2007). The probability columns are clipped to
    ``[eps, 1 - eps]`` first, so every blend stays inside that interval and the objective is
    smooth and convex. The solver is a projected Newton method: each step minimises the exact
    local quadratic model over the simplex (:func:`simplex_qp`) and backtracks until the loss
    decreases enough (Armijo rule); it converges quadratically near the optimum.

    Parameters
    ----------
    probs : array_like of shape (n, K)
        Out-of-fold probabilities in [0, 1], one column per learner.
    a : array_like of shape (n,)
        Observed binary indicator (values in [0, 1] are accepted).
    sample_weight : array_like of shape (n,), optional
        Non-negative row weights (default all ones).
    eps : float, default 1e-6
        Clipping level for the probabilities.
    max_iter : int, default 100
        Maximum number of Newton steps.

    Returns
    -------
    StackResult
        ``weights`` on the simplex; ``loss`` the weighted mean log-loss of the blend;
        ``details`` holds ``learner_losses``, ``iterations`` and the Frank-Wolfe gap
        ``optimality_gap`` (an upper bound on the loss above the optimum).

    See Also
    --------
    logloss_stack_batch : the same solver for many row-weight vectors at once.

    Examples
    --------
    >>> import numpy as np
    >>> p = np.array([[0.2, 0.6], [0.7, 0.5], [0.4, 0.9], [0.8, 0.3]])
    >>> res = logloss_stack(p, np.array([0, 1, 0, 1]))
    >>> res.status, float(res.weights.sum())
    ('optimal', 1.0)
    """
    p, aa, w = probability_inputs(probs, a, sample_weight, eps)
    rows = (w / w.sum())[None, :]
    learner_losses = rows[0] @ _bernoulli_loss(p, aa[:, None])
    details: dict[str, Any] = {"learner_losses": learner_losses}
    if p.shape[1] == 1:
        details.update(iterations=0, optimality_gap=0.0)
        return StackResult(
            np.ones(1), float(learner_losses[0]), "single", "logloss-newton", details
        )
    x, value, iterations, converged = logloss_newton(p, aa, rows, eps, max_iter)
    grad = (rows[0] * blend_derivatives(p, aa, x[0], eps)[0]) @ p
    details.update(iterations=int(iterations[0]), optimality_gap=float(grad @ x[0] - grad.min()))
    if not converged[0]:
        warn_user(
            f"log-loss stacking stopped after {max_iter} Newton steps before converging",
            RuntimeWarning,
        )
    status = "optimal" if converged[0] else "max_iter"
    return StackResult(x[0], float(value[0]), status, "logloss-newton", details)
