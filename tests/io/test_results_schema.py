"""The shipped JSON Schema of results.json: a valid draft 2020-12 schema that names every field
the code writes, readable by a plain JSON Schema validator, the source of the documentation's
field tables. The one-line messages naming the field at fault are tested with the other
rejections in test_serialise.py."""

import json
import runpy
import tomllib
from importlib import resources
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from jsonschema import Draft202012Validator
from sklearn.dummy import DummyClassifier, DummyRegressor
from sklearn.linear_model import LinearRegression, LogisticRegression

from stackdr import BlendEstimator
from stackdr.io import (
    SCHEMA,
    plain,
    read_results_json,
    result_to_dict,
    results_schema,
    validate_results,
    write_results_json,
)
from tests.helpers import confounded_data

ROOT = Path(__file__).resolve().parents[2]


def _fit(treatment: str, bootstrap: int):
    rng = np.random.default_rng(9)
    X, A, Y, _ = confounded_data(rng, 240)
    frame = pd.DataFrame({"x1": X[:, 0], "x2": X[:, 1], "x3": X[:, 2], "y": Y})
    if treatment == "binary":
        frame["a"] = A
        propensity = {"logistic": LogisticRegression(), "flat": DummyClassifier()}
        target = "ate"
    else:
        frame["a"] = X[:, 0] + rng.normal(size=240)
        propensity = {"linear": LinearRegression(), "mean": DummyRegressor()}
        target = "cov"
    outcome = {"linear": LinearRegression(), "mean": DummyRegressor()}
    estimator = BlendEstimator(
        target, propensity, outcome, folds=3, bootstrap=bootstrap, seed=1, n_jobs=1
    )
    return json.loads(json.dumps(plain(result_to_dict(estimator.fit(frame, "a", "y")))))


@pytest.fixture(scope="module")
def documents():
    """Results of a binary fit with a bootstrap and of a continuous one without (the fields
    that are null in one are filled in the other)."""
    return [_fit("binary", bootstrap=20), _fit("continuous", bootstrap=0)]


def test_schema_is_valid_draft_2020_12_and_shipped():
    schema = results_schema()
    Draft202012Validator.check_schema(schema)
    assert schema["$schema"] == "https://json-schema.org/draft/2020-12/schema"
    assert schema["properties"]["schema"]["const"] == SCHEMA
    assert resources.files("stackdr.io").joinpath("results.schema.json").is_file()
    # Shipped in wheels and sdists too, not only in a source checkout.
    config = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))
    assert "results.schema.json" in config["tool"]["setuptools"]["package-data"]["stackdr.io"]


def _unnamed_keys(value, node: dict, defs: dict, where: str = "") -> list:
    """Keys of ``value`` inside objects with fixed fields that the schema does not name."""
    if "$ref" in node:
        node = {**defs[node["$ref"].rsplit("/", 1)[1]], **node}
        node.pop("$ref")
    found = []
    if isinstance(value, dict):
        fields = node.get("properties")
        for key, item in value.items():
            if fields is not None and key not in fields:
                found.append(f"{where}.{key}")
            child = (fields or {}).get(key, node.get("additionalProperties"))
            if isinstance(child, dict):
                found += _unnamed_keys(item, child, defs, f"{where}.{key}")
    elif isinstance(value, list) and isinstance(node.get("items"), dict):
        for item in value:
            found += _unnamed_keys(item, node["items"], defs, f"{where}[]")
    return found


def test_schema_names_every_field_the_code_writes(documents):
    schema = results_schema()
    for d in documents:
        validate_results(d)
        assert _unnamed_keys(d, schema, schema["$defs"]) == []
    binary, continuous = documents
    assert binary["bootstrap"] is not None and binary["diagnostics"]["arm_sizes"] is not None
    assert continuous["diagnostics"]["overlap_histogram"] is None


def test_plain_validator_reads_written_files(documents, tmp_path):
    """Another tool with only the schema file and a stock validator accepts what is written."""
    schema = json.loads(
        resources.files("stackdr.io").joinpath("results.schema.json").read_text("utf-8")
    )
    for i, d in enumerate(documents):
        path = write_results_json(d, tmp_path / f"{i}.json")
        Draft202012Validator(schema).validate(json.loads(path.read_text(encoding="utf-8")))
        assert read_results_json(path) == d


def test_documentation_tables_are_generated_from_the_schema():
    script = runpy.run_path(str(ROOT / "docs" / "generate_results_schema.py"))
    assert script["main"](["--check"]) == 0, "run python docs/generate_results_schema.py"
    page = (ROOT / "docs" / "results-schema.md").read_text(encoding="utf-8")
    for key in results_schema()["properties"]:
        assert f"| `{key}` |" in page


def test_unknown_keys_are_ignored(documents):
    d = json.loads(json.dumps(documents[0]))
    d["later_field"] = {"anything": [1, "two"]}
    d["diagnostics"]["later_field"] = None
    validate_results(d)
