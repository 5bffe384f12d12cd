"""Reweighting and refit bootstrap: agreement with scipy's bootstrap on a plain mean, invariance to
chunking and workers, weights on the simplex in every replicate."""

from dataclasses import replace

import numpy as np
import pytest
from scipy import stats
from sklearn.dummy import DummyClassifier, DummyRegressor
from sklearn.linear_model import LinearRegression, LogisticRegression

from stackdr import BlendEstimator, Component, Target
from stackdr.inference import reweighting_bootstrap
from tests.helpers import confounded_data

PLAIN_MEAN = Target(
    name="plain-mean",
    description="mean of Y (every nuisance term vanishes)",
    components=(
        Component(
            outcome_head="m",
            weight_transform=lambda pi: pi,
            h1=lambda A, Y: np.zeros_like(Y),
            h2=lambda A, Y: np.zeros_like(Y),
            h3=lambda A, Y: np.zeros_like(Y),
        ),
    ),
    h4=lambda A, Y: Y,
    binary_treatment=False,
)


@pytest.mark.slow
def test_plain_mean_matches_scipy_bootstrap():
    # Reference: scipy.stats.bootstrap(method="percentile") on the same data. Both are Monte
    # Carlo approximations of the same bootstrap distribution of the mean; with B = 5000 the SE
    # of an estimated 2.5% quantile is about sqrt(.025 * .975 / B) / phi(1.96) ~ 0.038 bootstrap
    # SDs, so two independent runs differ by about 0.054 SDs; we allow 4 x that (0.22 SDs).
    rng = np.random.default_rng(12)
    n = 400
    Y = rng.gamma(2.0, 3.0, n)
    A = rng.normal(size=n)
    X = rng.normal(size=(n, 2))
    est = BlendEstimator(
        PLAIN_MEAN,
        {"const": DummyRegressor()},
        {"const": DummyRegressor()},
        folds=1,
        bootstrap=5000,
        seed=3,
    )
    res = est.fit(X, A, Y)
    assert res.estimate == pytest.approx(Y.mean(), rel=1e-12)
    ref = stats.bootstrap(
        (Y,),
        np.mean,
        n_resamples=5000,
        method="percentile",
        confidence_level=0.95,
        random_state=np.random.default_rng(4),
    )
    sd = ref.standard_error
    low, high = res.interval
    assert res.interval_method == "percentile"
    assert abs(low - ref.confidence_interval.low) < 0.22 * sd
    assert abs(high - ref.confidence_interval.high) < 0.22 * sd
    assert res.bootstrap.standard_errors["target-aimed stacking"] == pytest.approx(sd, rel=0.08)


def test_bootstrap_zero_disables(small_fit):
    _, res = small_fit
    assert res.bootstrap is None and res.interval_method == "wald"
    assert res.interval == pytest.approx(res.wald_interval)


def test_invariant_to_chunk_size_and_workers(small_fit):
    est, res = small_fit
    settings = est.inference_settings()
    a = reweighting_bootstrap(replace(settings, replicates=60, chunk_size=60, n_jobs=1), res)
    b = reweighting_bootstrap(replace(settings, replicates=60, chunk_size=7, n_jobs=2), res)
    np.testing.assert_allclose(
        a.estimates.to_numpy(), b.estimates.to_numpy(), rtol=1e-9, atol=1e-12
    )
    for name in a.intervals:
        np.testing.assert_allclose(a.intervals[name], b.intervals[name], rtol=1e-9)
    np.testing.assert_allclose(a.alpha.to_numpy(), b.alpha.to_numpy(), atol=1e-9)


def test_replicate_weights_on_simplex_and_stability(small_fit):
    est, res = small_fit
    settings = replace(est.inference_settings(), replicates=80, kind="bayesian", interval="basic")
    boot = reweighting_bootstrap(settings, res)
    for w in (boot.alpha.to_numpy(), boot.beta.to_numpy()):
        assert (w >= -1e-12).all()
        np.testing.assert_allclose(w.sum(axis=1), 1.0, atol=1e-9)
    assert set(boot.selection_frequency["side"]) == {"propensity", "outcome"}
    assert boot.selection_frequency["share_weighted"].between(0, 1).all()
    low, high = boot.intervals["target-aimed stacking"]
    assert low < res.estimate < high
    assert boot.kind == "bayesian" and boot.method == "basic"


def test_refit_bootstrap_runs():
    X, A, Y, _ = confounded_data(np.random.default_rng(30), 300)
    est = BlendEstimator(
        "ate",
        {"logit": LogisticRegression(), "flat": DummyClassifier(strategy="prior")},
        {"ols": LinearRegression(), "mean": DummyRegressor()},
        folds=3,
        bootstrap=8,
        bootstrap_kind="refit",
        seed=2,
    )
    res = est.fit(X, A, Y)
    assert res.bootstrap.kind == "refit" and res.bootstrap.replicates == 8
    assert np.isfinite(res.bootstrap.estimates.to_numpy()).all()
    assert res.interval_method == "percentile"


def test_prediction_loss_expansion_matches_exact_weighted_estimate(small_fit):
    # The replicate estimate of prediction-loss stacking uses a first-order expansion in the
    # propensity weights; its error must be second order: far below the estimate's SE for
    # bootstrap-sized weight changes, and shrinking ~4x when the change halves.
    from stackdr.core import phi
    from stackdr.inference._reweighting import _Layout, _pls_estimates, replicate_features

    _, res = small_fit
    an, cf = res.analysis, res.crossfit
    inp = an.inputs[0]
    K1, K2 = an.Psi.shape
    F = replicate_features(inp, cf, res.data, 0, an.stack_alpha)
    sl = _Layout(K1, K2, True).slices()
    rng = np.random.default_rng(0)
    w = np.bincount(rng.integers(0, inp.n, inp.n), minlength=inp.n).astype(float)
    beta = rng.dirichlet(np.ones(K2))
    direction = rng.normal(size=K1)
    direction -= direction.mean()
    errors = []
    for size in (0.04, 0.02):
        alpha = an.stack_alpha + size * direction / np.abs(direction).max()
        alpha = np.clip(alpha, 0, None)
        alpha /= alpha.sum()
        exact = phi(inp, alpha[None], "probability", w)[0] @ beta
        approx = _pls_estimates((w @ F)[None], sl, K1, K2, alpha[None], beta[None], an.stack_alpha)[
            0
        ]
        errors.append(abs(approx - exact))
    assert errors[0] < 0.05 * res.se
    assert errors[1] < errors[0] / 2.5 or errors[0] < 1e-10
