"""Weight selection from a pair table: the target-aimed search and the comparison selectors.

Shared by the main estimator and the reweighting bootstrap, so both run the identical search.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from stackdr.core import minimax_risk, mixed_risk
from stackdr.search._weights import search_weights

CRITERIA = ("mixed", "minimax")


@dataclass(frozen=True)
class SearchSettings:
    """Settings of the target-aimed weight search (a record; the values are validated by the
    estimator's settings table).

    criterion : "mixed" (mixed-minimax pseudo-risk, default) or "minimax".
    blend : "riesz", "probability" or "logit".
    tie_break : whether to move to the prediction-loss stacking weights within the noise floor.
    tie_break_scale : c, the tolerance in units of the noise floor (a standard error).
    resolution : lattice resolution for grid-based searches (None: solver default).
    """

    criterion: str = "mixed"
    blend: str = "riesz"
    tie_break: bool = True
    tie_break_scale: float = 0.5
    resolution: int | None = None


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


def run_search(Psi, settings: SearchSettings, *, phi=None, anchors, tolerance, masks):
    """The target-aimed search: pure minimiser, then the tie-break when enabled."""
    return search_weights(
        Psi,
        phi=phi,
        criterion=settings.criterion,
        tolerance=tolerance if settings.tie_break else None,
        anchors=anchors,
        masks=masks,
        resolution=settings.resolution,
    )


def pure_weights(search, K1: int) -> tuple[np.ndarray, np.ndarray]:
    """The pure minimiser (before any tie-break) from a search's solver records."""
    if "joint" in search.records:
        w = search.records["joint"].weights
        return w[:K1], w[K1:]
    return search.records["alpha"].weights, search.records["beta"].weights
