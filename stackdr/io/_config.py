"""TOML run configuration: both learner libraries by catalogue name, and every run setting.

A configuration file may only name learners from :data:`stackdr.learners.CATALOGUE` and set
their parameters; it never imports or runs code. Layout::

    [settings]
    target = "ate"
    treatment = "programme"
    outcome = "sbp_change"
    bootstrap = 500

    [propensity.logistic]             # the section name is the learner's name in tables
    learner = "logistic"              # catalogue name (may be left out when equal to the name)

    [propensity.forest]
    learner = "forest-classifier"
    n_estimators = 300

    [outcome.linear]

Relative paths in ``settings.data`` and ``settings.out`` are read relative to the file's folder,
so a configuration can live beside its data. Command-line flags override file values, which
override the built-in defaults (:func:`resolve_settings`).
"""

from __future__ import annotations

import difflib
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from sklearn.base import BaseEstimator

from stackdr.core import BLENDS, TARGET_NAMES
from stackdr.errors import InputError
from stackdr.estimation import BOOTSTRAP_KINDS, CATALOGUE, DIRECTIONS, INTERVALS, make_learner
from stackdr.search import CRITERIA

SIDES = ("propensity", "outcome")


@dataclass(frozen=True)
class Setting:
    """One run setting: its value type, allowed values and meaning.

    ``kind`` is one of "text", "whole", "number", "switch", "names" (a list of column names).
    ``low`` and ``high`` bound numbers (``high`` exclusive when ``high_open``); ``low_open``
    makes ``low`` exclusive.
    """

    kind: str
    help: str
    choices: tuple | None = None
    low: float | None = None
    high: float | None = None
    low_open: bool = False
    high_open: bool = False
    path: bool = False


SETTINGS: dict[str, Setting] = {
    "data": Setting("text", "data file, CSV or Parquet", path=True),
    "treatment": Setting("text", "treatment column (0/1, or numeric for target cov)"),
    "outcome": Setting("text", "outcome column"),
    "covariates": Setting("names", "covariate columns (default: every other column)"),
    "target": Setting("text", "target parameter", choices=TARGET_NAMES),
    "out": Setting("text", "output folder", path=True),
    "overwrite": Setting("switch", "replace an existing results.json"),
    "folds": Setting("whole", "cross-fitting folds (1 fits in sample)", low=1),
    "repeats": Setting("whole", "independent fold assignments, combined by the median", low=1),
    "bootstrap": Setting("whole", "bootstrap replicates (0: Wald intervals only)", low=0),
    "bootstrap_kind": Setting("text", "bootstrap kind", choices=BOOTSTRAP_KINDS),
    "blend": Setting("text", "how propensity learners are blended", choices=BLENDS),
    "criterion": Setting("text", "pseudo-risk minimised by the weights", choices=CRITERIA),
    "tie_break": Setting("switch", "move towards prediction-loss weights within the noise"),
    "tie_break_scale": Setting("number", "tie-break tolerance in standard errors", low=0),
    "clip": Setting("number", "propensity clipping bound", low=0, high=0.5, high_open=True),
    "seed": Setting("whole", "random seed for folds and bootstrap", low=0),
    "jobs": Setting("whole", "parallel workers for learner fits (-1: all cores)", low=-1),
    "progress": Setting("switch", "show progress bars"),
    "level": Setting("number", "confidence level", low=0, high=1, low_open=True, high_open=True),
    "interval": Setting("text", "bootstrap interval type", choices=INTERVALS),
    "directions": Setting("text", "learners whose swaps define the perturbations", DIRECTIONS),
    "direction_tolerance": Setting("number", "relative loss tolerance for credible", low=0),
    "outcome_mode": Setting("text", "per-arm or pooled outcome models", ("separate", "pooled")),
    "on_error": Setting("text", "what to do with a failing learner", ("drop", "raise")),
}

# Settings that configure BlendEstimator directly (the others describe the run: files, columns).
ESTIMATOR_SETTINGS = {
    "folds": "folds",
    "repeats": "repeats",
    "bootstrap": "bootstrap",
    "bootstrap_kind": "bootstrap_kind",
    "blend": "blend",
    "criterion": "criterion",
    "tie_break": "tie_break",
    "tie_break_scale": "tie_break_scale",
    "clip": "clip",
    "seed": "seed",
    "jobs": "n_jobs",
    "progress": "progress",
    "level": "level",
    "interval": "interval",
    "directions": "directions",
    "direction_tolerance": "direction_tolerance",
    "outcome_mode": "outcome_mode",
    "on_error": "on_error",
}

_KIND_WORDS = {
    "text": "text",
    "whole": "a whole number",
    "number": "a number",
    "switch": "true or false",
    "names": "a list of column names",
}


@dataclass(frozen=True)
class LearnerSpec:
    """A learner declared in a configuration file: catalogue recipe plus parameter overrides."""

    side: str
    name: str
    learner: str
    params: dict

    @property
    def kind(self) -> str:
        """ "classifier" or "regressor"."""
        return CATALOGUE[self.learner].kind

    def build(self) -> BaseEstimator:
        """A fresh, unfitted estimator."""
        return make_learner(self.learner, **self.params)


@dataclass(frozen=True)
class RunConfig:
    """A parsed configuration file.

    Attributes
    ----------
    path : Path or None
        Where it was read from (None for an empty configuration).
    settings : dict
        Values given under ``[settings]``, type-checked, paths made absolute.
    propensity, outcome : dict name -> LearnerSpec
        Declared libraries; empty means "use the default library".
    """

    path: Path | None = None
    settings: dict = field(default_factory=dict)
    propensity: dict = field(default_factory=dict)
    outcome: dict = field(default_factory=dict)

    @property
    def label(self) -> str:
        return f"config file {str(self.path)!r}" if self.path else "configuration"

    def library(self, side: str) -> dict[str, BaseEstimator] | None:
        """Built estimators of one side, or None when the file declares none."""
        specs = getattr(self, side)
        return {name: spec.build() for name, spec in specs.items()} or None

    def check_kinds(self, propensity_kind: str) -> None:
        """Check declared learners against what the data need.

        Parameters
        ----------
        propensity_kind : {"classifier", "regressor"}
            "classifier" for a 0/1 treatment, "regressor" for a continuous one.
        """
        for side, needed in (("propensity", propensity_kind), ("outcome", "regressor")):
            for spec in getattr(self, side).values():
                if spec.kind != needed:
                    why = (
                        " (the treatment is coded 0/1)"
                        if side == "propensity" and needed == "classifier"
                        else ""
                    )
                    raise InputError(
                        f"{self.label}: [{side}.{spec.name}] uses {spec.learner!r}, a "
                        f"{spec.kind}; {side} learners must be {needed}s{why}"
                    )

    def describe(self) -> dict:
        """Plain-data record of the declared libraries (for results files)."""
        return {
            side: {
                name: {"learner": spec.learner, **spec.params}
                for name, spec in getattr(self, side).items()
            }
            for side in SIDES
        }


def _close(word: str, options) -> str:
    match = difflib.get_close_matches(word, list(options), n=1)
    return f" (did you mean {match[0]!r}?)" if match else ""


def check_setting(name: str, value: Any, origin: str) -> Any:
    """Type- and range-check one setting; returns the value (ints accepted as numbers).

    Parameters
    ----------
    name : str
        Key of :data:`SETTINGS`.
    value : any
        The value as given.
    origin : str
        Where it came from, for the message (e.g. "--folds" or "config file 'a.toml'").

    Raises
    ------
    InputError
        Naming the setting, the origin and the value.
    """
    if name not in SETTINGS:
        raise InputError(f"{origin}: unknown setting {name!r}{_close(name, SETTINGS)}")
    spec = SETTINGS[name]
    is_number = isinstance(value, (int, float)) and not isinstance(value, bool)
    ok = {
        "text": isinstance(value, str),
        "whole": isinstance(value, int) and not isinstance(value, bool),
        "number": is_number,
        "switch": isinstance(value, bool),
        "names": isinstance(value, list) and all(isinstance(v, str) for v in value),
    }[spec.kind]
    if not ok:
        raise InputError(
            f"{origin}: setting {name!r} must be {_KIND_WORDS[spec.kind]}, got {value!r}"
        )
    if spec.choices is not None and value not in spec.choices:
        raise InputError(
            f"{origin}: {name} must be one of {', '.join(spec.choices)}, got {value!r}"
            f"{_close(value, spec.choices)}"
        )
    if is_number:
        too_low = spec.low is not None and (
            value <= spec.low if spec.low_open else value < spec.low
        )
        too_high = spec.high is not None and (
            value >= spec.high if spec.high_open else value > spec.high
        )
        if too_low or too_high or value != value:
            raise InputError(f"{origin}: {name} must be {_range_text(spec)}, got {value!r}")
        if name == "jobs" and value == 0:
            raise InputError(f"{origin}: jobs must be -1 (all cores) or at least 1, got 0")
    if spec.kind == "names" and not value:
        raise InputError(f"{origin}: {name} is an empty list")
    return float(value) if spec.kind == "number" else value


def _range_text(spec: Setting) -> str:
    parts = []
    if spec.low is not None:
        parts.append(f"{'>' if spec.low_open else '>='} {spec.low:g}")
    if spec.high is not None:
        parts.append(f"{'<' if spec.high_open else '<='} {spec.high:g}")
    return " and ".join(parts)


def load_config(path: str | Path) -> RunConfig:
    """Read and check a TOML configuration file.

    Parameters
    ----------
    path : str or Path

    Returns
    -------
    RunConfig

    Raises
    ------
    InputError
        Unreadable file, TOML syntax error, unknown section or key, wrong type, unknown learner
        or parameter; the message names the file and the key or learner.
    """
    path = Path(path)
    label = f"config file {str(path)!r}"
    try:
        text = path.read_bytes().decode("utf-8-sig")
    except FileNotFoundError:
        raise InputError(f"{label} not found") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"cannot read {label}: {exc}") from None
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{label} is not valid TOML: {exc}") from None
    return parse_config(raw, path)


def parse_config(raw: Mapping, path: Path | None = None) -> RunConfig:
    """Check an already-parsed configuration mapping (the contents of a TOML file).

    Parameters
    ----------
    raw : mapping
        Top-level tables ``settings``, ``propensity`` and ``outcome``.
    path : Path, optional
        The file it came from: names it in messages and anchors relative paths.
    """
    label = f"config file {str(path)!r}" if path else "configuration"
    unknown = [key for key in raw if key not in ("settings", *SIDES)]
    if unknown:
        raise InputError(
            f"{label}: unknown section [{unknown[0]}]{_close(unknown[0], ('settings', *SIDES))}; "
            "sections are [settings], [propensity.NAME] and [outcome.NAME]"
        )
    settings_raw = raw.get("settings", {})
    if not isinstance(settings_raw, Mapping):
        raise InputError(f"{label}: 'settings' must be a table ([settings])")
    base = path.parent.resolve() if path else Path.cwd()
    settings = {}
    for key, value in settings_raw.items():
        value = check_setting(key, value, f"{label}, [settings]")
        if SETTINGS[key].path:
            value = str(base / Path(value).expanduser())
        settings[key] = value
    libraries = {side: _parse_library(raw.get(side), side, label) for side in SIDES}
    return RunConfig(path, settings, libraries["propensity"], libraries["outcome"])


def _parse_library(section: Any, side: str, label: str) -> dict[str, LearnerSpec]:
    if section is None:
        return {}
    if not isinstance(section, Mapping) or not section:
        raise InputError(
            f"{label}: [{side}] must hold one table per learner, e.g. [{side}.NAME] with "
            'learner = "<catalogue name>"'
        )
    specs = {}
    for name, body in section.items():
        where = f"{label}, [{side}.{name}]"
        if not isinstance(body, Mapping):
            raise InputError(f"{where}: must be a table of learner settings, got {body!r}")
        body = dict(body)
        learner = body.pop("learner", name)
        if not isinstance(learner, str):
            raise InputError(f"{where}: learner must be a catalogue name (text), got {learner!r}")
        if learner not in CATALOGUE:
            raise InputError(
                f"{where}: unknown learner {learner!r}{_close(learner, CATALOGUE)}; "
                "`stackdr learners` lists the catalogue"
            )
        try:
            make_learner(learner, **body)
        except InputError as exc:
            raise InputError(f"{where}: {exc}") from None
        except (TypeError, ValueError) as exc:
            raise InputError(f"{where}: parameters rejected by {learner!r}: {exc}") from None
        specs[name] = LearnerSpec(side, name, learner, body)
    return specs


def resolve_settings(
    given: Mapping[str, Any], config: RunConfig | None = None
) -> tuple[dict, dict]:
    """Merge command-line values over configuration values.

    Parameters
    ----------
    given : mapping
        Command-line values; None means "not given on the command line".
    config : RunConfig, optional

    Returns
    -------
    values : dict
        Every setting that was given somewhere (absent keys fall back to the estimator's
        defaults).
    origins : dict
        For each value, where it came from (a flag or the configuration file).
    """
    values, origins = {}, {}
    if config is not None:
        for key, value in config.settings.items():
            values[key] = value
            origins[key] = f"{config.label}, [settings] {key}"
    for key, value in given.items():
        if value is None:
            continue
        flag = "--" + key.replace("_", "-")
        values[key] = check_setting(key, value, flag)
        origins[key] = flag
    return values, origins


def estimator_kwargs(values: Mapping[str, Any]) -> dict:
    """The subset of resolved settings that are BlendEstimator arguments, renamed."""
    return {ESTIMATOR_SETTINGS[k]: v for k, v in values.items() if k in ESTIMATOR_SETTINGS}
