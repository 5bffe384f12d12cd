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

import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from sklearn.base import BaseEstimator

from stackdr.errors import InputError
from stackdr.estimation import CATALOGUE, CONFIG_SETTINGS, check_value, close_match, make_learner

SIDES = ("propensity", "outcome")


#: Settings by configuration key (``jobs``, ``tie_break_scale``, ...), from the settings table.
SETTINGS = CONFIG_SETTINGS
#: Configuration key -> BlendEstimator parameter, for the settings that configure the estimator
#: (the others describe the run: files, columns).
ESTIMATOR_SETTINGS = {key: s.name for key, s in CONFIG_SETTINGS.items() if s.estimator}


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


def check_setting(name: str, value: Any, origin: str) -> Any:
    """Type- and range-check one setting given by its configuration key; returns the value
    (ints accepted as numbers).

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
        raise InputError(f"{origin}: unknown setting {name!r}{close_match(name, SETTINGS)}")
    return check_value(SETTINGS[name], value, origin)


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
        hint = close_match(unknown[0], ("settings", *SIDES))
        raise InputError(
            f"{label}: unknown section [{unknown[0]}]{hint}; "
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
                f"{where}: unknown learner {learner!r}{close_match(learner, CATALOGUE)}; "
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
