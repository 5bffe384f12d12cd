"""Shared test tools: learners that return known functions (or swing with their training rows),
simple simulated data, hypothesis strategies for pair tables and simplex points, a fit with
hostile learner names, and the quick command-line configuration with the arguments of
``stackdr estimate``.

Test modules import shared things from here (fixtures live in ``tests/conftest.py``), never from
one another.
"""

from pathlib import Path

import numpy as np
import pandas as pd
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays
from scipy.special import expit
from sklearn.base import BaseEstimator, ClassifierMixin, RegressorMixin
from sklearn.dummy import DummyClassifier, DummyRegressor
from sklearn.linear_model import LinearRegression, LogisticRegression

from stackdr import BlendEstimator, Component, Target

# ----------------------------------------------------------------------------- learners and data


class KnownRegressor(RegressorMixin, BaseEstimator):
    """Ignores the training data and predicts a fixed function of the inputs (an oracle or a
    deliberately wrong model)."""

    def __init__(self, function=None):
        self.function = function

    def fit(self, X, y):
        self.n_features_in_ = np.asarray(X).shape[1]
        return self

    def predict(self, X):
        return np.asarray(self.function(np.asarray(X)), dtype=float)


class KnownClassifier(ClassifierMixin, BaseEstimator):
    """Ignores the training data and returns P(A=1 | X) = function(X)."""

    def __init__(self, function=None):
        self.function = function

    def fit(self, X, y):
        self.classes_ = np.array([0, 1])
        self.n_features_in_ = np.asarray(X).shape[1]
        return self

    def predict_proba(self, X):
        p = np.asarray(self.function(np.asarray(X)), dtype=float)
        return np.column_stack([1 - p, p])


class SwingingClassifier(ClassifierMixin, BaseEstimator):
    """A constant propensity that swings with its training rows: 0.5 + 12 x (mean of the first
    covariate over the training rows), clipped to [0.2, 0.8]. Folds' training sets differ, so
    their fitted models differ by far more than the rows' sampling noise moves an estimate
    [construction]."""

    def fit(self, X, y):
        self.classes_ = np.array([0, 1])
        self.p_ = float(np.clip(0.5 + 12 * np.mean(np.asarray(X)[:, 0]), 0.2, 0.8))
        return self

    def predict_proba(self, X):
        p = np.full(np.asarray(X).shape[0], self.p_)
        return np.column_stack([1 - p, p])


def confounded_data(rng, n, effect=2.0):
    """X ~ N(0, I_3), pi = expit(X1 - 0.5 X2), Y = effect A + 3 X1 + X2 + X3^2 + N(0, 1)."""
    X = rng.normal(size=(n, 3))
    pi = expit(X[:, 0] - 0.5 * X[:, 1])
    A = rng.binomial(1, pi)
    Y = effect * A + 3 * X[:, 0] + X[:, 1] + X[:, 2] ** 2 + rng.normal(size=n)
    return X, A, Y, pi


#: E[Y(1)] declared through the public target protocol (equals the built-in "mean1").
TREATED_MEAN = Target(
    name="treated-mean",
    description="mean outcome had everyone been treated",
    components=(
        Component(
            outcome_head="mu1",
            weight_transform=lambda pi: 1.0 / pi,
            h1=lambda A, Y: -(A == 1).astype(float),
            h2=lambda A, Y: np.ones_like(A),
            h3=lambda A, Y: np.where(A == 1, Y, 0.0),
        ),
    ),
)


# ----------------------------------------------------------------------------- hypothesis

finite = st.floats(-50, 50, allow_nan=False, allow_infinity=False)


@st.composite
def tables(draw, max_k=6, elements=finite):
    """Pair tables (or value matrices) of shape up to max_k x max_k."""
    k1 = draw(st.integers(1, max_k))
    k2 = draw(st.integers(1, max_k))
    return draw(arrays(float, (k1, k2), elements=elements))


@st.composite
def simplex_points(draw, k):
    raw = draw(arrays(float, (k,), elements=st.floats(0.0, 1.0)))
    raw = raw + 1e-3  # keeps the normalising sum away from zero
    return raw / raw.sum()


# ----------------------------------------------------------------------------- hostile names

SCRIPT = "<script>alert(1)</script>"
SHELL = '"; rm -rf /'
MATH = r"cost $\undefinedcmd$"


def hostile_fit(bootstrap: int = 50, seed: int = 3, **settings):
    """A quick ATE fit whose names are hostile user text: three propensity learners (one named
    like a script tag, one with an invalid mathtext command) and two outcome learners; the
    weight search adds the stacked propensity unless ``settings`` turn it off."""
    rng = np.random.default_rng(seed)
    X, A, Y, _ = confounded_data(rng, 400)
    frame = pd.DataFrame({SCRIPT: X[:, 0], "x2": X[:, 1], MATH: X[:, 2], "treated": A, SHELL: Y})
    propensity = {
        SCRIPT: LogisticRegression(),
        "constant": DummyClassifier(strategy="prior"),
        MATH: LogisticRegression(C=0.05),
    }
    outcome = {SHELL: LinearRegression(), "mean": DummyRegressor()}
    estimator = BlendEstimator(
        "ate", propensity, outcome, folds=4, bootstrap=bootstrap, seed=seed, n_jobs=1, **settings
    )
    return estimator.fit(frame, "treated", SHELL)


# ----------------------------------------------------------------------------- command line

# Fast learners (logistic / OLS / constant), three folds and a ten-replicate bootstrap.
QUICK = """
[settings]
folds = 3
bootstrap = 10
progress = false

[propensity.logistic]
[propensity.constant]
learner = "constant-classifier"

[outcome.linear]
[outcome.constant]
learner = "constant-regressor"
"""
# The same without a bootstrap.
QUICK_NO_BOOTSTRAP = QUICK.replace("bootstrap = 10", "bootstrap = 0")


def estimate_args(
    root: Path, data: str, out: str, *, config: str = "quick.toml", target: str = "ate"
) -> list:
    """``stackdr estimate`` arguments for files in ``root`` (treatment a, outcome y)."""
    return [
        "estimate",
        root / data,
        "--treatment",
        "a",
        "--outcome",
        "y",
        "--target",
        target,
        "--config",
        root / config,
        "--out",
        root / out,
    ]
