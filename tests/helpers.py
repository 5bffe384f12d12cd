"""Small shared test tools: learners that return known functions, and simple simulated data."""

import numpy as np
from scipy.special import expit
from sklearn.base import BaseEstimator, ClassifierMixin, RegressorMixin


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


def confounded_data(rng, n, effect=2.0):
    """X ~ N(0, I_3), pi = expit(X1 - 0.5 X2), Y = effect A + 3 X1 + X2 + X3^2 + N(0, 1)."""
    X = rng.normal(size=(n, 3))
    pi = expit(X[:, 0] - 0.5 * X[:, 1])
    A = rng.binomial(1, pi)
    Y = effect * A + 3 * X[:, 0] + X[:, 1] + X[:, 2] ** 2 + rng.normal(size=n)
    return X, A, Y, pi
