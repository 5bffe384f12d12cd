"""Property tests of the pair table against brute-force row loops (DESIGN sections 2-3)."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.dummy import DummyClassifier, DummyRegressor
from sklearn.linear_model import LinearRegression, LogisticRegression, Ridge

from stackdr.core import (
    TARGET_NAMES,
    blend_estimate,
    get_target,
    pair_inputs,
    pair_table,
    phi,
    row_contributions,
)
from stackdr.estimation import CrossFitResult, cross_fit, prepare_data
from tests.helpers import confounded_data


def synthetic_crossfit(rng, n, K1, K2, heads):
    pi = rng.uniform(0.05, 0.95, size=(1, n, K1))
    outcome = {h: rng.normal(size=(1, n, K2)) for h in heads}
    return CrossFitResult(
        fold_labels=np.zeros((1, n), dtype=int),
        propensity=pi,
        propensity_raw=pi,
        outcome=outcome,
        observed=outcome[heads[0]],
        observed_mask=np.ones(n, bool),
        propensity_names=[f"p{k}" for k in range(K1)],
        outcome_names=[f"o{j}" for j in range(K2)],
        clip=0.01,
        clip_counts=np.zeros((1, K1, 2), int),
        in_sample=False,
        propensity_kind="classifier",
        outcome_mode="separate",
    )


def brute_force_H(target, A, Y, pi_row, b_rows):
    """H for one row with scalar nuisances, straight from DESIGN section 1."""
    total = 0.0
    for comp in target.components:
        p = comp.weight_transform(np.array([pi_row]))[0]
        b = b_rows[comp.outcome_head]
        a, y = np.array([A]), np.array([Y])
        total += b * p * comp.h1(a, y)[0] + b * comp.h2(a, y)[0] + p * comp.h3(a, y)[0]
    return total + target.h4(np.array([A]), np.array([Y]))[0]


@settings(max_examples=25, deadline=None)
@given(
    seed=st.integers(0, 10_000),
    target_name=st.sampled_from(TARGET_NAMES),
    K1=st.integers(1, 4),
    K2=st.integers(1, 4),
)
def test_pair_table_equals_row_loop(seed, target_name, K1, K2):
    rng = np.random.default_rng(seed)
    n = 30
    target = get_target(target_name)
    A = rng.binomial(1, 0.5, size=n).astype(float)
    A[:2] = [0.0, 1.0]
    Y = rng.normal(size=n)
    cf = synthetic_crossfit(rng, n, K1, K2, target.outcome_heads)
    inp = pair_inputs(target, cf, A, Y)
    Psi = pair_table(inp)
    d = target.denominator(A, Y)
    for k in range(K1):
        for j in range(K2):
            H = [
                brute_force_H(
                    target,
                    A[i],
                    Y[i],
                    cf.propensity[0, i, k],
                    {h: cf.outcome[h][0, i, j] for h in cf.outcome},
                )
                for i in range(n)
            ]
            assert Psi[k, j] == pytest.approx(sum(H) / d.sum(), rel=1e-10, abs=1e-10)


@settings(max_examples=25, deadline=None)
@given(
    seed=st.integers(0, 10_000),
    target_name=st.sampled_from(TARGET_NAMES),
    K1=st.integers(1, 5),
    K2=st.integers(1, 5),
)
def test_riesz_blend_is_bilinear(seed, target_name, K1, K2):
    # Key identity of DESIGN section 3: psi(alpha, beta) = alpha' Psi beta for the riesz blend,
    # and psi is linear in beta for every blend: psi(alpha, beta) = phi(alpha)' beta.
    rng = np.random.default_rng(seed)
    n = 50
    target = get_target(target_name)
    A = rng.binomial(1, 0.5, size=n).astype(float)
    Y = rng.normal(size=n)
    cf = synthetic_crossfit(rng, n, K1, K2, target.outcome_heads)
    inp = pair_inputs(target, cf, A, Y)
    alpha, beta = rng.dirichlet(np.ones(K1)), rng.dirichlet(np.ones(K2))
    Psi = pair_table(inp)
    est = blend_estimate(inp, alpha, beta).estimate
    assert est == pytest.approx(alpha @ Psi @ beta, rel=1e-9, abs=1e-10)
    for blend in ("riesz", "probability", "logit"):
        direct = row_contributions(inp, alpha, beta, blend).sum() / inp.d.sum()
        assert direct == pytest.approx(phi(inp, alpha[None], blend)[0] @ beta, rel=1e-9, abs=1e-10)
    np.testing.assert_allclose(phi(inp, np.eye(K1), "probability"), Psi, rtol=1e-10, atol=1e-10)


@settings(max_examples=10, deadline=None)
@given(seed=st.integers(0, 10_000))
def test_row_weights_equal_row_duplication(seed):
    rng = np.random.default_rng(seed)
    n = 40
    target = get_target("ate")
    A = rng.binomial(1, 0.5, size=n).astype(float)
    Y = rng.normal(size=n)
    cf = synthetic_crossfit(rng, n, 3, 2, target.outcome_heads)
    inp = pair_inputs(target, cf, A, Y)
    counts = rng.integers(0, 4, size=n)
    counts[0] += 1
    rows = np.repeat(np.arange(n), counts)
    cf2 = synthetic_crossfit(rng, rows.size, 3, 2, target.outcome_heads)
    cf2.propensity[:] = cf.propensity[:, rows]
    for h in cf.outcome:
        cf2.outcome[h][:] = cf.outcome[h][:, rows]
    dup = pair_inputs(target, cf2, A[rows], Y[rows])
    np.testing.assert_allclose(pair_table(inp, counts), pair_table(dup), rtol=1e-10)


def _fit(X, A, Y, target, plib, olib, **kw):
    t = get_target(target)
    d = prepare_data(X, A, Y, target=t)
    cf = cross_fit(d, t, plib, olib, **kw)
    return pair_table(pair_inputs(t, cf, d.A, d.Y)), cf


def test_learner_order_invariance(rng):
    X, A, Y, _ = confounded_data(rng, 300)
    plib = {"logit": LogisticRegression(), "const": DummyClassifier(strategy="prior")}
    olib = {"ols": LinearRegression(), "ridge": Ridge(alpha=10.0), "mean": DummyRegressor()}
    Psi, _ = _fit(X, A, Y, "ate", plib, olib, seed=4)
    Psi_rev, cf = _fit(
        X, A, Y, "ate", dict(reversed(plib.items())), dict(reversed(olib.items())), seed=4
    )
    assert cf.propensity_names == ["const", "logit"]
    np.testing.assert_allclose(Psi_rev, Psi[::-1, ::-1], rtol=1e-12)


def test_row_order_invariance_with_moving_folds(rng):
    X, A, Y, _ = confounded_data(rng, 300)
    labels = np.arange(300) % 4
    plib = {"logit": LogisticRegression()}
    olib = {"ols": LinearRegression(), "ridge": Ridge(alpha=3.0)}
    Psi, _ = _fit(X, A, Y, "att", plib, olib, folds=labels)
    perm = rng.permutation(300)
    Psi_p, _ = _fit(X[perm], A[perm], Y[perm], "att", plib, olib, folds=labels[perm])
    np.testing.assert_allclose(Psi_p, Psi, rtol=1e-9)


@pytest.mark.slow
def test_same_seed_same_numbers_for_any_n_jobs(rng):
    from stackdr.estimation import make_learner

    X, A, Y, _ = confounded_data(rng, 300)

    def libs():
        prop = {
            "logit": LogisticRegression(),
            "forest": make_learner("forest-classifier", n_estimators=20),
        }
        outc = {
            "ols": LinearRegression(),
            "forest": make_learner("forest-regressor", n_estimators=20),
        }
        return prop, outc

    Psi1, _ = _fit(X, A, Y, "ate", *libs(), seed=9, n_jobs=1)
    Psi2, _ = _fit(X, A, Y, "ate", *libs(), seed=9, n_jobs=2)
    np.testing.assert_array_equal(Psi1, Psi2)
