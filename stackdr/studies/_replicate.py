"""Monte Carlo replicates of the main estimator, for :func:`stackdr.study.run_study`.

One replicate fits :class:`~stackdr.estimator.BlendEstimator` once on a simulated data set and
returns one row per estimator of its comparison table (target-aimed stacking with and without
the tie-break, prediction-loss stacking, the best-predicting, mixed-minimax and minimax pairs),
all computed on the same folds and out-of-fold predictions, plus an **oracle pair** when the
design supplies its true nuisances: AIPW with the true propensity (clipped like the learners'
propensities) and the true outcome regressions, with an influence-function standard error.

The replicate is :func:`simulate_replicate` bound to its library and settings by
:func:`make_replicate` (a ``functools.partial`` of a module-level function), so it pickles for
loky and dask workers.
"""

from __future__ import annotations

import warnings
from collections.abc import Mapping
from functools import partial
from typing import Any

import numpy as np
from scipy.stats import norm

from stackdr.core import Target, estimate_from_rows, get_target
from stackdr.errors import InputError
from stackdr.estimation import (
    STUDY_SETTINGS,
    BlendEstimator,
    check_library,
    make_learner,
    parametric_outcome_library,
    parametric_propensity_library,
    validate_params,
)
from stackdr.search import ORACLE
from stackdr.studies._designs import DesignData

LIBRARIES = ("default", "parametric")
_SIDES = ("propensity", "outcome")


def build_libraries(library: str | Mapping) -> tuple[dict | None, dict | None]:
    """Learner libraries named by a study setting.

    Parameters
    ----------
    library : str or mapping
        ``"default"`` (the estimator's default libraries), ``"parametric"`` (logistic, quadratic
        logistic and constant propensity learners; linear, quadratic ridge and constant outcome
        learners), or a mapping ``{"propensity": {name: spec}, "outcome": {name: spec}}`` where
        each spec is ``{"learner": catalogue name, **parameters}`` (see
        :data:`stackdr.estimation.CATALOGUE`). A side left out keeps the default library.

    Returns
    -------
    (propensity library, outcome library)
        Dicts of name -> estimator; None means the estimator's default.
    """
    if isinstance(library, str):
        if library == "default":
            return None, None
        if library == "parametric":
            return parametric_propensity_library(), parametric_outcome_library()
        raise InputError(
            f"unknown library {library!r}; choose one of {', '.join(LIBRARIES)} or give "
            "learner specifications"
        )
    if not isinstance(library, Mapping):
        raise InputError(f"library must be a name or a mapping, got {type(library).__name__}")
    unknown = sorted(set(library) - set(_SIDES))
    if unknown:
        raise InputError(f"library has unknown side {unknown[0]!r}; sides are {_SIDES}")
    built: list[dict | None] = []
    for side, kind in zip(_SIDES, ("classifier", "regressor")):
        specs = library.get(side)
        if specs is None:
            built.append(None)
            continue
        if not isinstance(specs, Mapping) or not specs:
            raise InputError(f"{side} library must be a non-empty mapping of name -> spec")
        learners = {}
        for name, spec in specs.items():
            if not isinstance(spec, Mapping) or "learner" not in spec:
                raise InputError(
                    f"{side} learner {name!r} needs a spec with a 'learner' key naming a "
                    "catalogue entry"
                )
            params = {k: v for k, v in spec.items() if k != "learner"}
            learners[name] = make_learner(spec["learner"], **params)
        built.append(check_library(learners, kind, side))
    return built[0], built[1]


def check_settings(settings: Mapping[str, Any]) -> dict[str, Any]:
    """Validate estimator settings for a study and return them as a plain dict.

    Raises
    ------
    stackdr.errors.InputError
        A setting outside :data:`STUDY_SETTINGS` or with an unusable value.
    """
    if not isinstance(settings, Mapping):
        raise InputError(f"estimator settings must be a mapping, got {type(settings).__name__}")
    unknown = sorted(set(settings) - set(STUDY_SETTINGS))
    if unknown:
        raise InputError(
            f"unknown estimator setting {unknown[0]!r} for a study; allowed: "
            + ", ".join(STUDY_SETTINGS)
        )
    validate_params(settings)
    return dict(settings)


def make_replicate(
    library: str | Mapping = "default", *, cluster_aware: bool = True, **settings: Any
) -> partial:
    """A picklable replicate function for :func:`stackdr.study.run_study`.

    Parameters
    ----------
    library : str or mapping
        See :func:`build_libraries`.
    cluster_aware : bool, default True
        For a design with clusters (``DesignData.clusters``): fit with them (folds keep
        clusters whole, cluster-robust SEs, cluster bootstrap). False treats the rows as
        independent, for comparing row-level with cluster-aware intervals.
    **settings
        BlendEstimator settings from :data:`STUDY_SETTINGS` (e.g. ``bootstrap=200``,
        ``tie_break_scale=1.0``).

    Returns
    -------
    functools.partial
        ``replicate(design_data, seed) -> list[dict]``.
    """
    build_libraries(library)
    return partial(
        simulate_replicate,
        library=library,
        settings=check_settings(settings),
        cluster_aware=bool(cluster_aware),
    )


def simulate_replicate(
    data: DesignData,
    seed: int,
    *,
    library: str | Mapping = "default",
    settings: Mapping[str, Any] | None = None,
    cluster_aware: bool = True,
) -> list[dict]:
    """Fit the estimator once on a simulated data set; one row per estimator.

    Parameters
    ----------
    data : DesignData
        The simulated data with its truth.
    seed : int
        Seeds folds and bootstrap.
    library : str or mapping
        See :func:`build_libraries`.
    settings : mapping, optional
        BlendEstimator settings (see :data:`STUDY_SETTINGS`).
    cluster_aware : bool, default True
        Fit with the design's clusters when it has them (see :func:`make_replicate`).

    Returns
    -------
    list of dict
        Rows for :func:`~stackdr.study.run_study`: name, estimate, se, low, high (bootstrap
        interval when the bootstrap ran, else Wald), weights ({"propensity": {...}, "outcome":
        {...}}), and extra fields kind, interval_method, wald_low, wald_high, bootstrap_se,
        pseudo_risk, estimator_seconds; the target-aimed row adds tie_break_moved, tau_propensity,
        tau_outcome, s_out, s_ps and failed_learners.
    """
    propensity, outcome = build_libraries(library)
    estimator = BlendEstimator(
        data.target,
        propensity,
        outcome,
        seed=int(seed),
        n_jobs=1,
        **dict(settings or {}),
    )
    with warnings.catch_warnings():
        # Convergence chatter from learners would flood a study's log; dropped learners are
        # recorded in the rows instead.
        warnings.simplefilter("ignore")
        clusters = data.clusters if cluster_aware else None
        result = estimator.fit(
            data.frame, data.treatment, data.outcome, data.covariates, clusters=clusters
        )
    cf = result.crossfit
    seconds = float(result.timings["total"])
    rows = []
    for row in result.estimators:
        wald_low, wald_high = row.wald_interval
        rows.append(
            {
                "name": row.name,
                "estimate": row.estimate,
                "se": row.se,
                "low": row.low,
                "high": row.high,
                "weights": {
                    "propensity": dict(zip(result.propensity_names, map(float, row.alpha))),
                    "outcome": dict(zip(cf.outcome_names, map(float, row.beta))),
                },
                "kind": row.kind,
                "interval_method": row.interval_method,
                "wald_low": wald_low,
                "wald_high": wald_high,
                "bootstrap_se": row.bootstrap_se,
                "pseudo_risk": row.pseudo_risk,
                "estimator_seconds": seconds,
            }
        )
    rows[0].update(_search_details(result))
    oracle = oracle_row(
        data,
        result.target,
        result.data.A,
        result.data.Y,
        estimator.clip,
        estimator.level,
        result.data.cluster_codes,
    )
    if oracle is not None:
        oracle["estimator_seconds"] = seconds
        rows.append(oracle)
    return rows


def _search_details(result) -> dict[str, Any]:
    records = result.search.records
    taus = {}
    for side, key in (("propensity", "alpha_tie_break"), ("outcome", "beta_tie_break")):
        record = records.get(key) or records.get("joint_tie_break")
        taus[f"tau_{side}"] = (
            float(record.details.get("tolerance", np.nan)) if record is not None else None
        )
    return {
        "tie_break_moved": bool(result.tie_break_active),
        **taus,
        "s_out": float(result.search.s_out),
        "s_ps": float(result.search.s_ps),
        "failed_learners": sorted(result.crossfit.failures),
    }


def oracle_row(
    data: DesignData,
    target: Target | str,
    A: np.ndarray,
    Y: np.ndarray,
    clip: float,
    level: float = 0.95,
    cluster_codes: np.ndarray | None = None,
) -> dict | None:
    """AIPW with the design's true nuisances, or None when the design does not supply them.

    The true propensity is clipped to ``[clip, 1 - clip]`` as the learners' propensities are;
    the regression E[Y | X] (head ``"m"``) is ``pi mu1 + (1 - pi) mu0`` with the unclipped pi.
    The estimate and its influence-function standard error come from the target's row
    functions, exactly as for a learner pair.

    Parameters
    ----------
    data : DesignData
    target : Target or str
    A, Y : numpy.ndarray
        Validated treatment and outcome (rows whose outcome is unused hold 0).
    clip : float
    level : float
        Level of the Wald interval.
    cluster_codes : numpy.ndarray, optional
        Cluster of each row (0..G-1): the SE is then cluster-robust like the learners' rows.

    Returns
    -------
    dict or None
        A study row named :data:`ORACLE` with a Wald interval.
    """
    if data.true_propensity is None or data.true_outcome is None:
        return None
    target = get_target(target)
    pi_true = data.true_propensity
    mu1, mu0 = data.true_outcome[1], data.true_outcome[0]
    heads = {"mu1": mu1, "mu0": mu0, "m": pi_true * mu1 + (1 - pi_true) * mu0}
    pi = np.clip(pi_true, clip, 1 - clip)
    rows = target.row_functions(A, Y)
    H = rows["h4"].copy()
    for c, component in enumerate(target.components):
        p = np.asarray(component.weight_transform(pi), dtype=float)
        b = heads[component.outcome_head]
        H += b * p * rows["h1"][c] + b * rows["h2"][c] + p * rows["h3"][c]
    fit = estimate_from_rows(H, rows["d"], cluster_codes=cluster_codes)
    z = norm.ppf(0.5 + level / 2)
    low, high = fit.estimate - z * fit.se, fit.estimate + z * fit.se
    return {
        "name": ORACLE,
        "estimate": fit.estimate,
        "se": fit.se,
        "low": low,
        "high": high,
        "weights": None,
        "kind": "oracle",
        "interval_method": "wald",
        "wald_low": low,
        "wald_high": high,
        "clipped": int(np.sum((pi_true < clip) | (pi_true > 1 - clip))),
    }
