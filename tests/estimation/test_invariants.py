"""Numerical invariants as property tests (hypothesis): what must not change when the data or
the libraries are presented differently, and what must always hold.

The learners are chosen so that the invariant holds for them: OLS, ridge and the constant
learners are affine-equivariant in the outcome; logistic regression, OLS, ridge and the constant
learners do not depend on the order of rows or columns. With other learners these are not
properties of the tool.
"""

from __future__ import annotations

import json
import warnings

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, Phase, given, settings
from hypothesis import strategies as st
from sklearn.dummy import DummyClassifier, DummyRegressor
from sklearn.linear_model import LinearRegression, LogisticRegression, Ridge

from stackdr import BlendEstimator
from stackdr.estimation import make_folds
from stackdr.io import result_to_dict
from stackdr.search import PLS, STACKED_PROPENSITY, discrete_pairs, pseudo_risk
from tests.helpers import confounded_data

# Bounded, reproducible runs; no example database written into the work tree. Examples that
# fit learners skip shrinking (minutes per failure); the failing example is reported as drawn.
FITS = settings(
    max_examples=6,
    deadline=None,
    derandomize=True,
    database=None,
    phases=(Phase.explicit, Phase.generate),
    suppress_health_check=[HealthCheck.too_slow],
)
CHEAP = settings(max_examples=150, deadline=None, derandomize=True, database=None)

seeds = st.integers(0, 2**16)
targets = st.sampled_from(["ate", "att", "mean1", "mean0"])
blends = st.sampled_from(["riesz", "probability", "logit"])
criteria = st.sampled_from(["mixed", "minimax"])


def libraries(order: int = 1) -> tuple[dict, dict]:
    """Three learners per side, fresh each call; ``order=-1`` lists them in reverse."""
    propensity = {
        "logit": LogisticRegression(),
        "const": DummyClassifier(),
        "weak": LogisticRegression(C=0.01),
    }
    outcome = {"ols": LinearRegression(), "const": DummyRegressor(), "ridge": Ridge(alpha=50.0)}
    return (
        dict(list(propensity.items())[::order]),
        dict(list(outcome.items())[::order]),
    )


def data(seed: int, n: int = 180) -> pd.DataFrame:
    X, A, Y, _ = confounded_data(np.random.default_rng(seed), n)
    return pd.DataFrame(X, columns=["x1", "x2", "x3"]).assign(a=A.astype(float), y=Y)


def fit(frame, target="ate", order=1, **options):
    propensity, outcome = libraries(order)
    options = {"folds": 3, "bootstrap": 0, **options}
    with warnings.catch_warnings():
        # Clipping and stacking warnings are covered in test_faults.py; here they are noise.
        warnings.simplefilter("ignore")
        return BlendEstimator(target, propensity, outcome, **options).fit(frame, "a", "y")


def estimates(result) -> np.ndarray:
    return np.array([row.estimate for row in result.estimators])


def fold_labels(frame: pd.DataFrame, seed: int) -> np.ndarray:
    return make_folds(frame["a"].to_numpy(), 3, seed=seed)[0]


# ----------------------------------------------------------------------------- outcome changes

scales = st.floats(0.001, 1000.0).flatmap(lambda s: st.sampled_from([s, -s]))
shifts = st.floats(-1e4, 1e4)


def _is_mean(target: str) -> bool:
    return target.startswith("mean")


@FITS
@given(seed=seeds, target=targets, scale=scales)
def test_estimates_scale_with_the_outcome(seed, target, scale):
    frame = data(seed)
    base = fit(frame, target)
    scaled = fit(frame.assign(y=scale * frame.y), target)
    np.testing.assert_allclose(estimates(scaled), scale * estimates(base), rtol=1e-6, atol=0)
    assert scaled.se == pytest.approx(abs(scale) * base.se, rel=1e-6)
    # The weights do not depend on the outcome's unit (the pseudo-risk scales by scale^2).
    np.testing.assert_allclose(scaled.alpha, base.alpha, atol=1e-6)
    np.testing.assert_allclose(scaled.beta, base.beta, atol=1e-6)
    assert scaled.pseudo_risk == pytest.approx(scale**2 * base.pseudo_risk, rel=1e-6, abs=1e-12)


@FITS
@given(
    seed=seeds,
    target=targets,
    scale=scales,
    shift=shifts,
    blend=st.sampled_from(["riesz", "probability"]),
)
def test_affine_outcome_changes_without_tie_break(seed, target, scale, shift, blend):
    # Effects scale and the shift cancels; counterfactual means scale and shift. Every row but
    # prediction-loss stacking, whose NNLS weights are not shift-invariant (README limits).
    # The riesz search is an exact LP; the probability blend's lattice search and polish stop
    # at a numerical tolerance, so its weights (and estimates) agree to about 1e-5 relative.
    frame = data(seed)
    # The contrast test is off too: when it keeps PLS's nuisances, the headline inherits PLS's
    # lack of shift invariance; so are the default's least-squares stacking outcome weights
    # (outcome_side="search": the search chooses both sides).
    options = dict(tie_break=False, contrast_z=0, blend=blend, outcome_side="search")
    base = fit(frame, target, **options)
    moved = fit(frame.assign(y=scale * frame.y + shift), target, **options)
    keep = [row.name != PLS for row in base.estimators]
    expected = scale * estimates(base)[keep] + (shift if _is_mean(target) else 0.0)
    size = abs(scale) * np.abs(estimates(base)).max() + abs(shift)
    rtol = 1e-6 if blend == "riesz" else 1e-4
    np.testing.assert_allclose(estimates(moved)[keep], expected, rtol=rtol, atol=1e-9 * size)
    assert moved.se == pytest.approx(abs(scale) * base.se, rel=rtol)


@pytest.mark.xfail(
    strict=True,
    reason="prediction-loss stacking (NNLS without intercept, then normalised) is not "
    "shift-invariant, and the tie-break moves towards it (reported; README limits)",
)
def test_outcome_shift_with_the_tie_break():
    # Shown here with the riesz blend and c = 0.5, where the tie-break moves onto the NNLS
    # outcome weights on this data set; any tie-break towards them inherits the dependence.
    frame = data(5)
    base = fit(frame, "ate", blend="riesz", tie_break_scale=0.5)
    moved = fit(frame.assign(y=frame.y + 100.0), "ate", blend="riesz", tie_break_scale=0.5)
    assert moved.estimate == pytest.approx(base.estimate, rel=1e-6)


# ----------------------------------------------------------------------------- presentation


@FITS
@given(seed=seeds, target=targets, data_order=st.randoms(use_true_random=False))
def test_row_order_does_not_matter_when_folds_move_with_rows(seed, target, data_order):
    frame = data(seed)
    labels = fold_labels(frame, seed)
    perm = np.arange(len(frame))
    data_order.shuffle(perm)
    base = fit(frame, target, folds=labels)
    shuffled = fit(frame.iloc[perm].reset_index(drop=True), target, folds=labels[perm])
    np.testing.assert_allclose(estimates(shuffled), estimates(base), rtol=1e-7, atol=1e-9)
    np.testing.assert_allclose(shuffled.alpha, base.alpha, atol=1e-7)
    np.testing.assert_allclose(shuffled.beta, base.beta, atol=1e-7)


@pytest.mark.slow
@FITS
@given(seed=seeds, target=targets, columns=st.permutations(["x1", "x2", "x3"]))
def test_covariate_order_does_not_matter(seed, target, columns):
    frame = data(seed)
    labels = fold_labels(frame, seed)
    base = fit(frame, target, folds=labels)
    reordered = fit(frame[[*columns, "a", "y"]], target, folds=labels)
    np.testing.assert_allclose(estimates(reordered), estimates(base), rtol=1e-7, atol=1e-9)


@pytest.mark.slow
@FITS
@given(
    seed=seeds,
    target=targets,
    blend=blends,
    criterion=criteria,
)
def test_learner_order_permutes_the_weights(seed, target, blend, criterion):
    frame = data(seed)
    options = {"blend": blend, "criterion": criterion}
    base = fit(frame, target, **options)
    reversed_ = fit(frame, target, order=-1, **options)
    # The learners come in reverse order; the stacked propensity, when searched, stays last.
    names = list(base.alpha.index)
    learners = names[:-1] if names[-1] == STACKED_PROPENSITY else names
    assert list(reversed_.alpha.index) == learners[::-1] + names[len(learners) :]
    # The grid search behind non-riesz blends and the minimax criterion is exact only to its
    # refinement tolerance, so those compare more loosely than the LP path.
    exact = blend == "riesz" and criterion == "mixed"
    tol = 1e-7 if exact else 1e-3
    np.testing.assert_allclose(reversed_.alpha[base.alpha.index], base.alpha, atol=tol)
    np.testing.assert_allclose(reversed_.beta[base.beta.index], base.beta, atol=tol)
    scale = np.abs(estimates(base)).max() + base.se
    np.testing.assert_allclose(estimates(reversed_), estimates(base), atol=tol * scale)


# ----------------------------------------------------------------------------- always true


@FITS
@given(
    seed=seeds,
    target=targets,
    blend=blends,
    criterion=criteria,
    tie_break=st.booleans(),
    n=st.integers(60, 240),
)
def test_weights_on_the_simplex_and_risks_non_negative(
    seed, target, blend, criterion, tie_break, n
):
    result = fit(
        data(seed, n),
        target,
        blend=blend,
        criterion=criterion,
        tie_break=tie_break,
        bootstrap=10,
    )
    for row in result.estimators:
        for weights in (row.alpha, row.beta):
            assert weights.min() >= 0 and weights.sum() == pytest.approx(1.0, abs=1e-12)
        assert row.pseudo_risk >= 0
        assert row.low <= row.high
    for side in (result.bootstrap.alpha, result.bootstrap.beta):
        values = side.to_numpy()
        assert values.min() >= 0
        np.testing.assert_allclose(values.sum(axis=1), 1.0, atol=1e-12)
    assert result.search.s_out >= 0 and result.search.s_ps >= 0


pair_tables = st.tuples(st.integers(1, 6), st.integers(1, 6), seeds).map(
    lambda t: np.random.default_rng(t[2]).normal(scale=10 ** (t[2] % 7 - 3), size=t[:2])
)


@CHEAP
@given(Psi=pair_tables, data_seed=seeds, criterion=criteria)
def test_pseudo_risk_is_non_negative_anywhere_on_the_simplex(Psi, data_seed, criterion):
    rng = np.random.default_rng(data_seed)
    K1, K2 = Psi.shape
    alpha, beta = rng.dirichlet(np.ones(K1)), rng.dirichlet(np.ones(K2))
    phi_alpha, chi_beta = alpha @ Psi, Psi @ beta
    risk = pseudo_risk(criterion, phi_alpha, chi_beta, alpha @ Psi @ beta, (None, None))
    assert risk >= 0
    # At the vertices too, and the mixed-minimax pair selector picks the smallest of them.
    vertex_risks = np.array(
        [
            [pseudo_risk(criterion, Psi[k], Psi[:, j], Psi[k, j], (None, None)) for j in range(K2)]
            for k in range(K1)
        ]
    )
    assert vertex_risks.min() >= 0
    name = "mixed-minimax pair" if criterion == "mixed" else "minimax pair"
    k, j = discrete_pairs(Psi, (None, None))[name]
    assert vertex_risks[k, j] == pytest.approx(vertex_risks.min(), abs=1e-12 * np.ptp(Psi) ** 2)


# ----------------------------------------------------------------------------- workers


def _without_timings(record: dict) -> str:
    def strip(value):
        if isinstance(value, dict):
            # The time of the fit (provenance) differs between the runs by design.
            skip = ("timings", "created_utc")
            return {k: strip(v) for k, v in value.items() if k not in skip and "seconds" not in k}
        if isinstance(value, list):
            return [strip(v) for v in value]
        return value

    return json.dumps(strip(record), sort_keys=True)


def test_same_seed_gives_bit_identical_results_with_one_or_two_workers():
    frame = data(21, 240)
    runs = [fit(frame, "ate", bootstrap=40, seed=7, n_jobs=jobs) for jobs in (1, 2)]
    one, two = runs
    assert np.array_equal(one.crossfit.propensity, two.crossfit.propensity)
    assert np.array_equal(estimates(one), estimates(two))
    assert one.bootstrap.estimates.equals(two.bootstrap.estimates)
    assert _without_timings(result_to_dict(one)) == _without_timings(result_to_dict(two))
