"""The main estimator: cross-fit the libraries, search target-aimed weights, estimate, compare.

Scikit-learn style: the constructor stores settings, :meth:`BlendEstimator.fit` does the work
and returns a :class:`~stackdr.results.BlendResult`.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from functools import partial

import numpy as np
import pandas as pd
from sklearn.base import BaseEstimator, clone

from stackdr.core import (
    Target,
    blend_estimate,
    contrast_standard_error,
    get_target,
    log_losses,
    logloss_stack,
    nnls_stack,
    pair_inputs,
    pair_standard_errors,
    pair_table,
    phi,
    squared_error_losses,
)
from stackdr.errors import InputError
from stackdr.estimation._crossfit import CrossFitResult, cross_fit
from stackdr.estimation._data import PreparedData, prepare_data
from stackdr.estimation._learners import (
    check_library,
    default_outcome_library,
    default_propensity_library,
)
from stackdr.estimation._parallel import check_cluster, dask_jobs, parallel_backend
from stackdr.estimation._results import BlendResult, EstimatorRow
from stackdr.estimation._settings import settings_record, validate_params
from stackdr.inference import InferenceSettings, refit_bootstrap, reweighting_bootstrap
from stackdr.search import (
    SearchSettings,
    WeightContext,
    comparison_weights,
    pseudo_risk,
    run_search,
)


@dataclass(frozen=True)
class Analysis:
    """Everything computed from one cross-fit, reused by the bootstrap."""

    inputs: list
    Psi: np.ndarray
    pair_se: np.ndarray
    losses: dict
    stack_alpha: np.ndarray
    stack_beta: np.ndarray
    masks: tuple
    settings: SearchSettings


class BlendEstimator(BaseEstimator):
    """Target-aimed convex stacking of nuisance learners for a doubly robust target.

    Parameters
    ----------
    target : str or Target
        "ate", "att", "mean1", "mean0", "cov", or a user-defined :class:`~stackdr.targets.Target`.
    propensity_learners, outcome_learners : dict name -> estimator, optional
        Learner libraries (default: :func:`~stackdr.learners.default_propensity_library` and
        :func:`~stackdr.learners.default_outcome_library`). Cloned, never mutated.
    folds : int or array
        Cross-fitting folds (default 5); 1 fits in sample (parametric learners and reference
        checks only); or fold labels per row (e.g. clusters kept whole).
    repeats : int
        Independent fold assignments; pair tables and estimates are combined by the median.
    blend : {"riesz", "probability", "logit"}
        How propensity learners are blended (DESIGN section 3).
    criterion : {"mixed", "minimax"}
        Pseudo-risk minimised by the weights.
    tie_break : bool
        Among weights within ``tie_break_scale`` standard errors of the optimum, take those
        closest to the prediction-loss stacking weights.
    tie_break_scale : float
        The constant c of the tolerance c x (SE of the pair contrast attaining the range).
    directions : {"all", "credible"}
        Learners whose swaps define the perturbations: all of them (the published method), or
        only those whose out-of-fold loss is within ``direction_tolerance`` (relative) of the
        best on that side.
    direction_tolerance : float
        Relative loss tolerance for ``directions="credible"``.
    clip : float
        Propensities are clipped to [clip, 1 - clip].
    outcome_mode : {"separate", "pooled"}
        Per-arm outcome models, or one model with the treatment as a feature.
    level : float
        Confidence level of intervals.
    bootstrap : int
        Bootstrap replicates (default 1000; 0 disables and Wald intervals are reported).
    bootstrap_kind : {"multinomial", "bayesian", "refit"}
        Reweighting bootstrap with multinomial counts (default) or exponential weights, both
        reusing the out-of-fold predictions and rerunning the weight search; or the refit
        bootstrap, which also refits every learner (expensive, fully honest).
    interval : {"percentile", "basic"}
        Bootstrap interval type.
    chunk_size : int, optional
        Replicates per batched matrix product (default: sized to bound memory); results do not
        depend on it.
    seed : int
        Seeds folds and bootstrap.
    n_jobs : int
        joblib workers for learner fits.
    progress : bool
        Show progress bars.
    backend : None or "dask"
        "dask" runs the learner fits and the refit bootstrap on a dask.distributed cluster
        through joblib's dask backend; results are identical to a local run with the same seed.
    cluster : None, str, int or distributed.Client
        With ``backend="dask"``: scheduler address, number of workers of a local cluster to
        start for each fit, or an existing client (default: the current client, else a local
        cluster of ``n_jobs`` workers).
    """

    def __init__(
        self,
        target: str | Target = "ate",
        propensity_learners: dict | None = None,
        outcome_learners: dict | None = None,
        *,
        folds=5,
        repeats: int = 1,
        blend: str = "riesz",
        criterion: str = "mixed",
        tie_break: bool = True,
        tie_break_scale: float = 0.5,
        directions: str = "all",
        direction_tolerance: float = 0.25,
        clip: float = 0.01,
        outcome_mode: str = "separate",
        on_error: str = "drop",
        level: float = 0.95,
        bootstrap: int = 1000,
        bootstrap_kind: str = "multinomial",
        interval: str = "percentile",
        chunk_size: int | None = None,
        seed: int = 0,
        n_jobs: int | None = 1,
        progress: bool = False,
        backend: str | None = None,
        cluster=None,
    ):
        self.target = target
        self.propensity_learners = propensity_learners
        self.outcome_learners = outcome_learners
        self.folds = folds
        self.repeats = repeats
        self.blend = blend
        self.criterion = criterion
        self.tie_break = tie_break
        self.tie_break_scale = tie_break_scale
        self.directions = directions
        self.direction_tolerance = direction_tolerance
        self.clip = clip
        self.outcome_mode = outcome_mode
        self.on_error = on_error
        self.level = level
        self.bootstrap = bootstrap
        self.bootstrap_kind = bootstrap_kind
        self.interval = interval
        self.chunk_size = chunk_size
        self.seed = seed
        self.n_jobs = n_jobs
        self.progress = progress
        self.backend = backend
        self.cluster = cluster

    def _validate_params(self) -> None:
        """Check every parameter against the settings table (the one validation entry point)."""
        validate_params(self.get_params(deep=False))
        check_cluster(self.backend, self.cluster)

    def fit(self, data, treatment=None, outcome=None, covariates=None) -> BlendResult:
        """Validate data, cross-fit both libraries, search weights and estimate.

        Parameters
        ----------
        data : DataFrame or array (n, p)
        treatment, outcome : column names (DataFrame) or arrays
        covariates : list of column names, optional (default: all other columns)
        """
        self._validate_params()
        start = time.perf_counter()
        target = get_target(self.target)
        n_folds = self.folds if np.isscalar(self.folds) else 2
        prepared = prepare_data(
            data, treatment, outcome, covariates, target=target, folds=int(n_folds)
        )
        # --- backend/cluster: learner fits run where the backend setting says.
        with parallel_backend(self.backend, self.cluster, self.n_jobs or 1):
            cf = self.cross_fit(
                prepared,
                target,
                n_jobs=dask_jobs(self.n_jobs) if self.backend == "dask" else self.n_jobs,
                progress=self.progress,
            )
        fit_seconds = time.perf_counter() - start
        result = self.analyse(prepared, target, cf)
        result.timings["cross_fit"] = fit_seconds
        result.timings["total"] = time.perf_counter() - start
        return result

    def cross_fit(
        self, prepared: PreparedData, target: Target, *, n_jobs=1, progress: bool = False
    ) -> CrossFitResult:
        """Cross-fit both libraries on validated data with this estimator's settings."""
        plib, olib = self._libraries(prepared)
        return cross_fit(
            prepared,
            target,
            plib,
            olib,
            folds=self.folds,
            repeats=self.repeats,
            seed=self.seed,
            clip=self.clip,
            outcome_mode=self.outcome_mode,
            on_error=self.on_error,
            n_jobs=n_jobs,
            progress=progress,
        )

    def _libraries(self, prepared: PreparedData) -> tuple[dict, dict]:
        binary = bool(np.isin(prepared.A, (0.0, 1.0)).all())
        prop_kind = "classifier" if binary else "regressor"
        if self.propensity_learners is not None:
            plib = self.propensity_learners
        else:
            plib = default_propensity_library() if binary else default_outcome_library()
        olib = (
            self.outcome_learners
            if self.outcome_learners is not None
            else (default_outcome_library())
        )
        return (
            check_library(plib, prop_kind, "propensity"),
            check_library(olib, "regressor", "outcome"),
        )

    def search_settings(self) -> SearchSettings:
        return SearchSettings(
            criterion=self.criterion,
            blend=self.blend,
            tie_break=self.tie_break,
            tie_break_scale=float(self.tie_break_scale),
        )

    def prepare_analysis(
        self, prepared: PreparedData, target: Target, cf: CrossFitResult
    ) -> Analysis:
        """Pair tables, prediction losses, stacking weights and direction masks."""
        inputs = [pair_inputs(target, cf, prepared.A, prepared.Y, r) for r in range(cf.repeats)]
        tables = np.stack([pair_table(inp) for inp in inputs])
        Psi = np.median(tables, axis=0)
        pair_se = np.median(np.stack([pair_standard_errors(inp) for inp in inputs]), axis=0)
        losses, stack_alpha, stack_beta = prediction_losses_and_stacking(prepared, cf)
        masks = (
            self._direction_mask(losses["propensity"]),
            self._direction_mask(losses["outcome"]),
        )
        return Analysis(
            inputs, Psi, pair_se, losses, stack_alpha, stack_beta, masks, self.search_settings()
        )

    def _direction_mask(self, loss: np.ndarray) -> np.ndarray | None:
        if self.directions == "all":
            return None
        best = loss.min()
        return loss <= best + self.direction_tolerance * abs(best)

    def analyse(
        self, prepared: PreparedData, target: Target, cf: CrossFitResult, bootstrap: bool = True
    ) -> BlendResult:
        """Everything after cross-fitting: weight search, estimates, comparison table, and the
        bootstrap when enabled (``bootstrap=False`` skips it, e.g. inside a refit replicate)."""
        t0 = time.perf_counter()
        an = self.prepare_analysis(prepared, target, cf)
        settings = an.settings
        phi_fn = None if settings.blend == "riesz" else phi_function(an.inputs, settings.blend)
        tolerance = noise_floor_function(an, settings) if settings.tie_break else None
        search = run_search(
            an.Psi,
            settings,
            phi=phi_fn,
            anchors=(an.stack_alpha, an.stack_beta),
            tolerance=tolerance,
            masks=an.masks,
        )
        selections = comparison_weights(
            WeightContext(
                an.Psi,
                search,
                an.stack_alpha,
                an.stack_beta,
                an.losses["propensity"],
                an.losses["outcome"],
                an.masks,
                settings,
            )
        )
        rows = [
            self._row(name, an, alpha, beta, blend, kind)
            for name, (alpha, beta, blend, kind) in selections.items()
        ]
        main = rows[0]
        timings = {"analysis": time.perf_counter() - t0}
        result = BlendResult(
            target=target,
            data=prepared,
            crossfit=cf,
            analysis=an,
            search=search,
            estimate=main.estimate,
            se=main.se,
            level=self.level,
            alpha=pd.Series(search.alpha, index=cf.propensity_names, name="propensity weight"),
            beta=pd.Series(search.beta, index=cf.outcome_names, name="outcome weight"),
            estimators=rows,
            settings=settings_record(self.get_params(deep=False)),
            timings=timings,
        )
        if bootstrap and self.bootstrap:
            t1 = time.perf_counter()
            settings = self.inference_settings()
            if self.bootstrap_kind == "refit":
                if not np.isscalar(self.folds):
                    raise InputError(
                        "the refit bootstrap needs generated folds, not fixed fold labels"
                    )
                # --- backend/cluster: replicates go to the cluster; the clone they carry has no
                # client (a client does not travel to workers) and runs its fits in place.
                params = {**self.get_params(deep=False), "backend": None, "cluster": None}
                local = clone(type(self)(**params))
                with parallel_backend(self.backend, self.cluster, self.n_jobs or 1):
                    boot = refit_bootstrap(
                        settings,
                        result,
                        partial(local._fit_sample, target),
                        n_jobs=dask_jobs(self.n_jobs) if self.backend == "dask" else None,
                    )
            else:
                boot = reweighting_bootstrap(settings, result)
            result.attach_bootstrap(boot)
            timings["bootstrap"] = time.perf_counter() - t1
        return result

    def inference_settings(self) -> InferenceSettings:
        """The record the bootstraps work from."""
        return InferenceSettings(
            replicates=int(self.bootstrap),
            kind=self.bootstrap_kind,
            interval=self.interval,
            seed=int(self.seed),
            n_jobs=self.n_jobs,
            progress=bool(self.progress),
            chunk_size=self.chunk_size,
        )

    def _fit_sample(self, target: Target, prepared: PreparedData) -> BlendResult:
        """Cross-fit and analyse validated data without a bootstrap (one refit replicate)."""
        cf = self.cross_fit(prepared, target, n_jobs=1)
        return self.analyse(prepared, target, cf, bootstrap=False)

    def _row(self, name, an: Analysis, alpha, beta, blend, kind) -> EstimatorRow:
        vals = [blend_estimate(inp, alpha, beta, blend) for inp in an.inputs]
        est, se = combine_repeats([v.estimate for v in vals], [v.se for v in vals])
        # The row's own blend: a row that blends propensities differently from the search
        # (prediction-loss stacking) is judged by the criterion of the nuisances it used.
        phi_alpha = phi_function(an.inputs, blend)(np.asarray(alpha)[None])[0]
        chi_beta = an.Psi @ beta
        risk = pseudo_risk(an.settings.criterion, phi_alpha, chi_beta, phi_alpha @ beta, an.masks)
        return EstimatorRow(
            name, kind, est, se, np.asarray(alpha), np.asarray(beta), risk, self.level, blend=blend
        )


def combine_repeats(estimates, ses) -> tuple[float, float]:
    """Median over repeated splits, with the spread-adjusted SE of Chernozhukov et al. (2018)."""
    est = np.asarray(estimates, dtype=float)
    ses = np.asarray(ses, dtype=float)
    med = float(np.median(est))
    return med, float(np.median(np.sqrt(ses**2 + (est - med) ** 2)))


def phi_function(inputs: list, blend: str):
    def phi_fn(alphas: np.ndarray) -> np.ndarray:
        return np.median(np.stack([phi(inp, alphas, blend) for inp in inputs]), axis=0)

    return phi_fn


def prediction_losses_and_stacking(prepared: PreparedData, cf: CrossFitResult):
    """Per-learner out-of-fold losses and prediction-loss stacking weights (super learner,
    van der Laan, Polley & Hubbard 2007), pooled over repeated splits."""
    rows = cf.observed_mask
    R = cf.repeats
    obs = cf.observed[:, rows, :].reshape(-1, len(cf.outcome_names))
    y = np.tile(prepared.Y[rows], R)
    out_loss = squared_error_losses(obs, y)
    beta = nnls_stack(obs, y).weights
    probs = cf.propensity.reshape(-1, len(cf.propensity_names))
    a = np.tile(prepared.A, R)
    if cf.propensity_kind == "classifier":
        prop_loss = log_losses(probs, a)
        alpha = logloss_stack(probs, a).weights
    else:
        prop_loss = squared_error_losses(probs, a)
        alpha = nnls_stack(probs, a).weights
    return {"propensity": prop_loss, "outcome": out_loss}, alpha, beta


# Values within this fraction of the pair table's spread count as tied for the largest or the
# smallest: about the accuracy of the LP optimum, so round-off never decides which contrast sets
# the noise floor.
_TIE_FRACTION = 1e-9


def noise_floor_function(an: Analysis, settings: SearchSettings):
    """tau(side, weights) = c x SE of the pair contrast that attains the sensitivity range at
    those weights (first repetition's rows). When several learners tie for the largest or the
    smallest value (a zero range ties them all), the largest SE among the tied contrasts is
    used, so the result depends neither on learner order nor on round-off."""
    inp = an.inputs[0]
    K1, K2 = an.Psi.shape
    blend = settings.blend
    phi_fn = phi_function(an.inputs, blend)
    tie = _TIE_FRACTION * float(np.ptp(an.Psi))

    def extreme_pairs(values, mask):
        idx = np.arange(values.size) if mask is None else np.flatnonzero(mask)
        sub = values[idx]
        top, bottom = idx[sub >= sub.max() - tie], idx[sub <= sub.min() + tie]
        return {tuple(sorted((h, l))) for h in top for l in bottom if h != l}

    def tolerance(side: str, weights: np.ndarray) -> float:
        weights = np.asarray(weights, dtype=float)
        if side == "propensity":
            pairs = extreme_pairs(phi_fn(weights[None])[0], an.masks[1])
            ends = [((weights, np.eye(K2)[h]), (weights, np.eye(K2)[lo])) for h, lo in pairs]
        else:
            pairs = extreme_pairs(an.Psi @ weights, an.masks[0])
            ends = [((np.eye(K1)[h], weights), (np.eye(K1)[lo], weights)) for h, lo in pairs]
        if not ends:
            return 0.0
        return settings.tie_break_scale * max(
            contrast_standard_error(inp, first, second, blend) for first, second in ends
        )

    return tolerance
