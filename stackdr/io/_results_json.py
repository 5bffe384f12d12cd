"""The saved-results format: a fitted result as a plain, versioned JSON document.

:func:`result_to_dict` turns a :class:`stackdr.estimation.BlendResult` into nested dicts, lists,
strings, numbers, booleans and nulls only (its diagnostics are computed by the result itself and
only formatted here); :func:`write_results_json` writes it atomically and
:func:`read_results_json` reads it and validates it against the shipped JSON Schema
(``results.schema.json``, documented field by field in ``docs/results-schema.md``). NaN and
infinities are stored as ``null`` (JSON has no token for them, RFC 8259 section 6). Learner and
column names are user text and are only ever stored as data.
"""

from __future__ import annotations

import json
import math
import os
import pathlib
import secrets

import numpy as np

from stackdr._version import __version__
from stackdr.errors import InputError
from stackdr.estimation import CAUTION, DEFAULT_DIGITS, BlendResult, phi_function
from stackdr.io._provenance import provenance as make_provenance
from stackdr.io._results_schema import SCHEMA, validate_results

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
        "at_prediction_loss_weights": result.at_prediction_loss_weights,
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
            "by_propensity_learner": _named(result.propensity_names, by_propensity),
        },
        "direction_learners": {
            "propensity": _masked(result.propensity_names, prop_mask),
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
        "fold_check": _fold_check(result.fold_check),
    }


def _fold_check(check) -> dict | None:
    if check is None:
        return None
    spread = check.spread
    return {
        "folds": int(spread.folds),
        "estimates": plain(spread.estimates),
        "standard_errors": plain(spread.standard_errors),
        "q": plain(spread.q),
        "dispersion": plain(spread.dispersion),
        "p_value": plain(spread.p_value),
        "between_variance": plain(spread.between_variance),
        "top_row_share": plain(check.top_row_share),
        "alert": bool(check.alert),
        "corrected": bool(check.corrected),
        "added_variance": {str(k): plain(v) for k, v in check.added_variance.items()},
        "uncorrected_se": {str(k): plain(v) for k, v in check.uncorrected_se.items()},
        "refit_ratios": {str(k): plain(v) for k, v in check.refit_ratios.items()},
        "fit_variance": {str(k): plain(v) for k, v in check.fit_variance.items()},
        "fit_share": plain(check.fit_share),
        "calibration_gate": plain(check.gate),
        "refit_excess_se": {str(k): plain(v) for k, v in check.excess_se.items()},
        "calibration_shrink": plain(check.shrink),
        "sentence": check.sentence(),
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
    sampling = result.sampling
    weights, clusters = sampling["weights"], sampling["clusters"]
    if weights is not None and weights["unweighted_learners"]:
        cautions.append(
            "Learners fitted without the sampling weights (their fit takes no sample_weight): "
            f"{', '.join(weights['unweighted_learners'])}."
        )
    if clusters is not None and clusters["few"]:
        cautions.append(
            f"Only {clusters['count']} clusters: cluster-robust standard errors and the cluster "
            "bootstrap are unreliable with fewer than 30."
        )
    if result.crossfit.failures:
        cautions.append(
            f"{len(result.crossfit.failures)} learner(s) failed and were left out; see the "
            "diagnostics."
        )
    return cautions


def result_to_dict(
    result: BlendResult,
    *,
    provenance: dict | None = None,
    outcome_label: str | None = None,
    digits: int = DEFAULT_DIGITS,
) -> dict:
    """Everything needed to report a fit, as JSON-ready nested dicts (schema ``SCHEMA``).

    Parameters
    ----------
    result : BlendResult
        A fitted result from :meth:`stackdr.BlendEstimator.fit`.
    provenance : dict, optional
        From :func:`stackdr.io.provenance` (default: the result's time and the installed
        versions, no input file or command line).
    outcome_label : str, optional
        The outcome with its unit in parentheses, for axes and table headers of the report.
    digits : int
        Significant digits of the report's tables.

    Returns
    -------
    dict
        Plain data (see ``docs/results-schema.md``); NaN and infinities become None.
    """
    cf, data = result.crossfit, result.data
    pnames, onames = result.propensity_names, list(cf.outcome_names)
    low, high = result.interval
    estimators = []
    for row in result.estimators:
        wald_low, wald_high = row.wald_interval
        estimators.append(
            {
                "name": row.name,
                "kind": row.kind,
                "blend": row.blend,
                "estimate": plain(row.estimate),
                "se": plain(row.interval_se),
                "se_method": row.se_method,
                "low": plain(row.low),
                "high": plain(row.high),
                "interval_method": row.interval_method,
                "wald_se": plain(row.se),
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
        "se": plain(result.interval_se),
        "wald_se": plain(result.se),
        "interval": {
            "low": plain(low),
            "high": plain(high),
            "level": plain(result.level),
            "method": result.interval_method,
            "se_method": result.estimators[0].se_method,
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
        "contrast_test": None
        if getattr(result, "contrast", None) is None
        else plain(result.contrast.record(), "contrast_test"),
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
            **plain(result.sampling, "sampling"),
        },
        "notes": list(result.notes),
        "cautions": _cautions(result),
        "presentation": {"outcome_label": outcome_label, "digits": int(digits)},
        "provenance": provenance if provenance is not None else make_provenance(result.created_utc),
    }


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
