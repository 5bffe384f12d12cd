"""The results schema: a JSON Schema file shipped with the package, the cross-field checks JSON
Schema cannot express, and the field reference of ``docs/results-schema.md`` generated from it.

``results.schema.json`` (draft 2020-12) is the one description of the saved-results layout: other
tools can validate a ``results.json`` with it, :func:`validate_results` validates with it through
the ``jsonschema`` library, and the field tables of the documentation are rendered from it by
:func:`field_reference` (``python docs/generate_results_schema.py`` rewrites them).
"""

from __future__ import annotations

import copy
import functools
import json
import math
from importlib import resources

from jsonschema import Draft202012Validator, validators

from stackdr.errors import InputError

SCHEMA = "stackdr-results/3"
SCHEMA_FILE = "results.schema.json"


@functools.cache
def _schema() -> dict:
    return json.loads(resources.files("stackdr.io").joinpath(SCHEMA_FILE).read_text("utf-8"))


def results_schema() -> dict:
    """The JSON Schema (draft 2020-12) of a results document, as shipped with the package.

    Returns
    -------
    dict
        A fresh copy; changing it does not change validation.
    """
    return copy.deepcopy(_schema())


# --------------------------------------------------------------------------------- validation


def _finite_number(checker, instance) -> bool:
    # JSON numbers are finite, but a results dict built in Python may hold NaN or infinities;
    # those must be None before the dict is a valid document (they are written as null).
    if isinstance(instance, bool) or not isinstance(instance, (int, float)):
        return False
    return isinstance(instance, int) or math.isfinite(instance)


def _whole_number(checker, instance) -> bool:
    # Draft 2020-12 counts 400.0 as an integer; the format writes whole numbers without a
    # decimal point, so a float there means a damaged or hand-edited file.
    return isinstance(instance, int) and not isinstance(instance, bool)


_ResultsValidator = validators.extend(
    Draft202012Validator,
    type_checker=Draft202012Validator.TYPE_CHECKER.redefine_many(
        {"number": _finite_number, "integer": _whole_number}
    ),
)


def _inline_refs(node, defs: dict):
    """The schema with references to non-recursive definitions replaced by their content."""
    if isinstance(node, list):
        return [_inline_refs(item, defs) for item in node]
    if not isinstance(node, dict):
        return node
    name = node.get("$ref", "#/$defs/").rsplit("/", 1)[1]
    if name in defs and name != "json_value":
        rest = {k: v for k, v in node.items() if k != "$ref"}
        return _inline_refs({**defs[name], **rest}, defs)
    return {key: _inline_refs(value, defs) for key, value in node.items()}


@functools.cache
def _validator():
    # Resolving a $ref for every number of a long bootstrap list would dominate the time
    # (seconds for 5000 replicates); with the references inlined it is a fraction of that.
    schema = _schema()
    return _ResultsValidator(_inline_refs(schema, schema["$defs"]))


_TYPE_TEXT = {
    "number": "a number",
    "integer": "a whole number",
    "string": "a string",
    "boolean": "true or false",
    "object": "an object",
    "array": "a list",
    "null": "null",
}
_JSON_TYPES = {"null", "boolean", "string", "number", "array", "object"}


def _expected(types) -> str:
    types = [types] if isinstance(types, str) else list(types)
    if set(types) == _JSON_TYPES:
        return "a JSON value"
    if types == ["boolean", "null"]:
        return "true, false or null"
    words = [_TYPE_TEXT[t] for t in types]
    return words[0] if len(words) == 1 else ", ".join(words[:-1]) + " or " + words[-1]


def _magnitude(value) -> str:
    # Python ints have no size limit, and formatting one beyond the float range would overflow.
    if isinstance(value, int) and abs(value) >= 10**300:
        return f"about 1e+{len(str(abs(value))) - 1}"
    return f"{value:.3g}"


def _type_name(value) -> str:
    if isinstance(value, float) and not math.isfinite(value):
        return repr(value)
    return {type(None): "null", dict: "an object", list: "a list"}.get(
        type(value), type(value).__name__
    )


def _location(error) -> str:
    """The field at fault in the notation of the messages: ``a.b[0]["free key"]``."""
    instance_path = list(error.absolute_path)
    where = ""
    steps = iter(error.absolute_schema_path)
    for token in steps:
        if token == "properties":
            key = next(steps)
            instance_path.pop(0)
            where = f"{where}.{key}" if where else key
        elif token == "additionalProperties":
            where += f"[{json.dumps(instance_path.pop(0), ensure_ascii=False)}]"
        elif token == "items":
            where += f"[{instance_path.pop(0)}]"
    return where


def _message(error) -> str:
    where = _location(error)
    value, limit = error.instance, error.validator_value
    kind = error.validator
    if "propertyNames" in error.absolute_schema_path:
        return f"{where} has a key of type {_type_name(value)}; keys must be strings"
    if kind == "type":
        return f"{where or 'results'} must be {_expected(limit)}, got {_type_name(value)}"
    if kind == "required":
        key = next(k for k in limit if k not in value)
        return f"{where or 'results'} {'is' if where else 'are'} missing the key {key!r}"
    if kind in ("minimum", "maximum") and abs(limit) == _schema()["$defs"]["number"]["maximum"]:
        return (
            f"{where} is {_magnitude(value)}, beyond the largest magnitude a results file holds "
            f"({abs(limit):g})"
        )
    bounds = {
        "minimum": "at least",
        "maximum": "at most",
        "exclusiveMinimum": "above",
        "exclusiveMaximum": "below",
    }
    if kind in bounds:
        return f"{where} must be {bounds[kind]} {limit:g}, got {value!r}"
    if kind == "minItems":
        return f"{where} must hold at least {limit} item{'s' if limit != 1 else ''}"
    if kind == "const":
        return f"{where} must be {json.dumps(limit)}, got {json.dumps(value)}"
    return f"{where or 'results'} does not satisfy the schema keyword {kind!r}"


def _require(condition: bool, message: str) -> None:
    if not condition:
        raise InputError(message)


def _check_shapes(d: dict) -> None:
    """Cross-field consistency that the report relies on and JSON Schema cannot express."""
    table = d["pair_table"]
    rows, cols = table["rows"], table["columns"]
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
    for i, row in enumerate(d["estimators"]):
        same_learners(row["weights"], f"estimators[{i}].weights")
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

    Validation is the shipped JSON Schema (``results.schema.json``, with NaN and infinities not
    counted as numbers and whole numbers required without a decimal point) followed by the
    cross-field checks it cannot express: the pair table is rows x columns, every weight map
    names the pair-table learners in order, histogram counts have one entry per bin and every
    bootstrap list holds ``replicates`` values.

    Parameters
    ----------
    d : dict
        A results document (from :func:`result_to_dict` or :func:`read_results_json`).

    Raises
    ------
    InputError
        Wrong schema version, a missing key, a value of the wrong type (NaN and infinities
        included) or tables whose shapes disagree; the message names the field at fault.
    """
    if not isinstance(d, dict):
        raise InputError(f"results must be a JSON object, got {_type_name(d)}")
    if "schema" not in d:
        raise InputError("results are missing the key 'schema'")
    if d["schema"] != SCHEMA:
        raise InputError(
            f"unsupported results schema {d['schema']!r}; this version reads {SCHEMA!r}"
        )
    error = next(_validator().iter_errors(d), None)
    if error is not None:
        raise InputError(_message(error))
    _check_shapes(d)


# --------------------------------------------------------------------------- field reference


def _resolve(node: dict) -> tuple[dict, str | None]:
    """A schema node with its ``$ref`` followed (the referring node's keywords win) and the
    name of the definition it refers to."""
    ref = node.get("$ref")
    if ref is None:
        return node, None
    name = ref.rsplit("/", 1)[1]
    merged = {**_schema()["$defs"][name], **{k: v for k, v in node.items() if k != "$ref"}}
    return merged, name


_DEF_TEXT = {"number": "number", "number_or_null": "number?", "json_value": "any"}
_TYPE_WORD = {"integer": "int", "boolean": "bool", "string": "string", "number": "number"}


def _type_text(node: dict) -> str:
    node, name = _resolve(node)
    if name in _DEF_TEXT:
        return _DEF_TEXT[name]
    types = node.get("type", [])
    types = [types] if isinstance(types, str) else types
    nullable = "null" in types
    (base,) = [t for t in types if t != "null"]
    if base == "array":
        text = "list of " + _inner(node["items"])
    elif base == "object":
        text = (
            "object" if "properties" in node else "map of " + _inner(node["additionalProperties"])
        )
    else:
        text = _TYPE_WORD[base]
    if not nullable:
        return text
    return f"{text}, or null" if " of " in text else f"{text} or null"


def _inner(node: dict) -> str:
    text = _type_text(node)
    return f"({text})" if " or " in text and not text.startswith(("list", "map")) else text


def _with_fields(node: dict, suffix: str = "") -> tuple[dict, str] | None:
    """The object schema whose fields a node holds, through lists (``[]``) and maps (``*``)."""
    node, name = _resolve(node)
    if name in _DEF_TEXT:
        return None
    if "properties" in node:
        return node, suffix
    if "items" in node and isinstance(node["items"], dict) and node.get("type") == "array":
        return _with_fields(node["items"], suffix + "[]")
    extra = node.get("additionalProperties")
    if isinstance(extra, dict) and "properties" not in node:
        return _with_fields(extra, suffix + ".*")
    return None


def _row(parent: dict, key: str, node: dict, prefix: str = "") -> tuple:
    kind = _type_text(node)
    if key not in parent.get("required", ()):
        kind += " (optional)"
    return prefix + key, kind, _resolve(node)[0].get("description", "")


def _rows(node: dict, prefix: str = "") -> list:
    rows = []
    for key, child in node["properties"].items():
        rows.append(_row(node, key, child, prefix))
        inner = _with_fields(child)
        if inner is not None:
            rows += _rows(inner[0], f"{prefix}{key}{inner[1]}.")
    return rows


def _table(rows: list) -> str:
    lines = ["| key | type | meaning |", "|---|---|---|"]
    for key, kind, text in rows:
        lines.append(f"| `{key}` | {kind} | {text.replace('|', chr(92) + '|')} |")
    return "\n".join(lines)


def field_reference() -> str:
    """Markdown tables of every field in the schema: the top level, then one table per
    top-level object, nested fields with dotted keys (``[]`` a list item, ``*`` a free-text
    key such as a learner or estimator name).

    Returns
    -------
    str
    """
    schema = _schema()
    top = [_row(schema, key, node) for key, node in schema["properties"].items()]
    parts = ["## Top level", "", _table(top)]
    for key, node in schema["properties"].items():
        inner = _with_fields(node)
        if inner is not None:
            parts += ["", f"### `{key}{inner[1]}`", "", _table(_rows(inner[0]))]
    return "\n".join(parts)
