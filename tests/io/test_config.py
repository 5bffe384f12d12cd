"""TOML configuration: learner libraries by catalogue name, settings, precedence, errors."""

import inspect
from pathlib import Path

import pytest

from stackdr import BlendEstimator
from stackdr.errors import InputError
from stackdr.io import (
    ESTIMATOR_SETTINGS,
    SETTINGS,
    check_setting,
    estimator_kwargs,
    load_config,
    resolve_settings,
)


def write(tmp_path: Path, text: str, name: str = "run.toml") -> Path:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


FULL = """
[settings]
target = "att"
treatment = "programme"
outcome = "sbp_change"
covariates = ["age", "bmi"]
data = "data/trial.csv"
out = "results"
folds = 4
bootstrap = 50
blend = "logit"
tie_break = false
tie_break_scale = 1
clip = 0.02
seed = 7
jobs = 2
progress = false
level = 0.9

[propensity.forest]
learner = "forest-classifier"
n_estimators = 300
max_features = "sqrt"

[propensity.logistic]

[outcome.linear]
learner = "linear"

[outcome.knn]
learner = "knn-regressor"
n_neighbors = 7
"""


def test_full_config_builds_learners_and_settings(tmp_path):
    config = load_config(write(tmp_path, FULL))
    assert config.settings["folds"] == 4 and config.settings["tie_break"] is False
    # Numbers given as TOML integers are accepted where a real number is expected.
    assert config.settings["tie_break_scale"] == 1.0
    assert config.settings["covariates"] == ["age", "bmi"]
    # Relative paths are anchored at the file's folder, not the working directory.
    assert Path(config.settings["data"]) == (tmp_path / "data" / "trial.csv").resolve()
    assert Path(config.settings["out"]) == (tmp_path / "results").resolve()
    plib, olib = config.library("propensity"), config.library("outcome")
    assert list(plib) == ["forest", "logistic"] and list(olib) == ["linear", "knn"]
    assert plib["forest"].get_params()["n_estimators"] == 300
    # A section without `learner` uses its own name as the catalogue name.
    assert config.propensity["logistic"].learner == "logistic"
    assert olib["knn"].get_params()["kneighborsregressor__n_neighbors"] == 7
    assert config.describe()["propensity"]["forest"] == {
        "learner": "forest-classifier",
        "n_estimators": 300,
        "max_features": "sqrt",
    }


def test_library_is_none_without_sections(tmp_path):
    config = load_config(write(tmp_path, "[settings]\nfolds = 3\n"))
    assert config.library("propensity") is None and config.library("outcome") is None


def test_estimator_settings_are_blend_estimator_arguments(tmp_path):
    params = set(inspect.signature(BlendEstimator).parameters)
    assert set(ESTIMATOR_SETTINGS.values()) <= params
    config = load_config(write(tmp_path, FULL))
    est = BlendEstimator(**{**estimator_kwargs(config.settings), "target": "att"})
    got = est.get_params()
    assert got["n_jobs"] == 2 and got["blend"] == "logit" and got["level"] == 0.9
    assert got["tie_break"] is False and got["clip"] == 0.02


@pytest.mark.parametrize(
    "text, fragments",
    [
        ("[settings]\nfold = 5\n", ["unknown setting 'fold'", "did you mean 'folds'"]),
        ('[settings]\nfolds = "5"\n', ["'folds' must be a whole number", "'5'"]),
        ("[settings]\nfolds = 2.5\n", ["'folds' must be a whole number"]),
        ("[settings]\ntie_break = 1\n", ["'tie_break' must be true or false"]),
        ('[settings]\ncovariates = "age"\n', ["'covariates' must be a list of column names"]),
        ("[settings]\nclip = 0.7\n", ["clip must be >= 0 and < 0.5", "0.7"]),
        ("[settings]\nfolds = 0\n", ["folds must be >= 1"]),
        ("[settings]\njobs = 0\n", ["jobs must be -1"]),
        ('[settings]\nblend = "riez"\n', ["blend must be one of", "did you mean 'riesz'"]),
        ('[settings]\ntarget = "ATE"\n', ["target must be one of"]),
        ("[setting]\nfolds = 5\n", ["unknown section [setting]", "did you mean 'settings'"]),
        ("settings = 3\n", ["'settings' must be a table"]),
        ('[propensity.rf]\nlearner = "random-forest"\n', ["[propensity.rf]", "unknown learner"]),
        ("[propensity.rf]\nlearner = 3\n", ["[propensity.rf]", "catalogue name"]),
        # No code can be named: only catalogue entries are accepted.
        (
            '[outcome.x]\nlearner = "sklearn.linear_model.LinearRegression"\n',
            ["unknown learner 'sklearn.linear_model.LinearRegression'"],
        ),
        ('[outcome.x]\nlearner = "os.system"\n', ["unknown learner 'os.system'"]),
        (
            '[propensity.forest]\nlearner = "forest-classifier"\nn_trees = 3\n',
            ["[propensity.forest]", "no parameter 'n_trees'"],
        ),
        (
            '[propensity.forest]\nlearner = "forest-classifier"\nn_estimators = "many"\n',
            ["[propensity.forest]", "'n_estimators' must be like"],
        ),
        ("[propensity]\n", ["[propensity] must hold one table per learner"]),
        ("[outcome]\nlinear = 1\n", ["[outcome.linear]", "must be a table"]),
        ("[settings\nfolds = 5\n", ["is not valid TOML"]),
    ],
)
def test_bad_config_names_file_and_key(tmp_path, text, fragments):
    path = write(tmp_path, text)
    with pytest.raises(InputError) as info:
        load_config(path)
    message = str(info.value)
    assert str(path) in message
    for fragment in fragments:
        assert fragment in message


def test_missing_and_unreadable_files(tmp_path):
    with pytest.raises(InputError, match="not found"):
        load_config(tmp_path / "absent.toml")
    with pytest.raises(InputError, match="cannot read"):
        load_config(tmp_path)  # a folder
    bad = tmp_path / "latin.toml"
    bad.write_bytes(b'[settings]\ntreatment = "caf\xe9"\n')
    with pytest.raises(InputError, match="cannot read"):
        load_config(bad)


def test_bom_is_accepted(tmp_path):
    path = tmp_path / "bom.toml"
    path.write_bytes(b"\xef\xbb\xbf[settings]\nfolds = 3\n")
    assert load_config(path).settings == {"folds": 3}


def test_command_line_overrides_config(tmp_path):
    config = load_config(write(tmp_path, FULL))
    given = {"folds": 3, "bootstrap": None, "blend": "riesz", "tie_break": None, "seed": 0}
    values, origins = resolve_settings(given, config)
    assert values["folds"] == 3 and origins["folds"] == "--folds"
    assert values["blend"] == "riesz" and values["seed"] == 0
    # Not given on the command line: the file's value stays, and says where it came from.
    assert values["bootstrap"] == 50 and "[settings] bootstrap" in origins["bootstrap"]
    assert values["tie_break"] is False
    # Settings given nowhere are absent, so the estimator's own defaults apply.
    assert "repeats" not in values


def test_command_line_values_are_range_checked():
    with pytest.raises(InputError, match="--tie-break-scale: tie_break_scale must be >= 0"):
        resolve_settings({"tie_break_scale": -1.0})
    with pytest.raises(InputError, match="--bootstrap: bootstrap must be >= 0"):
        resolve_settings({"bootstrap": -5})


def test_kind_mismatch_names_learner_and_file(tmp_path):
    path = write(
        tmp_path, '[propensity.ols]\nlearner = "linear"\n[outcome.lr]\nlearner = "logistic"\n'
    )
    config = load_config(path)
    with pytest.raises(InputError) as info:
        config.check_kinds("classifier")
    assert "[propensity.ols]" in str(info.value) and str(path) in str(info.value)
    with pytest.raises(InputError, match=r"\[outcome.lr\] uses 'logistic', a classifier"):
        config.check_kinds("regressor")


def test_every_setting_has_help_and_a_valid_kind():
    for name, spec in SETTINGS.items():
        assert spec.help, name
        assert spec.kind in ("text", "whole", "number", "switch", "names")
    assert check_setting("level", 0.8, "here") == 0.8
