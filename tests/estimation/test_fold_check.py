"""The between-fold check of a fit: computed at the target-aimed nuisances, warning when refitted
learners move the estimate beyond sampling noise; and the optional refit calibration of the
reweighting bootstrap (setting ``calibration_refits``)."""

import json
import warnings

import numpy as np
import pandas as pd
import pytest
from sklearn.dummy import DummyRegressor
from sklearn.linear_model import LinearRegression, LogisticRegression

from stackdr import BlendEstimator
from stackdr.core import row_contributions
from stackdr.errors import UnstableLearnersWarning
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


def test_calibration_refits_widen_by_the_paired_ratio():
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        rw = _fit(unstable=True, bootstrap=20)
        refit = _fit(unstable=True, bootstrap=4, bootstrap_kind="refit")
        calibrated = _fit(unstable=True, bootstrap=20, calibration_refits=4)
    name = rw.estimators[0].name
    # Replicate b of both bootstraps draws the same rows (same generators) [construction], so
    # the ratio is over the first 4 replicates of each.
    a = refit.bootstrap.estimates[name].to_numpy()
    b = rw.bootstrap.estimates[name].to_numpy()[:4]
    ratio = np.sqrt(np.sum((a - rw.estimate) ** 2) / np.sum((b - rw.estimate) ** 2))
    check = calibrated.fold_check
    assert check.corrected and check.refit_ratios[name] == pytest.approx(ratio)
    se = rw.estimators[0].bootstrap_se
    assert calibrated.estimators[0].bootstrap_se == pytest.approx(se * max(1.0, ratio))
    assert ("widened" in _text(calibrated)) == (ratio > 1)


def test_calibration_is_skipped_without_a_reweighting_bootstrap():
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = _fit(unstable=False, calibration_refits=3)
    assert not result.fold_check.corrected and result.fold_check.refit_ratios == {}
