"""Tests for prediction-loss stacking (super learner weights).

Definition checked throughout: van der Laan, Polley & Hubbard (2007), "Super learner",
Statistical Applications in Genetics and Molecular Biology 6(1), Art. 25 -- NNLS of the outcome on
out-of-fold predictions normalised to sum to one (continuous outcome); convex weights minimising
the Bernoulli log-loss of the probability-scale blend (binary outcome).
"""

import itertools

import cvxpy as cp
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays
from scipy.optimize import approx_fprime, nnls
from sklearn.metrics import log_loss, mean_squared_error

from stackdr.core import (
    StackResult,
    log_losses,
    logloss_moment_features,
    logloss_stack,
    logloss_stack_batch,
    logloss_stack_from_moments,
    nnls_stack,
    nnls_stack_from_moments,
    simplex_qp,
    squared_error_losses,
)
from stackdr.errors import InputError


def expit(v):
    return 1.0 / (1.0 + np.exp(-v))


def regression_data(seed, n=300, k=5):
    """Outcome plus k noisy, differently scaled predictions of its mean (simulated)."""
    rng = np.random.default_rng(seed)
    z = rng.normal(size=n)
    y = 1.0 + z + rng.normal(size=n)
    preds = (
        1.0
        + z[:, None] * rng.uniform(0.3, 1.3, k)
        + rng.normal(size=(n, k)) * rng.uniform(0.2, 1.5, k)
    )
    return rng, preds, y


def classification_data(seed, n=400, k=4):
    """Binary indicator plus k noisy propensity predictions on the probability scale (simulated)."""
    rng = np.random.default_rng(seed)
    z = rng.normal(size=n)
    a = (rng.uniform(size=n) < expit(z)).astype(float)
    slopes = rng.uniform(0.2, 1.5, k)
    noise = rng.uniform(0.1, 1.2, k)
    probs = expit(z[:, None] * slopes + rng.normal(size=(n, k)) * noise)
    return rng, np.clip(probs, 0.01, 0.99), a


def cvxpy_nnls_weights(preds, y, w):
    x = cp.Variable(preds.shape[1])
    objective = cp.sum_squares(cp.multiply(np.sqrt(w), y - preds @ x))
    cp.Problem(cp.Minimize(objective), [x >= 0]).solve(solver="CLARABEL")
    return x.value / x.value.sum()


def cvxpy_logloss(probs, a, w):
    x = cp.Variable(probs.shape[1])
    blend = probs @ x
    loglik = cp.multiply(a, cp.log(blend)) + cp.multiply(1 - a, cp.log(1 - blend))
    problem = cp.Problem(cp.Minimize(-(w @ loglik) / w.sum()), [x >= 0, cp.sum(x) == 1])
    problem.solve(solver="CLARABEL", tol_gap_abs=1e-12, tol_gap_rel=1e-12, tol_feas=1e-12)
    return x.value, problem.value


def on_simplex(w, tol=1e-12):
    return bool((w >= -tol).all() and np.allclose(w.sum(axis=-1), 1.0, atol=1e-12))


# --------------------------------------------------------------------------- per-learner losses


def test_per_learner_losses_match_sklearn_metrics():
    # Reference library: scikit-learn's weighted mean_squared_error and log_loss per column.
    rng, preds, y = regression_data(0)
    w = rng.exponential(size=y.size)
    expected = [mean_squared_error(y, preds[:, k], sample_weight=w) for k in range(5)]
    np.testing.assert_allclose(squared_error_losses(preds, y, w), expected, rtol=1e-12)
    rng, probs, a = classification_data(1)
    w = rng.exponential(size=a.size)
    expected = [log_loss(a, probs[:, k], sample_weight=w) for k in range(4)]
    np.testing.assert_allclose(log_losses(probs, a, w), expected, rtol=1e-12)


# --------------------------------------------------------------------------- NNLS stacking


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_nnls_weights_match_scipy_and_cvxpy(seed):
    # Super learner definition (van der Laan, Polley & Hubbard 2007): NNLS then normalise.
    # References: scipy.optimize.nnls on sqrt-weight-scaled rows, and a cvxpy program.
    rng, preds, y = regression_data(seed)
    w = rng.exponential(size=y.size)
    res = nnls_stack(preds, y, w)
    assert isinstance(res, StackResult)
    assert res.status == "optimal" and res.method == "nnls"
    root = np.sqrt(w)
    coef = nnls(preds * root[:, None], y * root)[0]
    np.testing.assert_allclose(res.weights, coef / coef.sum(), atol=1e-10)
    np.testing.assert_allclose(res.weights, cvxpy_nnls_weights(preds, y, w), atol=1e-6)
    blend_mse = mean_squared_error(y, preds @ res.weights, sample_weight=w)
    assert res.loss == pytest.approx(blend_mse, rel=1e-12)


# Both stackers with their data: outcome regression and propensity classification.
STACKERS = {"nnls": (nnls_stack, regression_data), "logloss": (logloss_stack, classification_data)}


@pytest.mark.parametrize("kind", ["nnls", "logloss"])
def test_integer_weights_equal_row_duplication(kind):
    stack, data = STACKERS[kind]
    rng, preds, target = data(3)
    counts = rng.integers(0, 4, size=target.size)
    weighted = stack(preds, target, counts)
    duplicated = stack(np.repeat(preds, counts, axis=0), np.repeat(target, counts))
    np.testing.assert_allclose(weighted.weights, duplicated.weights, atol=1e-9)
    assert weighted.loss == pytest.approx(duplicated.loss, rel=1e-10)


@pytest.mark.parametrize("kind", ["nnls", "logloss"])
def test_column_permutation_permutes_weights(kind):
    stack, data = STACKERS[kind]
    rng, preds, target = data(4)
    order = rng.permutation(preds.shape[1])
    base = stack(preds, target).weights
    np.testing.assert_allclose(stack(preds[:, order], target).weights, base[order], atol=1e-9)


def test_nnls_single_learner_and_recovery_of_a_perfect_learner():
    _, preds, y = regression_data(5)
    assert nnls_stack(preds[:, :1], y).weights.tolist() == [1.0]
    # A column equal to y is a zero-residual fit with coefficient 1; NNLS must find it.
    with_truth = np.column_stack([preds, y])
    np.testing.assert_allclose(nnls_stack(with_truth, y).weights, np.eye(6)[5], atol=1e-10)


def test_nnls_all_zero_solution_falls_back_with_warning():
    # Every learner is negatively correlated with y, so the NNLS solution is x = 0.
    rng = np.random.default_rng(6)
    y = rng.normal(size=200)
    preds = np.column_stack([-y + 0.1 * rng.normal(size=200), -2 * y, -y + rng.normal(size=200)])
    with pytest.warns(RuntimeWarning, match="falling back"):
        res = nnls_stack(preds, y)
    assert res.status == "fallback"
    best = np.argmin(squared_error_losses(preds, y))
    np.testing.assert_array_equal(res.weights, np.eye(3)[best])
    gram = preds.T @ preds
    with pytest.warns(RuntimeWarning, match="1 of 1"):
        moment_weights = nnls_stack_from_moments(gram, preds.T @ y)
    np.testing.assert_array_equal(moment_weights, res.weights)


def test_nnls_moments_equal_direct_form():
    rng, preds, y = regression_data(7, n=250)
    # Multinomial and exponential replicate weights, as in the reweighting bootstrap, plus a
    # replicate that drops half the rows.
    rows = np.vstack(
        [
            rng.multinomial(y.size, np.full(y.size, 1 / y.size), size=20),
            rng.exponential(size=(20, y.size)),
            np.r_[np.ones(125), np.zeros(125)][None, :],
        ]
    ).astype(float)
    gram = np.einsum("bn,nk,nl->bkl", rows, preds, preds)
    cross = rows @ (preds * y[:, None])
    batched = nnls_stack_from_moments(gram, cross)
    direct = np.stack([nnls_stack(preds, y, r).weights for r in rows])
    assert batched.shape == (41, 5)
    np.testing.assert_allclose(batched, direct, atol=1e-8)
    np.testing.assert_allclose(nnls_stack_from_moments(gram[0], cross[0]), direct[0], atol=1e-8)


def test_nnls_moments_with_singular_gram():
    # A learner that is a copy of another makes the Gram matrix singular; the weights are no
    # longer unique, but the blend and its loss are.
    _, preds, y = regression_data(8, k=3)
    preds = np.column_stack([preds, preds[:, 0]])
    w_moment = nnls_stack_from_moments(preds.T @ preds, preds.T @ y)
    direct = nnls_stack(preds, y)
    assert on_simplex(w_moment)
    np.testing.assert_allclose(preds @ w_moment, preds @ direct.weights, atol=1e-8)


def test_nnls_errors_name_the_fault():
    _, preds, y = regression_data(9)
    bad = preds.copy()
    bad[3, 2] = np.nan
    with pytest.raises(InputError, match=r"column\(s\) \[2\]"):
        nnls_stack(bad, y)
    with pytest.raises(InputError, match="length 300"):
        nnls_stack(preds, y[:-1])
    with pytest.raises(InputError, match="negative"):
        nnls_stack(preds, y, -np.ones(y.size))
    with pytest.raises(InputError, match="shape"):
        nnls_stack_from_moments(np.eye(3), np.ones(4))


# --------------------------------------------------------------------------- log-loss stacking


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_logloss_weights_match_cvxpy(seed):
    # Super learner for a binary outcome (van der Laan, Polley & Hubbard 2007): convex weights
    # minimising the Bernoulli log-loss of the probability-scale blend; reference cvxpy program.
    rng, probs, a = classification_data(seed)
    w = rng.exponential(size=a.size)
    res = logloss_stack(probs, a, w)
    ref_weights, ref_value = cvxpy_logloss(probs, a, w)
    assert res.status == "optimal" and on_simplex(res.weights)
    np.testing.assert_allclose(res.weights, ref_weights, atol=1e-6)
    assert res.loss == pytest.approx(ref_value, abs=1e-9)
    assert res.loss <= ref_value + 1e-12
    assert res.loss == pytest.approx(log_loss(a, probs @ res.weights, sample_weight=w), rel=1e-12)
    assert 0 <= res.details["optimality_gap"] < 1e-10


def test_logloss_single_learner():
    _, probs, a = classification_data(4)
    single = logloss_stack(probs[:, 1:2], a)
    assert single.weights.tolist() == [1.0] and single.status == "single"


def test_logloss_clips_probabilities_of_zero_and_one():
    _, probs, a = classification_data(5)
    probs = probs.copy()
    probs[a == 1, 0] = 0.0  # a learner that is certain and wrong on every treated row
    res = logloss_stack(probs, a, eps=1e-6)
    assert np.isfinite(res.loss) and on_simplex(res.weights)
    assert res.weights[0] < 1e-6


def test_logloss_batch_equals_single_solves():
    rng, probs, a = classification_data(6, n=300)
    rows = np.vstack(
        [rng.exponential(size=(6, a.size)), rng.multinomial(a.size, [1 / a.size] * a.size, size=6)]
    )
    batch = logloss_stack_batch(probs, a, rows)
    single = np.stack([logloss_stack(probs, a, r).weights for r in rows])
    np.testing.assert_allclose(batch, single, atol=1e-12)
    with pytest.raises(InputError, match=r"bad replicates \[1\]"):
        logloss_stack_batch(probs, a, np.vstack([rows[0], -rows[1]]))


def test_logloss_input_errors():
    _, probs, a = classification_data(7)
    bad = probs.copy()
    bad[0, 3] = 1.5
    with pytest.raises(InputError, match=r"outside \[0, 1\] in learner column\(s\) \[3\]"):
        logloss_stack(bad, a)
    with pytest.raises(InputError, match="eps"):
        logloss_stack(probs, a, eps=0.0)


def test_moment_features_are_gradient_and_hessian_of_the_loss():
    # Reference: central finite differences of the weighted mean log-loss (scipy approx_fprime).
    rng, probs, a = classification_data(8, n=200, k=3)
    r = rng.exponential(size=a.size)
    x0 = np.array([0.5, 0.3, 0.2])
    grad_rows, hess_rows = logloss_moment_features(probs, a, x0)

    def loss(x):
        return r @ -(a * np.log(probs @ x) + (1 - a) * np.log(1 - probs @ x))

    def grad(x):
        return approx_fprime(x, loss, 1e-7)

    np.testing.assert_allclose(r @ grad_rows, grad(x0), rtol=1e-5, atol=1e-4)
    numeric_hess = np.array([(grad(x0 + h) - grad(x0 - h)) / 2e-4 for h in 1e-4 * np.eye(3)])
    np.testing.assert_allclose(np.tensordot(r, hess_rows, axes=1), numeric_hess, rtol=1e-3)


def test_one_step_is_exact_for_the_full_sample_weights():
    # At the full-sample optimum with the same row weights the one-step solution must stay put.
    _, probs, a = classification_data(9)
    x0 = logloss_stack(probs, a).weights
    grad_rows, hess_rows = logloss_moment_features(probs, a, x0)
    one = logloss_stack_from_moments(grad_rows.sum(0), hess_rows.sum(0), x0)
    np.testing.assert_allclose(one, x0, atol=1e-9)


@pytest.mark.parametrize("seed", [0, 1])
def test_one_step_error_is_quadratic_in_the_move(seed):
    # Newton's method: one exact step from a start at distance d of the optimum leaves an error
    # of order d**2 (Nocedal & Wright 2006, Theorem 3.5, recalled; the QP handles the simplex
    # exactly).
    # Row weights r = 1 + delta * u give moves d proportional to delta; halving delta must
    # shrink the error about four-fold (ratio <= 0.35 tested), and the error must stay below
    # d**2 (observed constant 0.1-0.15 in this interior design, so 1.0 leaves room).
    rng = np.random.default_rng(seed)
    n = 2000
    z = rng.normal(size=n)
    a = (rng.uniform(size=n) < expit(z)).astype(float)
    probs = np.column_stack(
        [expit(z * s + rng.normal(size=n) * t) for s, t in [(1.0, 0.8), (1.0, 0.8), (0.7, 0.3)]]
    )
    x0 = logloss_stack(probs, a).weights
    assert x0.min() > 0.05  # interior optimum, so the active set does not change
    grad_rows, hess_rows = logloss_moment_features(probs, a, x0)
    u = rng.uniform(-1, 1, size=n)
    rows = np.stack([1 + delta * u for delta in (0.4, 0.2, 0.1)])
    one = logloss_stack_from_moments(rows @ grad_rows, np.tensordot(rows, hess_rows, axes=1), x0)
    exact = logloss_stack_batch(probs, a, rows)
    move = np.abs(exact - x0).max(axis=1)
    error = np.abs(one - exact).max(axis=1)
    assert (move > 1e-3).all()
    assert (error <= move**2).all()
    assert (error[1:] <= 0.35 * error[:-1]).all()
    assert on_simplex(one)


# --------------------------------------------------------------------------- simplex QP


def frank_wolfe_gap(quad, lin, x):
    """g'x - min_k g_k with g the gradient: zero exactly at a KKT point of the simplex QP."""
    g = quad @ x + lin
    return g @ x - g.min()


@st.composite
def qp_problems(draw):
    k = draw(st.integers(1, 6))
    rank = draw(st.integers(1, k))  # rank < k gives singular, merely semi-definite Q
    elements = st.floats(-3, 3, allow_nan=False, allow_infinity=False)
    factor = draw(arrays(float, (k, rank), elements=elements))
    lin = draw(arrays(float, (k,), elements=elements))
    return factor @ factor.T, lin


@settings(max_examples=150, deadline=None)
@given(qp_problems())
def test_simplex_qp_satisfies_kkt_on_both_paths(problem):
    # KKT conditions of min 0.5 x'Qx + q'x on the simplex (Nocedal & Wright 2006, Theorem 12.1,
    # recalled): x feasible and every coordinate in the support attains the smallest gradient entry.
    quad, lin = problem
    scale = 1.0 + np.abs(quad).max() + np.abs(lin).max()
    enumerated = simplex_qp(quad, lin)
    active_set = simplex_qp(quad, lin, max_enumerate=0)
    for x in (enumerated, active_set):
        assert on_simplex(x)
        assert frank_wolfe_gap(quad, lin, x) <= 1e-9 * scale
    objective = [0.5 * x @ quad @ x + lin @ x for x in (enumerated, active_set)]
    assert objective[0] == pytest.approx(objective[1], abs=1e-10 * scale)


@pytest.mark.parametrize("k", [3, 7, 10])
def test_simplex_qp_matches_cvxpy(k):
    # Reference: the same QP as a cvxpy program. k = 10 exercises the active-set path.
    rng = np.random.default_rng(k)
    factor = rng.normal(size=(k, k + 2))
    quad, lin = factor @ factor.T / k, rng.normal(size=k)
    x = cp.Variable(k)
    objective = 0.5 * cp.quad_form(x, quad) + lin @ x
    cp.Problem(cp.Minimize(objective), [x >= 0, cp.sum(x) == 1]).solve(solver="CLARABEL")
    np.testing.assert_allclose(simplex_qp(quad, lin), x.value, atol=1e-6)


def test_simplex_qp_batch_equals_loop():
    rng = np.random.default_rng(11)
    factors = rng.normal(size=(30, 4, 4))
    quads = factors @ np.swapaxes(factors, 1, 2)
    lins = rng.normal(size=(30, 4)) * 3
    batch = simplex_qp(quads, lins)
    loop = np.stack(list(itertools.starmap(simplex_qp, zip(quads, lins, strict=True))))
    np.testing.assert_allclose(batch, loop, atol=1e-12)
    assert on_simplex(batch)
