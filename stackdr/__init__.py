"""stackdr: target-aimed convex stacking of nuisance learners for doubly robust functionals.

The public API is listed in ``__all__``. The subpackages follow the layers of the design (data
flows one way, lower layers never import higher ones):

- :mod:`stackdr.core`: targets, pair table, pseudo-risks, prediction-loss stacking (pure maths);
- :mod:`stackdr.search`: the weight search (range LP, lattice search, tie-breaks) and selectors;
- :mod:`stackdr.inference`: reweighting and refit bootstraps;
- :mod:`stackdr.estimation`: data validation, learners, cross-fitting, the estimator, results;
- :mod:`stackdr.io`: saved results, configuration files, exported nuisances and blended models;
- :mod:`stackdr.studies`: designs with known truth, the study replicate, runner and summaries;
- :mod:`stackdr.reporting`: figures and HTML pages;
- :mod:`stackdr.cli`: the command line.
"""

from stackdr._version import __version__
from stackdr.core import Component, Target, get_target
from stackdr.errors import InputError, LearnerError, PositivityWarning, StackdrError
from stackdr.estimation import BlendEstimator, BlendResult
from stackdr.io import (
    BlendedClassifier,
    BlendedRegressor,
    blended_models,
    blended_nuisances,
    read_results_json,
)
from stackdr.studies import make_replicate, register_design, run_study

__all__ = [
    "__version__",
    "BlendEstimator",
    "BlendResult",
    "BlendedClassifier",
    "BlendedRegressor",
    "Component",
    "InputError",
    "LearnerError",
    "PositivityWarning",
    "StackdrError",
    "Target",
    "blended_models",
    "blended_nuisances",
    "get_target",
    "make_replicate",
    "read_results_json",
    "register_design",
    "run_study",
]
