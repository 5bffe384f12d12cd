"""BlendResult as a record: diagnostics computed by the result, a one-line repr, and a summary
table object with text, HTML and DataFrame forms."""

import numpy as np
import pandas as pd
import pytest
from scipy.special import expit, logit
from sklearn.dummy import DummyClassifier, DummyRegressor
from sklearn.linear_model import LinearRegression, LogisticRegression, Ridge

from stackdr import BlendEstimator
from stackdr.estimation import (
    OVERLAP_EDGES,
    Diagnostics,
    ResultSummary,
    blended_propensity,
    effective_sample_size,
)
from tests.helpers import confounded_data

MARKUP = "<b>flat</b>"


def fit(blend: str = "riesz", target: str = "ate", seed: int = 4):
    rng = np.random.default_rng(seed)
    X, A, Y, _ = confounded_data(rng, 300)
    propensity = {"logistic": LogisticRegression(), MARKUP: DummyClassifier(strategy="prior")}
    outcome = {"linear": LinearRegression(), "mean": DummyRegressor()}
    estimator = BlendEstimator(
        target, propensity, outcome, folds=3, bootstrap=0, seed=seed, blend=blend, n_jobs=1
    )
    return estimator.fit(X, A, Y)


@pytest.fixture(scope="module")
def result():
    return fit()


def test_diagnostics_from_the_ingredients(result):
    diag = result.diagnostics
    assert isinstance(diag, Diagnostics)
    A = result.data.A
    # The search's propensity columns: the learners' and the stacked propensity.
    probs, alpha = result.analysis.inputs[0].pi, result.alpha.to_numpy()
    pi = probs @ alpha
    np.testing.assert_array_equal(diag.blended_propensity, pi)
    # Riesz blend of the ATE weight side (DESIGN sections 1 and 3): treated rows weigh
    # sum_k alpha_k / pi_k, controls sum_k alpha_k / (1 - pi_k).
    expected = np.where(A == 1, (1 / probs) @ alpha, (1 / (1 - probs)) @ alpha)
    np.testing.assert_allclose(diag.weight_values, expected, rtol=1e-12)
    for arm, rows in (("treated", A == 1), ("control", A == 0)):
        assert diag.arm_sizes[arm] == rows.sum()
        assert diag.propensity_range[arm] == (pi[rows].min(), pi[rows].max())
        assert diag.effective_sample_size[arm] == effective_sample_size(expected[rows])
        counts = diag.overlap_histogram.counts[arm]
        np.testing.assert_array_equal(counts, np.histogram(pi[rows], bins=OVERLAP_EDGES)[0])
    np.testing.assert_array_equal(diag.overlap_histogram.edges, OVERLAP_EDGES)
    lows, highs = result.crossfit.clip_counts.sum(axis=0).T
    assert diag.clipped == {
        name: (lo, hi) for name, lo, hi in zip(result.crossfit.propensity_names, lows, highs)
    }
    assert diag.clip == result.crossfit.clip
    # The record's repr leaves out the per-row arrays.
    assert len(repr(diag)) < 1000


def test_logit_blend_averages_logits():
    result = fit(blend="logit")
    probs, alpha = result.crossfit.propensity[0], result.alpha.to_numpy()
    np.testing.assert_allclose(
        result.diagnostics.blended_propensity, expit(logit(probs) @ alpha), rtol=1e-12
    )
    assert blended_propensity(np.array([[0.5, 0.5]]), np.array([0.3, 0.7]), "logit")[0] == 0.5


def test_continuous_treatment_has_no_arms():
    rng = np.random.default_rng(2)
    X, _, Y, _ = confounded_data(rng, 200)
    dose = X[:, 0] + rng.normal(size=200)
    library = {"linear": LinearRegression(), "ridge": Ridge(alpha=10.0)}
    result = BlendEstimator("cov", library, library, folds=3, bootstrap=0).fit(X, dose, Y)
    diag = result.diagnostics
    assert diag.blended_propensity is None and diag.arm_sizes is None
    assert diag.effective_sample_size is None and diag.overlap_histogram is None
    assert set(diag.clipped) == {"linear", "ridge"}


def test_repr_is_one_short_line(result):
    text = repr(result)
    assert "\n" not in text and len(text) < 200
    low, high = result.interval
    for part in (
        "ate",
        f"{result.estimate:.4g}",
        f"{result.se:.3g}",
        f"[{low:.4g}, {high:.4g}]",
        "n = 300",
        "learners 2 propensity + 2 outcome",
    ):
        assert part in text


def test_summary_is_a_table_object(result, capsys):
    summary = result.summary()
    assert isinstance(summary, ResultSummary)
    assert capsys.readouterr().out == ""
    text = summary.as_text()
    assert str(summary) == repr(summary) == text == str(result)
    assert text.splitlines()[0] == f"stackdr: {result.target.description}"
    assert "Caution: A causal reading needs consistency" in text
    pd.testing.assert_frame_equal(summary.as_frame(), result.comparison())
    print(summary)
    assert capsys.readouterr().out == text + "\n"


def test_summary_html_escapes_user_text(result):
    page = result.summary().as_html()
    assert page == result._repr_html_()
    assert MARKUP not in page and "&lt;b&gt;flat&lt;/b&gt;" in page
    assert "<table" in page and "<script" not in page
    assert "Caution: A causal reading needs consistency" in page
