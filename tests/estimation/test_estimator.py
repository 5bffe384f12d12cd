"""The main estimator end to end: oracle libraries, permutation invariance, blends, targets."""

import numpy as np
import pandas as pd
import pytest
from scipy.special import expit
from sklearn.dummy import DummyClassifier, DummyRegressor
from sklearn.linear_model import LinearRegression, LogisticRegression, Ridge

from stackdr import BlendEstimator
from stackdr.errors import InputError
from tests.helpers import TREATED_MEAN, KnownClassifier, KnownRegressor, confounded_data


def true_outcome(XA):
    X, A = XA[:, :3], XA[:, 3]
    return 2 * A + 3 * X[:, 0] + X[:, 1] + X[:, 2] ** 2


def true_propensity(X):
    return expit(X[:, 0] - 0.5 * X[:, 1])


def oracle_libraries():
    prop = {
        "true": KnownClassifier(true_propensity),
        "wrong": KnownClassifier(lambda X: np.full(X.shape[0], 0.5)),
    }
    outc = {
        "true": KnownRegressor(true_outcome),
        "wrong": KnownRegressor(lambda XA: 2 * XA[:, 3] + 1.5 * XA[:, 1]),
    }
    return prop, outc


def test_oracle_learners_receive_the_mass():
    # Double robustness (Rotnitzky, Smucler & Robins 2021, mixed bias property): at the true
    # propensity every outcome learner gives the same estimate up to noise, so the
    # outcome-direction sensitivity there is near zero, and the pure minimiser sits near the truth.
    X, A, Y, _ = confounded_data(np.random.default_rng(3), 4000)
    prop, outc = oracle_libraries()
    est = BlendEstimator(
        "ate",
        prop,
        outc,
        folds=2,
        outcome_mode="pooled",
        tie_break=False,
        contrast_z=0,
        bootstrap=0,
    )
    res = est.fit(X, A, Y)
    Psi = res.pair_table.to_numpy()
    se = res.pair_standard_errors.to_numpy()
    assert res.alpha["true"] > 0.8 and res.beta["true"] > 0.8
    range_true = np.ptp(Psi[0])
    assert range_true < 2 * se.max()
    assert range_true < 0.25 * np.ptp(Psi[1])
    assert abs(res.estimate - 2.0) < 4 * res.se


def test_permuting_learners_permutes_weights():
    X, A, Y, _ = confounded_data(np.random.default_rng(5), 600)
    prop = {
        "logit": LogisticRegression(),
        "flat": DummyClassifier(strategy="prior"),
        "sharp": LogisticRegression(C=100.0),
    }
    outc = {"ols": LinearRegression(), "ridge": Ridge(alpha=50.0), "mean": DummyRegressor()}
    a = BlendEstimator("ate", prop, outc, seed=2, bootstrap=0).fit(X, A, Y)
    b = BlendEstimator(
        "ate", dict(reversed(prop.items())), dict(reversed(outc.items())), seed=2, bootstrap=0
    ).fit(X, A, Y)
    assert b.estimate == pytest.approx(a.estimate, abs=1e-7)
    pd.testing.assert_series_equal(b.alpha[a.alpha.index], a.alpha, atol=1e-6)
    pd.testing.assert_series_equal(b.beta[a.beta.index], a.beta, atol=1e-6)


def test_comparison_table_and_summary(capsys):
    X, A, Y, _ = confounded_data(np.random.default_rng(6), 500)
    prop = {"logit": LogisticRegression(), "flat": DummyClassifier(strategy="prior")}
    outc = {"ols": LinearRegression(), "mean": DummyRegressor()}
    res = BlendEstimator("att", prop, outc, bootstrap=0).fit(X, A, Y)
    summary = res.summary()
    assert capsys.readouterr().out == ""  # a table object, printed only when asked
    printed = str(summary)
    assert "target-aimed stacking" in printed and "Caution" in printed
    table = summary.as_frame()
    names = set(table["estimator"])
    assert {
        "target-aimed stacking",
        "prediction-loss stacking",
        "best-predicting pair",
        "mixed-minimax pair",
        "minimax pair",
    } <= names
    assert (table["low"] < table["estimate"]).all() and (table["estimate"] < table["high"]).all()
    # One row per pair of the search's table (the stacked propensity's pairs included).
    assert res.pair_table.shape == (3, 2)
    assert len(res.comparison(include_pairs=True)) == len(table) + res.pair_table.size
    assert set(res.losses["side"]) == {"propensity", "outcome"}
    assert res.alpha.sum() == pytest.approx(1.0) and (res.alpha >= 0).all()
    assert "<table" in res._repr_html_()


@pytest.mark.parametrize("blend", ["probability", "logit"])
@pytest.mark.parametrize("criterion", ["mixed", "minimax"])
def test_blends_and_criteria_run(blend, criterion):
    X, A, Y, _ = confounded_data(np.random.default_rng(8), 400)
    prop = {"logit": LogisticRegression(), "flat": DummyClassifier(strategy="prior")}
    outc = {"ols": LinearRegression(), "mean": DummyRegressor()}
    res = BlendEstimator("ate", prop, outc, blend=blend, criterion=criterion, bootstrap=0).fit(
        X, A, Y
    )
    assert np.isfinite(res.estimate) and res.se > 0
    assert res.beta.sum() == pytest.approx(1.0)


def test_user_defined_target_matches_built_in():
    # A user declares E[Y(1)] through the public protocol; it must equal the built-in mean1.
    X, A, Y, _ = confounded_data(np.random.default_rng(9), 500)
    prop = {"logit": LogisticRegression()}
    outc = {"ols": LinearRegression()}
    a = BlendEstimator(TREATED_MEAN, prop, outc, seed=1, bootstrap=0).fit(X, A, Y)
    b = BlendEstimator("mean1", prop, outc, seed=1, bootstrap=0).fit(X, A, Y)
    assert a.estimate == pytest.approx(b.estimate, rel=1e-12)


def test_repeated_splits_and_bad_settings():
    X, A, Y, _ = confounded_data(np.random.default_rng(10), 300)
    prop = {"logit": LogisticRegression()}
    outc = {"ols": LinearRegression(), "mean": DummyRegressor()}
    res = BlendEstimator("ate", prop, outc, repeats=3, bootstrap=0).fit(X, A, Y)
    assert res.crossfit.repeats == 3 and np.isfinite(res.estimate)
    with pytest.raises(InputError, match="blend must be one of riesz, probability, logit, got"):
        BlendEstimator("ate", prop, outc, blend="linear").fit(X, A, Y)
    with pytest.raises(InputError, match="target must be one of mean1, mean0, ate, att, cov, got"):
        BlendEstimator("atx", prop, outc).fit(X, A, Y)
    with pytest.raises(InputError, match="outcome learner 'bad' is not a scikit-learn regressor"):
        BlendEstimator("ate", prop, {"bad": object()}).fit(X, A, Y)
