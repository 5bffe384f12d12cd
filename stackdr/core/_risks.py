"""Pseudo-risks of convex weights over a pair table (DESIGN.md sections 3 and 4).

Notation: the pair table ``Psi`` is K1 x K2 (propensity-side learner k, outcome-side learner j).
For propensity-side weights ``alpha`` and outcome-side weights ``beta``

- ``phi(alpha)`` (length K2) holds psi(alpha, e_j), the estimate at each outcome learner;
- ``chi(beta)`` (length K1) holds psi(e_k, beta) = Psi[k] @ beta, the estimate at each
  propensity-side learner;
- ``psi = phi(alpha) @ beta`` is the blended estimate.

Every function is pure and vectorised: leading batch dimensions broadcast, the learner axis is the
last one. Masks select the "direction" learners whose swaps define a perturbation.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

from stackdr.errors import InputError

__all__ = [
    "value_range",
    "outcome_sensitivity",
    "weight_sensitivity",
    "mixed_risk",
    "minimax_risk",
    "swap_deviations",
    "pairwise_gaps",
    "riesz_blend",
]


def checked_mask(mask: ArrayLike | None, n: int, name: str) -> np.ndarray | None:
    if mask is None:
        return None
    mask = np.asarray(mask)
    if mask.dtype != bool:
        raise InputError(f"{name} must be a boolean array, got dtype {mask.dtype}")
    if mask.shape != (n,):
        raise InputError(
            f"{name} must have shape ({n},) to match the learner axis, got {mask.shape}"
        )
    if not mask.any():
        raise InputError(f"{name} selects no learners; at least one entry must be True")
    return mask


def value_range(values: ArrayLike, mask: ArrayLike | None = None) -> np.ndarray:
    """Range (max minus min) over the last axis, optionally restricted to a mask.

    Parameters
    ----------
    values : array_like, shape (..., K)
        Values per learner; leading dimensions are batch dimensions.
    mask : array_like of bool, shape (K,), optional
        Learners to include. Default: all.

    Returns
    -------
    numpy.ndarray, shape (...)
        ``max - min`` over the selected learners (0 when one learner is selected).

    Examples
    --------
    >>> value_range([[1.0, 4.0, 2.0], [0.0, 0.0, 5.0]], mask=[True, True, False]).tolist()
    [3.0, 0.0]
    """
    values = np.asarray(values, dtype=float)
    if values.ndim == 0 or values.shape[-1] == 0:
        raise InputError("values need a non-empty last (learner) axis")
    mask = checked_mask(mask, values.shape[-1], "mask")
    if mask is not None:
        values = values[..., mask]
    return values.max(axis=-1) - values.min(axis=-1)


def outcome_sensitivity(phi: ArrayLike, mask: ArrayLike | None = None) -> np.ndarray:
    """Outcome-direction sensitivity ``S_out = max_j phi_j - min_j phi_j``.

    Parameters
    ----------
    phi : array_like, shape (..., K2)
        ``phi(alpha)``: the estimate at each outcome learner for the given propensity weights.
    mask : array_like of bool, shape (K2,), optional
        Outcome learners that define the perturbations. Default: all.

    Returns
    -------
    numpy.ndarray, shape (...)
    """
    return value_range(phi, mask)


def weight_sensitivity(chi: ArrayLike, mask: ArrayLike | None = None) -> np.ndarray:
    """Weight-direction sensitivity ``S_ps = max_k chi_k - min_k chi_k``.

    Parameters
    ----------
    chi : array_like, shape (..., K1)
        ``chi(beta) = Psi @ beta``: the estimate at each propensity-side learner.
    mask : array_like of bool, shape (K1,), optional
        Propensity-side learners that define the perturbations. Default: all.

    Returns
    -------
    numpy.ndarray, shape (...)
    """
    return value_range(chi, mask)


def mixed_risk(
    phi: ArrayLike,
    chi: ArrayLike,
    outcome_mask: ArrayLike | None = None,
    propensity_mask: ArrayLike | None = None,
) -> np.ndarray:
    """Mixed-minimax pseudo-risk ``R_mix = S_out(alpha)^2 + S_ps(beta)^2``.

    At vertices this is the mixed-minimax pair criterion of Cui & Tchetgen Tchetgen
    (arXiv:1911.02029).

    Parameters
    ----------
    phi : array_like, shape (..., K2)
        ``phi(alpha)``.
    chi : array_like, shape (..., K1)
        ``chi(beta)``.
    outcome_mask, propensity_mask : array_like of bool, optional
        Direction learners for ``S_out`` (length K2) and ``S_ps`` (length K1).

    Returns
    -------
    numpy.ndarray
        Broadcast of the batch dimensions of ``phi`` and ``chi``.
    """
    return (
        outcome_sensitivity(phi, outcome_mask) ** 2 + weight_sensitivity(chi, propensity_mask) ** 2
    )


def swap_deviations(
    phi: ArrayLike,
    chi: ArrayLike,
    psi: ArrayLike,
    outcome_mask: ArrayLike | None = None,
    propensity_mask: ArrayLike | None = None,
) -> np.ndarray:
    """Signed moves of the estimate under single-learner swaps, both signs.

    ``(phi_j - psi, psi - phi_j, chi_k - psi, psi - chi_k)`` over the direction learners; their
    maximum is ``sqrt(R_mm)``, and each entry is smooth when ``phi`` is.

    Parameters
    ----------
    phi : array_like, shape (..., K2)
    chi : array_like, shape (..., K1)
    psi : array_like, shape (...)
    outcome_mask, propensity_mask : array_like of bool, optional
        Direction learners over ``j`` (length K2) and ``k`` (length K1).

    Returns
    -------
    numpy.ndarray, shape (..., 2 * (J + K))
        J and K count the selected learners.
    """
    phi = np.asarray(phi, dtype=float)
    chi = np.asarray(chi, dtype=float)
    psi = np.asarray(psi, dtype=float)[..., None]
    out_mask = checked_mask(outcome_mask, phi.shape[-1], "outcome_mask")
    ps_mask = checked_mask(propensity_mask, chi.shape[-1], "propensity_mask")
    out_dev = phi - psi if out_mask is None else phi[..., out_mask] - psi
    ps_dev = chi - psi if ps_mask is None else chi[..., ps_mask] - psi
    batch = np.broadcast_shapes(out_dev.shape[:-1], ps_dev.shape[:-1])
    out_dev = np.broadcast_to(out_dev, batch + out_dev.shape[-1:])
    ps_dev = np.broadcast_to(ps_dev, batch + ps_dev.shape[-1:])
    return np.concatenate([out_dev, -out_dev, ps_dev, -ps_dev], axis=-1)


def minimax_risk(
    phi: ArrayLike,
    chi: ArrayLike,
    psi: ArrayLike,
    outcome_mask: ArrayLike | None = None,
    propensity_mask: ArrayLike | None = None,
) -> np.ndarray:
    """Minimax pseudo-risk: the largest squared move of the estimate under a single swap.

    ``R_mm = max( max_j (phi_j - psi)^2, max_k (chi_k - psi)^2 )``, not separable in
    (alpha, beta).

    Parameters
    ----------
    phi : array_like, shape (..., K2)
        ``phi(alpha)``.
    chi : array_like, shape (..., K1)
        ``chi(beta)``.
    psi : array_like, shape (...)
        The blended estimate ``phi(alpha) @ beta``.
    outcome_mask, propensity_mask : array_like of bool, optional
        Direction learners over ``j`` (length K2) and ``k`` (length K1).

    Returns
    -------
    numpy.ndarray
        Broadcast of the batch dimensions.
    """
    deviations = swap_deviations(phi, chi, psi, outcome_mask, propensity_mask)
    return deviations.max(axis=-1) ** 2


def pairwise_gaps(values: ArrayLike, mask: ArrayLike | None = None) -> np.ndarray:
    """All differences ``v_i - v_j`` over the selected learners; their maximum is the range.

    Parameters
    ----------
    values : array_like, shape (..., K)
    mask : array_like of bool, shape (K,), optional

    Returns
    -------
    numpy.ndarray, shape (..., J * J)
        J counts the selected learners.
    """
    values = np.asarray(values, dtype=float)
    mask = checked_mask(mask, values.shape[-1], "mask")
    if mask is not None:
        values = values[..., mask]
    gaps = values[..., :, None] - values[..., None, :]
    return gaps.reshape(*values.shape[:-1], -1)


def riesz_blend(
    pair_table: ArrayLike, alpha: ArrayLike, beta: ArrayLike
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``phi``, ``chi`` and ``psi`` for the linear (riesz) blend, ``psi = alpha' Psi beta``.

    Parameters
    ----------
    pair_table : array_like, shape (K1, K2)
        The pair table ``Psi``.
    alpha : array_like, shape (..., K1)
        Propensity-side weights.
    beta : array_like, shape (..., K2)
        Outcome-side weights. Batch dimensions of ``alpha`` and ``beta`` broadcast.

    Returns
    -------
    phi : numpy.ndarray, shape (..., K2)
        ``alpha @ Psi``.
    chi : numpy.ndarray, shape (..., K1)
        ``beta @ Psi.T``.
    psi : numpy.ndarray, shape (...)
        ``phi @ beta``.

    Examples
    --------
    >>> phi, chi, psi = riesz_blend([[1.0, 2.0], [3.0, 5.0]], [0.5, 0.5], [1.0, 0.0])
    >>> phi.tolist(), chi.tolist(), float(psi)
    ([2.0, 3.5], [1.0, 3.0], 2.0)
    """
    table = np.asarray(pair_table, dtype=float)
    if table.ndim != 2:
        raise InputError(f"pair_table must be 2-D (K1 x K2), got shape {table.shape}")
    alpha = np.asarray(alpha, dtype=float)
    beta = np.asarray(beta, dtype=float)
    if alpha.shape[-1:] != (table.shape[0],):
        raise InputError(f"alpha needs last axis {table.shape[0]} (K1), got shape {alpha.shape}")
    if beta.shape[-1:] != (table.shape[1],):
        raise InputError(f"beta needs last axis {table.shape[1]} (K2), got shape {beta.shape}")
    phi = alpha @ table
    chi = beta @ table.T
    psi = np.sum(phi * beta, axis=-1)
    return phi, chi, psi
