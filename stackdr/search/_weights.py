"""The weight search for a pair table (DESIGN.md section 5): :func:`search_weights` minimises
the mixed-minimax risk side by side or the minimax risk jointly, then applies the tie-break when
a tolerance is given."""

from __future__ import annotations

from collections.abc import Callable, Mapping

import numpy as np
from numpy.typing import ArrayLike

from stackdr.core import checked_mask, pairwise_gaps, swap_deviations, value_range
from stackdr.errors import InputError
from stackdr.search._polish import grid_refine
from stackdr.search._range_lp import minimise_range_lp
from stackdr.search._records import (
    Objective,
    SolveResult,
    WeightSearch,
    checked_tolerance,
    checked_weights,
    value_matrix,
)
from stackdr.search._tie_break import tie_break_general, tie_break_range, vertex_tie_break

__all__ = ["search_weights"]


def _side_tolerance(tolerance, side: str, weights: np.ndarray) -> float:
    if callable(tolerance):
        return checked_tolerance(tolerance(side, weights), f"tolerance({side!r}, ...)")
    if not isinstance(tolerance, Mapping) or side not in tolerance:
        raise InputError(
            'tolerance must be a callable or a dict with keys "propensity" and "outcome", '
            f"got {tolerance!r}"
        )
    return checked_tolerance(tolerance[side], f"tolerance[{side!r}]")


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
    outcome_weights: ArrayLike | None = None,
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
    outcome_weights : array_like, optional
        Fixed outcome-side weights (the least-squares stacking weights in the estimator's
        default): the search then chooses the propensity side only, alpha minimising
        ``S_out`` (``"mixed"``, the same alpha as without the fixed side) or ``sqrt(R_mm)`` at
        these outcome weights (``"minimax"``), with the propensity side's tie-break; the outcome
        side has no search and no tie-break (its record, ``"beta"``, has method ``"fixed"``).

    Returns
    -------
    WeightSearch
    """
    table = value_matrix(Psi, "Psi")
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
                checked_weights(anchors[0], [K1], "alpha anchor"),
                checked_weights(anchors[1], [K2], "beta anchor"),
            ]
        )
    if outcome_weights is not None:
        # The outcome side held (no search, no tie-break); the propensity side by the criterion.
        fixed = checked_weights(outcome_weights, [K2], "outcome weights")
        side = _fixed_outcome_side(pair, criterion, fixed)
        records = _alpha_side(pair, side, (vertices_only, resolution, seed, tolerance, anchor))
        records["beta"] = SolveResult(
            fixed, float(pair.s_ps(fixed[None])[0]), "optimal", "fixed", 0.0
        )
    else:
        search = _search_mixed if criterion == "mixed" else _search_minimax
        records = search(pair, vertices_only, resolution, seed, tolerance, anchor)
    # Tie-break records come after the pure ones, so they overwrite them here.
    final = {key.removesuffix("_tie_break"): rec.weights for key, rec in records.items()}
    if "joint" not in final:
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
    options = (vertices_only, resolution, seed, tolerance, anchor)
    records = _alpha_side(pair, (pair.s_out, pair.s_out_pieces, pair.riesz), options)
    if vertices_only:
        records["beta"] = grid_refine(pair.s_ps, [K2], 1, refine=False)
    else:
        records["beta"] = minimise_range_lp(pair.table.T, pair.ps_mask)
    if tolerance is None:
        return records
    beta_pure = records["beta"]
    tau = _side_tolerance(tolerance, "outcome", beta_pure.weights)
    if vertices_only:
        records["beta_tie_break"] = vertex_tie_break(pair.s_ps, [K2], beta_pure, tau, anchor[K1:])
    else:
        records["beta_tie_break"] = tie_break_range(
            pair.table.T, beta_pure, tau, anchor[K1:], pair.ps_mask
        )
    return records


def _alpha_side(pair: _PairObjectives, side: tuple, options: tuple) -> dict[str, SolveResult]:
    """One propensity-side search: the pure minimiser of ``objective`` over alpha, then its
    tie-break when a tolerance is given (records ``"alpha"``, ``"alpha_tie_break"``).

    ``side`` is ``(objective, pieces, exact)``: the batch objective over alpha, its smooth
    pieces (for the general tie-break), and whether it is S_out of the riesz blend (an exact
    range LP and range tie-break). ``options`` is ``(vertices_only, resolution, seed,
    tolerance, anchor)`` as in :func:`_search_mixed`."""
    objective, pieces, exact = side
    vertices_only, resolution, seed, tolerance, anchor = options
    K1 = pair.K1
    if vertices_only:
        alpha_pure = grid_refine(objective, [K1], 1, refine=False)
    elif exact:
        alpha_pure = minimise_range_lp(pair.table, pair.out_mask)
    else:
        alpha_pure = grid_refine(objective, [K1], resolution, lower_bound=0.0, seed=seed)
    records = {"alpha": alpha_pure}
    if tolerance is None:
        return records
    tau = _side_tolerance(tolerance, "propensity", alpha_pure.weights)
    if vertices_only:
        records["alpha_tie_break"] = vertex_tie_break(objective, [K1], alpha_pure, tau, anchor[:K1])
    elif exact:
        records["alpha_tie_break"] = tie_break_range(
            pair.table, alpha_pure, tau, anchor[:K1], pair.out_mask
        )
    else:
        records["alpha_tie_break"] = tie_break_general(
            objective,
            [K1],
            alpha_pure.objective,
            tau,
            anchor[:K1],
            alpha_pure.weights,
            pieces=pieces,
        )
    return records


def _fixed_outcome_side(pair: _PairObjectives, criterion: str, beta: np.ndarray) -> tuple:
    """``(objective, pieces, exact)`` of the propensity side with the outcome weights held at
    ``beta``: S_out for the mixed criterion (R_mix separates, so this is the unrestricted
    search's alpha), sqrt(R_mm) at that beta for minimax."""
    if criterion == "mixed":
        return pair.s_out, pair.s_out_pieces, pair.riesz

    def stacked(A: np.ndarray) -> np.ndarray:
        return np.hstack([A, np.broadcast_to(beta, (A.shape[0], beta.size))])

    def objective(A: np.ndarray) -> np.ndarray:
        return pair.root_minimax(stacked(A))

    def pieces(A: np.ndarray) -> np.ndarray:
        return pair.minimax_pieces(stacked(A))

    return objective, pieces, False


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
        records["joint_tie_break"] = vertex_tie_break(
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
