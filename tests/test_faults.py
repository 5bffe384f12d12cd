"""Fault table: every bad input or misbehaving part gets a clear error or a loud warning, and the
tool keeps working when one learner fails. README section "Errors and limits" lists the same
table; ``test_readme_lists_every_fault`` keeps the two in step.

Fast learners only (logistic / OLS / constant) and no bootstrap, so the file runs in seconds.
"""

from __future__ import annotations

import contextlib
import html
import io
import json
import re
import warnings
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import integrate
from scipy.special import expit
from sklearn.base import BaseEstimator, ClassifierMixin, RegressorMixin
from sklearn.dummy import DummyClassifier, DummyRegressor
from sklearn.linear_model import LinearRegression, LogisticRegression

from stackdr import BlendEstimator
from stackdr.cli import main
from stackdr.errors import InputError, LearnerError, PositivityWarning, UnstableLearnersWarning
from stackdr.io import load_config, read_results_json
from stackdr.search import STACKED_PROPENSITY
from tests.helpers import (
    QUICK_NO_BOOTSTRAP,
    KnownRegressor,
    SwingingClassifier,
    confounded_data,
    estimate_args,
)

README = Path(__file__).resolve().parents[1] / "README.md"


# ----------------------------------------------------------------------------- tools


def toy_frame(n: int = 200, seed: int = 3) -> pd.DataFrame:
    """Confounded toy data (tests/helpers.py design, true ATE 2) as a DataFrame."""
    X, A, Y, _ = confounded_data(np.random.default_rng(seed), n)
    frame = pd.DataFrame(X, columns=["x1", "x2", "x3"])
    frame["a"] = A.astype(float)
    frame["y"] = Y
    return frame


def propensity_library(**extra) -> dict:
    return {"logit": LogisticRegression(), "const": DummyClassifier(), **extra}


def outcome_library(**extra) -> dict:
    return {"ols": LinearRegression(), "const": DummyRegressor(), **extra}


def fit(frame=None, target="ate", propensity=None, outcome=None, **settings):
    """One fast fit: 3 folds, no bootstrap, logistic/constant x OLS/constant libraries."""
    frame = toy_frame() if frame is None else frame
    options = {"folds": 3, "bootstrap": 0, **settings}
    estimator = BlendEstimator(
        target,
        propensity_library() if propensity is None else propensity,
        outcome_library() if outcome is None else outcome,
        **options,
    )
    return estimator.fit(frame, "a", "y")


def changed(**columns) -> Callable[[], pd.DataFrame]:
    """A toy frame with some columns replaced (callables get the frame)."""

    def build() -> pd.DataFrame:
        frame = toy_frame()
        for name, value in columns.items():
            frame[name] = value(frame) if callable(value) else value
        return frame

    return build


def with_cell(column: str, row: int, value) -> Callable[[], pd.DataFrame]:
    def build() -> pd.DataFrame:
        frame = toy_frame()
        frame[column] = frame[column].astype(object if isinstance(value, str) else float)
        frame.loc[row, column] = value
        return frame

    return build


class FailingFit(ClassifierMixin, BaseEstimator):
    """A classifier whose fit always raises."""

    def fit(self, X, y):
        raise RuntimeError("deliberate failure in fit")

    def predict_proba(self, X):
        raise AssertionError("never fitted")


class BadProbabilities(ClassifierMixin, BaseEstimator):
    """A classifier whose predict_proba misbehaves in the way ``mode`` names."""

    def __init__(self, mode: str = "nan"):
        self.mode = mode

    def fit(self, X, y):
        self.classes_ = np.array([0, 1])
        return self

    def predict_proba(self, X):
        n = len(X)
        if self.mode == "rows":
            return np.full((n + 1, 2), 0.5)
        if self.mode == "columns":
            return np.full((n, 3), 1 / 3)
        p = np.full(n, np.nan if self.mode == "nan" else 1.5)
        return np.column_stack([1 - p, p])


class NaNRegressor(RegressorMixin, BaseEstimator):
    def fit(self, X, y):
        return self

    def predict(self, X):
        return np.full(len(X), np.nan)


class NotAnEstimator:
    """Has fit and predict but is not a scikit-learn estimator (no get_params)."""

    def fit(self, X, y):
        return self

    def predict(self, X):
        return np.zeros(len(X))


def cli(args) -> tuple[int, str]:
    """Run ``stackdr`` in process; returns (exit code, stderr)."""
    err = io.StringIO()
    with contextlib.redirect_stderr(err), contextlib.redirect_stdout(io.StringIO()):
        code = main([str(a) for a in args])
    return code, err.getvalue()


# ----------------------------------------------------------------------------- the table


@dataclass(frozen=True)
class Fault:
    """One row of the fault table.

    ``expect`` is the exception or warning class the fault must produce (the message must
    contain ``message``); for a warning the fit must still return finite estimates.
    """

    name: str
    action: str
    message: str
    expect: type
    run: Callable[[], object]


def fit_frame(build, **kw) -> Callable[[], object]:
    return lambda: fit(build(), **kw)


def fit_design(build, **roles) -> Callable[[], object]:
    """A fast fit of the toy frame with sampling weights and/or clusters (column names)."""

    def run():
        estimator = BlendEstimator(
            "ate", propensity_library(), outcome_library(), folds=3, bootstrap=0
        )
        return estimator.fit(build(), "a", "y", ["x1", "x2", "x3"], **roles)

    return run


def design_frame(**columns) -> Callable[[], pd.DataFrame]:
    """The toy frame with a weights column ``w`` (1 to 2) and a cluster column ``g`` (40
    clusters), then ``columns`` replaced."""
    defaults = {
        "w": lambda f: 1.0 + (np.arange(len(f)) % 3) / 2,
        "g": lambda f: np.arange(len(f)) % 40,
    }
    return changed(**{**defaults, **columns})


FAULTS = [
    Fault(
        "missing value in the treatment",
        "error",
        "treatment column 'a' has 1 missing values",
        InputError,
        fit_frame(with_cell("a", 3, np.nan)),
    ),
    Fault(
        "missing value in the outcome",
        "error",
        "outcome column 'y' has 1 missing values",
        InputError,
        fit_frame(with_cell("y", 3, np.nan)),
    ),
    Fault(
        "missing value in a covariate",
        "error",
        "covariates have missing values: 'x2' (1)",
        InputError,
        fit_frame(with_cell("x2", 3, np.nan)),
    ),
    Fault(
        "infinite covariate",
        "error",
        "covariates have infinite values in columns: x1",
        InputError,
        fit_frame(with_cell("x1", 0, np.inf)),
    ),
    Fault(
        "infinite outcome",
        "error",
        "outcome column 'y' has infinite values",
        InputError,
        fit_frame(with_cell("y", 5, -np.inf)),
    ),
    Fault(
        "infinite treatment",
        "error",
        "must be coded 0/1 for target 'ate'; values found: ",
        InputError,
        fit_frame(with_cell("a", 5, np.inf)),
    ),
    Fault(
        "treatment with a value other than 0/1",
        "error listing the values",
        "values found: 0.0, 1.0, 2.0",
        InputError,
        fit_frame(changed(a=lambda f: np.where(f.index == 0, 2.0, f.a).astype(float))),
    ),
    Fault(
        "treatment with one level",
        "error",
        "treatment column 'a' has a single level (1); both 0 and 1 are needed",
        InputError,
        fit_frame(changed(a=1.0)),
    ),
    Fault(
        'treatment stored as "yes"/"no"',
        "error listing the values (no guessed mapping: it could flip the sign)",
        "must be coded 0/1 for target 'ate'; values found: ",
        InputError,
        fit_frame(changed(a=lambda f: np.where(f.a == 1, "yes", "no"))),
    ),
    Fault(
        "continuous treatment that is constant (target cov)",
        "error",
        "treatment column 'a' is constant",
        InputError,
        lambda: fit(changed(a=0.5)(), "cov", propensity=outcome_library()),
    ),
    Fault(
        "text in the outcome",
        "error naming the values",
        "outcome column 'y' is not numeric; values found include 'n/a'",
        InputError,
        fit_frame(with_cell("y", 7, "n/a")),
    ),
    Fault(
        "constant outcome",
        "runs; warning (the estimate is the trivial value, SE 0)",
        "outcome column 'y' is constant (3)",
        UserWarning,
        fit_frame(changed(y=3.0)),
    ),
    Fault(
        "outcome beyond 1e100 in magnitude",
        "error asking to rescale",
        "rescale it so its largest value lies between 1e-100 and 1e+100",
        InputError,
        fit_frame(changed(y=lambda f: f.y * 1e120)),
    ),
    Fault(
        "duplicated column names (DataFrame)",
        "error",
        "duplicated column names: 'x1'",
        InputError,
        fit_frame(lambda: toy_frame().set_axis(["x1", "x1", "x3", "a", "y"], axis=1)),
    ),
    Fault(
        "zero rows",
        "error",
        "the data have zero rows",
        InputError,
        fit_frame(lambda: toy_frame().iloc[:0]),
    ),
    Fault(
        "one row",
        "error",
        "has a single level",
        InputError,
        fit_frame(lambda: toy_frame().iloc[:1]),
    ),
    Fault(
        "fewer rows in an arm than folds",
        "error",
        "treatment arm a = 1 has 2 rows, fewer than the 3 needed for 3 folds",
        InputError,
        fit_frame(changed(a=lambda f: (f.index < 2).astype(float))),
    ),
    Fault(
        "more folds than rows",
        "error",
        "fewer than the 500 needed for 500 folds",
        InputError,
        lambda: fit(folds=500),
    ),
    Fault(
        "date covariate",
        "error (one-hot encoding would make every date a column)",
        "covariate 'when' holds dates or durations; convert it to a number first",
        InputError,
        fit_frame(changed(when=lambda f: pd.date_range("2020-01-01", periods=len(f)))),
    ),
    Fault(
        "identifier column among the covariates",
        "runs; warning (one indicator column per distinct text value)",
        "covariate 'id' has 200 distinct text values in 200 rows and becomes 199 indicator",
        UserWarning,
        fit_frame(changed(id=lambda f: [f"p{i}" for i in f.index])),
    ),
    Fault(
        "perfect separation (a covariate equal to the treatment)",
        "runs; propensities clipped; positivity warning naming learners and share",
        "positivity: propensities outside [0.01, 0.99] were clipped for 1 of 2 propensity "
        "learners ('logit' 100.0% of rows)",
        PositivityWarning,
        lambda: fit(
            changed(sep=lambda f: 10 * f.a)(),
            propensity=propensity_library(logit=LogisticRegression(C=1e6, max_iter=5000)),
        ),
    ),
    Fault(
        "learner raises in fit",
        "learner dropped with a warning; the rest run",
        "propensity learner 'boom' failed and was dropped: RuntimeError: deliberate failure",
        UserWarning,
        lambda: fit(propensity=propensity_library(boom=FailingFit())),
    ),
    Fault(
        "propensity learner named like the stacked propensity",
        "error; rename the learner, or set stacked_propensity to false",
        "the propensity learner name 'prediction-loss stack' is reserved",
        InputError,
        lambda: fit(propensity=propensity_library(**{STACKED_PROPENSITY: DummyClassifier()})),
    ),
    Fault(
        "predict_proba returns NaN",
        "learner dropped with a warning",
        "propensity learner 'bad' failed and was dropped: ValueError: returned 67 non-finite",
        UserWarning,
        lambda: fit(propensity=propensity_library(bad=BadProbabilities("nan"))),
    ),
    Fault(
        "predict_proba outside [0, 1]",
        "learner dropped with a warning",
        "returned probabilities outside [0, 1] (range 1.5 to 1.5)",
        UserWarning,
        lambda: fit(propensity=propensity_library(bad=BadProbabilities("outside"))),
    ),
    Fault(
        "predict_proba with the wrong number of rows",
        "learner dropped with a warning",
        "predict_proba returned shape (68, 2) for 67 rows",
        UserWarning,
        lambda: fit(propensity=propensity_library(bad=BadProbabilities("rows"))),
    ),
    Fault(
        "predict_proba with more columns than classes",
        "learner dropped with a warning",
        "predict_proba returned shape (67, 3) for 67 rows and classes [0, 1]",
        UserWarning,
        lambda: fit(propensity=propensity_library(bad=BadProbabilities("columns"))),
    ),
    Fault(
        "outcome learner predicts NaN",
        "learner dropped with a warning",
        "outcome learner 'nan' failed and was dropped: ValueError: returned",
        UserWarning,
        lambda: fit(outcome=outcome_library(nan=NaNRegressor())),
    ),
    Fault(
        "learner that is not a scikit-learn estimator",
        "error",
        "outcome learner 'plain' is not a scikit-learn regressor (needs fit, predict and "
        "get_params); got NotAnEstimator",
        InputError,
        lambda: fit(outcome=outcome_library(plain=NotAnEstimator())),
    ),
    Fault(
        "regressor given as a propensity learner",
        "error",
        "propensity learner 'ols' is not a scikit-learn classifier",
        InputError,
        lambda: fit(propensity=propensity_library(ols=LinearRegression())),
    ),
    Fault(
        "every learner of a side fails",
        "error",
        "every propensity learner failed; the propensity library is empty",
        LearnerError,
        lambda: fit(propensity={"boom": FailingFit()}),
    ),
    Fault(
        'learner fails with on_error="raise"',
        "error naming the learner",
        "propensity learner 'boom' failed and was dropped: RuntimeError",
        LearnerError,
        lambda: fit(propensity=propensity_library(boom=FailingFit()), on_error="raise"),
    ),
    Fault(
        "empty learner library",
        "error",
        "propensity library must be a non-empty dict",
        InputError,
        lambda: fit(propensity={}),
    ),
    Fault(
        "all-zero NNLS stacking solution",
        "runs; warning; prediction-loss stacking falls back to the best single learner",
        "NNLS stacking gave all-zero coefficients in 1 of 1 fit(s)",
        RuntimeWarning,
        # Both outcome learners predict against the outcome's direction: no positive blend.
        lambda: fit(
            outcome={
                "down1": KnownRegressor(lambda X: -3 * X[:, 0] - 10),
                "down2": KnownRegressor(lambda X: -X[:, 1] - 20),
            }
        ),
    ),
    Fault(
        "refit bootstrap resample that cannot be fitted",
        "runs; that replicate left out; warning counting such replicates",
        "refit bootstrap replicates could not be fitted and were left out of the interval",
        RuntimeWarning,
        # Four treated rows: some resamples leave a fold without two treated rows to train on.
        lambda: fit(
            toy_frame(24).assign(a=[1.0] * 4 + [0.0] * 20),
            bootstrap=8,
            bootstrap_kind="refit",
        ),
    ),
    Fault(
        "clipping bound outside [0, 0.5)",
        "error",
        "clip must be >= 0 and < 0.5, got 0.7",
        InputError,
        lambda: fit(clip=0.7),
    ),
    Fault(
        "sampling weights column not found",
        "error",
        "weights column 'wt' not found",
        InputError,
        fit_design(design_frame(), weights="wt"),
    ),
    Fault(
        "negative sampling weight",
        "error",
        "weights column 'w' has 1 negative values",
        InputError,
        fit_design(design_frame(w=lambda f: np.where(f.index == 2, -1.0, 1.0)), weights="w"),
    ),
    Fault(
        "missing or infinite sampling weight",
        "error",
        "weights column 'w' has 2 missing or infinite values",
        InputError,
        fit_design(
            design_frame(w=lambda f: np.select([f.index == 1, f.index == 4], [np.nan, np.inf], 1)),
            weights="w",
        ),
    ),
    Fault(
        "text in the sampling weights",
        "error",
        "weights column 'w' is not numeric",
        InputError,
        fit_design(design_frame(w=lambda f: np.where(f.index == 0, "high", "1")), weights="w"),
    ),
    Fault(
        "sampling weights all zero",
        "error",
        "weights column 'w' is zero in every row",
        InputError,
        fit_design(design_frame(w=0.0), weights="w"),
    ),
    Fault(
        "a single cluster",
        "error",
        "clusters column 'g' has a single cluster",
        InputError,
        fit_design(design_frame(g="ward 1"), clusters="g"),
    ),
    Fault(
        "fewer clusters than folds",
        "error",
        "clusters column 'g' has 2 clusters, fewer than the 3 folds",
        InputError,
        fit_design(design_frame(g=lambda f: np.arange(len(f)) % 2), clusters="g"),
    ),
    Fault(
        "fewer than 30 clusters",
        "runs with a warning",
        "clusters column 'g' has only 6 clusters",
        UserWarning,
        fit_design(design_frame(g=lambda f: np.arange(len(f)) % 6), clusters="g"),
    ),
    Fault(
        "negative bootstrap count",
        "error",
        "bootstrap must be >= 0, got -1",
        InputError,
        lambda: fit(bootstrap=-1),
    ),
    Fault(
        "unknown blend",
        "error",
        "blend must be one of riesz, probability, logit, got 'cubic'",
        InputError,
        lambda: fit(blend="cubic"),
    ),
]


def _finite_result(result) -> None:
    rows = result.comparison()
    assert np.isfinite(rows[["estimate", "se", "low", "high"]].to_numpy()).all()
    for weights in (result.alpha, result.beta):
        assert weights.min() >= 0 and weights.sum() == pytest.approx(1.0)


@pytest.mark.parametrize("fault", FAULTS, ids=[f.name for f in FAULTS])
def test_fault_table(fault: Fault):
    pattern = re.escape(fault.message)
    if issubclass(fault.expect, Warning):
        with pytest.warns(fault.expect, match=pattern):
            result = fault.run()
        _finite_result(result)
    else:
        with pytest.raises(fault.expect, match=pattern):
            fault.run()


# ----------------------------------------------------------------------------- faults with more
# to check than a message: each is a README row too.

CHECKED = {
    'treatment stored as text "0"/"1" or as booleans': "runs; same estimate as 0/1 numbers",
    "binary outcome": "runs; estimate in [-1, 1] and near the truth",
    "constant covariate column": "runs",
    "perfectly collinear covariates": "runs",
    "failed learner": "result equals a run without that learner",
    "LP solver reports failure": "runs; warning naming range_lp; best single learner",
    "LP solver raises": "known gap: internal error, exit 1 (the solver module lets it escape)",
    "config: learner parameter out of range": "runs; that learner dropped with a warning",
    "one learner on a side (K = 1)": "runs; weight 1 on that learner",
    "outcome scaled by 1e12 or 1e-12": "runs; estimate and SE scale exactly (1e-6 relative)",
    "cross-fitting folds disagree more than sampling noise explains (unstable learners)": (
        "runs; warning recommending the refit bootstrap"
    ),
}


@pytest.fixture(scope="module")
def baseline():
    return fit()


def test_missing_outcome_where_the_target_ignores_it_is_fine():
    frame = toy_frame()
    untreated = frame.index[frame.a == 0]
    frame.loc[untreated[:5], "y"] = np.nan
    complete = toy_frame()
    complete.loc[untreated[:5], "y"] = 0.0  # any value: mean1 never reads untreated outcomes
    assert fit(frame, "mean1").estimate == fit(complete, "mean1").estimate
    with pytest.raises(InputError, match="5 missing values among rows with a = 0"):
        fit(frame, "mean0")


def test_text_or_boolean_treatment_codes_match_numbers(baseline):
    text = fit(changed(a=lambda f: f.a.astype(int).astype(str))())
    flags = fit(changed(a=lambda f: f.a == 1)())
    assert text.estimate == baseline.estimate
    assert flags.estimate == baseline.estimate


def test_binary_outcome_estimates_are_sane():
    # Y(a) ~ Bernoulli(expit(-0.5 + a + X1)), X1 ~ N(0, 1): the true ATE is an integral over the
    # normal density, computed here by quadrature (scipy.integrate.quad).
    rng = np.random.default_rng(3)
    n = 1500
    X = rng.normal(size=(n, 3))
    A = rng.binomial(1, expit(X[:, 0] - 0.5 * X[:, 1]))
    Y = rng.binomial(1, expit(-0.5 + A + X[:, 0])).astype(float)
    frame = pd.DataFrame(X, columns=["x1", "x2", "x3"]).assign(a=A, y=Y)
    density = lambda x: np.exp(-(x**2) / 2) / np.sqrt(2 * np.pi)  # noqa: E731
    truth = integrate.quad(
        lambda x: (expit(0.5 + x) - expit(-0.5 + x)) * density(x), -np.inf, np.inf
    )[0]
    result = fit(frame)
    assert -1 <= result.estimate <= 1
    assert abs(result.estimate - truth) < 4 * result.se
    mean1 = fit(frame, "mean1")
    assert 0 <= mean1.estimate <= 1


@pytest.mark.parametrize(
    "extra",
    [
        {"const_col": 1.0},
        {"twice_x1": lambda f: 2 * f.x1 + 1, "x1_plus_x2": lambda f: f.x1 + f.x2},
    ],
    ids=["constant covariate column", "perfectly collinear covariates"],
)
def test_degenerate_covariates_still_work(baseline, extra):
    result = fit(changed(**extra)())
    _finite_result(result)
    # Same column space, so the OLS and constant learners agree; the ridge-penalised logistic
    # fit moves slightly, well within one standard error.
    assert abs(result.estimate - baseline.estimate) < result.se


def test_failed_learner_is_left_out_exactly(baseline):
    with pytest.warns(UserWarning, match="'boom' failed and was dropped"):
        result = fit(propensity=propensity_library(boom=FailingFit()))
    assert list(result.alpha.index) == ["logit", "const", STACKED_PROPENSITY]
    assert result.estimate == baseline.estimate
    assert result.crossfit.failures["propensity:boom"].startswith("RuntimeError")


def _lp_failure(*args, **kwargs):
    return False, None, "infeasible (simulated)", 0


def _lp_crash(*args, **kwargs):
    raise ValueError("simulated HiGHS crash")


@pytest.mark.parametrize(
    "replacement, message",
    [
        (_lp_failure, "range_lp failed (HiGHS status infeasible (simulated))"),
        (_lp_crash, "range_lp failed (ValueError: simulated HiGHS crash)"),
    ],
    ids=["LP solver reports failure", "LP solver raises"],
)
def test_failed_lp_falls_back_to_a_vertex(monkeypatch, replacement, message):
    monkeypatch.setattr("stackdr.search._range_lp.highs_range_lp", replacement)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        # Both sides searched (the default fixes the outcome side at the stacking weights).
        result = fit(tie_break=False, outcome_side="search")
    assert any(message in str(w.message) for w in caught if w.category is RuntimeWarning)
    _finite_result(result)
    for record in ("alpha", "beta"):
        assert result.search.records[record].status == "fallback"
        weights = result.search.records[record].weights
        assert np.count_nonzero(weights) == 1 and weights.max() == 1.0


def test_disagreeing_folds_warn_and_recommend_refit():
    rng = np.random.default_rng(5)
    X, A, Y, _ = confounded_data(rng, 800)
    frame = pd.DataFrame(X, columns=["x1", "x2", "x3"]).assign(a=A, y=Y + 10)
    estimator = BlendEstimator(
        "ate",
        {"swinging": SwingingClassifier()},
        {"zero": DummyRegressor(strategy="constant", constant=0.0)},
        folds=5,
        seed=2,
        bootstrap=0,
        n_jobs=1,
    )
    with pytest.warns(UnstableLearnersWarning, match="consider --bootstrap-kind refit"):
        result = estimator.fit(frame, "a", "y")
    assert np.isfinite(result.estimate) and result.fold_check.alert


def test_single_learner_sides():
    one_side = fit(propensity={"logit": LogisticRegression()})
    assert one_side.alpha.to_dict() == {"logit": 1.0}
    _finite_result(one_side)
    both = fit(propensity={"logit": LogisticRegression()}, outcome={"ols": LinearRegression()})
    assert both.estimate == pytest.approx(both.analysis.Psi[0, 0], rel=1e-12)


@pytest.mark.parametrize("scale", [1e12, 1e-12])
def test_outcome_scale_does_not_change_the_relative_result(baseline, scale):
    result = fit(changed(y=lambda f: f.y * scale)())
    assert result.estimate / scale == pytest.approx(baseline.estimate, rel=1e-6)
    assert result.se / scale == pytest.approx(baseline.se, rel=1e-6)
    assert result.beta.to_numpy() == pytest.approx(baseline.beta.to_numpy(), abs=1e-6)


# ----------------------------------------------------------------------------- configuration

CONFIG_FAULTS = {
    "config: unknown key": (
        QUICK_NO_BOOTSTRAP.replace("folds = 3", "folds = 3\nfoldz = 2"),
        "unknown setting 'foldz' (did you mean 'folds'?)",
    ),
    "config: wrong type": (
        QUICK_NO_BOOTSTRAP.replace("folds = 3", 'folds = "3"'),
        "setting 'folds' must be a whole number, got '3'",
    ),
    "config: unknown learner name": (
        QUICK_NO_BOOTSTRAP.replace("[outcome.linear]", '[outcome.linear]\nlearner = "linnear"'),
        "[outcome.linear]: unknown learner 'linnear' (did you mean 'linear'?)",
    ),
    "config: unknown learner parameter": (
        QUICK_NO_BOOTSTRAP.replace("[outcome.linear]", "[outcome.linear]\nalpha = 3"),
        "learner 'linear' has no parameter 'alpha'",
    ),
    "config: unknown section": (
        QUICK_NO_BOOTSTRAP + "\n[extras]\nx = 1\n",
        "unknown section [extras]",
    ),
    "config: TOML syntax error": ("[settings\nfolds = 3\n", "is not valid TOML"),
    "config: not UTF-8": ("[settings]\n# caf\xe9\n", "cannot read config file"),
}


@pytest.mark.parametrize("case", list(CONFIG_FAULTS))
def test_config_faults(tmp_path, case):
    body, message = CONFIG_FAULTS[case]
    path = tmp_path / "run.toml"
    path.write_bytes(body.encode("latin-1" if "UTF-8" in case else "utf-8"))
    with pytest.raises(InputError, match=re.escape(message)) as info:
        load_config(path)
    assert str(path) in str(info.value)


def test_config_parameter_rejected_by_the_learner_drops_it(tmp_path):
    # The catalogue checks names and types when the file is read; a value out of the learner's
    # range (here n_neighbors < 1) surfaces when it is fitted, naming the learner and value.
    body = QUICK_NO_BOOTSTRAP.replace('"constant-regressor"', '"knn-regressor"\nn_neighbors = -3')
    (tmp_path / "run.toml").write_text(body)
    config = load_config(tmp_path / "run.toml")
    message = "outcome learner 'constant' failed and was dropped: InvalidParameterError"
    with pytest.warns(UserWarning, match=message):
        result = fit(outcome=config.library("outcome"))
    assert list(result.beta.index) == ["linear"]


# ----------------------------------------------------------------------------- files, end to end

HOSTILE = "<b>dose</b>; $(touch pwned) `id` & 'q'"


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    root = tmp_path_factory.mktemp("faults")
    frame = toy_frame(120, seed=4)
    frame["a"] = frame["a"].astype(int)
    frame.to_csv(root / "plain.csv", index=False)
    text = frame.to_csv(index=False)
    (root / "bom.csv").write_bytes(b"\xef\xbb\xbf" + text.encode("utf-8"))
    (root / "semicolon.csv").write_text(frame.to_csv(index=False, sep=";", decimal=","))
    (root / "quoted.csv").write_text(frame.to_csv(index=False, quoting=1))
    frame.rename(columns={"x3": HOSTILE}).to_csv(root / "hostile.csv", index=False)
    header, body = text.split("\n", 1)
    (root / "repeated.csv").write_text(header.replace("x2", "x1") + "\n" + body)
    frame.assign(a=np.where(frame.a == 1, "yes", "no")).to_csv(root / "yesno.csv", index=False)
    frame.assign(x2=frame.x2.where(frame.index != 9)).to_csv(root / "gaps.csv", index=False)
    frame.assign(y=np.where(frame.index == 4, np.inf, frame.y)).to_csv(
        root / "inf.csv", index=False
    )
    (root / "quick.toml").write_text(QUICK_NO_BOOTSTRAP)
    return root


CSV_ERRORS = {
    "CSV with a repeated column name": ("repeated.csv", "has duplicated column names: 'x1'"),
    'CSV treatment "yes"/"no"': ("yesno.csv", "values found: 'no', 'yes'"),
    "CSV with an empty cell": ("gaps.csv", "covariates have missing values: 'x2' (1)"),
    "CSV with inf in the outcome": ("inf.csv", "outcome column 'y' has infinite values"),
}


@pytest.mark.parametrize("case", list(CSV_ERRORS))
def test_csv_faults_exit_2_with_one_line(files, case):
    data, message = CSV_ERRORS[case]
    code, err = cli(estimate_args(files, data, f"out-{data}"))
    assert code == 2
    assert err.count("\n") == 1 and err.startswith("stackdr: error: "), err
    assert message in err
    assert not (files / f"out-{data}").exists()


@pytest.fixture(scope="module")
def plain_run(files) -> dict:
    code, err = cli(estimate_args(files, "plain.csv", "out-plain"))
    assert code == 0, err
    return read_results_json(files / "out-plain" / "results.json")


@pytest.mark.parametrize(
    "data",
    ["bom.csv", "semicolon.csv", "quoted.csv"],
    ids=["UTF-8 BOM", "semicolon delimiter, decimal comma", "quoted numbers"],
)
def test_spreadsheet_csv_variants_match_plain(files, plain_run, data):
    code, err = cli(estimate_args(files, data, f"out-{data}"))
    assert code == 0, err
    variant = read_results_json(files / f"out-{data}" / "results.json")
    assert variant["data"]["covariates"] == ["x1", "x2", "x3"]
    assert variant["estimate"] == pytest.approx(plain_run["estimate"], rel=1e-12)


CLI_ERRORS = {
    "output folder inside a file": (
        lambda root: estimate_args(root, "plain.csv", "plain.csv/run"),
        "output folder",
        "cannot be written",
    ),
    "study file in a missing folder": (
        lambda root: [
            "simulate",
            "--design",
            "kang-schafer",
            "--n",
            100,
            "--reps",
            1,
            "--out",
            root / "absent" / "study.sqlite",
        ],
        "cannot open study file",
        "unable to open database file",
    ),
}


@pytest.mark.parametrize("case", list(CLI_ERRORS))
def test_unusable_output_paths(files, case):
    build, *fragments = CLI_ERRORS[case]
    code, err = cli(build(files))
    assert code == 2 and err.count("\n") == 1 and err.startswith("stackdr: error: "), err
    assert all(fragment in err for fragment in fragments)


def test_damaged_results_file_is_refused_by_report(files, plain_run):
    damaged = {**plain_run, "estimate": 1e300}
    (files / "damaged.json").write_text(json.dumps(damaged))
    code, err = cli(["report", files / "damaged.json", "--out", files / "damaged-report"])
    assert code == 2 and err.count("\n") == 1
    assert "estimate is 1e+300, beyond the largest magnitude a results file holds" in err
    assert not (files / "damaged-report").exists()


def test_hostile_column_name_is_inert(files, monkeypatch):
    monkeypatch.chdir(files)
    code, err = cli(estimate_args(files, "hostile.csv", "out-hostile"))
    assert code == 0, err
    out = files / "out-hostile"
    results = json.loads((out / "results.json").read_text(encoding="utf-8"))
    assert HOSTILE in results["data"]["covariates"]
    report = (out / "report.html").read_text(encoding="utf-8")
    assert "<b>dose</b>" not in report and html.escape(HOSTILE) in report
    assert not (files / "pwned").exists()


# ----------------------------------------------------------------------------- README


def readme_section() -> str:
    text = README.read_text(encoding="utf-8")
    start = text.index("## Errors and limits")
    end = text.find("\n## ", start + 1)
    return text[start : end if end > 0 else len(text)]


def test_readme_lists_every_fault():
    section = readme_section()
    rows = [line for line in section.splitlines() if line.startswith("| ")]
    names = (
        [f.name for f in FAULTS]
        + list(CHECKED)
        + list(CONFIG_FAULTS)
        + list(CSV_ERRORS)
        + [
            "CSV with a UTF-8 BOM, `;` delimiter or quoted numbers",
            "column name with HTML or shell metacharacters",
            "damaged results file given to `stackdr report`",
            *CLI_ERRORS,
        ]
    )
    missing = [name for name in names if not any(f"| {name} |" in row for row in rows)]
    assert missing == []
    for fault in FAULTS:
        row = next(r for r in rows if f"| {fault.name} |" in r)
        assert fault.message.split(";")[0][:40].replace("|", "\\|") in row.replace("`", "")
