"""The between-fold check of a fit: computed at the target-aimed nuisances, warning when refitted
learners move the estimate beyond sampling noise; the fold-model jackknife of the refitting
noise; and the refit calibration of the reweighting bootstrap that it switches on (settings
``calibration_refits``, ``calibration_gate``)."""

import json
import warnings

import numpy as np
import pandas as pd
import pytest
from sklearn.base import clone
from sklearn.dummy import DummyRegressor
from sklearn.linear_model import LinearRegression, LogisticRegression

from stackdr import BlendEstimator
from stackdr.core import get_target, row_contributions
from stackdr.errors import UnstableLearnersWarning
from stackdr.estimation import cross_fit, prepare_data
from stackdr.inference import fold_spread
from stackdr.io import plain, result_to_dict, validate_results
from tests.helpers import SwingingClassifier, confounded_data


def _data(seed=5, n=800):
    X, A, Y, _ = confounded_data(np.random.default_rng(seed), n)
    frame = pd.DataFrame({"x1": X[:, 0], "x2": X[:, 1], "x3": X[:, 2], "a": A, "y": Y + 10})
    return frame


def _fit(unstable: bool, **settings):
    if unstable:
        # Inverse-probability weighting with the swinging propensity (outcome model 0).
        propensity = {"swinging": SwingingClassifier()}
        outcome = {"zero": DummyRegressor(strategy="constant", constant=0.0)}
    else:
        propensity = {"logistic": LogisticRegression()}
        outcome = {"linear": LinearRegression()}
    estimator = BlendEstimator(
        "ate", propensity, outcome, folds=5, seed=2, n_jobs=1, **{"bootstrap": 0, **settings}
    )
    return estimator.fit(_data(), "a", "y")


def _text(result) -> str:
    """The printed summary with its line wrapping undone."""
    return " ".join(str(result.summary()).split())


def _unstable_warnings(record) -> list:
    return [w for w in record if issubclass(w.category, UnstableLearnersWarning)]


def test_check_is_the_fold_spread_at_the_target_aimed_nuisances():
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = _fit(unstable=False)
    inp = result.analysis.inputs[0]
    H = row_contributions(inp, result.alpha.to_numpy(), result.beta.to_numpy())
    expected = fold_spread(H, inp.d, result.crossfit.fold_labels[0])
    assert result.fold_check.spread.q == pytest.approx(expected.q)
    # The fold estimates average (weighted by fold size) to the estimate itself.
    sizes = np.bincount(result.crossfit.fold_labels[0])
    assert np.sum(sizes * result.fold_check.spread.estimates) / sizes.sum() == pytest.approx(
        result.estimate
    )


def test_warning_fires_on_unstable_learners_and_not_on_stable_ones():
    with warnings.catch_warnings(record=True) as record:
        warnings.simplefilter("always")
        unstable = _fit(unstable=True)
    assert unstable.fold_check.alert and unstable.fold_check.spread.p_value < 0.01
    assert len(_unstable_warnings(record)) == 1
    assert "--bootstrap-kind refit" in str(_unstable_warnings(record)[0].message)
    with warnings.catch_warnings(record=True) as record:
        warnings.simplefilter("always")
        stable = _fit(unstable=False)
    assert not stable.fold_check.alert and _unstable_warnings(record) == []
    assert "no disagreement between the fold estimates beyond sampling noise" in _text(stable)
    assert "disagree more than sampling noise explains" in _text(unstable)


def test_no_warning_with_the_refit_bootstrap():
    with warnings.catch_warnings(record=True) as record:
        warnings.simplefilter("always")
        result = _fit(unstable=True, bootstrap=3, bootstrap_kind="refit")
    assert result.fold_check.alert and _unstable_warnings(record) == []


def test_check_is_saved_in_results_json():
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = _fit(unstable=True)
    saved = json.loads(json.dumps(plain(result_to_dict(result))))
    validate_results(saved)
    check = saved["diagnostics"]["fold_check"]
    assert check["alert"] is True and check["folds"] == 5
    assert check["q"] == pytest.approx(result.fold_check.spread.q)
    assert check["sentence"] == result.fold_check.sentence()


def test_calibration_refits_widen_by_the_shrunk_paired_excess():
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        rw = _fit(unstable=True, bootstrap=20, calibration_refits=0)
        refit = _fit(unstable=True, bootstrap=4, bootstrap_kind="refit")
        calibrated = {
            s: _fit(
                unstable=True,
                bootstrap=20,
                calibration_refits=4,
                calibration_gate=0,
                calibration_shrink=s,
            )
            for s in (0.0, 0.5, 50.0)
        }
    name = rw.estimators[0].name
    # Replicate b of both bootstraps draws the same rows (same generators) [construction], so
    # the ratio is over the first 4 replicates of each; the excess ratio^2 - 1 and its
    # leave-one-pair-out jackknife SE are computed here by hand.
    e2 = (refit.bootstrap.estimates[name].to_numpy() - rw.estimate) ** 2
    u2 = (rw.bootstrap.estimates[name].to_numpy()[:4] - rw.estimate) ** 2
    ratio2 = e2.sum() / u2.sum()
    loo = np.array([np.delete(e2, i).sum() / np.delete(u2, i).sum() for i in range(4)])
    jse = np.sqrt(3 / 4 * np.sum((loo - loo.mean()) ** 2))
    se = rw.estimators[0].bootstrap_se
    for shrink, fit in calibrated.items():
        check = fit.fold_check
        assert check.corrected and check.refit_ratios[name] == pytest.approx(np.sqrt(ratio2))
        assert check.excess_se[name] == pytest.approx(jse) and check.shrink == shrink
        excess = max(ratio2 - 1, 0.0)
        if excess > 0 and shrink > 0:
            excess *= max(0.0, 1 - (shrink * jse / excess) ** 2)
        assert fit.estimators[0].bootstrap_se == pytest.approx(se * np.sqrt(1 + excess))
        assert ("widened" in _text(fit)) == (excess > 0)
    # Unshrunk (the rule before the seventh round): the SE times max(1, ratio).
    assert calibrated[0.0].estimators[0].bootstrap_se == pytest.approx(
        se * max(1.0, np.sqrt(ratio2))
    )
    # A shrinkage far beyond the excess's noise widens nothing and says why.
    if ratio2 > 1:
        assert calibrated[50.0].estimators[0].bootstrap_se == pytest.approx(se)
        assert "within its noise" in _text(calibrated[50.0])


def test_calibration_is_skipped_without_a_reweighting_bootstrap():
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = _fit(unstable=False, calibration_refits=3)
    assert not result.fold_check.corrected and result.fold_check.refit_ratios == {}


def test_fold_model_jackknife_is_the_grouped_jackknife_of_the_refitted_fold_models():
    """Reference computed by hand: for each fold k, the learners refitted with scikit-learn on
    the other folds predict every row, the AIPW estimate of the ATE (Robins, Rotnitzky & Zhao
    1994) is computed from those predictions with the usual formula, and the grouped jackknife
    (K - 1) / K x sum_k (g_k - mean g)^2 (Shao & Wu 1989, delete-d jackknife with K disjoint
    groups) is taken over the K estimates."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = _fit(unstable=False)
    frame = _data()
    X = frame[["x1", "x2", "x3"]].to_numpy()
    A = frame["a"].to_numpy(dtype=float)
    Y = frame["y"].to_numpy(dtype=float)
    labels = result.crossfit.fold_labels[0]
    K = int(labels.max()) + 1
    g = []
    for k in range(K):
        train = labels != k
        pi = clone(LogisticRegression()).fit(X[train], A[train]).predict_proba(X)[:, 1]
        pi = np.clip(pi, 0.01, 0.99)
        arm = {
            a: clone(LinearRegression()).fit(X[train & (A == a)], Y[train & (A == a)])
            for a in (0, 1)
        }
        mu1, mu0 = arm[1].predict(X), arm[0].predict(X)
        g.append(np.mean(mu1 - mu0 + A * (Y - mu1) / pi - (1 - A) * (Y - mu0) / (1 - pi)))
    g = np.array(g)
    expected = (K - 1) / K * np.sum((g - g.mean()) ** 2)
    check = result.fold_check
    assert check.fit_variance[result.estimators[0].name] == pytest.approx(expected, rel=1e-8)
    # Good learners on a smooth design: refitting noise is a small share of the variance.
    assert check.fit_share == pytest.approx(expected / result.se**2)
    assert check.fit_share < 0.05 and not check.flagged


def test_jackknife_predictions_leave_the_out_of_fold_predictions_unchanged():
    frame = _data()
    target = get_target("ate")
    prepared = prepare_data(frame, "a", "y", ["x1", "x2", "x3"], target=target)
    libraries = ({"logistic": LogisticRegression()}, {"linear": LinearRegression()})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        plain_fit = cross_fit(prepared, target, *libraries, folds=5, seed=3)
        with_folds = cross_fit(prepared, target, *libraries, folds=5, seed=3, jackknife=True)
    assert plain_fit.fold_propensity is None and plain_fit.jackknife_rows is None
    assert np.array_equal(plain_fit.propensity, with_folds.propensity)
    for head in plain_fit.outcome:
        assert np.array_equal(plain_fit.outcome[head], with_folds.outcome[head])
    assert with_folds.fold_propensity.shape == (1, 5, len(frame), 1)
    # Each row's out-of-fold prediction is its own fold's model's prediction on that row.
    labels = with_folds.fold_labels[0]
    own = with_folds.fold_propensity[0, labels, np.arange(len(frame)), 0]
    assert np.allclose(own, with_folds.propensity[0, :, 0], rtol=0, atol=1e-12)


def test_the_gate_switches_the_refit_calibration_on_for_unstable_learners_only():
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        unstable = _fit(unstable=True, bootstrap=20, calibration_refits=3)
        closed = _fit(unstable=True, bootstrap=20, calibration_refits=3, calibration_gate=1e6)
        stable = _fit(unstable=False, bootstrap=20, calibration_refits=3)
        capped = _fit(unstable=True, bootstrap=20, calibration_refits=3, calibration_rows=799)
        fixed = BlendEstimator(
            "ate",
            {"swinging": SwingingClassifier()},
            {"zero": DummyRegressor(strategy="constant", constant=0.0)},
            folds=np.arange(800) % 5,
            bootstrap=20,
            calibration_refits=3,
        ).fit(_data(), "a", "y")
    name = unstable.estimators[0].name
    share = (
        unstable.fold_check.fit_variance[name]
        / closed.fold_check.uncorrected_se.get(name, closed.estimators[0].bootstrap_se) ** 2
    )
    assert unstable.fold_check.fit_share == pytest.approx(share)
    assert unstable.fold_check.flagged and unstable.fold_check.corrected
    assert "above the gate 0.05), so the refit calibration ran" in _text(unstable)
    assert closed.fold_check.flagged is False and not closed.fold_check.corrected
    assert closed.estimators[0].bootstrap_se == pytest.approx(
        unstable.fold_check.uncorrected_se[name]
    )
    assert not stable.fold_check.flagged and not stable.fold_check.corrected
    assert "below the gate 0.05; no refit calibration" in _text(stable)
    # Above calibration_rows (800 rows here) the flagged fit is not refitted and says why.
    assert capped.fold_check.flagged and not capped.fold_check.corrected
    assert "with 800 rows (more than calibration_rows = 799)" in _text(capped)
    # Fixed fold labels: refits cannot redraw the folds, so the flagged fit says so instead.
    assert fixed.fold_check.flagged and not fixed.fold_check.corrected
    assert "needs generated folds" in _text(fixed)
    saved = json.loads(json.dumps(plain(result_to_dict(unstable))))
    validate_results(saved)
    block = saved["diagnostics"]["fold_check"]
    assert block["fit_share"] == pytest.approx(unstable.fold_check.fit_share)
    assert block["calibration_gate"] == 0.05 and block["corrected"] is True
