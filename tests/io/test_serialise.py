"""Saved-results format: round trip, validation, JSON without NaN tokens, diagnostics."""

import json
import re

import numpy as np
import pytest

from stackdr import InputError
from stackdr.estimation import effective_sample_size
from stackdr.io import (
    SCHEMA,
    plain,
    read_results_json,
    result_to_dict,
    validate_results,
    write_results_json,
)
from stackdr.search import STACKED_PROPENSITY
from tests.helpers import MATH, SCRIPT, SHELL, hostile_fit


@pytest.fixture(scope="module")
def fitted():
    result = hostile_fit()
    return result, result_to_dict(result)


def test_dict_carries_the_fit(fitted):
    result, d = fitted
    assert d["schema"] == SCHEMA
    assert d["estimate"] == result.estimate
    assert (d["interval"]["low"], d["interval"]["high"]) == result.interval
    assert d["interval"]["method"] == "percentile"
    assert d["pair_table"]["rows"] == [SCRIPT, "constant", MATH, STACKED_PROPENSITY]
    assert d["pair_table"]["columns"] == [SHELL, "mean"]
    np.testing.assert_array_equal(d["pair_table"]["values"], result.pair_table.to_numpy())
    assert list(d["weights"]["propensity"].values()) == result.alpha.tolist()
    assert [row["name"] for row in d["estimators"]] == [r.name for r in result.estimators]
    assert d["bootstrap"]["replicates"] == 50
    for name, reps in d["bootstrap"]["estimates"].items():
        assert reps == result.bootstrap.estimates[name].tolist()
    assert d["data"] == {
        "treatment": "treated",
        "outcome": SHELL,
        "covariates": [SCRIPT, "x2", MATH],
        "weights": None,
        "clusters": None,
    }
    assert d["seed"] == 3 and d["settings"]["bootstrap"] == 50
    assert d["cautions"][0].startswith("A causal reading needs")
    # For the riesz blend psi(alpha, e_j) = (alpha' Psi)_j exactly (DESIGN section 3).
    chosen = np.array(list(d["sensitivities"]["at_chosen_weights"]["by_outcome_learner"].values()))
    np.testing.assert_allclose(chosen, result.alpha.to_numpy() @ result.pair_table.to_numpy())
    assert d["sensitivities"]["outcome_direction"] == pytest.approx(np.ptp(chosen))


def test_diagnostics_match_direct_computation(fitted):
    result, d = fitted
    diag = d["diagnostics"]
    # The search's propensity columns: the learners' and the stacked propensity.
    pi = result.analysis.inputs[0].pi @ result.alpha.to_numpy()
    A = result.data.A
    for arm, rows in (("treated", A == 1), ("control", A == 0)):
        assert diag["arm_sizes"][arm] == rows.sum()
        assert diag["propensity_range"][arm] == {"min": pi[rows].min(), "max": pi[rows].max()}
        assert sum(diag["overlap_histogram"]["counts"][arm]) == rows.sum()
    # Riesz blend of the ATE weight side: treated rows weigh sum_k alpha_k / pi_k, controls
    # sum_k alpha_k / (1 - pi_k) (DESIGN sections 1 and 3); effective sample size by Kish's
    # formula (Kish 1965, Survey Sampling): (sum w)^2 / sum w^2.
    probs, alpha = result.analysis.inputs[0].pi, result.alpha.to_numpy()
    w1 = (1 / probs[A == 1]) @ alpha
    w0 = (1 / (1 - probs[A == 0])) @ alpha
    ess = diag["effective_sample_size"]
    assert ess["treated"] == pytest.approx(w1.sum() ** 2 / (w1**2).sum(), rel=1e-12)
    assert ess["control"] == pytest.approx(w0.sum() ** 2 / (w0**2).sum(), rel=1e-12)
    assert effective_sample_size(np.ones(7)) == pytest.approx(7.0)
    assert effective_sample_size(np.zeros(3)) is None
    assert [x["learner"] for x in diag["learners"]] == [SCRIPT, "constant", MATH, SHELL, "mean"]
    assert set(diag["clipping"]) == {SCRIPT, "constant", MATH}


def test_json_round_trip(fitted, tmp_path):
    _, d = fitted
    path = write_results_json(d, tmp_path / "out" / "results.json")
    assert path == tmp_path / "out" / "results.json"
    back = read_results_json(path)
    assert back == d
    assert json.loads(path.read_text(encoding="utf-8")) == d
    # Names stay data: the file holds them verbatim as JSON strings.
    text = path.read_text(encoding="utf-8")
    assert json.dumps(SCRIPT) in text and json.dumps(SHELL, ensure_ascii=False) in text
    assert sorted(p.name for p in path.parent.iterdir()) == ["results.json"]


def test_refuses_to_overwrite(fitted, tmp_path):
    _, d = fitted
    path = write_results_json(d, tmp_path / "results.json")
    before = path.read_bytes()
    with pytest.raises(InputError, match=re.escape(str(path))):
        write_results_json(d, path)
    assert path.read_bytes() == before
    changed = {**d, "estimate": 1.5}
    write_results_json(changed, path, overwrite=True)
    assert read_results_json(path)["estimate"] == 1.5
    assert sorted(p.name for p in tmp_path.iterdir()) == ["results.json"]


def test_nan_and_infinity_become_null(fitted, tmp_path):
    _, d = fitted
    d = json.loads(json.dumps(d))
    d["se"] = float("nan")
    d["pair_table"]["standard_errors"][1][0] = float("inf")
    d["estimators"][2]["pseudo_risk"] = np.float64("nan")
    first = next(iter(d["bootstrap"]["estimates"]))
    d["bootstrap"]["estimates"][first][4] = float("nan")
    d["timings"]["total"] = -np.inf
    path = write_results_json(d, tmp_path / "results.json")
    text = path.read_text(encoding="utf-8")
    # RFC 8259 section 6: NaN and Infinity are not JSON numbers.
    assert not re.search(r"\bNaN\b|Infinity", text)
    back = read_results_json(path)
    assert back["se"] is None and back["timings"]["total"] is None
    assert back["pair_table"]["standard_errors"][1][0] is None
    assert back["estimators"][2]["pseudo_risk"] is None
    assert back["bootstrap"]["estimates"][first][4] is None


def _mutations():
    def drop(key):
        return lambda d: d.pop(key)

    def setter(path, value):
        def apply(d):
            *head, last = path
            for key in head:
                d = d[key]
            d[last] = value

        return apply

    return [
        (drop("estimate"), "missing the key 'estimate'"),
        (drop("diagnostics"), "missing the key 'diagnostics'"),
        (lambda d: d["interval"].pop("method"), "interval is missing the key 'method'"),
        (setter(["n"], "400"), "n must be a whole number, got str"),
        (setter(["n"], 400.0), "n must be a whole number, got float"),
        (setter(["estimate"], True), "estimate must be a number, got bool"),
        (setter(["estimate"], None), "estimate must be a number, got null"),
        (setter(["estimate"], float("nan")), "estimate must be a number, got nan"),
        (setter(["pair_table", "values", 0, 1], float("inf")), r"pair_table.values\[0\]\[1\]"),
        (setter(["estimators", 1, "se"], "0.3"), r"estimators\[1\].se must be a number or null"),
        (setter(["weights", "outcome"], [0.5, 0.5]), "weights.outcome must be an object"),
        (setter(["cautions"], "careful"), "cautions must be a list"),
        (setter(["schema"], "stackdr-results/99"), "unsupported results schema"),
        (lambda d: d["pair_table"]["values"].pop(), r"pair_table.values must be 4 x 2"),
        (
            lambda d: d["weights"].update(outcome={"mean": 0.5, SHELL: 0.5}),
            "weights.outcome must name the learners",
        ),
        (
            lambda d: next(iter(d["bootstrap"]["estimates"].values())).pop(),
            "must hold 50 replicate values",
        ),
        (setter(["estimate"], 1e300), r"estimate is 1e\+300, beyond the largest magnitude"),
        (setter(["estimate"], 10**400), r"estimate is about 1e\+400, beyond the largest"),
        (setter(["diagnostics", "clip"], 0.5), "diagnostics.clip must be below 0.5, got 0.5"),
        (setter(["diagnostics", "clip"], -0.1), "diagnostics.clip must be at least 0"),
        (setter(["pair_table", "rows"], []), "pair_table.rows must hold at least 1 item"),
        (setter(["estimators"], []), "estimators must hold at least 1 item"),
        (setter(["settings", "blend"], np.nan), r'settings\["blend"\] must be a JSON value'),
        (setter(["settings", "extra"], {1: "a"}), r'settings\["extra"\] has a key of type int'),
        (setter(["seed"], 1.0), "seed must be a whole number or null, got float"),
        (
            setter(["diagnostics", "clipping", "constant", "low"], 2.0),
            r'diagnostics.clipping\["constant"\].low must be a whole number, got float',
        ),
        (
            setter(["bootstrap", "intervals", "minimax pair", "high"], "1"),
            r'intervals\["minimax pair"\].high must be a number or null, got str',
        ),
        (
            setter(["bootstrap", "selection_frequency", "outcome", "mean"], {"share_weighted": 1}),
            r'selection_frequency\["outcome"\]\["mean"\] is missing the key .mean_weight.',
        ),
        (
            lambda d: d["diagnostics"]["overlap_histogram"]["counts"]["treated"].pop(),
            r'overlap_histogram.counts\["treated"\] must have one count per bin',
        ),
        (lambda d: d["target"].pop("name"), "target is missing the key 'name'"),
    ]


@pytest.mark.parametrize("mutate, message", _mutations())
def test_validation_catches_bad_documents(fitted, mutate, message):
    _, d = fitted
    d = json.loads(json.dumps(d))
    validate_results(d)
    mutate(d)
    with pytest.raises(InputError, match=message) as info:
        validate_results(d)
    assert "\n" not in str(info.value)


def test_read_errors_are_one_line(fitted, tmp_path):
    _, d = fitted
    cases = {
        "missing.json": (None, "does not exist"),
        "broken.json": ('{"schema": ', "is not valid JSON"),
        "nan.json": ('{"schema": NaN}', "NaN"),
        "list.json": ("[1, 2]", "must be a JSON object"),
        "old.json": (json.dumps({**d, "schema": "stackdr-results/0"}), "unsupported"),
        "short.json": (json.dumps({k: v for k, v in d.items() if k != "weights"}), "'weights'"),
    }
    for name, (text, message) in cases.items():
        path = tmp_path / name
        if text is not None:
            path.write_text(text, encoding="utf-8")
        with pytest.raises(InputError, match=message) as info:
            read_results_json(path)
        assert str(path) in str(info.value) and "\n" not in str(info.value)


def test_plain_converts_numpy_and_rejects_objects():
    out = plain({"a": np.float32(0.5), "b": np.arange(3), "c": (np.bool_(True), np.nan)})
    assert out == {"a": 0.5, "b": [0, 1, 2], "c": [True, None]}
    assert type(out["b"][0]) is int
    with pytest.raises(InputError, match=r"settings.learner has type object"):
        plain({"learner": object()}, "settings")
