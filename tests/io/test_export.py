"""Exported blended nuisances and fitted blended models."""

import numpy as np
import pandas as pd
import pytest
from scipy.special import expit, logit
from sklearn.base import clone
from sklearn.exceptions import NotFittedError
from sklearn.linear_model import LinearRegression, LogisticRegression
from sklearn.model_selection import cross_val_score
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

from stackdr import BlendEstimator
from stackdr.errors import InputError
from stackdr.estimation import make_learner
from stackdr.io import (
    BlendedClassifier,
    BlendedRegressor,
    blended_models,
    blended_nuisances,
)
from tests.helpers import confounded_data


def libraries():
    plib = {
        "logistic": make_learner("logistic"),
        "quadratic": make_learner("quadratic-logistic"),
        "constant": make_learner("constant-classifier"),
    }
    olib = {
        "linear": make_learner("linear"),
        "quadratic": make_learner("quadratic-ridge"),
        "constant": make_learner("constant-regressor"),
    }
    return plib, olib


@pytest.fixture(scope="module")
def data():
    X, A, Y, _ = confounded_data(np.random.default_rng(11), 300)
    frame = pd.DataFrame(X, columns=["x1", "x2", "x3"])
    frame["a"], frame["y"] = A, Y
    return frame


def fit(frame, target, **kwargs):
    plib, olib = libraries()
    settings = {"bootstrap": 0, "folds": 3, **kwargs}
    return BlendEstimator(target, plib, olib, **settings).fit(frame, "a", "y")


@pytest.mark.parametrize("target", ["ate", "att", "mean1", "mean0", "cov"])
@pytest.mark.parametrize("blend", ["riesz", "probability", "logit"])
def test_contributions_reproduce_the_estimate(data, target, blend):
    result = fit(data, target, blend=blend)
    table = blended_nuisances(result)
    assert len(table) == len(data)
    denominator = table["treatment"].sum() if target == "att" else len(table)
    assert table["contribution"].sum() / denominator == pytest.approx(result.estimate, rel=1e-10)
    heads = [c.outcome_head for c in result.target.components]
    assert [c for c in table if c.startswith("weight_")] == [f"weight_{h}" for h in heads]
    for head in heads:
        manual = result.crossfit.outcome[head][0] @ result.beta.to_numpy()
        np.testing.assert_allclose(table[head], manual)
    # Fold labels are the cross-fitting folds, and each row's values are out-of-fold.
    np.testing.assert_array_equal(table["fold"], result.crossfit.fold_labels[0])


def test_weight_side_matches_blended_propensity(data):
    pi = None
    for blend in ("probability", "logit"):
        result = fit(data, "ate", blend=blend)
        table = blended_nuisances(result)
        P, alpha = result.crossfit.propensity[0], result.alpha.to_numpy()
        pi = P @ alpha if blend == "probability" else expit(logit(P) @ alpha)
        np.testing.assert_allclose(table["propensity"], pi)
        np.testing.assert_allclose(table["weight_mu1"], 1 / pi)
        np.testing.assert_allclose(table["weight_mu0"], 1 / (1 - pi))
    riesz = fit(data, "ate", blend="riesz")
    table = blended_nuisances(riesz)
    # The search's propensity columns (the learners', then the stacked propensity); the riesz
    # blend averages the inverse propensities themselves.
    P, alpha = riesz.analysis.inputs[0].pi, riesz.alpha.to_numpy()
    np.testing.assert_allclose(table["weight_mu1"], (1 / P) @ alpha)
    np.testing.assert_allclose(table["weight_mu0"], (1 / (1 - P)) @ alpha)
    assert table.attrs["propensity_scale"].startswith("probability-scale")
    assert "propensity_scale" not in table.columns and table["treatment"].dtype.kind == "i"


def test_outcome_missing_where_target_does_not_use_it(data):
    table = blended_nuisances(fit(data, "mean1"))
    assert table.loc[table.treatment == 0, "outcome"].isna().all()
    assert table.loc[table.treatment == 1, "outcome"].notna().all()


def test_repeated_splits_are_stacked(data):
    result = fit(data, "ate", repeats=2)
    table = blended_nuisances(result)
    assert len(table) == 2 * len(data) and set(table["repeat"]) == {0, 1}
    per_repeat = table.groupby("repeat")["contribution"].mean()
    # Two repetitions are combined by their median, the mean of the two.
    assert per_repeat.median() == pytest.approx(result.estimate, rel=1e-10)
    assert len(blended_nuisances(result, repeat=1)) == len(data)
    with pytest.raises(InputError, match="repeat must be between 0 and 1"):
        blended_nuisances(result, repeat=2)


@pytest.mark.parametrize("target", ["ate", "att", "mean0", "cov"])
@pytest.mark.parametrize("blend", ["riesz", "probability", "logit"])
def test_blended_models_refit_on_all_rows_match_in_sample_nuisances(data, target, blend):
    """With in-sample fitting (folds = 1) the cross-fitted nuisances are the full-data fits, so
    the refitted blended models must reproduce them exactly."""
    plib, olib = libraries()
    result = fit(data, target, blend=blend, folds=1)
    table = blended_nuisances(result)
    models = blended_models(result, propensity_learners=plib, outcome_learners=olib)
    X = result.data.X
    transforms = {c.outcome_head: c.weight_transform for c in result.target.components}
    for key, model in models.items():
        if key.startswith("propensity"):
            pi = model.predict_proba(X)[:, 1]
            for head, transform in transforms.items():
                if key in ("propensity", f"propensity_{head}"):
                    np.testing.assert_allclose(transform(pi), table[f"weight_{head}"], rtol=1e-9)
        else:
            np.testing.assert_allclose(model.predict(X), table[key], rtol=1e-9, atol=1e-9)
    if target == "ate" and blend == "riesz":
        # 1/pi and 1/(1 - pi) are blended separately, so there is one propensity per arm.
        assert models["propensity_mu1"].scale == "inverse"
        assert models["propensity_mu0"].scale == "inverse-complement"


def test_blended_models_continuous_treatment(data):
    frame = data.assign(a=data["x1"] + 0.3 * data["x2"] ** 2)
    reg = {"linear": make_learner("linear"), "constant": make_learner("constant-regressor")}
    _, olib = libraries()
    result = BlendEstimator("cov", reg, olib, folds=1, bootstrap=0).fit(frame, "a", "y")
    models = blended_models(result, propensity_learners=reg, outcome_learners=olib)
    assert isinstance(models["propensity"], BlendedRegressor)
    table = blended_nuisances(result)
    np.testing.assert_allclose(models["propensity"].predict(result.data.X), table["weight_m"])
    np.testing.assert_allclose(models["m"].predict(result.data.X), table["m"])


def test_blended_models_need_the_fitted_library(data):
    result = fit(data, "ate")
    with pytest.raises(InputError, match="propensity learner 'quadratic'"):
        blended_models(result)  # the default library has other names


def test_blended_classifier_against_hand_blend(rng):
    """Reference: each scale's blend computed by hand from separately fitted scikit-learn
    logistic regressions."""
    X = rng.normal(size=(400, 2))
    A = rng.binomial(1, expit(X[:, 0] - X[:, 1]))
    members = {
        "full": LogisticRegression(),
        "first": make_pipeline(StandardScaler(), LogisticRegression(C=0.1)),
    }
    weights = {"full": 0.3, "first": 0.7}
    p1 = np.clip(LogisticRegression().fit(X, A).predict_proba(X)[:, 1], 0.01, 0.99)
    second = make_pipeline(StandardScaler(), LogisticRegression(C=0.1)).fit(X, A)
    p2 = np.clip(second.predict_proba(X)[:, 1], 0.01, 0.99)
    expected = {
        "probability": 0.3 * p1 + 0.7 * p2,
        "logit": expit(0.3 * logit(p1) + 0.7 * logit(p2)),
        "inverse": 1 / (0.3 / p1 + 0.7 / p2),
        "inverse-complement": 1 - 1 / (0.3 / (1 - p1) + 0.7 / (1 - p2)),
        "odds": 1 / (1 + 1 / (0.3 * p1 / (1 - p1) + 0.7 * p2 / (1 - p2))),
    }
    for scale, want in expected.items():
        model = BlendedClassifier(members, weights, scale=scale).fit(X, A)
        proba = model.predict_proba(X)
        np.testing.assert_allclose(proba[:, 1], want, rtol=1e-10)
        np.testing.assert_allclose(proba.sum(axis=1), 1.0)
        np.testing.assert_array_equal(model.predict(X), (want >= 0.5).astype(int))


def test_blended_estimators_follow_the_scikit_learn_contract(rng):
    X = rng.normal(size=(200, 3))
    A = rng.binomial(1, expit(X[:, 0]))
    y = X @ np.array([1.0, -2.0, 0.5]) + rng.normal(size=200)
    clf = BlendedClassifier(
        {"lr": LogisticRegression(), "c": make_learner("constant-classifier")},
        {"lr": 0.8, "c": 0.2},
        scale="logit",
    )
    copy = clone(clf)
    assert copy is not clf and copy.get_params()["scale"] == "logit"
    assert copy.get_params()["weights"] == {"lr": 0.8, "c": 0.2}
    with pytest.raises(NotFittedError):
        copy.predict_proba(X)
    copy.set_params(scale="probability", clip=0.05)
    assert copy.fit(X, A) is copy and copy.scale == "probability"
    assert set(copy.estimators_) == {"lr", "c"}
    assert not hasattr(clf, "estimators_")  # the original is untouched
    assert copy.score(X, A) > 0.5  # ClassifierMixin accuracy through predict
    reg = BlendedRegressor(
        {"ols": LinearRegression(), "c": make_learner("constant-regressor")}, {"ols": 1.0}
    )
    scores = cross_val_score(reg, X, y, cv=3)  # clones, fits, predicts, scores
    assert np.all(scores > 0.8)
    fitted = clone(reg).fit(X, y)
    assert set(fitted.estimators_) == {"ols"}  # zero-weight members are not fitted
    np.testing.assert_allclose(fitted.predict(X), LinearRegression().fit(X, y).predict(X))


@pytest.mark.parametrize(
    "kwargs, fragment",
    [
        ({"weights": {"lr": 0.5}}, "weights must sum to 1"),
        ({"weights": {"lr": 1.2, "c": -0.2}}, "weight of 'c' must be >= 0"),
        ({"weights": {"other": 1.0}}, "unknown learner 'other'"),
        ({"scale": "probit"}, "unknown scale 'probit'"),
        ({"clip": 0.6}, "clip must be in"),
        ({"estimators": {}}, "non-empty dict"),
    ],
)
def test_blended_classifier_rejects_bad_settings(rng, kwargs, fragment):
    settings = {
        "estimators": {"lr": LogisticRegression(), "c": make_learner("constant-classifier")},
        "weights": {"lr": 1.0},
        **kwargs,
    }
    X = rng.normal(size=(50, 2))
    with pytest.raises(InputError, match=fragment):
        BlendedClassifier(**settings).fit(X, rng.binomial(1, 0.5, 50))
