"""Input validation and cross-fitting behaviour: clear errors that name what is wrong."""

import warnings

import numpy as np
import pandas as pd
import pytest
from sklearn.base import BaseEstimator, ClassifierMixin
from sklearn.dummy import DummyClassifier, DummyRegressor
from sklearn.linear_model import LinearRegression, LogisticRegression

from stackdr.core import get_target
from stackdr.errors import InputError, LearnerError
from stackdr.estimation import BlendEstimator, cross_fit, make_folds, prepare_data
from tests.helpers import confounded_data


@pytest.fixture
def frame(rng):
    X, A, Y, _ = confounded_data(rng, 200)
    return pd.DataFrame({"t": A, "y": Y, "age": X[:, 0], "bmi": X[:, 1], "dose": X[:, 2]})


ATE = get_target("ate")


def test_dataframe_defaults_to_all_other_columns(frame):
    d = prepare_data(frame, "t", "y", target=ATE)
    assert d.covariate_names == ["age", "bmi", "dose"]
    assert d.X.shape == (200, 3)


@pytest.mark.parametrize(
    "mutate, message",
    [
        (lambda f: f.assign(age=f.age.where(f.index % 7 != 0)), "'age' (29)"),
        (lambda f: f.assign(y=f.y.where(f.index != 3)), "1 missing values"),
        (lambda f: f.assign(t=f.t.where(f.index != 3)), "treatment column 't' has 1 missing"),
        (lambda f: f.assign(t=f.t * 2), "values found: 0, 2"),
        (lambda f: f.assign(t=1.0), "single level (1)"),
        (lambda f: f.assign(bmi=np.inf), "infinite values in columns: bmi"),
        (lambda f: f.assign(y=np.where(f.index == 0, np.inf, f.y)), "infinite"),
        (lambda f: f.assign(t=np.where(f.t == 1, "yes", "no")), "values found: 'no', 'yes'"),
    ],
)
def test_bad_frames_name_the_problem(frame, mutate, message):
    with pytest.raises(InputError, match=message.replace("(", r"\(").replace(")", r"\)")):
        prepare_data(mutate(frame), "t", "y", target=ATE)


def test_unknown_and_duplicated_columns(frame):
    with pytest.raises(InputError, match="outcome column 'yy' not found"):
        prepare_data(frame, "t", "yy", target=ATE)
    with pytest.raises(InputError, match="covariate columns not found: 'weight'"):
        prepare_data(frame, "t", "y", ["age", "weight"], target=ATE)
    dup = pd.concat([frame, frame[["age"]]], axis=1)
    with pytest.raises(InputError, match="duplicated column names: 'age'"):
        prepare_data(dup, "t", "y", target=ATE)


def test_small_arm_and_length_mismatch(rng):
    X = rng.normal(size=(50, 2))
    A = np.zeros(50)
    A[:3] = 1
    with pytest.raises(InputError, match="has 3 rows, fewer than the 5 needed for 5 folds"):
        prepare_data(X, A, rng.normal(size=50), target=ATE, folds=5)
    with pytest.raises(InputError, match="length mismatch: outcome has 49 rows"):
        prepare_data(X, np.r_[np.zeros(25), np.ones(25)], rng.normal(size=49), target=ATE)
    with pytest.raises(InputError, match="zero rows"):
        prepare_data(np.zeros((0, 2)), np.zeros(0), np.zeros(0), target=ATE)


def test_categorical_covariates_are_one_hot_encoded(frame):
    frame = frame.assign(region=np.where(frame.index % 3 == 0, "north", "south"))
    d = prepare_data(frame, "t", "y", target=ATE)
    assert "region_south" in d.covariate_names
    assert any("region" in note for note in d.notes)


def test_missing_outcome_allowed_outside_target_arm(frame):
    # The mean of an outcome missing at random: rows with t = 0 have no outcome.
    frame = frame.assign(y=frame.y.where(frame.t == 1))
    d = prepare_data(frame, "t", "y", target=get_target("mean1"))
    assert np.isfinite(d.Y).all()
    with pytest.raises(InputError, match="missing values"):
        prepare_data(frame, "t", "y", target=ATE)


def test_continuous_treatment_for_covariance_target(rng):
    X = rng.normal(size=(300, 2))
    A = X[:, 0] + rng.normal(size=300)
    Y = 0.5 * A + X[:, 1] + rng.normal(size=300)
    t = get_target("cov")
    d = prepare_data(X, A, Y, target=t)
    cf = cross_fit(d, t, {"ols": LinearRegression()}, {"ols": LinearRegression()})
    assert cf.propensity_kind == "regressor"


def test_folds_are_stratified_and_seeded(rng):
    A = (rng.random(103) < 0.3).astype(float)
    f1 = make_folds(A, 5, seed=1)
    f2 = make_folds(A, 5, seed=1)
    np.testing.assert_array_equal(f1, f2)
    shares = [A[f1[0] == s].mean() for s in range(5)]
    assert max(shares) - min(shares) < 0.1
    assert make_folds(A, 5, seed=1, repeats=3).shape == (3, 103)
    with pytest.raises(InputError, match="single fold"):
        make_folds(A, np.zeros(103))


class Broken(ClassifierMixin, BaseEstimator):
    def fit(self, X, y):
        raise RuntimeError("singular matrix")

    def predict_proba(self, X):
        return None


class NaNProba(ClassifierMixin, BaseEstimator):
    def fit(self, X, y):
        self.classes_ = np.array([0, 1])
        return self

    def predict_proba(self, X):
        return np.full((X.shape[0], 2), np.nan)


def test_failing_learners_dropped_by_name(frame):
    d = prepare_data(frame, "t", "y", target=ATE)
    plib = {"ok": LogisticRegression(), "broken": Broken(), "nan": NaNProba()}
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        cf = cross_fit(d, ATE, plib, {"ols": LinearRegression()})
    text = " ".join(str(w.message) for w in caught)
    assert "'broken' failed" in text and "singular matrix" in text
    assert "'nan' failed" in text and "non-finite" in text
    assert cf.propensity_names == ["ok"]
    with pytest.raises(LearnerError, match="'broken'"):
        cross_fit(d, ATE, plib, {"ols": LinearRegression()}, on_error="raise")
    with (
        pytest.raises(LearnerError, match="propensity library is empty"),
        warnings.catch_warnings(),
    ):
        warnings.simplefilter("ignore")
        cross_fit(d, ATE, {"broken": Broken()}, {"ols": LinearRegression()})


def test_clipping_counts_and_learners_not_mutated(frame):
    d = prepare_data(frame, "t", "y", target=ATE)
    sharp = LogisticRegression(C=1e6, max_iter=5000)
    frame_sep = d.X.copy()
    frame_sep[:, 0] = d.A * 10 - 5
    d2 = prepare_data(frame_sep, d.A, d.Y, target=ATE)
    cf = cross_fit(d2, ATE, {"sharp": sharp}, {"ols": LinearRegression()}, clip=0.05)
    assert cf.clip_counts.sum() > 0
    assert cf.propensity.min() >= 0.05 and cf.propensity.max() <= 0.95
    assert not hasattr(sharp, "coef_")


def test_pooled_and_separate_outcome_modes(frame):
    d = prepare_data(frame, "t", "y", target=ATE)
    plib = {"c": DummyClassifier(strategy="prior")}
    sep = cross_fit(d, ATE, plib, {"m": DummyRegressor()}, outcome_mode="separate", folds=1)
    pooled = cross_fit(d, ATE, plib, {"m": DummyRegressor()}, outcome_mode="pooled", folds=1)
    np.testing.assert_allclose(sep.outcome["mu1"][0, :, 0], d.Y[d.A == 1].mean())
    np.testing.assert_allclose(pooled.outcome["mu1"][0, :, 0], d.Y.mean())


class _ThreadRecorder(LinearRegression):
    """Records the native thread limits in force while it is fitted."""

    seen: list = []

    def fit(self, X, y):
        from threadpoolctl import threadpool_info

        pools = {pool["user_api"]: pool["num_threads"] for pool in threadpool_info()}
        type(self).seen.append(pools)
        return super().fit(X, y)


@pytest.mark.parametrize("threads", [1, 2])
def test_every_fit_runs_under_the_thread_budget(threads):
    X, A, Y, _ = confounded_data(np.random.default_rng(3), 200)
    _ThreadRecorder.seen = []
    BlendEstimator(
        "ate",
        {"logit": LogisticRegression()},
        {"rec": _ThreadRecorder()},
        bootstrap=0,
        threads=threads,
    ).fit(X, A, Y)
    assert _ThreadRecorder.seen, "the recorder was not fitted"
    expected = threads
    for pools in _ThreadRecorder.seen:
        assert all(n <= expected for n in pools.values()), pools


def test_dispatch_order_is_longest_first_and_changes_no_number(monkeypatch):
    from sklearn.ensemble import RandomForestRegressor

    from stackdr.estimation import _crossfit

    forest = RandomForestRegressor(n_estimators=5, random_state=0)
    assert _crossfit.expected_cost(forest, 100) > _crossfit.expected_cost(LinearRegression(), 100)
    X, A, Y, _ = confounded_data(np.random.default_rng(4), 200)
    estimator = BlendEstimator(
        "ate",
        {"logit": LogisticRegression()},
        {"ols": LinearRegression(), "forest": forest},
        bootstrap=0,
        seed=1,
    )
    sorted_run = estimator.fit(X, A, Y)
    monkeypatch.setattr(_crossfit, "expected_cost", lambda estimator, rows: 0.0)
    natural_run = estimator.fit(X, A, Y)
    assert sorted_run.estimate == natural_run.estimate
    np.testing.assert_array_equal(
        sorted_run.crossfit.outcome["mu1"], natural_run.crossfit.outcome["mu1"]
    )


def test_copies_of_a_resampled_row_share_a_cross_fitting_fold():
    """In a refit-bootstrap resample a row drawn twice must not be predicted by a model fitted
    on its own copy (common practice for cross-fitting on bootstrap samples: copies are kept in
    one fold, as clusters are); with clusters, the copies of a cluster share a fold."""
    import warnings as _warnings

    from sklearn.linear_model import LinearRegression, LogisticRegression

    from stackdr.core import get_target
    from stackdr.estimation import cross_fit, prepare_data

    rng = np.random.default_rng(11)
    n = 300
    frame = pd.DataFrame(
        {"x": rng.normal(size=n), "a": rng.integers(0, 2, n), "y": rng.normal(size=n)}
    )
    frame["g"] = np.arange(n) // 3
    target = get_target("ate")
    for clusters in (None, "g"):
        prepared = prepare_data(frame, "a", "y", ["x"], target=target, clusters=clusters)
        rows = np.random.default_rng(3).integers(0, n, n)
        resample = prepared.take(rows)
        original = rows if clusters is None else frame["g"].to_numpy()[rows]
        with _warnings.catch_warnings():
            _warnings.simplefilter("ignore")
            cf = cross_fit(
                resample,
                target,
                {"logistic": LogisticRegression()},
                {"linear": LinearRegression()},
                folds=5,
                seed=1,
            )
        labels = cf.fold_labels[0]
        for value in np.unique(original):
            assert np.unique(labels[original == value]).size == 1
        assert np.unique(labels).size == 5
