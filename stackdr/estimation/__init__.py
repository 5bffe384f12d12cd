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
from stackdr.estimation._estimator import (
    BOOTSTRAP_KINDS,
    DIRECTIONS,
    ESTIMATOR_PARAMS,
    INTERVALS,
    PLS,
    BlendEstimator,
    phi_function,
)
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

__all__ = [
    "BOOTSTRAP_KINDS",
    "CATALOGUE",
    "CAUTION",
    "DIRECTIONS",
    "ESTIMATOR_PARAMS",
    "INTERVALS",
    "OVERLAP_EDGES",
    "PLS",
    "BlendEstimator",
    "BlendResult",
    "CrossFitResult",
    "Diagnostics",
    "EstimatorRow",
    "OverlapHistogram",
    "PreparedData",
    "ResultSummary",
    "blended_propensity",
    "check_cluster",
    "check_library",
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
    "weight_side_values",
]
