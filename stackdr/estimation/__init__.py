"""Estimation: data validation, learner catalogue, cross-fitting, the estimator and its result."""

from stackdr.estimation._crossfit import CrossFitResult, cross_fit, make_folds
from stackdr.estimation._data import PreparedData, prepare_data
from stackdr.estimation._diagnostics import (
    OVERLAP_EDGES,
    Diagnostics,
    OverlapHistogram,
    blended_propensity,
    effective_sample_size,
    fit_diagnostics,
    weight_side_values,
)
from stackdr.estimation._estimator import BlendEstimator, phi_function
from stackdr.estimation._learners import (
    CATALOGUE,
    check_library,
    default_outcome_library,
    default_propensity_library,
    make_learner,
    parametric_outcome_library,
    parametric_propensity_library,
)
from stackdr.estimation._parallel import check_cluster, dask_backend, dask_jobs, parallel_backend
from stackdr.estimation._results import CAUTION, BlendResult, EstimatorRow, ResultSummary
from stackdr.estimation._settings import (
    BOOTSTRAP_KINDS,
    CONFIG_SETTINGS,
    DIRECTIONS,
    ESTIMATOR_PARAMS,
    INTERVALS,
    SETTINGS,
    STUDY_SETTINGS,
    Setting,
    check_value,
    close_match,
    settings_record,
    validate_params,
)

__all__ = [
    "BOOTSTRAP_KINDS",
    "BlendEstimator",
    "BlendResult",
    "CATALOGUE",
    "CAUTION",
    "CONFIG_SETTINGS",
    "CrossFitResult",
    "DIRECTIONS",
    "Diagnostics",
    "ESTIMATOR_PARAMS",
    "EstimatorRow",
    "INTERVALS",
    "OVERLAP_EDGES",
    "OverlapHistogram",
    "PreparedData",
    "ResultSummary",
    "SETTINGS",
    "STUDY_SETTINGS",
    "Setting",
    "blended_propensity",
    "check_cluster",
    "check_library",
    "check_value",
    "close_match",
    "cross_fit",
    "dask_backend",
    "dask_jobs",
    "default_outcome_library",
    "default_propensity_library",
    "effective_sample_size",
    "fit_diagnostics",
    "make_folds",
    "make_learner",
    "parallel_backend",
    "parametric_outcome_library",
    "parametric_propensity_library",
    "phi_function",
    "prepare_data",
    "settings_record",
    "validate_params",
    "weight_side_values",
]
