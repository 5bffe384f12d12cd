"""The registry of comparison estimators: every row of the comparison table, declared once.

Each :class:`Comparison` says how its weights come from a :class:`WeightContext` (the pair table,
the weight search, the prediction-loss stacking weights and per-learner losses of one sample),
which blend its estimate uses, over which propensity learners it is defined, whether it appears
under the current settings, and how the reweighting bootstrap recomputes it. The estimator's
full-sample table, the bootstrap replicates, the study replicate and both reports read
:data:`COMPARISONS`, so adding an estimator means adding one entry here.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from functools import cached_property

import numpy as np

from stackdr.search._selection import (
    SearchSettings,
    discrete_pairs,
    pure_weights,
    smoothed_pair_weights,
)

MAIN = "target-aimed stacking"
#: The search's own weights before the contrast test (shown when the test is on).
UNTESTED = "target-aimed, no contrast test"
PURE = "target-aimed, no tie-break"
PLS = "prediction-loss stacking"
BEST = "best-predicting pair"
MIXED_PAIR = "mixed-minimax pair"
MINIMAX_PAIR = "minimax pair"
SMOOTHED = "smoothed pair average"
#: Name of the extra propensity column of the weight search with ``stacked_propensity``: the
#: prediction-loss stacked propensity, added as one more propensity learner.
STACKED_PROPENSITY = "prediction-loss stack"
#: A study-only row: AIPW at the design's true nuisances (see ``stackdr.studies``).
ORACLE = "oracle pair"


@dataclass
class WeightContext:
    """The ingredients every comparison estimator chooses its weights from, for one sample
    (the full sample or one bootstrap replicate).

    Attributes
    ----------
    Psi : numpy.ndarray (K1, K2)
        Pair table.
    search : WeightSearch
        The target-aimed search on this sample.
    stack_alpha, stack_beta : numpy.ndarray
        Prediction-loss stacking weights on this sample.
    propensity_loss, outcome_loss : numpy.ndarray
        Per-learner out-of-fold losses on this sample.
    masks : tuple
        Direction masks (propensity, outcome), over the columns of ``Psi``.
    settings : SearchSettings
    pair_se : numpy.ndarray, optional
        Influence-function SEs of the base learners' pairs; the full-sample values in every
        bootstrap replicate too (they only set the smoothed selector's scale floor).
    stacked : bool
        Whether the last row of ``Psi`` is the prediction-loss stacked propensity (the search's
        extra column) rather than a learner of the library.
    value : callable, optional
        ``value(alpha, beta) -> float``: the estimate at weights over the search's columns and
        the search's blend, on this sample. Needed only by the contrast test.
    contrast_tolerance : float, optional
        z x (paired SE of the difference between the search's estimate and the prediction-loss
        stacking estimate), from the full sample (held there in every bootstrap replicate, as
        the tie-break tolerances are). None: no contrast test.
    """

    Psi: np.ndarray
    search: object
    stack_alpha: np.ndarray
    stack_beta: np.ndarray
    propensity_loss: np.ndarray
    outcome_loss: np.ndarray
    masks: tuple
    settings: SearchSettings
    pair_se: np.ndarray | None = None
    stacked: bool = False
    value: Callable | None = None
    contrast_tolerance: float | None = None

    @property
    def stacking_weights(self) -> tuple[np.ndarray, np.ndarray]:
        """Prediction-loss stacking's nuisances as weights over the search's columns at the
        search's blend: the stacked column's vertex when there is one, else the stacking weights
        themselves (exact under the probability blend, a continuous treatment or one learner;
        :func:`contrast_applies` says when)."""
        if self.stacked:
            return np.eye(self.Psi.shape[0])[-1], self.stack_beta
        return self.stack_alpha, self.stack_beta

    @cached_property
    def contrast(self) -> tuple[np.ndarray, np.ndarray, float]:
        """The contrast test: ``(alpha, beta, difference)``. The search's weights when their
        estimate differs from prediction-loss stacking's by more than ``contrast_tolerance``,
        else the stacking weights (difference: search minus stacking; nan without a test).

        This is a Hausman-type test between an estimator that is efficient when every learner is
        good or all share one bias (prediction-loss stacking) and one aimed at the target's
        bias (the search): the search moves the estimate only when the move is larger than
        its paired sampling noise.
        """
        alpha, beta = self.search.alpha, self.search.beta
        if self.contrast_tolerance is None or self.value is None:
            return alpha, beta, float("nan")
        a0, b0 = self.stacking_weights
        difference = float(self.value(alpha, beta) - self.value(a0, b0))
        if abs(difference) > self.contrast_tolerance:
            return alpha, beta, difference
        return a0, b0, difference

    @property
    def base_Psi(self) -> np.ndarray:
        """The pair table of the library's own learners (without the stacked column)."""
        return self.Psi[:-1] if self.stacked else self.Psi

    @property
    def base_masks(self) -> tuple:
        prop_mask, out_mask = self.masks
        if self.stacked and prop_mask is not None:
            prop_mask = prop_mask[:-1]
        return prop_mask, out_mask

    @cached_property
    def pairs(self) -> dict:
        """The discrete selectors' pairs (computed once for both of them)."""
        return discrete_pairs(self.base_Psi, self.base_masks)

    def vertex(self, k: int, j: int) -> tuple[np.ndarray, np.ndarray]:
        """The vertex weights of pair (k, j) of the library's own learners."""
        K1, K2 = self.base_Psi.shape
        return np.eye(K1)[k], np.eye(K2)[j]


def _always(settings: SearchSettings) -> bool:
    return True


@dataclass(frozen=True)
class Comparison:
    """One comparison estimator.

    Attributes
    ----------
    name : str
        Row name in tables, reports and study files; the tuple order of :data:`COMPARISONS` is
        the row order everywhere.
    kind : str
        "target-aimed", "prediction-loss", "single pair" or "pair average".
    weights : callable
        ``weights(context) -> (alpha, beta)``, the same rule in the full sample and in every
        bootstrap replicate. The estimate is the DR estimate at these blended nuisances, so the
        weights say exactly what the row estimates.
    blend : str or None
        The blend of the row's estimate; None means the search's blend.
    learners : str
        "search": alpha is over the columns of the search's pair table (the stacked column
        included, when there is one); "base": over the library's own learners only (the
        stacked column is shown with weight 0).
    shown : callable
        ``shown(settings) -> bool``: whether the row exists under these settings.
    replicate : str
        How the reweighting bootstrap recomputes the estimate: "weights" (the replicate's weights
        from ``weights`` on the replicate's context, evaluated on the replicate's pair table) or
        "linearised" (a dedicated first-order expansion, for prediction-loss stacking whose
        probability-scale blend is not linear in the replicate row weights).
    """

    name: str
    kind: str
    weights: Callable[[WeightContext], tuple]
    blend: str | None = None
    learners: str = "search"
    shown: Callable[[SearchSettings], bool] = _always
    replicate: str = "weights"

    def row_blend(self, settings: SearchSettings) -> str:
        return settings.blend if self.blend is None else self.blend


def _best_predicting(ctx: WeightContext):
    return ctx.vertex(int(np.argmin(ctx.propensity_loss)), int(np.argmin(ctx.outcome_loss)))


def _smoothed(ctx: WeightContext):
    u, v, _ = smoothed_pair_weights(ctx.base_Psi, ctx.pair_se, ctx.base_masks)
    return u, v


def contrast_applies(settings: SearchSettings, stacked: bool, classifier: bool, K1: int) -> bool:
    """Whether prediction-loss stacking's nuisances are weights of the search's blend, so that
    the contrast test can fall back on them: the stacked column under the riesz blend, the
    probability blend, a continuous treatment (linear weight side) or one propensity learner.
    Not under the logit blend, nor the riesz blend over several classifiers without the stacked
    column."""
    if settings.contrast_z <= 0:
        return False
    if settings.blend == "probability" or stacked or K1 == 1:
        return True
    return settings.blend == "riesz" and not classifier


COMPARISONS: tuple[Comparison, ...] = (
    Comparison(MAIN, "target-aimed", lambda ctx: ctx.contrast[:2]),
    Comparison(
        UNTESTED,
        "target-aimed",
        lambda ctx: (ctx.search.alpha, ctx.search.beta),
        shown=lambda settings: settings.contrast_z > 0,
    ),
    Comparison(
        PURE,
        "target-aimed",
        lambda ctx: pure_weights(ctx.search, ctx.Psi.shape[0]),
        shown=lambda settings: settings.tie_break,
    ),
    # Prediction-loss stacking blends propensities on the probability scale (its natural form).
    Comparison(
        PLS,
        "prediction-loss",
        lambda ctx: (ctx.stack_alpha, ctx.stack_beta),
        blend="probability",
        learners="base",
        replicate="linearised",
    ),
    Comparison(BEST, "single pair", _best_predicting, learners="base"),
    Comparison(
        MIXED_PAIR,
        "single pair",
        lambda ctx: ctx.vertex(*ctx.pairs[MIXED_PAIR]),
        learners="base",
    ),
    Comparison(
        MINIMAX_PAIR,
        "single pair",
        lambda ctx: ctx.vertex(*ctx.pairs[MINIMAX_PAIR]),
        learners="base",
    ),
    # The pair weights w_kj = u_k v_j factorise (see smoothed_pair_weights), so the marginal
    # weights (u, v) shown for this row are exact: the pair average is the riesz blend at them,
    # whatever blend the search uses, and its Wald SE comes from the averaged pairs' rows.
    Comparison(SMOOTHED, "pair average", _smoothed, blend="riesz", learners="base"),
)

#: Row order of every table and report (study-only rows last).
ESTIMATOR_ORDER: tuple[str, ...] = (*(c.name for c in COMPARISONS), ORACLE)


def active_comparisons(settings: SearchSettings) -> tuple[Comparison, ...]:
    """The comparison estimators shown under these settings, in table order."""
    return tuple(c for c in COMPARISONS if c.shown(settings))


def comparison_weights(ctx: WeightContext) -> dict:
    """``name -> (alpha, beta, blend, kind, base)`` of every shown comparison estimator, main
    first; ``base`` says that alpha is over the library's own learners only."""
    return {
        c.name: (*c.weights(ctx), c.row_blend(ctx.settings), c.kind, c.learners == "base")
        for c in active_comparisons(ctx.settings)
    }
