"""The contrast test between the searched weights and prediction-loss stacking (``contrast_z``).

The headline keeps the searched weights only when their estimate differs from the prediction-loss
stacking (PLS) estimate by more than z paired influence-function SEs (a Hausman-type test;
Hausman 1978, Econometrica 46, 1251-1271). Checked here: the rule flips exactly at the observed
statistic; z = 0 is the search as before; the fallback is exactly PLS's estimate; the paired SE
is the paired-difference SE of the exported row terms; the bootstrap reruns the rule; unit
sampling weights change nothing and singleton clusters scale the SE by sqrt(n / (n - 1)); the
test is skipped, and says so, where PLS's nuisances are not weights of the blend. The variance
guard (``contrast_guard``, k; off in the tests of the threshold itself): the searched weights
are kept whatever the contrast when their IF SE is at most k x PLS's, the rule flips exactly at
the observed SE ratio, and the bootstrap holds the verdict.
"""

import warnings

import numpy as np
import pytest
from sklearn.dummy import DummyClassifier, DummyRegressor
from sklearn.linear_model import LinearRegression, LogisticRegression

from stackdr import BlendEstimator
from stackdr.io import blended_nuisances, result_to_dict, validate_results
from stackdr.search import MAIN, PLS, UNTESTED
from tests.helpers import confounded_data

PROPENSITY = {
    "logit": LogisticRegression(),
    "flat": DummyClassifier(strategy="prior"),
    "sharp": LogisticRegression(C=100.0),
}
OUTCOME = {"ols": LinearRegression(), "mean": DummyRegressor()}


def fit(seed=31, n=800, **settings):
    X, A, Y, _ = confounded_data(np.random.default_rng(seed), n)
    # Without the tie-break the search lands away from the PLS weights, so there is a contrast.
    params = {"bootstrap": 0, "seed": 4, "tie_break": False, "contrast_guard": 0, **settings}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return BlendEstimator("ate", PROPENSITY, OUTCOME, **params).fit(X, A, Y)


def row(result, name):
    return next(r for r in result.estimators if r.name == name)


@pytest.fixture(scope="module")
def base():
    return fit()


def test_rule_flips_at_the_observed_statistic(base):
    test = base.contrast
    assert test.applies and test.se > 0 and np.isfinite(test.difference)
    # The untested row is the search's own estimate; the difference is it minus PLS's.
    assert row(base, UNTESTED).estimate - row(base, PLS).estimate == pytest.approx(
        test.difference, rel=1e-9, abs=1e-12
    )
    stat = test.statistic
    below, above = fit(contrast_z=stat * 0.999), fit(contrast_z=stat * 1.001)
    assert below.contrast.used == "target-aimed weights"
    assert below.estimate == row(below, UNTESTED).estimate
    assert above.contrast.used == "prediction-loss stacking nuisances"
    # With the stacked column the fallback is PLS's own nuisances, so its own estimate.
    assert above.estimate == pytest.approx(row(above, PLS).estimate, rel=1e-10)
    assert above.alpha["prediction-loss stack"] == 1.0
    assert np.allclose(above.beta.to_numpy(), above.analysis.stack_beta)


def test_zero_is_the_search_as_before(base):
    off = fit(contrast_z=0)
    assert not off.contrast.applies
    assert UNTESTED not in [r.name for r in off.estimators]
    assert off.estimate == row(base, UNTESTED).estimate
    others = [r.name for r in off.estimators]
    for name in others[1:]:
        assert row(off, name).estimate == row(base, name).estimate


def test_paired_se_from_the_exported_row_terms():
    # Common practice, the paired-difference SE: with row terms H_i of the two estimates on the
    # same rows (the exported ``contribution`` column; the ATE's denominator is n),
    # SE = SD(H_search - H_PLS) / sqrt(n). The two fits share data, folds and seed; a tiny z
    # keeps the searched weights, a huge one PLS's nuisances.
    kept, fell_back = fit(contrast_z=1e-9), fit(contrast_z=1e9)
    assert kept.contrast.used == "target-aimed weights"
    assert fell_back.contrast.used == "prediction-loss stacking nuisances"
    h_search = blended_nuisances(kept)["contribution"].to_numpy()
    h_pls = blended_nuisances(fell_back)["contribution"].to_numpy()
    assert h_pls.mean() == pytest.approx(row(kept, PLS).estimate, rel=1e-9)
    diff = h_search - h_pls
    assert diff.mean() == pytest.approx(kept.contrast.difference, rel=1e-9)
    assert diff.std() / np.sqrt(diff.size) == pytest.approx(kept.contrast.se, rel=1e-9)
    # Pairing matters: the difference is far less noisy than either estimate.
    assert kept.contrast.se < 0.5 * min(row(kept, UNTESTED).se, row(kept, PLS).se)


def test_bootstrap_reruns_the_rule():
    res = fit(seed=7, n=600, bootstrap=200)
    boot = res.bootstrap.estimates
    searched = np.isclose(boot[MAIN], boot[UNTESTED], rtol=0, atol=1e-10)
    stacked = np.isclose(boot[MAIN], boot[PLS], rtol=0, atol=1e-9)
    assert np.all(searched | stacked)
    # Each replicate applies the full-sample threshold to its own difference.
    tol = res.contrast.tolerance
    expect_search = np.abs(boot[UNTESTED] - boot[PLS]) > tol
    assert np.array_equal(searched[expect_search], np.ones(expect_search.sum(), dtype=bool))
    assert np.all(stacked[~expect_search])


def test_unit_sampling_weights_change_nothing(base):
    # The weighted path (sandwich SE sqrt(sum (s IF)^2) / sum s, weighted fits and stacking) at
    # s = 1 is the unweighted one. (A constant other than 1 would change the penalised logistic
    # fits, whose penalty does not scale with the weights.)
    X, A, Y, _ = confounded_data(np.random.default_rng(31), 800)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        weighted = BlendEstimator(
            "ate", PROPENSITY, OUTCOME, bootstrap=0, seed=4, tie_break=False, contrast_guard=0
        ).fit(X, A, Y, weights=np.ones(800))
    assert weighted.contrast.difference == pytest.approx(base.contrast.difference, rel=1e-9)
    assert weighted.contrast.se == pytest.approx(base.contrast.se, rel=1e-9)


def test_not_applicable_under_the_logit_blend():
    res = fit(blend="logit")
    assert res.contrast.z == 1.5 and not res.contrast.applies
    assert res.estimate == row(res, UNTESTED).estimate
    assert any("not applicable" in note for note in res.notes)


def test_results_file_carries_the_test(base):
    d = result_to_dict(base)
    validate_results(d)
    record = d["contrast_test"]
    assert record["z"] == 1.5 and record["applies"] is True
    assert record["used"] in ("target-aimed weights", "prediction-loss stacking nuisances")
    assert any(note.startswith("Contrast test:") for note in d["notes"])


def test_singleton_clusters_scale_the_se_by_the_small_sample_factor():
    # With one cluster per row the cluster-robust variance is the row-level one times G / (G - 1)
    # (the factor of Cameron & Miller 2015), so the paired SE scales by sqrt(n / (n - 1)) and the
    # difference is unchanged. Both fits use the same user fold labels, so they share folds.
    n = 800
    X, A, Y, _ = confounded_data(np.random.default_rng(31), n)
    folds = np.random.default_rng(2).permutation(np.arange(n) % 5)
    settings = {"bootstrap": 0, "seed": 4, "tie_break": False, "folds": folds, "contrast_guard": 0}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        rows = BlendEstimator("ate", PROPENSITY, OUTCOME, **settings).fit(X, A, Y)
        clustered = BlendEstimator("ate", PROPENSITY, OUTCOME, **settings).fit(
            X, A, Y, clusters=np.arange(n)
        )
    assert clustered.contrast.difference == pytest.approx(rows.contrast.difference, rel=1e-9)
    assert clustered.contrast.se == pytest.approx(rows.contrast.se * np.sqrt(n / (n - 1)), rel=1e-9)


def test_guard_flips_at_the_observed_se_ratio(base):
    # The ratio is that of the two rows' own influence-function SEs (searched weights over PLS).
    ratio = base.contrast.se_ratio
    assert ratio == pytest.approx(row(base, UNTESTED).se / row(base, PLS).se, rel=1e-9)
    # A huge z alone always falls back on PLS; the guard keeps the search when the ratio is
    # within it and only then.
    within = fit(contrast_z=1e9, contrast_guard=ratio * 1.001)
    beyond = fit(contrast_z=1e9, contrast_guard=ratio * 0.999)
    assert within.contrast.guarded and within.contrast.used == "target-aimed weights"
    assert within.estimate == row(within, UNTESTED).estimate
    assert within.contrast.tolerance == 0.0
    assert not beyond.contrast.guarded
    assert beyond.contrast.used == "prediction-loss stacking nuisances"
    assert beyond.estimate == pytest.approx(row(beyond, PLS).estimate, rel=1e-10)
    assert any("variance guard" in note for note in within.notes)
    # Off (0) is the threshold alone.
    off = fit(contrast_z=1e9, contrast_guard=0)
    assert not off.contrast.guarded and off.estimate == beyond.estimate


def test_guard_holds_in_the_bootstrap(base):
    ratio = base.contrast.se_ratio
    res = fit(n=800, bootstrap=100, contrast_z=1e9, contrast_guard=ratio * 1.001)
    boot = res.bootstrap.estimates
    # Every replicate keeps its own searched weights (threshold 0 held from the full sample).
    assert np.allclose(boot[MAIN], boot[UNTESTED], rtol=0, atol=1e-10)
    assert not np.allclose(boot[MAIN], boot[PLS], rtol=0, atol=1e-6)


def test_results_file_carries_the_guard(base):
    d = result_to_dict(fit(contrast_guard=1.05))
    validate_results(d)
    record = d["contrast_test"]
    assert record["guard"] == 1.05
    assert record["se_ratio"] == pytest.approx(base.contrast.se_ratio, rel=1e-9)


def test_sentences_of_the_guard_and_of_no_contrast():
    from stackdr.estimation._contrast import SEARCH_KEPT, STACKING_KEPT, ContrastTest

    # The search returned PLS's own nuisances (difference and SE exactly 0): nothing to test.
    same = ContrastTest(1.5, True, 0.0, 0.0, STACKING_KEPT, 1.05, 1.0)
    assert "nothing to test" in same.sentence() and "guard" not in same.sentence()
    kept = ContrastTest(1.5, True, 0.1, 0.2, SEARCH_KEPT, 1.05, 1.02)
    assert kept.guarded and kept.tolerance == 0.0
    assert "within the variance guard 1.05" in kept.sentence()
    above = ContrastTest(1.5, True, 0.1, 0.2, STACKING_KEPT, 1.05, 1.2)
    assert not above.guarded and above.tolerance == pytest.approx(0.3)
    assert "above the variance guard" in above.sentence()
