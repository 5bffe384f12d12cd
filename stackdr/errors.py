"""Exception types. Every user-facing problem raises one of these with a message that names
the column, learner or value at fault, so front ends can print one readable line."""


class StackdrError(Exception):
    """Base class for errors raised deliberately by stackdr."""


class InputError(StackdrError, ValueError):
    """The data, a setting or a configuration value is not usable as given."""


class LearnerError(StackdrError, RuntimeError):
    """A learner failed in a way that leaves a library unusable."""


class PositivityWarning(UserWarning):
    """Propensities reached the clipping bounds: overlap between the arms is in doubt."""
