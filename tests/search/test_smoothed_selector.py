"""The smoothed pair average (comparison row ``SMOOTHED``) against its formula computed by hand.

Reference [construction]: pair weights w_kj proportional to exp(-tau R_mix(k, j) / scale) with
R_mix(k, j) = (range of row k)^2 + (range of column j)^2, tau = 1 and
scale = max(min_kj R_mix, 0.01 x median squared pair SE); estimate sum_kj w_kj Psi[k, j]
(search/_selection.py, smoothed_pair_weights).
"""

import numpy as np
import pytest
from sklearn.dummy import DummyClassifier, DummyRegressor
from sklearn.linear_model import LinearRegression, LogisticRegression

from stackdr import BlendEstimator
from stackdr.core import estimate_from_rows, pair_rows, pair_table
from stackdr.inference import draw_row_weights, replicate_generators
from stackdr.search import SMOOTHED, smoothed_pair_weights
from tests.helpers import confounded_data

PSI = np.array([[1.0, 1.4, 0.8], [2.0, 1.0, 1.5]])
SE = np.array([[0.3, 0.2, 0.4], [0.5, 0.3, 0.2]])


def by_hand(Psi, se, out_mask=None, prop_mask=None):
    K1, K2 = Psi.shape
    cols = range(K2) if out_mask is None else np.flatnonzero(out_mask)
    rows = range(K1) if prop_mask is None else np.flatnonzero(prop_mask)
    R = np.empty((K1, K2))
    for k in range(K1):
        for j in range(K2):
            row = [Psi[k, c] for c in cols]
            column = [Psi[r, j] for r in rows]
            R[k, j] = (max(row) - min(row)) ** 2 + (max(column) - min(column)) ** 2
    scale = max(R.min(), 0.01 * np.median(se**2))
    W = np.exp(-R / scale)
    return W / W.sum(), scale


def test_weights_and_estimate_match_the_formula():
    # Rows: ranges 0.6 and 1.0; columns: ranges 1.0, 0.4, 0.7. min R = 0.36 + 0.16 = 0.52.
    W, scale = by_hand(PSI, SE)
    u, v, got_scale = smoothed_pair_weights(PSI, SE, (None, None))
    assert got_scale == pytest.approx(0.52) and scale == pytest.approx(0.52)
    np.testing.assert_allclose(np.outer(u, v), W, rtol=1e-14)
    assert u @ PSI @ v == pytest.approx(np.sum(W * PSI), rel=1e-14)


def test_floor_and_masks():
    # A zero-range pair makes min R zero: the floor 0.01 x median SE^2 sets the scale.
    Psi = np.array([[1.0, 1.0], [1.0, 3.0]])
    se = np.full((2, 2), 0.5)
    u, v, scale = smoothed_pair_weights(Psi, se, (None, None))
    W, hand_scale = by_hand(Psi, se)
    assert scale == hand_scale == pytest.approx(0.0025)
    np.testing.assert_allclose(np.outer(u, v), W, rtol=1e-12, atol=1e-300)
    # Direction masks restrict the ranges exactly as in the discrete selectors.
    masks = (np.array([True, False]), np.array([True, False, True]))
    u, v, _ = smoothed_pair_weights(PSI, SE, masks)
    W, _ = by_hand(PSI, SE, out_mask=masks[1], prop_mask=masks[0])
    np.testing.assert_allclose(np.outer(u, v), W, rtol=1e-14)
    # Every SE zero and a zero-range pair: the weight goes to the minimisers.
    u, v, scale = smoothed_pair_weights(Psi, np.zeros((2, 2)), (None, None))
    assert scale == 0.0 and u.tolist() == [1.0, 0.0] and v.tolist() == [1.0, 0.0]


def test_row_of_a_fit_is_the_pair_average_with_its_rows_se():
    # The comparison row: estimate sum w_kj Psi[k, j] over the learners' pairs, Wald SE from
    # the row contributions sum_kj w_kj H_kj of the averaged pairs.
    X, A, Y, _ = confounded_data(np.random.default_rng(41), 400)
    prop = {"logit": LogisticRegression(), "flat": DummyClassifier(strategy="prior")}
    outc = {"ols": LinearRegression(), "mean": DummyRegressor()}
    result = BlendEstimator("ate", prop, outc, bootstrap=30, seed=2).fit(X, A, Y)
    an = result.analysis
    K1 = an.base_learners
    W, _ = by_hand(an.Psi[:K1], an.pair_se[:K1])
    row = next(r for r in result.estimators if r.name == SMOOTHED)
    assert row.kind == "pair average"
    assert row.estimate == pytest.approx(np.sum(W * an.Psi[:K1]), rel=1e-12)
    inp = an.base_inputs[0]
    H = sum(W[k] @ pair_rows(inp, k).T for k in range(K1))
    assert row.se == pytest.approx(estimate_from_rows(H, inp.d).se, rel=1e-10)
    # The weights shown are the marginals of W (0 on the stacked propensity).
    np.testing.assert_allclose(row.alpha, [*W.sum(axis=1), 0.0], rtol=1e-12)
    np.testing.assert_allclose(row.beta, W.sum(axis=0), rtol=1e-12)
    # The bootstrap recomputes it from each replicate's pair table, with the pair SEs (which
    # only set the scale floor) held at their full-sample values.
    reps = result.bootstrap.estimates[SMOOTHED]
    assert np.isfinite(reps).all() and reps.std() > 0
    for b, generator in enumerate(replicate_generators(2, 3)):
        w = draw_row_weights(generator, inp.n, "multinomial")
        Psi_b = pair_table(inp, w)
        W_b, _ = by_hand(Psi_b, an.pair_se[:K1])
        assert reps[b] == pytest.approx(np.sum(W_b * Psi_b), rel=1e-10)
