"""Reweighting and refit bootstrap: agreement with scipy's bootstrap on a plain mean, invariance to
chunking and workers, weights on the simplex in every replicate."""

from dataclasses import replace
from types import SimpleNamespace

import numpy as np
import pytest
from scipy import stats
from sklearn.base import clone
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


def _expansion_case(small_fit, seed: int) -> SimpleNamespace:
    """For the expansion tests: the small fit's learners' inputs, one multinomial draw of row
    weights ``w``, the weighted sums ``w' F`` of the replicate features, and propensity weights
    moved from the stacking weights by 0.04 and 0.02 in one random direction (a second-order
    error shrinks about 4x from the first to the second)."""
    from stackdr.inference._reweighting import _Layout, replicate_features

    _, res = small_fit
    an = res.analysis
    inp = an.base_inputs[0]
    K1, K2 = an.base_learners, an.Psi.shape[1]
    F = replicate_features(inp, res.crossfit, res.data, 0, an.stack_alpha)
    rng = np.random.default_rng(seed)
    w = np.bincount(rng.integers(0, inp.n, inp.n), minlength=inp.n).astype(float)
    direction = rng.normal(size=K1)
    direction -= direction.mean()
    moved = []
    for size in (0.04, 0.02):
        alpha = np.clip(an.stack_alpha + size * direction / np.abs(direction).max(), 0, None)
        moved.append(alpha / alpha.sum())
    return SimpleNamespace(
        res=res,
        inp=inp,
        shape=(K1, K2),
        slices=_Layout(K1, K2, True).slices(),
        w=w,
        sums=(w @ F)[None],
        moved=moved,
        rng=rng,
    )


def test_prediction_loss_expansion_matches_exact_weighted_estimate(small_fit):
    # The replicate estimate of prediction-loss stacking uses a first-order expansion in the
    # propensity weights; its error must be second order: far below the estimate's SE for
    # bootstrap-sized weight changes, and shrinking ~4x when the change halves.
    from stackdr.core import phi
    from stackdr.inference._reweighting import _pls_estimates

    case = _expansion_case(small_fit, 0)
    a0 = case.res.analysis.stack_alpha
    beta = case.rng.dirichlet(np.ones(case.shape[1]))
    errors = []
    for alpha in case.moved:
        exact = phi(case.inp, alpha[None], "probability", case.w)[0] @ beta
        approx = _pls_estimates(case.sums, case.slices, *case.shape, alpha[None], beta[None], a0)[0]
        errors.append(abs(approx - exact))
    assert errors[0] < 0.05 * case.res.se
    assert errors[1] < errors[0] / 2.5 or errors[0] < 1e-10


def test_stacked_column_of_a_replicate_matches_exact_recomputation(small_fit):
    # A replicate's row of the stacked propensity in the pair table is the first-order expansion
    # of psi(pi @ a, e_j) in the stacking weights a around the full-sample weights a0
    # (_stacked_rows, from the prediction-loss stacking terms). Reference: the exact value,
    # which recomputes the column pi @ a over every row and the weighted pair table. The error
    # is second order: none at a = a0, far below the SE for bootstrap-sized changes of a, and
    # about 4x smaller when the change halves.
    from stackdr.core import pair_table, with_stacked_propensity
    from stackdr.inference._reweighting import _stacked_rows

    case = _expansion_case(small_fit, 3)
    assert case.res.analysis.stacked
    a0 = case.res.analysis.stack_alpha

    def exact(alpha):
        return pair_table(with_stacked_propensity(case.inp, alpha), case.w)[-1]

    def approx(alpha):
        return _stacked_rows(case.sums, case.slices, *case.shape, alpha[None], a0)[0]

    np.testing.assert_allclose(approx(a0), exact(a0), rtol=1e-12)
    errors = [np.abs(approx(alpha) - exact(alpha)).max() for alpha in case.moved]
    assert errors[0] < 0.05 * case.res.se
    assert errors[1] < errors[0] / 2.5 or errors[0] < 1e-10


def test_bootstrap_with_the_stacked_column(small_fit):
    # Every replicate searches over the learners and the stacked propensity; the weights sum to
    # one over those columns, and the rows over the learners match a fit without the column.
    est, res = small_fit
    settings = replace(est.inference_settings(), replicates=40)
    boot = reweighting_bootstrap(settings, res)
    assert list(boot.alpha.columns) == res.propensity_names
    np.testing.assert_allclose(boot.alpha.sum(axis=1), 1.0)
    plain = clone(est).set_params(stacked_propensity=False)
    other = plain.fit(res.data.X, res.data.A, res.data.Y)
    again = reweighting_bootstrap(replace(plain.inference_settings(), replicates=40), other)
    for name in ("prediction-loss stacking", "best-predicting pair", "smoothed pair average"):
        np.testing.assert_array_equal(boot.estimates[name], again.estimates[name])
