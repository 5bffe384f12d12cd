"""The settings table: every setting of a run declared once.

Each :class:`Setting` row gives a setting's name, default, type, allowed values, help text and
where it appears. Everything else reads this table:

- :class:`~stackdr.estimation.BlendEstimator` validates its parameters with
  :func:`validate_params` (and its constructor defaults are checked against the table by a test);
- the TOML configuration (``[settings]``) and the command-line flags (name, type, choices and the
  "(default ...)" in their help) come from :data:`SETTINGS` through :mod:`stackdr.io` and
  :mod:`stackdr.cli`;
- the ``settings`` block saved in ``results.json`` holds the rows with ``recorded=True``;
- a Monte Carlo study passes through the rows with ``study=True``.

Adding a setting means adding one row here (and using the value where the work happens).
"""

from __future__ import annotations

import difflib
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from stackdr.core import BLENDS, TARGET_NAMES
from stackdr.errors import InputError
from stackdr.estimation._numbers import DEFAULT_DIGITS
from stackdr.search import CRITERIA, OUTCOME_SIDES

DIRECTIONS = ("all", "credible")
BOOTSTRAP_KINDS = ("multinomial", "bayesian", "refit")
INTERVALS = ("percentile", "basic")
OUTCOME_MODES = ("separate", "pooled")
ON_ERROR = ("drop", "raise")
BACKENDS = (None, "dask")

_KIND_WORDS = {
    "text": "text",
    "whole": "a whole number",
    "number": "a number",
    "switch": "true or false",
    "names": "a list of column names",
}


@dataclass(frozen=True)
class Setting:
    """One setting.

    Attributes
    ----------
    name : str
        The estimator parameter (``BlendEstimator(name=...)``) or, for a run setting, the key.
    default : any
        The default value (the estimator's constructor default).
    kind : str
        "text", "whole", "number", "switch", "names" (a list of column names) or "object"
        (Python objects only: learner dicts, fold label arrays, clients).
    help : str
        One line for ``--help``, configuration errors and documentation.
    choices : tuple, optional
        Allowed values.
    low, high : float, optional
        Bounds of a number; ``low_open`` / ``high_open`` make them exclusive.
    key : str, optional
        The name in configuration files and on the command line, when it differs from ``name``
        (``n_jobs`` is ``jobs``). None for a setting that only the Python API takes.
    estimator : bool
        A parameter of ``BlendEstimator`` (False: describes the run, e.g. the data file).
    recorded : bool
        Saved in a result's ``settings`` block.
    study : bool
        Passed through to the estimator by a Monte Carlo study.
    path : bool
        A file or folder path (relative paths in a configuration file are read from its folder).
    metavar : str, optional
        Placeholder in ``--help``.
    optional_none : bool
        None is allowed and means "choose automatically".
    """

    name: str
    default: Any
    kind: str
    help: str
    choices: tuple | None = None
    low: float | None = None
    high: float | None = None
    low_open: bool = False
    high_open: bool = False
    key: str | None = ""
    estimator: bool = True
    recorded: bool = True
    study: bool = True
    path: bool = False
    metavar: str | None = None
    optional_none: bool = False

    @property
    def config_key(self) -> str | None:
        """Name in configuration files and on the command line (None: Python API only)."""
        if self.key is None:
            return None
        return self.key or self.name

    @property
    def flag(self) -> str | None:
        """The command-line flag (``--tie-break-scale``), or None."""
        key = self.config_key
        return None if key is None else "--" + key.replace("_", "-")

    def default_text(self) -> str:
        """The default as ``--help`` shows it."""
        if isinstance(self.default, bool):
            return "on" if self.default else "off"
        if isinstance(self.default, float):
            return f"{self.default:g}"
        return str(self.default)

    def range_text(self) -> str:
        parts = []
        if self.low is not None:
            parts.append(f"{'>' if self.low_open else '>='} {self.low:g}")
        if self.high is not None:
            parts.append(f"{'<' if self.high_open else '<='} {self.high:g}")
        return " and ".join(parts)


_TABLE = (
    # Run settings (files and columns), then the estimator's parameters in constructor order.
    Setting("data", None, "text", "data file, CSV or Parquet", estimator=False, path=True),
    Setting(
        "treatment",
        None,
        "text",
        "treatment column (0/1, or numeric for target cov)",
        estimator=False,
        metavar="COL",
    ),
    Setting("outcome", None, "text", "outcome column", estimator=False, metavar="COL"),
    Setting(
        "covariates",
        None,
        "names",
        "covariate columns (default: every other column)",
        estimator=False,
        metavar="COL",
    ),
    Setting(
        "weights",
        None,
        "text",
        "sampling weights column (finite, >= 0): estimate the weighted-population target",
        estimator=False,
        metavar="COL",
    ),
    Setting(
        "clusters",
        None,
        "text",
        "cluster labels column: folds keep clusters whole, cluster-robust SEs and bootstrap",
        estimator=False,
        metavar="COL",
    ),
    Setting("out", None, "text", "output folder", estimator=False, path=True, metavar="DIR"),
    Setting("overwrite", False, "switch", "replace an existing results.json", estimator=False),
    Setting(
        "outcome_label",
        None,
        "text",
        "outcome with its unit for axes and table headers, e.g. 'change in systolic pressure "
        "(mmHg)'",
        estimator=False,
        metavar="TEXT",
    ),
    Setting(
        "digits",
        DEFAULT_DIGITS,
        "whole",
        "significant digits in tables",
        low=1,
        high=15,
        estimator=False,
        metavar="D",
    ),
    Setting("target", "ate", "text", "target parameter", choices=TARGET_NAMES, study=False),
    Setting(
        "propensity_learners",
        None,
        "object",
        "propensity library: dict name -> classifier (default library when None)",
        key=None,
        recorded=False,
        study=False,
    ),
    Setting(
        "outcome_learners",
        None,
        "object",
        "outcome library: dict name -> regressor (default library when None)",
        key=None,
        recorded=False,
        study=False,
    ),
    Setting("folds", 5, "whole", "cross-fitting folds (1 fits in sample)", low=1, metavar="S"),
    Setting(
        "repeats",
        1,
        "whole",
        "independent fold assignments, combined by the median",
        low=1,
        metavar="R",
    ),
    Setting("blend", "riesz", "text", "how propensity learners are blended", BLENDS),
    Setting("criterion", "mixed", "text", "pseudo-risk minimised by the weights", CRITERIA),
    Setting(
        "tie_break",
        True,
        "switch",
        "move towards the prediction-loss weights within the noise",
    ),
    Setting(
        "tie_break_scale",
        0.25,
        "number",
        "tie-break tolerance in standard errors",
        low=0,
        metavar="C",
    ),
    Setting(
        "stacked_propensity",
        True,
        "switch",
        "add the prediction-loss stacked propensity as one more propensity learner of the weight "
        "search (riesz blend)",
    ),
    Setting(
        "outcome_side",
        "stacking",
        "text",
        "outcome learners weighted by least-squares stacking (the search then picks the "
        "propensity side only) or by the target-aimed search",
        OUTCOME_SIDES,
    ),
    Setting(
        "contrast_z",
        1.5,
        "number",
        "keep the target-aimed weights only when their estimate differs from prediction-loss "
        "stacking's by more than Z paired SEs (0: always keep them)",
        low=0,
        metavar="Z",
    ),
    Setting(
        "contrast_guard",
        1.05,
        "number",
        "variance guard of the contrast test: keep the target-aimed weights whatever the "
        "contrast when their influence-function SE is at most K x prediction-loss stacking's "
        "(0: off)",
        low=0,
        metavar="K",
    ),
    Setting(
        "directions", "all", "text", "learners whose swaps define the perturbations", DIRECTIONS
    ),
    Setting(
        "direction_tolerance",
        0.25,
        "number",
        "relative loss tolerance for directions=credible",
        low=0,
        metavar="X",
    ),
    Setting(
        "clip",
        0.01,
        "number",
        "clip propensities to [EPS, 1 - EPS]",
        low=0,
        high=0.5,
        high_open=True,
        metavar="EPS",
    ),
    Setting("outcome_mode", "separate", "text", "per-arm or pooled outcome models", OUTCOME_MODES),
    Setting("on_error", "drop", "text", "what to do with a failing learner", ON_ERROR),
    Setting(
        "level",
        0.95,
        "number",
        "confidence level",
        low=0,
        high=1,
        low_open=True,
        high_open=True,
        metavar="L",
    ),
    Setting(
        "bootstrap",
        1000,
        "whole",
        "bootstrap replicates (0: Wald intervals only)",
        low=0,
        metavar="B",
    ),
    Setting(
        "bootstrap_kind",
        "multinomial",
        "text",
        "reweighting with multinomial or exponential (bayesian) row weights, or refit every "
        "learner",
        BOOTSTRAP_KINDS,
    ),
    Setting("interval", "percentile", "text", "bootstrap interval type", INTERVALS),
    Setting(
        "calibration_refits",
        5,
        "whole",
        "refit replicates that calibrate the reweighting bootstrap when the fold-model "
        "jackknife flags the fit (0: never): SEs and intervals widen by their spread's ratio to "
        "the reweighting replicates on the same row draws",
        low=0,
        metavar="M",
    ),
    Setting(
        "calibration_gate",
        0.05,
        "number",
        "run the refit calibration when the fold-model jackknife puts the learners' refitting "
        "noise above this share of the bootstrap variance (0: always)",
        low=0,
        metavar="G",
    ),
    Setting(
        "calibration_shrink",
        0.5,
        "number",
        "how far the refit calibration discounts its own noise: the refits' variance excess x "
        "is shrunk to x * max(0, 1 - (S * s / x)^2), s its jackknife SE over the paired "
        "replicates (0: no shrinkage)",
        low=0,
        metavar="S",
    ),
    Setting(
        "calibration_rows",
        20000,
        "whole",
        "largest data set (rows) the gated refit calibration runs on by default; above it a "
        "flagged fit gets a note instead (each refit costs a full fit)",
        low=0,
        metavar="N",
    ),
    Setting(
        "chunk_size",
        None,
        "whole",
        "bootstrap replicates per batched matrix product (results do not depend on it)",
        low=1,
        key=None,
        optional_none=True,
    ),
    Setting(
        "seed",
        0,
        "whole",
        "random seed for folds and bootstrap",
        low=0,
        study=False,
        metavar="N",
    ),
    Setting(
        "n_jobs",
        1,
        "whole",
        "parallel workers for learner fits (-1: all cores)",
        low=-1,
        key="jobs",
        recorded=False,
        study=False,
        metavar="J",
        optional_none=True,
    ),
    Setting(
        "threads",
        1,
        "whole",
        "native (OpenMP/BLAS) threads per learner fit; a run uses jobs x threads cores",
        low=1,
        recorded=False,
        study=False,
        metavar="T",
    ),
    Setting("progress", False, "switch", "show progress bars", recorded=False, study=False),
    Setting(
        "backend",
        None,
        "text",
        "where learner fits run: None (local processes) or dask",
        choices=BACKENDS,
        key=None,
        recorded=False,
        study=False,
    ),
    Setting(
        "cluster",
        None,
        "object",
        "with backend dask: scheduler address, local worker count or a client",
        key=None,
        recorded=False,
        study=False,
    ),
)

SETTINGS: dict[str, Setting] = {s.name: s for s in _TABLE}
#: The estimator's parameters in constructor order.
ESTIMATOR_PARAMS: tuple[str, ...] = tuple(s.name for s in _TABLE if s.estimator)
#: Settings a Monte Carlo study passes to the estimator.
STUDY_SETTINGS: tuple[str, ...] = tuple(s.name for s in _TABLE if s.estimator and s.study)
#: Settings by their configuration-file / command-line key.
CONFIG_SETTINGS: dict[str, Setting] = {
    s.config_key: s for s in _TABLE if s.config_key is not None and s.kind != "object"
}


def close_match(word: Any, options) -> str:
    """`` (did you mean 'x'?)`` for a near miss, else an empty string."""
    if not isinstance(word, str):
        return ""
    match = difflib.get_close_matches(word, [str(o) for o in options], n=1)
    return f" (did you mean {match[0]!r}?)" if match else ""


def check_value(setting: Setting, value: Any, origin: str = "", *, key: str | None = None) -> Any:
    """Type- and range-check one value of a setting; returns it (whole numbers accepted as
    numbers, returned as float).

    Parameters
    ----------
    setting : Setting
    value : any
    origin : str
        Where the value came from, prefixed to messages (e.g. "--folds" or "config file
        'a.toml', [settings]").
    key : str, optional
        The name to show (default: the configuration key, else the parameter name).

    Raises
    ------
    InputError
        Naming the setting, the origin and the value.
    """
    name = key or setting.config_key or setting.name
    where = f"{origin}: " if origin else ""
    if setting.kind == "object" or (value is None and setting.optional_none):
        return value
    is_number = isinstance(value, (int, float)) and not isinstance(value, bool)
    ok = {
        "text": isinstance(value, str)
        or (setting.choices is not None and value in setting.choices),
        "whole": is_number and float(value).is_integer(),
        "number": is_number,
        "switch": isinstance(value, bool),
        "names": isinstance(value, list) and all(isinstance(v, str) for v in value),
    }[setting.kind]
    if setting.kind == "whole" and origin and not isinstance(value, int):
        # Configuration files and flags must say a whole number as one (3, not 3.0 or "3").
        ok = False
    if not ok:
        raise InputError(
            f"{where}setting {name!r} must be {_KIND_WORDS[setting.kind]}, got {value!r}"
        )
    if setting.choices is not None and value not in setting.choices:
        shown = ", ".join(str(c) for c in setting.choices)
        raise InputError(
            f"{where}{name} must be one of {shown}, got {value!r}"
            f"{close_match(value, setting.choices)}"
        )
    if is_number:
        too_low = setting.low is not None and (
            value <= setting.low if setting.low_open else value < setting.low
        )
        too_high = setting.high is not None and (
            value >= setting.high if setting.high_open else value > setting.high
        )
        if too_low or too_high or value != value:
            raise InputError(f"{where}{name} must be {setting.range_text()}, got {value!r}")
        if setting.name == "n_jobs" and value == 0:
            raise InputError(f"{where}{name} must be -1 (all cores) or at least 1, got 0")
    if setting.kind == "names" and not value:
        raise InputError(f"{where}{name} is an empty list")
    if setting.kind == "number":
        return float(value)
    if setting.kind == "whole":
        return int(value)
    return value


def validate_params(params: Mapping[str, Any], origin: str = "") -> None:
    """Check estimator parameters against the table (the one validation entry point).

    ``target`` may also be a :class:`~stackdr.core.Target` object and ``folds`` an array of
    fold labels; those are checked where they are used (``get_target``, ``make_folds``).
    """
    for name, value in params.items():
        setting = SETTINGS[name]
        if name == "target" and not isinstance(value, str):
            continue
        if name == "folds" and not _is_scalar(value):
            continue
        check_value(setting, value, origin, key=name)


def _is_scalar(value: Any) -> bool:
    return isinstance(value, (int, float, str, bool)) or value is None


def settings_record(params: Mapping[str, Any]) -> dict[str, Any]:
    """The ``settings`` block of a result: recorded estimator parameters, plain values."""
    record = {}
    for name, value in params.items():
        if name == "target":
            continue
        setting = SETTINGS[name]
        if not setting.recorded:
            continue
        if name == "folds" and not _is_scalar(value):
            value = "user-supplied labels"
        record[name] = value
    target = params.get("target", SETTINGS["target"].default)
    record["target"] = target if isinstance(target, str) else target.name
    return record
