"""The main estimator: cross-fit the libraries, search target-aimed weights, estimate, compare.

Scikit-learn style: the constructor stores settings, :meth:`BlendEstimator.fit` does the work
and returns a :class:`~stackdr.results.BlendResult`.
"""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np
import pandas as pd
from sklearn.base import BaseEstimator

from stackdr.core import (
    Target,
    blend_estimate,
    get_target,
    pair_inputs,
    pair_standard_errors,
    pair_table,
    with_stacked_propensity,
)
from stackdr.errors import InputError
from stackdr.estimation._analysis import (
    combine_repeats,
    noise_floor_function,
    phi_function,
    prediction_losses_and_stacking,
    search_table,
    stacked_propensity_loss,
)
from stackdr.estimation._contrast import contrast_test
from stackdr.estimation._crossfit import CrossFitResult, cross_fit
from stackdr.estimation._data import PreparedData, prepare_data
from stackdr.estimation._fold_check import check_folds, refit_replicates
from stackdr.estimation._learners import (
    check_library,
    default_outcome_library,
    default_propensity_library,
)
from stackdr.estimation._parallel import (
    check_cluster,
    dask_jobs,
    native_threads,
    parallel_backend,
    threads_per_fit,
)
from stackdr.estimation._results import BlendResult, EstimatorRow
from stackdr.estimation._settings import settings_record, validate_params
from stackdr.inference import InferenceSettings, reweighting_bootstrap
from stackdr.search import (
    STACKED_PROPENSITY,
    SearchSettings,
    WeightContext,
    comparison_weights,
    pseudo_risk,
    run_search,
)


@dataclass(frozen=True)
class Analysis:
    """Everything computed from one cross-fit, reused by the bootstrap.

    The weight search works on the propensity columns named by ``propensity_names``: the
    library's learners, then, with ``stacked`` (setting ``stacked_propensity`` under the riesz
    blend), the prediction-loss stacked propensity ``pi @ stack_alpha`` as one more column.
    ``inputs``, ``Psi``, ``pair_se`` and the propensity mask are over those columns;
    ``base_inputs``, ``losses`` and ``stack_alpha`` over the library's learners only (they are
    the same objects as ``inputs`` when nothing is stacked).
    """

    inputs: list
    Psi: np.ndarray
    pair_se: np.ndarray
    losses: dict
    stack_alpha: np.ndarray
    stack_beta: np.ndarray
    masks: tuple
    settings: SearchSettings
    base_inputs: list
    propensity_names: list
    stacked: bool = False

    @property
    def base_learners(self) -> int:
        """K1, the number of propensity learners of the library."""
        return self.Psi.shape[0] - int(self.stacked)

    def search_anchor(self, stack_alpha: np.ndarray) -> np.ndarray:
        """The propensity-side tie-break anchor for stacking weights ``stack_alpha``: those
        weights, or the vertex of the stacked column, which is the same propensity."""
        if not self.stacked:
            return stack_alpha
        return np.eye(self.Psi.shape[0])[-1]

    def search_weights(self, alpha: np.ndarray, base: bool) -> np.ndarray:
        """Propensity weights over the search's columns (0 on the stacked column for weights
        over the library's learners)."""
        alpha = np.asarray(alpha, dtype=float)
        return np.append(alpha, 0.0) if base and self.stacked else alpha


class BlendEstimator(BaseEstimator):
    """Target-aimed convex stacking of nuisance learners for a doubly robust target.

    Parameters
    ----------
    target : str or Target
        "ate", "att", "mean1", "mean0", "cov", or a user-defined :class:`~stackdr.targets.Target`.
    propensity_learners, outcome_learners : dict name -> estimator, optional
        Learner libraries (default: :func:`~stackdr.estimation.default_propensity_library` and
        :func:`~stackdr.estimation.default_outcome_library`, which is also a continuous
        treatment's default). Cloned, never mutated.
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
        The constant c of the tolerance c x (SE of the pair contrast attaining the range); 0.25
        by default, chosen with ``stacked_propensity``, ``outcome_side`` and ``contrast_z`` on
        paired Monte Carlo evidence (README, "Which default").
    stacked_propensity : bool
        With the riesz blend, add the prediction-loss stacked propensity (the probability-scale
        blend of the propensity learners at their prediction-loss stacking weights) as one more
        propensity learner of the weight search, named ``"prediction-loss stack"``, and make
        its vertex the propensity-side tie-break anchor. When the data cannot tell the
        sensitivities apart beyond the noise floor, the tie-break then returns exactly the
        propensity of prediction-loss stacking, and with the outcome side at its anchor (the
        NNLS weights) exactly its estimate. The comparison rows other than target-aimed
        stacking stay over the library's own learners. The other blends are unchanged (under
        the probability blend the stacked propensity already is the point alpha = stacking
        weights of the search), and so is a continuous treatment (whose weight side is linear
        in E[A | X]) or a single propensity learner.
    outcome_side : {"stacking", "search"}
        How the outcome learners are weighted. ``"stacking"`` (default): by least-squares
        stacking (NNLS, normalised), and the search chooses the propensity side only (under
        the mixed criterion the same propensity weights as with ``"search"``; under minimax
        those minimising the criterion at the stacking outcome weights). Least squares already
        targets the outcome regression's own L2 error, the factor of the DR bias on that side,
        while log-loss stacking of the propensity does not target the error of the inverse
        weights, the factor on the other side; in the paired studies the searched outcome
        weights added error (README, "Which default"). ``"search"``: the mixed-minimax search
        chooses both sides (the earlier default).
    contrast_z : float
        The contrast test (default 1.5; 0 turns it off): the headline keeps the searched weights
        only when their estimate differs from the prediction-loss stacking estimate by more than
        ``contrast_z`` paired influence-function SEs; otherwise it uses prediction-loss
        stacking's nuisances. The searched weights stay in the table as the row
        ``"target-aimed, no contrast test"``. The bootstrap reruns the test in every replicate
        (its SE held at the full-sample value). It applies when prediction-loss stacking's
        nuisances are weights of the search's blend: the riesz blend with
        ``stacked_propensity``, the probability blend, a continuous treatment or one propensity
        learner.
    contrast_guard : float
        The variance guard of the contrast test (default 1.05; 0 turns it off): when the
        searched weights' influence-function SE is at most ``contrast_guard`` times that of the
        prediction-loss stacking estimate, the searched weights are kept whatever the contrast
        (the test's threshold becomes 0, in the bootstrap replicates too). The test protects
        against searched weights that buy a bias reduction the data cannot show at the price of
        a noisier estimate (heavier inverse weights); when they are no noisier there is nothing
        to protect against. Chosen on paired Monte Carlo evidence (README, "Which default").
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
    calibration_refits : int
        Refit replicates that widen the reweighting bootstrap by their paired spread ratio
        (default 5; 0: never), run when the fold-model jackknife flags the fit (see
        ``calibration_gate``).
    calibration_gate : float
        The refit calibration runs when the fold-model jackknife's estimate of the learners'
        refitting noise exceeds this share of the headline's bootstrap variance (default 0.05;
        0: always). The jackknife re-evaluates the estimate with each fold's models on the same
        rows, so only the fitted models change.
    calibration_shrink : float
        How far the refit calibration discounts its own noise (default 0.5; 0: none). The
        variance excess of the refit replicates over the reweighting ones, x, is shrunk to
        x * max(0, 1 - (calibration_shrink * s / x)^2) with s its jackknife SE over the paired
        replicates, so an excess the few refits cannot tell from noise widens nothing.
    calibration_rows : int
        The gated refit calibration runs on data sets of at most this many rows (default
        20,000: each refit is a full fit); a larger flagged fit gets a note recommending
        ``calibration_rows`` or the refit bootstrap instead.
    chunk_size : int, optional
        Replicates per batched matrix product (default: sized to bound memory); results do not
        depend on it.
    seed : int
        Seeds folds and bootstrap.
    n_jobs : int
        joblib workers for learner fits.
    threads : int
        Native (OpenMP/BLAS) threads per learner fit and for this process's own work, so a
        run occupies ``n_jobs x threads`` cores and two runs on one machine do not
        oversubscribe it.
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
        tie_break_scale: float = 0.25,
        stacked_propensity: bool = True,
        outcome_side: str = "stacking",
        contrast_z: float = 1.5,
        contrast_guard: float = 1.05,
        directions: str = "all",
        direction_tolerance: float = 0.25,
        clip: float = 0.01,
        outcome_mode: str = "separate",
        on_error: str = "drop",
        level: float = 0.95,
        bootstrap: int = 1000,
        bootstrap_kind: str = "multinomial",
        interval: str = "percentile",
        calibration_refits: int = 5,
        calibration_gate: float = 0.05,
        calibration_shrink: float = 0.5,
        calibration_rows: int = 20000,
        chunk_size: int | None = None,
        seed: int = 0,
        n_jobs: int | None = 1,
        threads: int = 1,
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
        self.stacked_propensity = stacked_propensity
        self.outcome_side = outcome_side
        self.contrast_z = contrast_z
        self.contrast_guard = contrast_guard
        self.directions = directions
        self.direction_tolerance = direction_tolerance
        self.clip = clip
        self.outcome_mode = outcome_mode
        self.on_error = on_error
        self.level = level
        self.bootstrap = bootstrap
        self.bootstrap_kind = bootstrap_kind
        self.interval = interval
        self.calibration_refits = calibration_refits
        self.calibration_gate = calibration_gate
        self.calibration_shrink = calibration_shrink
        self.calibration_rows = calibration_rows
        self.chunk_size = chunk_size
        self.seed = seed
        self.n_jobs = n_jobs
        self.threads = threads
        self.progress = progress
        self.backend = backend
        self.cluster = cluster

    def _validate_params(self) -> None:
        """Check every parameter against the settings table (the one validation entry point)."""
        validate_params(self.get_params(deep=False))
        check_cluster(self.backend, self.cluster)

    def fit(
        self, data, treatment=None, outcome=None, covariates=None, *, weights=None, clusters=None
    ) -> BlendResult:
        """Validate data, cross-fit both libraries, search weights and estimate.

        Parameters
        ----------
        data : DataFrame or array (n, p)
        treatment, outcome : column names (DataFrame) or arrays
        covariates : list of column names, optional (default: all other columns)
        weights : column name or array, optional
            Sampling weights: the estimand is the weighted-population one. Learners that take
            ``sample_weight`` are fitted weighted; every sum, loss, stacking fit, SE and
            bootstrap replicate carries the weights.
        clusters : column name or array, optional
            Cluster labels: folds keep clusters whole, SEs are cluster-robust (factor
            G / (G - 1)), the reweighting bootstrap draws one weight per cluster and the refit
            bootstrap resamples clusters.
        """
        self._validate_params()
        # The process's own native work (stacking, bootstrap matrix products) and every learner
        # fit run under the thread budget (threads_per_fit).
        with native_threads(threads_per_fit(self.n_jobs, self.threads)):
            return self._fit(data, treatment, outcome, covariates, weights, clusters)

    def _fit(self, data, treatment, outcome, covariates, weights, clusters) -> BlendResult:
        start = time.perf_counter()
        target = get_target(self.target)
        n_folds = self.folds if np.isscalar(self.folds) else 2
        prepared = prepare_data(
            data,
            treatment,
            outcome,
            covariates,
            target=target,
            folds=int(n_folds),
            weights=weights,
            clusters=clusters,
        )
        # --- backend/cluster: learner fits run where the backend setting says.
        with parallel_backend(self.backend, self.cluster, self.n_jobs or 1):
            cf = self.cross_fit(
                prepared,
                target,
                n_jobs=dask_jobs(self.n_jobs) if self.backend == "dask" else self.n_jobs,
                progress=self.progress,
                jackknife=True,
            )
        fit_seconds = time.perf_counter() - start
        result = self.analyse(prepared, target, cf)
        result.timings["cross_fit"] = fit_seconds
        result.timings["total"] = time.perf_counter() - start
        return result

    def cross_fit(
        self,
        prepared: PreparedData,
        target: Target,
        *,
        n_jobs=1,
        progress: bool = False,
        jackknife: bool = False,
    ) -> CrossFitResult:
        """Cross-fit both libraries on validated data with this estimator's settings
        (``jackknife``: also the fold models' predictions for the fold-model jackknife)."""
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
            threads=self.threads,
            progress=progress,
            jackknife=jackknife,
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
            else default_outcome_library()
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
            contrast_z=float(self.contrast_z),
            contrast_guard=float(self.contrast_guard),
            outcome_side=self.outcome_side,
        )

    def prepare_analysis(
        self, prepared: PreparedData, target: Target, cf: CrossFitResult
    ) -> Analysis:
        """Pair tables, prediction losses, stacking weights and direction masks."""
        base_inputs = [
            pair_inputs(
                target,
                cf,
                prepared.A,
                prepared.Y,
                r,
                sample_weight=prepared.weights,
                cluster_codes=prepared.cluster_codes,
            )
            for r in range(cf.repeats)
        ]
        losses, stack_alpha, stack_beta = prediction_losses_and_stacking(prepared, cf)
        names = list(cf.propensity_names)
        # With one learner the stacked propensity is that learner again; with a continuous
        # treatment the weight side is linear in E[A | X], so the riesz blend at the stacking
        # weights already is the stacked propensity.
        stacked = (
            bool(self.stacked_propensity)
            and self.blend == "riesz"
            and len(names) > 1
            and cf.propensity_kind == "classifier"
        )
        inputs = base_inputs
        prop_mask = self._direction_mask(losses["propensity"])
        if stacked:
            if STACKED_PROPENSITY in names:
                raise InputError(
                    f"the propensity learner name {STACKED_PROPENSITY!r} is reserved for the "
                    "stacked propensity; rename the learner or set stacked_propensity to false"
                )
            names.append(STACKED_PROPENSITY)
            inputs = [with_stacked_propensity(inp, stack_alpha) for inp in base_inputs]
            if prop_mask is not None:
                # The stacked propensity is credible by the same rule, against the best learner.
                loss = stacked_propensity_loss(prepared, cf, stack_alpha)
                prop_mask = np.append(prop_mask, self._direction_mask(losses["propensity"], loss))
        Psi = search_table(pair_table, base_inputs, inputs, stacked)
        pair_se = search_table(pair_standard_errors, base_inputs, inputs, stacked)
        masks = (prop_mask, self._direction_mask(losses["outcome"]))
        return Analysis(
            inputs,
            Psi,
            pair_se,
            losses,
            stack_alpha,
            stack_beta,
            masks,
            self.search_settings(),
            base_inputs,
            names,
            stacked,
        )

    def _direction_mask(self, loss: np.ndarray, candidate=None) -> np.ndarray | None:
        """Learners whose loss is within the tolerance of the best (or whether ``candidate``, a
        loss, is)."""
        if self.directions == "all":
            return None
        best = loss.min()
        return (loss if candidate is None else candidate) <= best + self.direction_tolerance * abs(
            best
        )

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
            anchors=(an.search_anchor(an.stack_alpha), an.stack_beta),
            tolerance=tolerance,
            masks=an.masks,
        )
        contrast, value = contrast_test(an, search, cf.propensity_kind == "classifier")
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
                an.pair_se[: an.base_learners],
                an.stacked,
                value,
                contrast.tolerance,
            )
        )
        rows = [
            self._row(name, an, alpha, beta, blend, kind, base)
            for name, (alpha, beta, blend, kind, base) in selections.items()
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
            alpha=pd.Series(main.alpha, index=an.propensity_names, name="propensity weight"),
            beta=pd.Series(main.beta, index=cf.outcome_names, name="outcome weight"),
            estimators=rows,
            settings=settings_record(self.get_params(deep=False)),
            timings=timings,
            contrast=contrast,
        )
        if bootstrap and self.bootstrap:
            t1 = time.perf_counter()
            settings = self.inference_settings()
            if self.bootstrap_kind == "refit":
                boot = refit_replicates(self, target, settings, result)
            else:
                boot = reweighting_bootstrap(settings, result)
            result.attach_bootstrap(boot)
            timings["bootstrap"] = time.perf_counter() - t1
        if bootstrap:  # not inside a refit replicate
            t2 = time.perf_counter()
            result.fold_check = check_folds(result, self, target)
            timings["fold_check"] = time.perf_counter() - t2
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

    def _row(self, name, an: Analysis, alpha, beta, blend, kind, base: bool) -> EstimatorRow:
        """A comparison row: the estimate on the inputs its weights are over; the weights shown
        and the pseudo-risk (at the row's own blend) over the search's propensity
        columns."""
        inputs = an.base_inputs if base else an.inputs
        vals = [blend_estimate(inp, alpha, beta, blend) for inp in inputs]
        est, se = combine_repeats([v.estimate for v in vals], [v.se for v in vals])
        weights = an.search_weights(alpha, base)
        # The row's own blend: a row that blends propensities differently from the search
        # (prediction-loss stacking) is judged by the criterion of the nuisances it used. At
        # vertices every blend agrees, so the pair table serves the outcome side of any row.
        phi_alpha = phi_function(an.inputs, blend)(weights[None])[0]
        chi_beta = an.Psi @ beta
        risk = pseudo_risk(an.settings.criterion, phi_alpha, chi_beta, phi_alpha @ beta, an.masks)
        return EstimatorRow(
            name, kind, est, se, weights, np.asarray(beta), risk, self.level, blend=blend
        )
