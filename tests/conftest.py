"""Fixtures shared by several test modules; plain helpers live in ``tests/helpers.py``.

Long-running tests carry ``@pytest.mark.slow``; ``make test`` runs them too, and
``pytest -m "not slow"`` skips them for a quick check.
"""

import os

import matplotlib
import numpy as np
import pytest
from sklearn.dummy import DummyClassifier, DummyRegressor
from sklearn.linear_model import LinearRegression, LogisticRegression

from stackdr import BlendEstimator
from tests.helpers import confounded_data

matplotlib.use("Agg")
os.environ.setdefault("PYTHONHASHSEED", "0")


@pytest.fixture
def rng():
    return np.random.default_rng(20261202)


@pytest.fixture(scope="module")
def small_fit():
    """The small ATE fit of the bootstrap tests: three propensity and two outcome learners, no
    bootstrap; returns (estimator, result)."""
    X, A, Y, _ = confounded_data(np.random.default_rng(21), 500)
    prop = {
        "logit": LogisticRegression(),
        "flat": DummyClassifier(strategy="prior"),
        "sharp": LogisticRegression(C=100.0),
    }
    outc = {"ols": LinearRegression(), "mean": DummyRegressor()}
    est = BlendEstimator("ate", prop, outc, bootstrap=0, seed=7)
    return est, est.fit(X, A, Y)
