"""The contrast test between the search's weights and prediction-loss stacking.

The weight search aims the nuisances at the target's bias; prediction-loss stacking (PLS) aims
them at prediction. When every learner is good, or all share one bias, the search's weights
buy no bias reduction and only add variance (the riesz blend keeps the heavier inverse weights
of the worse propensity learners). The contrast test keeps the search's weights only when the
two estimates differ by more than ``z`` paired standard errors, the standard error of the
difference of their influence functions on the same rows (a Hausman-type specification test:
Hausman 1978, Econometrica 46, 1251-1271); otherwise the headline uses PLS's nuisances.

The variance guard (``contrast_guard``, k) sets the threshold to 0 when the search's estimate
is no noisier than PLS's: influence-function SE at most k times PLS's. What the test protects
against is a search that buys a bias reduction the data cannot show at the price of a noisier
estimate (heavier inverse weights, as under poor overlap); without that price the searched
weights are kept. The guard's verdict is taken on the full sample and held in the bootstrap
replicates, like the threshold.

With repeated splits the difference is that of the median-combined estimates and its SE the
median over repeats. Sampling weights and clusters enter the SE exactly as in every other
influence-function SE (:func:`~stackdr.core.influence_standard_error`).
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from stackdr.core import blend_estimate, influence_standard_error
from stackdr.estimation._analysis import combine_repeats
from stackdr.search import WeightContext, contrast_applies

#: Headline choices of the test.
SEARCH_KEPT = "target-aimed weights"
STACKING_KEPT = "prediction-loss stacking nuisances"


@dataclass(frozen=True)
class ContrastTest:
    """The full-sample contrast test.

    Attributes
    ----------
    z : float
        The threshold in paired standard errors (setting ``contrast_z``; 0: off).
    applies : bool
        Whether the test ran (see :func:`~stackdr.search.contrast_applies`).
    difference : float
        Search estimate minus PLS estimate (nan when the test did not run).
    se : float
        Paired influence-function SE of that difference.
    used : str
        ``SEARCH_KEPT`` or ``STACKING_KEPT`` (``SEARCH_KEPT`` when the test did not run).
    guard : float
        The variance guard k (setting ``contrast_guard``; 0: off).
    se_ratio : float
        Influence-function SE of the searched weights' estimate over that of the prediction-loss
        stacking estimate (nan when the test did not run).
    """

    z: float
    applies: bool
    difference: float = float("nan")
    se: float = float("nan")
    used: str = SEARCH_KEPT
    guard: float = 0.0
    se_ratio: float = float("nan")

    @property
    def guarded(self) -> bool:
        """The variance guard passed: the searched weights are no noisier than k x PLS's."""
        return bool(self.applies and self.guard > 0 and self.se_ratio <= self.guard)

    @property
    def tolerance(self) -> float | None:
        if not self.applies:
            return None
        return 0.0 if self.guarded else self.z * self.se

    @property
    def statistic(self) -> float:
        """|difference| / se."""
        return abs(self.difference) / self.se if self.se > 0 else float("inf")

    def sentence(self, digits_fn=lambda x: f"{x:.4g}") -> str:
        """One sentence for summaries and reports."""
        if not self.applies:
            if self.z <= 0:
                return ""
            return (
                "Contrast test not applicable: prediction-loss stacking's nuisances are not "
                "weights of this blend, so the target-aimed weights are used as searched."
            )
        if self.difference == 0 and self.se == 0:
            return (
                "Contrast test: the target-aimed weights give exactly prediction-loss stacking's "
                "estimate (the tie-break returned its nuisances), so there is nothing to test."
            )
        head = (
            "Contrast test: the target-aimed weights' estimate minus prediction-loss stacking's "
            f"is {digits_fn(self.difference)} (paired SE {digits_fn(self.se)}, "
            f"{self.statistic:.2f} SEs against z = {self.z:g})"
        )
        if self.guarded and self.used == SEARCH_KEPT:
            return (
                f"{head}; their SE is {self.se_ratio:.3f} x stacking's, within the variance "
                f"guard {self.guard:g}, so the headline uses the target-aimed weights."
            )
        verdict = (
            "beyond the threshold, so the headline uses the target-aimed weights"
            if self.used == SEARCH_KEPT
            else "within the threshold, so the headline uses the prediction-loss stacking "
            "nuisances (the data do not show a bias that the target-aimed weights remove)"
        )
        guard = (
            f"; their SE is {self.se_ratio:.3f} x stacking's, above the variance guard "
            f"{self.guard:g}"
            if self.guard > 0 and np.isfinite(self.se_ratio)
            else ""
        )
        return f"{head}{guard}: {verdict}."

    def record(self) -> dict:
        return {
            "z": self.z,
            "applies": self.applies,
            "difference": self.difference,
            "se": self.se,
            "used": self.used,
            "guard": self.guard,
            "se_ratio": self.se_ratio,
        }


def contrast_test(an, search, classifier: bool) -> tuple[ContrastTest, object]:
    """The full-sample test (threshold ``contrast_z`` and variance guard ``contrast_guard`` of
    the analysis's settings) and the ``value`` function the weight context needs.

    Returns ``(test, value)``; ``value(alpha, beta)`` is the combined estimate at the search's
    blend on the full sample (None when the test does not apply).
    """
    settings = an.settings
    z, guard = float(settings.contrast_z), float(settings.contrast_guard)
    if not contrast_applies(settings, an.stacked, classifier, an.base_learners):
        return ContrastTest(z, False, guard=guard), None
    blend = settings.blend
    # Per-repeat fits by weights: the test's two fits are reused by ``value`` when the weight
    # context decides the headline, so each is computed once.
    fits: dict = {}

    def repeat_fits(alpha, beta) -> list:
        key = (np.asarray(alpha, dtype=float).tobytes(), np.asarray(beta, dtype=float).tobytes())
        if key not in fits:
            fits[key] = [blend_estimate(inp, alpha, beta, blend) for inp in an.inputs]
        return fits[key]

    def combined(alpha, beta) -> tuple[float, float]:
        """Estimate and SE combined over repeats."""
        rows = repeat_fits(alpha, beta)
        return combine_repeats([f.estimate for f in rows], [f.se for f in rows])

    def value(alpha, beta) -> float:
        return combined(alpha, beta)[0]

    ctx = WeightContext(
        an.Psi,
        search,
        an.stack_alpha,
        an.stack_beta,
        None,
        None,
        an.masks,
        settings,
        stacked=an.stacked,
    )
    a0, b0 = ctx.stacking_weights
    searched, stacking = repeat_fits(search.alpha, search.beta), repeat_fits(a0, b0)
    ses = [
        float(
            influence_standard_error(
                first.influence - second.influence, inp.sample_weight, inp.cluster_codes
            )
        )
        for first, second, inp in zip(searched, stacking, an.inputs)
    ]
    se = float(np.median(ses))
    # The estimates' own SEs are those of their rows (weighted, cluster-robust as set).
    est_first, se_first = combined(search.alpha, search.beta)
    est_second, se_second = combined(a0, b0)
    se_ratio = float(se_first / se_second) if se_second > 0 else float("inf")
    difference = float(est_first - est_second)
    test = ContrastTest(z, True, difference, se, SEARCH_KEPT, guard, se_ratio)
    # The same rule as ``WeightContext.contrast`` applies in every bootstrap replicate.
    if not abs(difference) > test.tolerance:
        test = replace(test, used=STACKING_KEPT)
    return test, value
