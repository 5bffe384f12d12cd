"""The settings table is the one declaration: the estimator's signature, validation, the CLI
flags and their help defaults, configuration keys, saved settings and study settings agree
with it. And BlendEstimator honours the scikit-learn estimator contract (clone, get_params,
set_params, repr)."""

from __future__ import annotations

import inspect
import re

import numpy as np
import pytest
from sklearn.base import clone
from sklearn.dummy import DummyRegressor
from sklearn.linear_model import LinearRegression, LogisticRegression

import stackdr
from stackdr.cli._main import build_parser
from stackdr.errors import InputError
from stackdr.estimation import (
    CONFIG_SETTINGS,
    ESTIMATOR_PARAMS,
    SETTINGS,
    STUDY_SETTINGS,
    BlendEstimator,
    settings_record,
)
from stackdr.io import ESTIMATOR_SETTINGS
from stackdr.search import COMPARISONS, ESTIMATOR_ORDER
from stackdr.studies import check_settings


def test_signature_matches_table():
    params = inspect.signature(BlendEstimator).parameters
    assert tuple(params) == ESTIMATOR_PARAMS
    for name, parameter in params.items():
        assert parameter.default == SETTINGS[name].default, name


def _estimate_actions() -> dict:
    parser = build_parser()
    sub = next(a for a in parser._actions if isinstance(a.choices, dict))
    return {flag: a for a in sub.choices["estimate"]._actions for flag in a.option_strings}


def test_cli_help_defaults_equal_estimator_defaults():
    actions = _estimate_actions()
    defaults = BlendEstimator().get_params()
    checked = 0
    for key, setting in CONFIG_SETTINGS.items():
        if not setting.estimator or setting.kind == "switch" or key == "target":
            continue
        match = re.search(r"\(default ([^)]*)\)", actions[setting.flag].help)
        assert match, f"{setting.flag} shows no default"
        value = defaults[setting.name]
        expected = f"{value:g}" if isinstance(value, float) else str(value)
        assert match.group(1) == expected, setting.flag
        checked += 1
    assert checked >= 12
    # Switches that are on by default have a --no- flag; required settings say so.
    assert "--no-tie-break" in actions and "--no-progress" in actions
    assert "required" in actions["--target"].help and "required" in actions["--out"].help


def test_config_keys_map_to_parameters():
    assert set(ESTIMATOR_SETTINGS.values()) <= set(ESTIMATOR_PARAMS)
    assert ESTIMATOR_SETTINGS["jobs"] == "n_jobs"
    assert set(STUDY_SETTINGS) <= set(ESTIMATOR_PARAMS)
    assert "seed" not in STUDY_SETTINGS and "n_jobs" not in STUDY_SETTINGS


def test_settings_record_and_study_settings():
    record = settings_record(BlendEstimator("att", folds=np.arange(10) % 2).get_params())
    assert record["target"] == "att" and record["folds"] == "user-supplied labels"
    assert not {"n_jobs", "progress", "backend", "cluster", "propensity_learners"} & set(record)
    assert check_settings({"blend": "logit", "bootstrap": 0}) == {"blend": "logit", "bootstrap": 0}
    with pytest.raises(InputError, match="tie_break_scale must be >= 0, got -1"):
        check_settings({"tie_break_scale": -1})


def test_one_validation_for_every_entry_point():
    # The same table message from the estimator, a study and cross_fit's own arguments.
    with pytest.raises(InputError, match="clip must be >= 0 and < 0.5, got 0.7"):
        BlendEstimator(clip=0.7)._validate_params()
    with pytest.raises(InputError, match="clip must be >= 0 and < 0.5, got 0.7"):
        check_settings({"clip": 0.7})
    with pytest.raises(InputError, match="interval must be one of percentile, basic"):
        BlendEstimator(interval="bca")._validate_params()


def test_sklearn_contract():
    prop = {"logit": LogisticRegression()}
    outc = {"ols": LinearRegression(), "mean": DummyRegressor()}
    est = BlendEstimator("ate", prop, outc, bootstrap=0, blend="probability")
    copy = clone(est)
    assert copy is not est and copy.get_params()["blend"] == "probability"
    # Learners are cloned too: fresh, unfitted copies, never the user's objects.
    assert copy.propensity_learners["logit"] is not prop["logit"]
    assert clone(stackdr.BlendEstimator("ate")).get_params() == BlendEstimator("ate").get_params()
    est.set_params(tie_break_scale=0.75, seed=3)
    assert est.tie_break_scale == 0.75 and est.seed == 3
    with pytest.raises(ValueError):
        est.set_params(not_a_setting=1)
    assert repr(BlendEstimator()) == "BlendEstimator()"
    text = repr(est)
    assert len(text) < 300 and "tie_break_scale=0.75" in text and "blend='probability'" in text


def test_registry_orders_every_table():
    names = [c.name for c in COMPARISONS]
    assert list(ESTIMATOR_ORDER[: len(names)]) == names
    X = np.random.default_rng(0).normal(size=(300, 2))
    A = (X[:, 0] + np.random.default_rng(1).normal(size=300) > 0).astype(float)
    Y = X.sum(axis=1) + A
    res = BlendEstimator(
        "ate", {"logit": LogisticRegression()}, {"ols": LinearRegression()}, bootstrap=0
    ).fit(X, A, Y)
    assert [row.name for row in res.estimators] == names
    res = BlendEstimator(
        "ate",
        {"logit": LogisticRegression()},
        {"ols": LinearRegression()},
        bootstrap=0,
        tie_break=False,
    ).fit(X, A, Y)
    assert [row.name for row in res.estimators] == [n for n in names if "no tie-break" not in n]
