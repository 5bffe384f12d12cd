"""The outcome side at the least-squares stacking weights (setting ``outcome_side``).

With ``outcome_side="stacking"`` (the default) the outcome weights are the NNLS stacking weights
and the search chooses the propensity side only. Checked here against the unrestricted search
(the mixed-minimax criterion separates, so its propensity weights must not change), against a
brute-force lattice (minimax at fixed outcome weights), and through the estimator and its
reweighting bootstrap (every replicate's headline outcome weights are that replicate's stacking
weights, whatever the rest of the search does).
"""

import warnings

import numpy as np
import pytest
from sklearn.dummy import DummyClassifier, DummyRegressor
from sklearn.linear_model import LinearRegression, LogisticRegression

from stackdr import BlendEstimator
from stackdr.core import swap_deviations
from stackdr.search import MAIN, PLS, PURE, UNTESTED, search_weights, simplex_lattice
from tests.helpers import confounded_data

RNG = np.random.default_rng(8)
TABLES = [RNG.normal(size=(3, 4)) for _ in range(4)] + [RNG.normal(size=(5, 3)) for _ in range(3)]


def _fixed(K2, seed):
    w = np.random.default_rng(seed).dirichlet(np.ones(K2))
    return w


@pytest.mark.parametrize("Psi", TABLES)
@pytest.mark.parametrize("tolerance", [None, {"propensity": 0.05, "outcome": 0.05}])
def test_mixed_keeps_the_searched_propensity_weights(Psi, tolerance):
    K1, K2 = Psi.shape
    anchors = (np.full(K1, 1 / K1), _fixed(K2, 1))
    full = search_weights(Psi, tolerance=tolerance, anchors=anchors)
    beta0 = _fixed(K2, 2)
    fixed = search_weights(Psi, tolerance=tolerance, anchors=anchors, outcome_weights=beta0)
    np.testing.assert_array_equal(fixed.alpha, full.alpha)
    np.testing.assert_allclose(fixed.beta, beta0, atol=1e-15)
    assert fixed.records["beta"].method == "fixed"
    assert "beta_tie_break" not in fixed.records
    # The sensitivities and the estimate are those of the weights returned.
    assert fixed.s_ps == pytest.approx(np.ptp(Psi @ beta0), abs=1e-12)
    assert fixed.s_out == pytest.approx(full.s_out, abs=1e-12)
    assert fixed.estimate == pytest.approx(fixed.alpha @ Psi @ beta0, abs=1e-12)
    assert fixed.risk == pytest.approx(fixed.s_out**2 + fixed.s_ps**2, rel=1e-12)


@pytest.mark.parametrize("Psi", TABLES[:4])
def test_minimax_at_fixed_outcome_weights_matches_a_fine_lattice(Psi):
    K1, K2 = Psi.shape
    beta0 = _fixed(K2, 3)
    found = search_weights(Psi, criterion="minimax", outcome_weights=beta0)

    def root(A):
        phis = A @ Psi
        psi = phis @ beta0
        B = np.broadcast_to(beta0, (A.shape[0], K2))
        return swap_deviations(phis, B @ Psi.T, psi, None, None).max(axis=1)

    grid = simplex_lattice(K1, 60)
    best = root(grid).min()
    np.testing.assert_allclose(found.beta, beta0, atol=1e-15)
    assert root(found.alpha[None])[0] <= best + 1e-6
    assert found.risk == pytest.approx(root(found.alpha[None])[0] ** 2, rel=1e-9)


PROPENSITY = {
    "logit": LogisticRegression(),
    "flat": DummyClassifier(strategy="prior"),
    "sharp": LogisticRegression(C=100.0),
}
OUTCOME = {"ols": LinearRegression(), "mean": DummyRegressor()}


def fit(**settings):
    X, A, Y, _ = confounded_data(np.random.default_rng(31), 600)
    params = {"bootstrap": 0, "seed": 4, **settings}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return BlendEstimator("ate", PROPENSITY, OUTCOME, **params).fit(X, A, Y)


def row(result, name):
    return next(r for r in result.estimators if r.name == name)


def test_default_outcome_weights_are_the_stacking_weights():
    res = fit()
    stacking = row(res, PLS).beta
    # (equal up to the search's renormalisation onto the simplex, an ulp)
    for name in (MAIN, UNTESTED, PURE):
        np.testing.assert_allclose(row(res, name).beta, stacking, rtol=0, atol=1e-14)
    np.testing.assert_allclose(res.beta.to_numpy(), stacking, rtol=0, atol=1e-14)
    # The propensity side is the unrestricted search's (without the tie-break, which here moves
    # the searched outcome weights onto the stacking weights anyway).
    one = fit(tie_break=False)
    both = fit(tie_break=False, outcome_side="search")
    np.testing.assert_array_equal(row(one, UNTESTED).alpha, row(both, UNTESTED).alpha)
    assert not np.allclose(row(both, UNTESTED).beta, stacking)


def test_bootstrap_replicates_use_their_own_stacking_weights():
    # Each replicate's headline outcome weights are its own NNLS weights, so they cannot depend
    # on the tie-break or on the contrast test (which only ever choose between propensity
    # weights), and they move from replicate to replicate.
    runs = [
        fit(bootstrap=40, **settings) for settings in ({}, {"tie_break": False}, {"contrast_z": 0})
    ]
    betas = [r.bootstrap.beta.to_numpy() for r in runs]
    for other in betas[1:]:
        np.testing.assert_allclose(other, betas[0], rtol=0, atol=1e-14)
    assert np.ptp(betas[0][:, 0]) > 0
    searched = fit(bootstrap=40, outcome_side="search", contrast_z=0, tie_break=False)
    assert np.abs(searched.bootstrap.beta.to_numpy() - betas[0]).max() > 1e-3


def test_default_weighting_note_only_at_the_default_weighting():
    from stackdr.estimation._results import DEFAULT_WEIGHTING

    assert DEFAULT_WEIGHTING in fit().notes
    assert DEFAULT_WEIGHTING not in fit(outcome_side="search").notes
    assert DEFAULT_WEIGHTING not in fit(contrast_z=2.0).notes
