"""Estimation: data validation, learner catalogue, cross-fitting, the estimator and its result."""

from stackdr.estimation._crossfit import CrossFitResult, cross_fit, make_folds
from stackdr.estimation._data import PreparedData, prepare_data
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
from stackdr.estimation._results import CAUTION, BlendResult, EstimatorRow
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
    "CATALOGUE",
    "CAUTION",
    "DIRECTIONS",
    "ESTIMATOR_PARAMS",
    "INTERVALS",
    "CONFIG_SETTINGS",
    "SETTINGS",
    "STUDY_SETTINGS",
    "BlendEstimator",
    "BlendResult",
    "CrossFitResult",
    "EstimatorRow",
    "PreparedData",
    "Setting",
    "check_value",
    "close_match",
    "check_cluster",
    "check_library",
    "cross_fit",
    "dask_backend",
    "dask_jobs",
    "default_outcome_library",
    "default_propensity_library",
    "make_folds",
    "make_learner",
    "parallel_backend",
    "parametric_outcome_library",
    "parametric_propensity_library",
    "phi_function",
    "prepare_data",
    "settings_record",
    "validate_params",
]
