"""The between-fold check of a fit, the fold-model jackknife of the learners' refitting noise,
and the refit calibration of the reweighting bootstrap that the jackknife switches on.

The check is always computed (it changes no number): the fold-specific estimates at the
target-aimed nuisances, Cochran's Q over the cross-fitting folds and the share of the
influence-function variance carried by the top 1% of rows (:mod:`stackdr.inference`'s
``fold_spread``). When Q rejects agreement of the folds at :data:`ALERT_P`, refitting the
learners moves the estimate by more than sampling noise; the reweighting bootstrap, which holds
the out-of-fold predictions fixed, cannot see that, so the fit warns
(:class:`~stackdr.errors.UnstableLearnersWarning`) and recommends the refit bootstrap.

The fold-model jackknife (:func:`fold_model_jackknife`) measures the same thing with far more
power: every fold's models (fitted without that fold) also predict one common set of rows, and
each estimator is re-evaluated on those rows with fold k's models for every k. Only the fitted
models differ between the K values, so their spread is the learners' refitting noise with the
row sampling removed; the grouped (delete-a-fold) jackknife turns it into a variance,
(K - 1) / K x sum_k (g_k - mean g)^2. Where the DR estimate is insensitive to small changes in
the nuisances (Neyman orthogonality with good learners) this is negligible; where every learner
is wrong and unstable it is not, and the reweighting bootstrap is then too narrow.

With ``calibration_refits`` (M > 0), a reweighting bootstrap and at most ``calibration_rows``
rows, when the jackknife variance of the headline estimate exceeds ``calibration_gate`` times
its bootstrap variance (or always with a gate of 0), M refit replicates are run on the row draws
of the first M reweighting replicates; each estimator's bootstrap variance is widened by the
refits' excess spread over the reweighting replicates on the same draws, ratio^2 - 1 where the
ratio (:func:`~stackdr.inference.paired_refit_ratio`) exceeds 1, shrunk for the noise of so
few pairs by ``calibration_shrink`` (:func:`~stackdr.inference.refit_excess`): an excess
within its jackknife SE of 0 widens little or nothing. Replicate b of both bootstraps comes
from the same generator, so the row draws are shared with multinomial row weights (the
default); with Bayesian weights the ratio compares unpaired replicates (noisier). Cost: M full
fits (cross-fitting included), only for flagged fits; the jackknife itself costs predictions
only. The evidence for the rule and its defaults is in DEVELOPERS.md ("Honest SE with unstable
learners").
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from functools import partial
from types import SimpleNamespace

import numpy as np
from sklearn.base import clone

from stackdr.core import (
    estimate_from_rows,
    pair_inputs,
    row_contributions,
    with_stacked_propensity,
)
from stackdr.errors import InputError, UnstableLearnersWarning, warn_user
from stackdr.estimation._numbers import number_text
from stackdr.estimation._parallel import dask_jobs, parallel_backend
from stackdr.inference import (
    FoldSpread,
    fold_spread,
    refit_bootstrap,
    refit_excess,
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
    fit_variance : dict of str to float
        Per estimator: the fold-model jackknife variance of its estimate (the learners'
        refitting noise; :func:`fold_model_jackknife`); empty when not available (one fold,
        fits in sample).
    fit_share : float
        The headline's jackknife variance over its bootstrap variance (over its squared
        influence-function SE without a bootstrap); NaN when not available.
    gate : float
        The ``calibration_gate`` the share was compared with (NaN without an estimator).
    skipped : str
        Why a flagged fit was not calibrated (empty otherwise).
    excess_se : dict of str to float
        When the refit calibration ran: per estimator, the jackknife SE (over the paired
        replicates) of the refits' variance excess, ratio^2 - 1 (:func:`refit_excess`).
    shrink : float
        The ``calibration_shrink`` the excess was shrunk with (NaN without an estimator).
    """

    spread: FoldSpread
    top_row_share: float
    alert: bool
    corrected: bool = False
    added_variance: dict = field(default_factory=dict)
    uncorrected_se: dict = field(default_factory=dict)
    refit_ratios: dict = field(default_factory=dict)
    headline: str = ""
    fit_variance: dict = field(default_factory=dict)
    fit_share: float = float("nan")
    gate: float = float("nan")
    skipped: str = ""
    excess_se: dict = field(default_factory=dict)
    shrink: float = float("nan")

    @property
    def flagged(self) -> bool:
        """The jackknife share is above the gate (the refit calibration is called for)."""
        return _above_gate(self.fit_share, self.gate)

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
        return text + self._jackknife() + self._correction()

    def _jackknife(self) -> str:
        if not np.isfinite(self.fit_share):
            return ""
        share = number_text(self.fit_share, 2)
        text = (
            f" Fold-model jackknife: the learners' refitting noise is {share} of the bootstrap "
            "variance of the target-aimed estimate"
        )
        if not np.isfinite(self.gate):
            return text + "."
        if not self.flagged:
            return text + f" (below the gate {self.gate:g}; no refit calibration)."
        text += f" (above the gate {self.gate:g})"
        if self.corrected:
            return text + ", so the refit calibration ran."
        return text + f"; {self.skipped}."

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
        if ratio is not None and ratio > 1 and self.shrink > 0:
            return text + (
                " With so few refits that excess is within its noise (calibration_shrink = "
                f"{self.shrink:g}), so the bootstrap SE of the target-aimed estimate is "
                "unchanged."
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


def _refit_calibration(estimator, target, result) -> tuple[dict, dict, dict]:
    """Variance to add per estimator from ``calibration_refits`` refit replicates that share
    their row draws with the first reweighting replicates: the excess of the refits' spread
    over the reweighting replicates', shrunk for its noise (``calibration_shrink``;
    :func:`~stackdr.inference.refit_excess`), times SE^2. Returns the ratios, the added
    variances and the excesses' jackknife SEs."""
    settings = replace(
        estimator.inference_settings(),
        replicates=int(estimator.calibration_refits),
        progress=False,
    )
    refits = refit_replicates(estimator, target, settings, result)
    boot = result.bootstrap
    shrink = float(getattr(estimator, "calibration_shrink", 0.0) or 0.0)
    ratios, added, noise = {}, {}, {}
    for row in result.estimators:
        if row.name not in boot.standard_errors:
            continue
        ratio, excess, excess_se = refit_excess(
            refits.estimates[row.name].to_numpy(),
            boot.estimates[row.name].to_numpy(),
            row.estimate,
            shrink,
        )
        ratios[row.name] = ratio
        noise[row.name] = excess_se
        if excess > 0:
            added[row.name] = excess * boot.standard_errors[row.name] ** 2
    return ratios, added, noise


def fold_model_jackknife(result) -> dict:
    """The fold-model jackknife variance of every estimator of ``result``: the learners'
    refitting noise, with the row sampling held fixed.

    For each fold assignment and each fold k, the estimator's weights are applied to the
    predictions that the models fitted without fold k made on the common rows
    ``crossfit.jackknife_rows`` (sampling weights as in the fit), giving g_k; the variance is
    (K - 1) / K x sum_k (g_k - mean g)^2, the grouped jackknife for K groups of n / K rows, and
    is averaged over fold assignments.

    Returns
    -------
    dict of str to float
        Estimator name -> variance; empty when the cross-fit kept no fold predictions.
    """
    cf = result.crossfit
    if cf.fold_propensity is None:
        return {}
    rows = cf.jackknife_rows
    prepared, an = result.data, result.analysis
    A, Y = prepared.A[rows], prepared.Y[rows]
    w = None if prepared.weights is None else prepared.weights[rows]
    R, K = cf.fold_propensity.shape[:2]
    values = {row.name: np.zeros((R, K)) for row in result.estimators}
    for r in range(R):
        for k in range(K):
            fold = SimpleNamespace(
                propensity=cf.fold_propensity[r, k][None],
                outcome={h: v[r, k][None] for h, v in cf.fold_outcome.items()},
                propensity_kind=cf.propensity_kind,
            )
            inp = pair_inputs(result.target, fold, A, Y, 0, sample_weight=w)
            if an.stacked:
                inp = with_stacked_propensity(inp, an.stack_alpha)
            for row in result.estimators:
                H = row_contributions(inp, row.alpha, row.beta, row.blend)
                values[row.name][r, k] = estimate_from_rows(H, inp.d, w).estimate
    factor = (K - 1) / K
    return {
        name: float(np.mean(factor * ((g - g.mean(axis=1, keepdims=True)) ** 2).sum(axis=1)))
        for name, g in values.items()
    }


def _above_gate(share: float, gate: float) -> bool:
    """Whether a jackknife share is above the calibration gate (False when either is NaN)."""
    return bool(np.isfinite(share) and np.isfinite(gate) and share > gate)


def _jackknife_share(result, fit_variance: dict) -> float:
    main = result.estimators[0]
    if main.name not in fit_variance:
        return float("nan")
    boot = result.bootstrap
    se = main.se
    if boot is not None and main.name in boot.standard_errors:
        se = boot.standard_errors[main.name]
    if not (np.isfinite(se) and se > 0):
        return float("nan")
    return float(fit_variance[main.name] / se**2)


def check_folds(result, estimator=None, target=None) -> FoldCheck:
    """The between-fold check of a fitted result and, when ``estimator`` has
    ``calibration_refits`` > 0, the result a reweighting bootstrap and the fold-model jackknife
    share above ``calibration_gate`` (or a gate of 0), its refit calibration (the result's rows
    and bootstrap record are updated): that many refit replicates, and every estimator's SE and
    interval widened by their paired ratio to the reweighting replicates where it exceeds 1.

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
    fit_variance = fold_model_jackknife(result)
    share = _jackknife_share(result, fit_variance)
    refits = int(getattr(estimator, "calibration_refits", 0) or 0)
    gate = float(getattr(estimator, "calibration_gate", float("nan")))
    flagged = _above_gate(share, gate)
    wanted = reweighting and refits > 0 and (gate == 0 or flagged)
    skipped = ""
    if wanted and not np.isscalar(estimator.folds):
        wanted = False
        skipped = "the refit calibration needs generated folds, not fixed fold labels"
    elif wanted and result.data.n > int(getattr(estimator, "calibration_rows", result.data.n)):
        wanted = False
        skipped = (
            f"with {result.data.n:,} rows (more than calibration_rows = "
            f"{int(estimator.calibration_rows):,}) the refit calibration, {refits} full fits, "
            "is not run by default; raise calibration_rows or use --bootstrap-kind refit if the "
            "interval matters"
        )
    elif flagged and not wanted:
        if boot is None:
            skipped = "without a bootstrap the Wald SE leaves that noise out"
        elif boot.kind == "refit":
            skipped = "the refit bootstrap already includes it"
        else:
            skipped = (
                "the refit calibration is off (calibration_refits = 0), so the bootstrap "
                "interval may be too narrow"
            )
    corrected = wanted
    added, before, ratios, noise = {}, {}, {}, {}
    if corrected:
        ratios, added, noise = _refit_calibration(estimator, target, result)
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
        fit_variance,
        share,
        gate,
        skipped,
        noise,
        float(getattr(estimator, "calibration_shrink", float("nan"))),
    )
    if check.alert and not corrected and not (boot is not None and boot.kind == "refit"):
        warn_user(check.sentence(), UnstableLearnersWarning)
    return check
