"""Default learner libraries and the named catalogue that configuration files may use.

Config files may only name learners from :data:`CATALOGUE` and set their parameters; they never
import code. Python users may pass any scikit-learn compatible estimator.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from sklearn.base import BaseEstimator
from sklearn.dummy import DummyClassifier, DummyRegressor
from sklearn.ensemble import (
    HistGradientBoostingClassifier,
    HistGradientBoostingRegressor,
    RandomForestClassifier,
    RandomForestRegressor,
)
from sklearn.linear_model import LassoCV, LinearRegression, LogisticRegression, RidgeCV
from sklearn.neighbors import KNeighborsClassifier, KNeighborsRegressor
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import PolynomialFeatures, SplineTransformer, StandardScaler

from stackdr.errors import InputError


@dataclass(frozen=True)
class CatalogueEntry:
    """A named learner recipe: ``kind`` is "classifier" or "regressor"."""

    kind: str
    description: str
    build: Callable[..., BaseEstimator]
    defaults: dict


def _logistic(C: float = 1e4, max_iter: int = 2000):
    return make_pipeline(StandardScaler(), LogisticRegression(C=C, max_iter=max_iter))


def _spline_logistic(n_knots: int = 5, degree: int = 3, C: float = 1.0, max_iter: int = 2000):
    return make_pipeline(
        StandardScaler(),
        SplineTransformer(n_knots=n_knots, degree=degree),
        LogisticRegression(C=C, max_iter=max_iter),
    )


def _quadratic_logistic(C: float = 1.0, max_iter: int = 2000):
    return make_pipeline(
        StandardScaler(),
        PolynomialFeatures(degree=2, include_bias=False),
        StandardScaler(),
        LogisticRegression(C=C, max_iter=max_iter),
    )


def _spline_ridge(n_knots: int = 5, degree: int = 3):
    return make_pipeline(
        StandardScaler(),
        SplineTransformer(n_knots=n_knots, degree=degree),
        RidgeCV(alphas=np.logspace(-3, 3, 13)),
    )


def _quadratic_ridge():
    return make_pipeline(
        StandardScaler(),
        PolynomialFeatures(degree=2, include_bias=False),
        StandardScaler(),
        RidgeCV(alphas=np.logspace(-3, 3, 13)),
    )


def _boosting_classifier(
    max_iter: int = 100,
    learning_rate: float = 0.1,
    max_leaf_nodes: int = 15,
    min_samples_leaf: int = 20,
    random_state: int = 0,
):
    return HistGradientBoostingClassifier(
        max_iter=max_iter,
        learning_rate=learning_rate,
        max_leaf_nodes=max_leaf_nodes,
        min_samples_leaf=min_samples_leaf,
        random_state=random_state,
    )


def _boosting_regressor(
    max_iter: int = 100,
    learning_rate: float = 0.1,
    max_leaf_nodes: int = 15,
    min_samples_leaf: int = 20,
    random_state: int = 0,
):
    return HistGradientBoostingRegressor(
        max_iter=max_iter,
        learning_rate=learning_rate,
        max_leaf_nodes=max_leaf_nodes,
        min_samples_leaf=min_samples_leaf,
        random_state=random_state,
    )


class _RowCappedForest:
    """Each tree is grown on at most ``rows_per_tree`` rows drawn with replacement (all rows,
    the ordinary bagging draw, when there are fewer). The cost of a forest then stops growing
    with n beyond the cap, which keeps the default library's time at n = 1e5-1e6 in line with
    the other learners; below the cap the forest is exactly the plain one."""

    def fit(self, X, y, sample_weight=None):
        rows = len(X)
        cap = self.rows_per_tree
        # A fraction, because scikit-learn draws round(fraction x rows) rows per tree.
        self.max_samples = None if cap is None or rows <= cap else cap / rows
        return super().fit(X, y, sample_weight=sample_weight)


class RowCappedForestClassifier(_RowCappedForest, RandomForestClassifier):
    """Random forest classifier whose trees see at most ``rows_per_tree`` rows each."""

    def __init__(
        self,
        n_estimators: int = 100,
        *,
        rows_per_tree: int | None = 10_000,
        min_samples_leaf: int = 5,
        max_features: float | str = "sqrt",
        random_state: int | None = 0,
        n_jobs: int | None = 1,
    ):
        super().__init__(
            n_estimators=n_estimators,
            min_samples_leaf=min_samples_leaf,
            max_features=max_features,
            random_state=random_state,
            n_jobs=n_jobs,
        )
        self.rows_per_tree = rows_per_tree


class RowCappedForestRegressor(_RowCappedForest, RandomForestRegressor):
    """Random forest regressor whose trees see at most ``rows_per_tree`` rows each."""

    def __init__(
        self,
        n_estimators: int = 100,
        *,
        rows_per_tree: int | None = 10_000,
        min_samples_leaf: int = 5,
        max_features: float | str = 1.0,
        random_state: int | None = 0,
        n_jobs: int | None = 1,
    ):
        super().__init__(
            n_estimators=n_estimators,
            min_samples_leaf=min_samples_leaf,
            max_features=max_features,
            random_state=random_state,
            n_jobs=n_jobs,
        )
        self.rows_per_tree = rows_per_tree


def _forest_classifier(
    n_estimators: int = 100,
    min_samples_leaf: int = 5,
    max_features: float | str = "sqrt",
    rows_per_tree: int = 10_000,
    random_state: int = 0,
):
    return RowCappedForestClassifier(
        n_estimators=n_estimators,
        rows_per_tree=rows_per_tree,
        min_samples_leaf=min_samples_leaf,
        max_features=max_features,
        random_state=random_state,
    )


def _forest_regressor(
    n_estimators: int = 100,
    min_samples_leaf: int = 5,
    max_features: float | str = 1.0,
    rows_per_tree: int = 10_000,
    random_state: int = 0,
):
    return RowCappedForestRegressor(
        n_estimators=n_estimators,
        rows_per_tree=rows_per_tree,
        min_samples_leaf=min_samples_leaf,
        max_features=max_features,
        random_state=random_state,
    )


def _knn_classifier(n_neighbors: int = 25):
    return make_pipeline(StandardScaler(), KNeighborsClassifier(n_neighbors=n_neighbors))


def _knn_regressor(n_neighbors: int = 25):
    return make_pipeline(StandardScaler(), KNeighborsRegressor(n_neighbors=n_neighbors))


def _lasso(cv: int = 5):
    # scikit-learn 1.9 takes the number of penalties as `alphas` (`n_alphas` was removed).
    return make_pipeline(StandardScaler(), LassoCV(cv=cv, alphas=30, max_iter=5000))


CATALOGUE: dict[str, CatalogueEntry] = {
    "logistic": CatalogueEntry(
        "classifier",
        "logistic regression on standardised covariates (nearly unpenalised)",
        _logistic,
        {"C": 1e4, "max_iter": 2000},
    ),
    "spline-logistic": CatalogueEntry(
        "classifier",
        "logistic regression on additive cubic spline bases, ridge penalty",
        _spline_logistic,
        {"n_knots": 5, "degree": 3, "C": 1.0, "max_iter": 2000},
    ),
    "quadratic-logistic": CatalogueEntry(
        "classifier",
        "penalised logistic regression on squares and pairwise products",
        _quadratic_logistic,
        {"C": 1.0, "max_iter": 2000},
    ),
    "boosting-classifier": CatalogueEntry(
        "classifier",
        "histogram gradient boosting of trees",
        _boosting_classifier,
        {
            "max_iter": 100,
            "learning_rate": 0.1,
            "max_leaf_nodes": 15,
            "min_samples_leaf": 20,
            "random_state": 0,
        },
    ),
    "forest-classifier": CatalogueEntry(
        "classifier",
        "random forest of probability trees, at most rows_per_tree rows per tree",
        _forest_classifier,
        {
            "n_estimators": 100,
            "min_samples_leaf": 5,
            "max_features": "sqrt",
            "rows_per_tree": 10_000,
            "random_state": 0,
        },
    ),
    "knn-classifier": CatalogueEntry(
        "classifier",
        "k nearest neighbours on standardised covariates",
        _knn_classifier,
        {"n_neighbors": 25},
    ),
    "constant-classifier": CatalogueEntry(
        "classifier",
        "the marginal treatment share, ignoring covariates",
        lambda: DummyClassifier(strategy="prior"),
        {},
    ),
    "linear": CatalogueEntry("regressor", "ordinary least squares", lambda: LinearRegression(), {}),
    "lasso": CatalogueEntry(
        "regressor", "lasso with the penalty chosen by cross-validation", _lasso, {"cv": 5}
    ),
    "spline-ridge": CatalogueEntry(
        "regressor",
        "ridge regression on additive cubic spline bases, penalty by CV",
        _spline_ridge,
        {"n_knots": 5, "degree": 3},
    ),
    "quadratic-ridge": CatalogueEntry(
        "regressor",
        "ridge regression on squares and pairwise products, penalty by CV",
        _quadratic_ridge,
        {},
    ),
    "boosting-regressor": CatalogueEntry(
        "regressor",
        "histogram gradient boosting of trees",
        _boosting_regressor,
        {
            "max_iter": 100,
            "learning_rate": 0.1,
            "max_leaf_nodes": 15,
            "min_samples_leaf": 20,
            "random_state": 0,
        },
    ),
    "forest-regressor": CatalogueEntry(
        "regressor",
        "random forest regression, at most rows_per_tree rows per tree",
        _forest_regressor,
        {
            "n_estimators": 100,
            "min_samples_leaf": 5,
            "max_features": 1.0,
            "rows_per_tree": 10_000,
            "random_state": 0,
        },
    ),
    "knn-regressor": CatalogueEntry(
        "regressor",
        "k nearest neighbours on standardised covariates",
        _knn_regressor,
        {"n_neighbors": 25},
    ),
    "constant-regressor": CatalogueEntry(
        "regressor",
        "the mean outcome, ignoring covariates",
        lambda: DummyRegressor(strategy="mean"),
        {},
    ),
}


def make_learner(name: str, **params) -> BaseEstimator:
    """Build a catalogue learner by name with optional parameter overrides.

    Examples
    --------
    >>> learner = make_learner("knn-regressor", n_neighbors=10)
    >>> [type(step).__name__ for step in learner]
    ['StandardScaler', 'KNeighborsRegressor']
    >>> learner[-1].n_neighbors
    10
    >>> make_learner("lasso", folds=3)
    Traceback (most recent call last):
    ...
    stackdr.errors.InputError: learner 'lasso' has no parameter 'folds' (parameters: cv)
    """
    if name not in CATALOGUE:
        raise InputError(f"unknown learner {name!r}; see the catalogue: {', '.join(CATALOGUE)}")
    entry = CATALOGUE[name]
    unknown = sorted(set(params) - set(entry.defaults))
    if unknown:
        allowed = ", ".join(entry.defaults) or "none"
        raise InputError(
            f"learner {name!r} has no parameter {unknown[0]!r} (parameters: {allowed})"
        )
    for key, value in params.items():
        default = entry.defaults[key]
        numeric = isinstance(value, (int, float)) and not isinstance(value, bool)
        ok = numeric if isinstance(default, (int, float)) else (numeric or isinstance(value, str))
        if not ok:
            raise InputError(
                f"learner {name!r} parameter {key!r} must be like {default!r}, got {value!r}"
            )
    return entry.build(**params)


def default_propensity_library() -> dict[str, BaseEstimator]:
    """Four fast propensity learners of different kinds."""
    return {
        "logistic": make_learner("logistic"),
        "spline-logistic": make_learner("spline-logistic"),
        "boosting": make_learner("boosting-classifier"),
        "forest": make_learner("forest-classifier"),
    }


def default_outcome_library() -> dict[str, BaseEstimator]:
    """Four fast outcome learners of different kinds."""
    return {
        "linear": make_learner("linear"),
        "spline-ridge": make_learner("spline-ridge"),
        "boosting": make_learner("boosting-regressor"),
        "forest": make_learner("forest-regressor"),
    }


def parametric_propensity_library() -> dict[str, BaseEstimator]:
    """Parametric-only propensity library (for studies): logistic, quadratic, constant."""
    return {
        "logistic": make_learner("logistic"),
        "quadratic-logistic": make_learner("quadratic-logistic"),
        "constant": make_learner("constant-classifier"),
    }


def parametric_outcome_library() -> dict[str, BaseEstimator]:
    """Parametric-only outcome library (for studies): linear, quadratic ridge, constant."""
    return {
        "linear": make_learner("linear"),
        "quadratic-ridge": make_learner("quadratic-ridge"),
        "constant": make_learner("constant-regressor"),
    }


def check_library(library, kind: str, side: str) -> dict[str, BaseEstimator]:
    """Validate a user library: a non-empty dict (or list of pairs) of estimators."""
    if isinstance(library, (list, tuple)):
        try:
            library = dict(library)
        except (TypeError, ValueError) as exc:
            raise InputError(
                f"{side} library must be a dict or a list of (name, learner) pairs"
            ) from exc
    if not isinstance(library, dict) or not library:
        raise InputError(f"{side} library must be a non-empty dict of name -> learner")
    method = "predict_proba" if kind == "classifier" else "predict"
    for name, est in library.items():
        if not isinstance(name, str) or not name:
            raise InputError(
                f"{side} library: learner names must be non-empty strings, got {name!r}"
            )
        if not (hasattr(est, "fit") and hasattr(est, method) and hasattr(est, "get_params")):
            raise InputError(
                f"{side} learner {name!r} is not a scikit-learn {kind} (needs fit, {method} "
                f"and get_params); got {type(est).__name__}"
            )
    return dict(library)
