"""Input and output: saved results (``results.json`` and its JSON Schema), TOML configuration,
exported nuisances and blended scikit-learn models."""

from stackdr.io._config import (
    ESTIMATOR_SETTINGS,
    SETTINGS,
    check_setting,
    estimator_kwargs,
    load_config,
    resolve_settings,
)
from stackdr.io._export import (
    BlendedClassifier,
    BlendedRegressor,
    blended_models,
    blended_nuisances,
)
from stackdr.io._provenance import (
    RECORDED_PACKAGES,
    input_record,
    provenance,
    relative_path,
    versions,
)
from stackdr.io._results_json import (
    atomic_write,
    plain,
    read_results_json,
    result_to_dict,
    write_results_json,
)
from stackdr.io._results_schema import SCHEMA, field_reference, results_schema, validate_results

__all__ = [
    "RECORDED_PACKAGES",
    "ESTIMATOR_SETTINGS",
    "SCHEMA",
    "SETTINGS",
    "BlendedClassifier",
    "BlendedRegressor",
    "atomic_write",
    "blended_models",
    "blended_nuisances",
    "check_setting",
    "estimator_kwargs",
    "field_reference",
    "input_record",
    "load_config",
    "plain",
    "provenance",
    "read_results_json",
    "relative_path",
    "resolve_settings",
    "result_to_dict",
    "results_schema",
    "validate_results",
    "versions",
    "write_results_json",
]
