"""The saved-results format: a fitted result as a plain, versioned JSON document.

:func:`result_to_dict` turns a :class:`stackdr.estimation.BlendResult` into nested dicts, lists,
strings, numbers, booleans and nulls only (its diagnostics are computed by the result itself and
only formatted here); :func:`write_results_json` writes it atomically and
:func:`read_results_json` reads and validates it. The layout is documented field by field in
``docs/results-schema.md``. NaN and infinities are stored as ``null`` (JSON has no token for them,
RFC 8259 section 6). Learner and column names are user text and are only ever stored as data.
"""

from __future__ import annotations

import json
import math
import os
import pathlib
import secrets
from dataclasses import dataclass

import numpy as np

from stackdr import __version__
from stackdr.errors import InputError
from stackdr.estimation import CAUTION, BlendResult, phi_function

SCHEMA = "stackdr-results/1"


# --------------------------------------------------------------------------------- conversion


def plain(value, where: str = "value"):
    """Convert numpy/pandas scalars, arrays and tuples to JSON types; non-finite floats to None.

    Parameters
    ----------
    value : object
        Nested dicts, lists, tuples, numpy arrays and scalars.
    where : str
        Location used in the error message.

    Returns
    -------
    object
        The same structure made of dict, list, str, int, float, bool and None only.

    Raises
    ------
    InputError
        For a value with no JSON form (the message names its location and type).
    """
    if value is None or isinstance(value, (bool, str)):
        return value
    if isinstance(value, np.bool_):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        value = float(value)
        return value if math.isfinite(value) else None
    if isinstance(value, np.ndarray):
        return plain(value.tolist(), where)
    if isinstance(value, dict):
        return {str(k): plain(v, f"{where}.{k}") for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [plain(v, f"{where}[{i}]") for i, v in enumerate(value)]
    raise InputError(f"{where} has type {type(value).__name__}, which has no JSON form")


def _named(names, values) -> dict:
    return {str(name): plain(v) for name, v in zip(names, values)}


def _solver_step(key: str, record) -> dict:
    details = {
        str(k): plain(v)
        for k, v in record.details.items()
        if v is None or isinstance(v, (bool, str, int, float, np.number, np.bool_))
    }
    return {
        "step": key,
        "method": record.method,
        "status": record.status,
        "seconds": plain(record.time),
        "objective": plain(record.objective),
        "details": details,
    }


_STEP_SIDES = {"alpha": "propensity", "beta": "outcome", "joint": "both"}


def _tie_break(result: BlendResult) -> dict:
    steps = []
    for key, rec in result.search.records.items():
        if not key.endswith("_tie_break"):
            continue
        d = rec.details
        steps.append(
            {
                "step": key,
                "side": _STEP_SIDES.get(key.split("_", 1)[0], "both"),
                "tolerance": plain(d.get("tolerance")),
                "bound": plain(d.get("bound")),
                "moved": bool(d.get("moved", False)),
                "anchor_feasible": plain(d.get("anchor_feasible")),
                "distance_to_anchor": plain(d.get("distance_to_anchor")),
                "pure_distance_to_anchor": plain(d.get("pure_distance_to_anchor")),
            }
        )
    return {
        "enabled": bool(result.settings.get("tie_break", False)),
        "scale": plain(result.settings.get("tie_break_scale")),
        "moved": result.tie_break_active,
        "steps": steps,
    }


def _sensitivities(result: BlendResult) -> dict:
    an, cf = result.analysis, result.crossfit
    alpha, beta = result.alpha.to_numpy(), result.beta.to_numpy()
    by_outcome = phi_function(an.inputs, an.settings.blend)(alpha[None])[0]
    by_propensity = an.Psi @ beta
    prop_mask, out_mask = an.masks
    return {
        "outcome_direction": plain(result.search.s_out),
        "weight_direction": plain(result.search.s_ps),
        "at_chosen_weights": {
            "by_outcome_learner": _named(cf.outcome_names, by_outcome),
            "by_propensity_learner": _named(cf.propensity_names, by_propensity),
        },
        "direction_learners": {
            "propensity": _masked(cf.propensity_names, prop_mask),
            "outcome": _masked(cf.outcome_names, out_mask),
        },
    }


def _masked(names, mask) -> list:
    return list(names) if mask is None else [n for n, m in zip(names, mask) if m]


def _diagnostics(result: BlendResult) -> dict:
    cf, data = result.crossfit, result.data
    diag = result.diagnostics
    learners = [
        {
            "side": row["side"],
            "learner": str(row["learner"]),
            "loss": plain(row["loss"]),
            "metric": row["metric"],
            "stacking_weight": plain(row["stacking weight"]),
            "fit_seconds": plain(cf.fit_seconds.get(f"{row['side']}:{row['learner']}")),
        }
        for row in result.losses.to_dict("records")
    ]
    failed = []
    for key, message in cf.failures.items():
        side, name = key.split(":", 1)
        failed.append({"side": side, "learner": name, "reason": message})
    hist = diag.overlap_histogram
    ranges = diag.propensity_range
    return {
        "clip": plain(diag.clip),
        "repeats": cf.repeats,
        "propensity_kind": cf.propensity_kind,
        "clipping": {name: {"low": lo, "high": hi} for name, (lo, hi) in diag.clipped.items()},
        "arm_sizes": plain(diag.arm_sizes),
        "propensity_range": None
        if ranges is None
        else {
            arm: None if span is None else {"min": plain(span[0]), "max": plain(span[1])}
            for arm, span in ranges.items()
        },
        "effective_sample_size": plain(diag.effective_sample_size),
        "overlap_histogram": None
        if hist is None
        else {
            "edges": plain(hist.edges),
            "counts": {arm: plain(counts) for arm, counts in hist.counts.items()},
        },
        "learners": learners,
        "failed_learners": failed,
        "notes": [str(note) for note in data.notes],
    }


def _bootstrap(result: BlendResult) -> dict | None:
    boot = result.bootstrap
    if boot is None:
        return None
    freq = {"propensity": {}, "outcome": {}}
    for row in boot.selection_frequency.itertuples(index=False):
        freq[row.side][str(row.learner)] = {
            "share_weighted": plain(row.share_weighted),
            "mean_weight": plain(row.mean_weight),
        }
    return {
        "kind": boot.kind,
        "method": boot.method,
        "level": plain(boot.level),
        "replicates": int(boot.replicates),
        "chunk_size": int(boot.chunk_size),
        "estimates": {str(k): plain(boot.estimates[k].to_numpy()) for k in boot.estimates},
        "intervals": {
            str(k): {"low": plain(lo), "high": plain(hi)} for k, (lo, hi) in boot.intervals.items()
        },
        "standard_errors": {str(k): plain(v) for k, v in boot.standard_errors.items()},
        "weights": {
            "propensity": {str(k): plain(boot.alpha[k].to_numpy()) for k in boot.alpha},
            "outcome": {str(k): plain(boot.beta[k].to_numpy()) for k in boot.beta},
        },
        "selection_frequency": freq,
        "tie_break_share": plain(boot.tie_break_share),
        "seconds": {str(k): plain(v) for k, v in boot.seconds.items()},
    }


def _cautions(result: BlendResult) -> list:
    cautions = [CAUTION]
    if result.bootstrap is None:
        cautions.append(
            "No bootstrap was run: the intervals are Wald intervals from the influence function "
            "and ignore that the weights were chosen from the same data."
        )
    clipped = int(result.clip_counts.to_numpy().sum())
    if clipped:
        cautions.append(
            f"{clipped} out-of-fold propensity predictions (counted over all learners) were "
            f"clipped to [{result.crossfit.clip:g}, "
            f"{1 - result.crossfit.clip:g}]; some rows have little overlap between the arms."
        )
    if result.crossfit.failures:
        cautions.append(
            f"{len(result.crossfit.failures)} learner(s) failed and were left out; see the "
            "diagnostics."
        )
    return cautions


def result_to_dict(result: BlendResult) -> dict:
    """Everything needed to report a fit, as JSON-ready nested dicts (schema ``SCHEMA``).

    Parameters
    ----------
    result : BlendResult
        A fitted result from :meth:`stackdr.BlendEstimator.fit`.

    Returns
    -------
    dict
        Plain data (see ``docs/results-schema.md``); NaN and infinities become None.
    """
    cf, data = result.crossfit, result.data
    pnames, onames = list(cf.propensity_names), list(cf.outcome_names)
    low, high = result.interval
    estimators = []
    for row in result.estimators:
        wald_low, wald_high = row.wald_interval
        estimators.append(
            {
                "name": row.name,
                "kind": row.kind,
                "estimate": plain(row.estimate),
                "se": plain(row.se),
                "low": plain(row.low),
                "high": plain(row.high),
                "interval_method": row.interval_method,
                "wald_low": plain(wald_low),
                "wald_high": plain(wald_high),
                "bootstrap_se": plain(row.bootstrap_se),
                "pseudo_risk": plain(row.pseudo_risk),
                "weights": {
                    "propensity": _named(pnames, row.alpha),
                    "outcome": _named(onames, row.beta),
                },
            }
        )
    return {
        "schema": SCHEMA,
        "package_version": __version__,
        "target": {"name": result.target.name, "description": result.target.description},
        "n": int(data.n),
        "estimate": plain(result.estimate),
        "se": plain(result.se),
        "interval": {
            "low": plain(low),
            "high": plain(high),
            "level": plain(result.level),
            "method": result.interval_method,
        },
        "weights": {
            "propensity": _named(pnames, result.alpha.to_numpy()),
            "outcome": _named(onames, result.beta.to_numpy()),
        },
        "pair_table": {
            "rows": pnames,
            "columns": onames,
            "values": plain(result.analysis.Psi),
            "standard_errors": plain(result.analysis.pair_se),
        },
        "estimators": estimators,
        "sensitivities": _sensitivities(result),
        "pseudo_risk": plain(result.pseudo_risk),
        "tie_break": _tie_break(result),
        "solver_records": [_solver_step(k, rec) for k, rec in result.search.records.items()],
        "diagnostics": _diagnostics(result),
        "bootstrap": _bootstrap(result),
        "settings": plain(result.settings, "settings"),
        "seed": plain(result.settings.get("seed")),
        "timings": plain(result.timings, "timings"),
        "data": {
            "treatment": data.treatment_name,
            "outcome": data.outcome_name,
            "covariates": [str(c) for c in data.covariate_names],
        },
        "cautions": _cautions(result),
    }


# --------------------------------------------------------------------------------- validation


@dataclass(frozen=True)
class _ListOf:
    item: object


@dataclass(frozen=True)
class _MapOf:
    value: object


@dataclass(frozen=True)
class _Maybe:
    inner: object


# Largest magnitude a saved number may have. Outcomes are limited to 1e100 (stackdr.data), so
# estimates stay near that and squared quantities near 1e200; larger values can only come from a
# damaged file, and the figures' arithmetic on them would overflow.
_LARGEST_SAVED = 1e250

_KIND_TEXT = {
    "num": "a number",
    "num?": "a number or null",
    "int": "a whole number",
    "str": "a string",
    "bool": "true or false",
    "any": "a JSON value",
}
_NUMS = _ListOf("num?")
_WEIGHTS = {"propensity": _MapOf("num?"), "outcome": _MapOf("num?")}
_LOW_HIGH = {"low": "num?", "high": "num?"}

SPEC = {
    "schema": "str",
    "package_version": "str",
    "target": {"name": "str", "description": "str"},
    "n": "int",
    "estimate": "num",
    "se": "num?",
    "interval": {"low": "num?", "high": "num?", "level": "num", "method": "str"},
    "weights": _WEIGHTS,
    "pair_table": {
        "rows": _ListOf("str"),
        "columns": _ListOf("str"),
        "values": _ListOf(_NUMS),
        "standard_errors": _ListOf(_NUMS),
    },
    "estimators": _ListOf(
        {
            "name": "str",
            "kind": "str",
            "estimate": "num?",
            "se": "num?",
            "low": "num?",
            "high": "num?",
            "interval_method": "str",
            "wald_low": "num?",
            "wald_high": "num?",
            "bootstrap_se": "num?",
            "pseudo_risk": "num?",
            "weights": _WEIGHTS,
        }
    ),
    "sensitivities": {
        "outcome_direction": "num?",
        "weight_direction": "num?",
        "at_chosen_weights": {
            "by_outcome_learner": _MapOf("num?"),
            "by_propensity_learner": _MapOf("num?"),
        },
        "direction_learners": {"propensity": _ListOf("str"), "outcome": _ListOf("str")},
    },
    "pseudo_risk": "num?",
    "tie_break": {
        "enabled": "bool",
        "scale": "num?",
        "moved": "bool",
        "steps": _ListOf(
            {
                "step": "str",
                "side": "str",
                "tolerance": "num?",
                "bound": "num?",
                "moved": "bool",
                "anchor_feasible": _Maybe("bool"),
                "distance_to_anchor": "num?",
                "pure_distance_to_anchor": "num?",
            }
        ),
    },
    "solver_records": _ListOf(
        {
            "step": "str",
            "method": "str",
            "status": "str",
            "seconds": "num?",
            "objective": "num?",
            "details": _MapOf("any"),
        }
    ),
    "diagnostics": {
        "clip": "num",
        "repeats": "int",
        "propensity_kind": "str",
        "clipping": _MapOf({"low": "int", "high": "int"}),
        "arm_sizes": _Maybe(_MapOf("int")),
        "propensity_range": _Maybe(_MapOf(_Maybe({"min": "num?", "max": "num?"}))),
        "effective_sample_size": _Maybe(_MapOf("num?")),
        "overlap_histogram": _Maybe({"edges": _ListOf("num"), "counts": _MapOf(_ListOf("int"))}),
        "learners": _ListOf(
            {
                "side": "str",
                "learner": "str",
                "loss": "num?",
                "metric": "str",
                "stacking_weight": "num?",
                "fit_seconds": "num?",
            }
        ),
        "failed_learners": _ListOf({"side": "str", "learner": "str", "reason": "str"}),
        "notes": _ListOf("str"),
    },
    "bootstrap": _Maybe(
        {
            "kind": "str",
            "method": "str",
            "level": "num",
            "replicates": "int",
            "chunk_size": "int",
            "estimates": _MapOf(_NUMS),
            "intervals": _MapOf(_LOW_HIGH),
            "standard_errors": _MapOf("num?"),
            "weights": {"propensity": _MapOf(_NUMS), "outcome": _MapOf(_NUMS)},
            "selection_frequency": _MapOf(
                _MapOf({"share_weighted": "num?", "mean_weight": "num?"})
            ),
            "tie_break_share": "num?",
            "seconds": _MapOf("num?"),
        }
    ),
    "settings": _MapOf("any"),
    "seed": _Maybe("int"),
    "timings": _MapOf("num?"),
    "data": {"treatment": "str", "outcome": "str", "covariates": _ListOf("str")},
    "cautions": _ListOf("str"),
}


def _scalar_ok(value, kind: str) -> bool:
    if kind == "any":
        return _is_json(value)
    if value is None:
        return kind == "num?"
    if kind in ("num", "num?"):
        return (
            isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)
        )
    if kind == "int":
        return isinstance(value, int) and not isinstance(value, bool)
    if kind == "str":
        return isinstance(value, str)
    return isinstance(value, bool)


def _is_json(value) -> bool:
    if value is None or isinstance(value, (bool, str, int)):
        return True
    if isinstance(value, float):
        return math.isfinite(value)
    if isinstance(value, list):
        return all(_is_json(v) for v in value)
    if isinstance(value, dict):
        return all(isinstance(k, str) and _is_json(v) for k, v in value.items())
    return False


def _type_name(value) -> str:
    if isinstance(value, float) and not math.isfinite(value):
        return repr(value)
    return {type(None): "null", dict: "an object", list: "a list"}.get(
        type(value), type(value).__name__
    )


def _check(value, spec, where: str) -> None:
    if isinstance(spec, str):
        if not _scalar_ok(value, spec):
            raise InputError(f"{where} must be {_KIND_TEXT[spec]}, got {_type_name(value)}")
        if spec in ("num", "num?") and value is not None and abs(value) > _LARGEST_SAVED:
            raise InputError(
                f"{where} is {value:.3g}, beyond the largest magnitude a results file holds "
                f"({_LARGEST_SAVED:g})"
            )
    elif isinstance(spec, _Maybe):
        if value is not None:
            _check(value, spec.inner, where)
    elif isinstance(spec, _ListOf):
        if not isinstance(value, list):
            raise InputError(f"{where} must be a list, got {_type_name(value)}")
        for i, item in enumerate(value):
            _check(item, spec.item, f"{where}[{i}]")
    elif isinstance(spec, _MapOf):
        if not isinstance(value, dict):
            raise InputError(f"{where} must be an object, got {_type_name(value)}")
        for key, item in value.items():
            _check(item, spec.value, f"{where}[{json.dumps(key)}]")
    else:
        if not isinstance(value, dict):
            raise InputError(f"{where} must be an object, got {_type_name(value)}")
        for key, sub in spec.items():
            if key not in value:
                raise InputError(f"{where} is missing the key {key!r}")
            _check(value[key], sub, f"{where}.{key}" if where else key)


def _require(condition: bool, message: str) -> None:
    if not condition:
        raise InputError(message)


def _check_shapes(d: dict) -> None:
    """Cross-field consistency that the report relies on."""
    table = d["pair_table"]
    rows, cols = table["rows"], table["columns"]
    _require(bool(rows) and bool(cols), "pair_table needs at least one row and one column")
    for key in ("values", "standard_errors"):
        shape_ok = len(table[key]) == len(rows) and all(len(r) == len(cols) for r in table[key])
        _require(shape_ok, f"pair_table.{key} must be {len(rows)} x {len(cols)} (rows x columns)")
    sides = {"propensity": rows, "outcome": cols}

    def same_learners(weights: dict, where: str) -> None:
        for side, names in sides.items():
            _require(
                list(weights[side]) == names,
                f"{where}.{side} must name the learners of the pair table in the same order",
            )

    same_learners(d["weights"], "weights")
    _require(bool(d["estimators"]), "estimators must list at least one estimator")
    for i, row in enumerate(d["estimators"]):
        same_learners(row["weights"], f"estimators[{i}].weights")
    clip = d["diagnostics"]["clip"]
    _require(0 <= clip < 0.5, f"diagnostics.clip must be in [0, 0.5), got {clip!r}")
    hist = d["diagnostics"]["overlap_histogram"]
    if hist is not None:
        for arm, counts in hist["counts"].items():
            _require(
                len(counts) == len(hist["edges"]) - 1,
                f"diagnostics.overlap_histogram.counts[{json.dumps(arm)}] must have one count "
                "per bin",
            )
    boot = d["bootstrap"]
    if boot is not None:
        reps = boot["replicates"]
        lists = [(f"estimates[{json.dumps(k)}]", v) for k, v in boot["estimates"].items()]
        for side in ("propensity", "outcome"):
            lists += [
                (f"weights.{side}[{json.dumps(k)}]", v) for k, v in boot["weights"][side].items()
            ]
        for where, values in lists:
            _require(len(values) == reps, f"bootstrap.{where} must hold {reps} replicate values")


def validate_results(d: dict) -> None:
    """Check a results dict against the schema; raise InputError with a one-line reason.

    Parameters
    ----------
    d : dict
        A results document (from :func:`result_to_dict` or :func:`read_results_json`).

    Raises
    ------
    InputError
        Wrong schema version, a missing key, a value of the wrong type (NaN and infinities
        included) or tables whose shapes disagree.
    """
    if not isinstance(d, dict):
        raise InputError(f"results must be a JSON object, got {_type_name(d)}")
    if "schema" not in d:
        raise InputError("results are missing the key 'schema'")
    if d["schema"] != SCHEMA:
        raise InputError(
            f"unsupported results schema {d['schema']!r}; this version reads {SCHEMA!r}"
        )
    _check(d, SPEC, "")
    _check_shapes(d)


# ------------------------------------------------------------------------------------- files


def atomic_write(path, data: bytes, *, overwrite: bool = False) -> pathlib.Path:
    """Write ``data`` to ``path`` through a temporary file in the same folder and os.replace,
    so a reader never sees a half-written file.

    Parameters
    ----------
    path : str or path-like
    data : bytes
    overwrite : bool
        Replace an existing file (otherwise an existing file raises InputError).

    Returns
    -------
    pathlib.Path
    """
    path = pathlib.Path(path)
    if path.exists() and not overwrite:
        raise InputError(f"{path} already exists; pass overwrite=True to replace it")
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.parent / f".{path.name}.{secrets.token_hex(6)}.tmp"
    # os.open applies the umask, so the file gets the usual permissions (mkstemp gives 0600).
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666)
    try:
        with os.fdopen(fd, "wb") as handle:
            handle.write(data)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return path


def write_results_json(results: dict, path, *, overwrite: bool = False) -> pathlib.Path:
    """Validate and write a results dict as JSON (atomic; NaN and infinities become null).

    Parameters
    ----------
    results : dict
        From :func:`result_to_dict`.
    path : str or path-like
    overwrite : bool
        Replace an existing file (default: refuse, raising InputError naming the path).

    Returns
    -------
    pathlib.Path
        The written file.
    """
    clean = plain(results, "results")
    validate_results(clean)
    text = json.dumps(clean, indent=2, ensure_ascii=False, allow_nan=False) + "\n"
    return atomic_write(path, text.encode("utf-8"), overwrite=overwrite)


def _reject_constant(token: str):
    raise InputError(f"contains the token {token}, which is not JSON (use null)")


def read_results_json(path) -> dict:
    """Read and validate a results file written by :func:`write_results_json`.

    Parameters
    ----------
    path : str or path-like

    Returns
    -------
    dict

    Raises
    ------
    InputError
        One line naming the file and the reason: missing file, invalid JSON, wrong schema
        version, a missing key or a value of the wrong type.
    """
    path = pathlib.Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise InputError(f"results file {path} does not exist") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"cannot read results file {path}: {exc}") from None
    try:
        d = json.loads(text, parse_constant=_reject_constant)
    except json.JSONDecodeError as exc:
        raise InputError(
            f"results file {path} is not valid JSON (line {exc.lineno}, column {exc.colno}: "
            f"{exc.msg})"
        ) from None
    except InputError as exc:
        raise InputError(f"results file {path} {exc}") from None
    try:
        validate_results(d)
    except InputError as exc:
        raise InputError(f"results file {path}: {exc}") from None
    return d
