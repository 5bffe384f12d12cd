"""Exception types. Every user-facing problem raises one of these with a message that names
the column, learner or value at fault, so front ends can print one readable line."""


class StackdrError(Exception):
    """Base class for errors raised deliberately by stackdr."""


class InputError(StackdrError, ValueError):
    """The data, a setting or a configuration value is not usable as given."""


class LearnerError(StackdrError, RuntimeError):
    """A learner failed in a way that leaves a library unusable."""


class WorkerLostError(StackdrError, RuntimeError):
    """A distributed worker died repeatedly while running the same task."""


class PositivityWarning(UserWarning):
    """Propensities reached the clipping bounds: overlap between the arms is in doubt."""


class UnstableLearnersWarning(UserWarning):
    """The cross-fitting folds disagree more than sampling noise explains: refitting the learners
    may move the estimate, which the reweighting bootstrap does not see (the refit bootstrap
    does)."""


def warn_user(message: str, category: type[Warning] = UserWarning) -> None:
    """Issue a warning attributed to the first caller outside stackdr (the user's own line),
    so the printed source line is the user's call, not an internal one, however deep inside
    the package the warning arises."""
    import os
    import sys
    import warnings

    package = os.path.dirname(os.path.abspath(__file__))
    frame, level = sys._getframe(1), 2
    while frame is not None and os.path.abspath(frame.f_code.co_filename).startswith(package):
        frame, level = frame.f_back, level + 1
    warnings.warn(message, category, stacklevel=level)
