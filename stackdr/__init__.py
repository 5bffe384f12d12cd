"""stackdr: target-aimed convex stacking of nuisance learners for doubly robust functionals."""

__version__ = "0.1.0"

from .errors import InputError, LearnerError, StackdrError  # noqa: E402
from .estimator import BlendEstimator  # noqa: E402
from .results import BlendResult  # noqa: E402
from .targets import Component, Target, get_target  # noqa: E402

__all__ = [
    "BlendEstimator",
    "BlendResult",
    "Component",
    "InputError",
    "LearnerError",
    "StackdrError",
    "Target",
    "get_target",
]
