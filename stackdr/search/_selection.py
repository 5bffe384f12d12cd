"""Weight selection from a pair table: the target-aimed search and the comparison selectors.

Shared by the main estimator and the reweighting bootstrap, so both run the identical search.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from stackdr.core import minimax_risk, mixed_risk, outcome_sensitivity, weight_sensitivity
from stackdr.search._weights import search_weights

CRITERIA = ("mixed", "minimax")
#: How the outcome learners are weighted (setting ``outcome_side``).
OUTCOME_SIDES = ("stacking", "search")


@dataclass(frozen=True)
class SearchSettings:
    """Settings of the target-aimed weight search (a record; the values are validated by the
    estimator's settings table).

    criterion : "mixed" (mixed-minimax pseudo-risk, default) or "minimax".
    blend : "riesz", "probability" or "logit".
    tie_break : whether to move to the prediction-loss stacking weights within the noise floor.
    tie_break_scale : c, the tolerance in units of the noise floor (a standard error).
    resolution : lattice resolution for grid-based searches (None: solver default).
    contrast_z : z of the contrast test (0: off). The search's weights are kept only when their
        estimate differs from the prediction-loss stacking estimate by more than z paired
        standard errors; otherwise the stacking nuisances are used (see
        :class:`~stackdr.search.WeightContext`).
    contrast_guard : the variance guard of the contrast test (0: off): when the searched weights'
        influence-function SE is at most this multiple of the stacking estimate's, the test's
        threshold is 0 (the searched weights are kept).
    outcome_side : "search" (the search chooses the outcome weights too) or "stacking" (the
        outcome weights are the least-squares stacking weights, the outcome anchor of
        :func:`run_search`; the search chooses the propensity side only).
    """

    criterion: str = "mixed"
    blend: str = "riesz"
    tie_break: bool = True
    tie_break_scale: float = 1.0
    resolution: int | None = None
    contrast_z: float = 0.0
    contrast_guard: float = 0.0
    outcome_side: str = "search"


def pseudo_risk(criterion: str, phi_alpha, chi_beta, psi, masks) -> float:
    """Pseudo-risk of weights from phi(alpha), chi(beta) and psi(alpha, beta)."""
    prop_mask, out_mask = masks
    if criterion == "mixed":
        return float(
            mixed_risk(phi_alpha, chi_beta, outcome_mask=out_mask, propensity_mask=prop_mask)
        )
    return float(
        minimax_risk(phi_alpha, chi_beta, psi, outcome_mask=out_mask, propensity_mask=prop_mask)
    )


def discrete_pairs(Psi: np.ndarray, masks) -> dict:
    """Vertex-only selectors: the mixed-minimax pair and the minimax pair, as (k, j)."""
    K1, K2 = Psi.shape
    prop_mask, out_mask = masks
    phi = Psi[:, None, :] * np.ones((1, K2, 1))  # phi(e_k) for every (k, j)
    chi = np.transpose(Psi)[None, :, :] * np.ones((K1, 1, 1))  # chi(e_j) for every (k, j)
    mix = mixed_risk(phi, chi, outcome_mask=out_mask, propensity_mask=prop_mask)
    mm = minimax_risk(phi, chi, Psi, outcome_mask=out_mask, propensity_mask=prop_mask)
    return {
        "mixed-minimax pair": np.unravel_index(int(np.argmin(mix)), Psi.shape),
        "minimax pair": np.unravel_index(int(np.argmin(mm)), Psi.shape),
    }


def smoothed_pair_weights(
    Psi: np.ndarray, pair_se: np.ndarray, masks, tau: float = 1.0
) -> tuple[np.ndarray, np.ndarray, float]:
    """Pair weights of the smoothed (model-averaging) selector over single pairs.

    The selector averages the pair estimates with weights ``w_kj`` proportional to
    ``exp(-tau R_mix(k, j) / scale)``, where ``R_mix(k, j) = S_out(e_k)^2 + S_ps(e_j)^2`` is the
    mixed-minimax criterion at the vertex (k, j) (the range of row k of the pair table squared
    plus the range of column j squared, over the direction learners; as in
    :func:`discrete_pairs`). Replacing the discrete choice of one pair by this exponentially
    weighted average is the smooth approximation of the selector that Cui & Tchetgen Tchetgen
    (arXiv:1911.02029) describe for post-selection inference: unlike the choice of one pair, the
    estimate moves continuously with the pair table.

    Rule: ``tau = 1`` and ``scale = max(min_kj R_mix(k, j), 0.01 x median_kj SE_kj^2)``.
    Scaling by the best pair's own pseudo-risk makes the weights unit-free and relative to what
    the best pair attains: a pair whose risk exceeds the best one's by that same amount gets
    ``exp(-1)`` times its weight. The floor, a hundredth of the typical sampling variance of one
    pair estimate, keeps the scale positive when a pair has zero range. Of the three scales the
    screening study tried (this one, the median squared pair SE, the squared SE of
    prediction-loss stacking) it had the lowest RMSE in all six Kang-Schafer cells, though it
    stayed above prediction-loss stacking with parametric libraries.

    ``R_mix(k, j)`` is a term of k plus a term of j, so the pair weights factorise exactly:
    ``w_kj = u_k v_j`` with ``u`` proportional to ``exp(-tau S_out(e_k)^2 / scale)`` and ``v``
    proportional to ``exp(-tau S_ps(e_j)^2 / scale)``. The average ``sum_kj w_kj Psi[k, j]``
    is therefore ``u' Psi v``, the riesz blend at propensity weights ``u`` and outcome weights
    ``v``, and its row contributions ``sum_kj w_kj H_kj`` are those of that blend.

    Parameters
    ----------
    Psi : numpy.ndarray (K1, K2)
        Pair table.
    pair_se : numpy.ndarray (K1, K2)
        Influence-function SE of every pair (only their median enters, through the floor).
    masks : (array or None, array or None)
        Direction masks (propensity, outcome).
    tau : float
        Inverse temperature.

    Returns
    -------
    u : numpy.ndarray (K1,)
    v : numpy.ndarray (K2,)
        Marginal weights whose outer product is the pair-weight matrix.
    scale : float
    """
    prop_mask, out_mask = masks
    row_risk = outcome_sensitivity(Psi, out_mask) ** 2  # S_out(e_k)^2, one per row
    column_risk = weight_sensitivity(Psi.T, prop_mask) ** 2  # S_ps(e_j)^2, one per column
    best = float(row_risk.min() + column_risk.min())
    scale = max(best, 0.01 * float(np.median(np.asarray(pair_se) ** 2)))

    def normalised(risk: np.ndarray) -> np.ndarray:
        excess = risk - risk.min()
        # A zero scale (every SE zero and a pair of zero range) is the limit of a vanishing
        # temperature: equal weight on the minimisers.
        w = np.exp(-tau * excess / scale) if scale > 0 else (excess == 0).astype(float)
        return w / w.sum()

    return normalised(row_risk), normalised(column_risk), scale


def run_search(Psi, settings: SearchSettings, *, phi=None, anchors, tolerance, masks):
    """The target-aimed search: pure minimiser, then the tie-break when enabled.

    ``anchors`` is ``(propensity anchor, least-squares stacking weights of the outcome
    learners)``; with ``settings.outcome_side == "stacking"`` the latter are the outcome
    weights and the search chooses the propensity side only."""
    return search_weights(
        Psi,
        phi=phi,
        criterion=settings.criterion,
        tolerance=tolerance if settings.tie_break else None,
        anchors=anchors,
        masks=masks,
        resolution=settings.resolution,
        outcome_weights=anchors[1] if settings.outcome_side == "stacking" else None,
    )


def pure_weights(search, K1: int) -> tuple[np.ndarray, np.ndarray]:
    """The pure minimiser (before any tie-break) from a search's solver records."""
    if "joint" in search.records:
        w = search.records["joint"].weights
        return w[:K1], w[K1:]
    return search.records["alpha"].weights, search.records["beta"].weights
