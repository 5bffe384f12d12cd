"""The between-fold check of a fit, and the optional refit calibration of the reweighting
bootstrap.

The check is always computed (it changes no number): the fold-specific estimates at the
target-aimed nuisances, Cochran's Q over the cross-fitting folds and the share of the
influence-function variance carried by the top 1% of rows (:mod:`stackdr.inference`'s
``fold_spread``). When Q rejects agreement of the folds at :data:`ALERT_P`, refitting the
learners moves the estimate by more than sampling noise; the reweighting bootstrap, which holds
the out-of-fold predictions fixed, cannot see that, so the fit warns
(:class:`~stackdr.errors.UnstableLearnersWarning`) and recommends the refit bootstrap.

With the setting ``calibration_refits`` (M > 0) and a reweighting bootstrap, M refit replicates
are run on the row draws of the first M reweighting replicates; each estimator's bootstrap SE and
interval are widened by the paired ratio of the two bootstraps' spreads
(:func:`~stackdr.inference.paired_refit_ratio`) where it exceeds 1. Replicate b of both
bootstraps comes from the same generator, so the row draws are shared with multinomial row
weights (the default); with Bayesian weights the ratio compares unpaired replicates (noisier).
Cost: M full fits (cross-fitting included), against a reweighting bootstrap that fits nothing.
The evidence for the rule and its default (off) is in DEVELOPERS.md ("Honest SE with unstable
learners").
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from functools import partial

import numpy as np
from sklearn.base import clone

from stackdr.core import estimate_from_rows, row_contributions
from stackdr.errors import InputError, UnstableLearnersWarning, warn_user
from stackdr.estimation._numbers import number_text
from stackdr.estimation._parallel import dask_jobs, parallel_backend
from stackdr.inference import (
    FoldSpread,
    fold_spread,
    paired_refit_ratio,
    refit_bootstrap,
    top_row_share,
    widen_intervals,
)

#: Cochran's Q p-value below which the folds count as disagreeing. Strict on purpose: the
#: check has little power against the usual instability (see DEVELOPERS.md, "Honest SE with
#: unstable learners"), so it only speaks up for gross fold-to-fold swings, and a stable fit
#: sees a false alarm once in a thousand fits, not once in twenty.
ALERT_P = 0.001


@dataclass(frozen=True)
class FoldCheck:
    """Whether the cross-fitting folds agree at the target-aimed nuisances.

    Attributes
    ----------
    spread : FoldSpread
        Fold estimates, their SEs, Cochran's Q, Q / (K - 1), its p-value and tau^2 (first fold
        assignment).
    top_row_share : float
        Share of the influence-function variance carried by the top 1% of rows.
    alert : bool
        The folds disagree at :data:`ALERT_P`.
    corrected : bool
        Whether the refit calibration ran (setting ``calibration_refits``, reweighting
        bootstrap).
    added_variance : dict of str to float
        Variance added to each estimator's bootstrap SE squared (empty when not corrected).
    uncorrected_se : dict of str to float
        The bootstrap SEs before the addition (empty when not corrected).
    refit_ratios : dict of str to float
        With ``calibration_refits``: per estimator, the paired ratio of refit to reweighting
        spread (:func:`~stackdr.inference.paired_refit_ratio`); empty otherwise.
    headline : str
        Name of the target-aimed row the check is computed for.
    """

    spread: FoldSpread
    top_row_share: float
    alert: bool
    corrected: bool = False
    added_variance: dict = field(default_factory=dict)
    uncorrected_se: dict = field(default_factory=dict)
    refit_ratios: dict = field(default_factory=dict)
    headline: str = ""

    def sentence(self) -> str:
        """The check in one or two sentences, for the summary, the report and the warning."""
        s = self.spread
        if s.folds < 2:
            text = "Between-fold check: not available (a single fold)."
        else:
            text = (
                f"Between-fold check over {s.folds} folds: Cochran's Q / (K - 1) = "
                f"{number_text(s.dispersion, 3)} ({_p_text(s.p_value)}); "
            )
            if not self.alert:
                text += (
                    "no disagreement between the fold estimates beyond sampling noise at "
                    f"p < {ALERT_P:g} (a check of little power: it catches gross swings only)."
                )
            else:
                text += (
                    "the fold estimates disagree more than sampling noise explains (by chance in "
                    f"1 fit in {round(1 / ALERT_P)}): refitting the learners may move the "
                    "estimate, which the reweighting bootstrap (fits held fixed) misses"
                )
                text += "." if self.corrected else "; consider --bootstrap-kind refit."
        return text + self._correction()

    def _correction(self) -> str:
        if not self.corrected:
            return ""
        main = self.headline
        ratio = self.refit_ratios.get(main)
        text = ""
        if ratio is not None:
            text += f" Paired refit / reweighting spread ratio {number_text(ratio, 3)}."
        if main in self.added_variance:
            before = self.uncorrected_se[main]
            after = float(np.sqrt(before**2 + self.added_variance[main]))
            return text + (
                f" The bootstrap SE of the target-aimed estimate was widened from "
                f"{number_text(before, 3)} to {number_text(after, 3)}, its interval likewise."
            )
        return text + " The bootstrap SE of the target-aimed estimate needed no widening."


def _spread(result, row) -> tuple[FoldSpread, np.ndarray]:
    """Fold spread and influence values of ``row`` on the first fold assignment."""
    inp = result.analysis.inputs[0]
    H = row_contributions(inp, row.alpha, row.beta, row.blend)
    labels = result.crossfit.fold_labels[0]
    spread = fold_spread(H, inp.d, labels, inp.sample_weight, inp.cluster_codes)
    return spread, estimate_from_rows(H, inp.d, inp.sample_weight).influence


def _p_text(p: float) -> str:
    return "p < 0.0001" if p < 1e-4 else f"p = {number_text(p, 2)}"


def _disagree(spread: FoldSpread) -> bool:
    return bool(np.isfinite(spread.p_value) and spread.p_value < ALERT_P)


def refit_replicates(estimator, target, settings, result):
    """The refit bootstrap of ``result`` with ``settings`` (replicates, seed, workers), each
    replicate a clone of ``estimator`` fitted on resampled rows."""
    if not np.isscalar(estimator.folds):
        raise InputError("the refit bootstrap needs generated folds, not fixed fold labels")
    # --- backend/cluster: replicates go to the cluster; the clone they carry has no client (a
    # client does not travel to workers) and runs its fits in place.
    params = {**estimator.get_params(deep=False), "backend": None, "cluster": None}
    local = clone(type(estimator)(**params))
    with parallel_backend(estimator.backend, estimator.cluster, estimator.n_jobs or 1):
        return refit_bootstrap(
            settings,
            result,
            partial(local._fit_sample, target),
            n_jobs=dask_jobs(estimator.n_jobs) if estimator.backend == "dask" else None,
        )


def _refit_calibration(estimator, target, result) -> tuple[dict, dict]:
    """Variance to add per estimator from ``calibration_refits`` refit replicates that share
    their row draws with the first reweighting replicates: (max(1, ratio)^2 - 1) x SE^2."""
    settings = replace(
        estimator.inference_settings(),
        replicates=int(estimator.calibration_refits),
        progress=False,
    )
    refits = refit_replicates(estimator, target, settings, result)
    boot = result.bootstrap
    ratios, added = {}, {}
    for row in result.estimators:
        if row.name not in boot.standard_errors:
            continue
        ratio = paired_refit_ratio(
            refits.estimates[row.name].to_numpy(),
            boot.estimates[row.name].to_numpy(),
            row.estimate,
        )
        ratios[row.name] = ratio
        if np.isfinite(ratio) and ratio > 1:
            added[row.name] = (ratio**2 - 1) * boot.standard_errors[row.name] ** 2
    return ratios, added


def check_folds(result, estimator=None, target=None) -> FoldCheck:
    """The between-fold check of a fitted result and, when ``estimator`` has
    ``calibration_refits`` > 0 and the result a reweighting bootstrap, its refit calibration
    (the result's rows and bootstrap record are updated): that many refit replicates, and every
    estimator's SE and interval widened by their paired ratio to the reweighting replicates
    where it exceeds 1.

    Warns (:class:`~stackdr.errors.UnstableLearnersWarning`) when the target-aimed estimate's
    folds disagree and the intervals do not already account for refitting.

    Parameters
    ----------
    result : BlendResult
    estimator : BlendEstimator, optional
        The estimator that made ``result`` (None: the check only).
    target : Target, optional
        Its target (needed for ``calibration_refits``).

    Returns
    -------
    FoldCheck
    """
    main = result.estimators[0]
    spread, influence = _spread(result, main)
    boot = result.bootstrap
    reweighting = boot is not None and boot.kind != "refit"
    corrected = reweighting and int(getattr(estimator, "calibration_refits", 0) or 0) > 0
    added, before, ratios = {}, {}, {}
    if corrected:
        ratios, added = _refit_calibration(estimator, target, result)
        before = dict(boot.standard_errors)
        estimates = {row.name: row.estimate for row in result.estimators}
        result.attach_bootstrap(widen_intervals(boot, estimates, added))
    check = FoldCheck(
        spread,
        top_row_share(influence),
        _disagree(spread),
        corrected,
        added,
        before,
        ratios,
        main.name,
    )
    if check.alert and not corrected and not (boot is not None and boot.kind == "refit"):
        warn_user(check.sentence(), UnstableLearnersWarning)
    return check
