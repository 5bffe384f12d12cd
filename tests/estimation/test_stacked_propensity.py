"""The stacked propensity column of the weight search (setting ``stacked_propensity``).

The prediction-loss stacked propensity pi @ a (a: the log-loss stacking weights) is one more
propensity learner of the riesz search, and its vertex is the tie-break anchor. Properties
checked here, each by construction: the estimator nests prediction-loss stacking; the rows over
the library's own learners are the same numbers with and without the column; the exports, the
saved results and the report carry the column by name; repeated splits and user-defined targets
work; the setting leaves other blends and a single learner alone.
"""

import numpy as np
import pytest
from sklearn.dummy import DummyClassifier, DummyRegressor
from sklearn.linear_model import LinearRegression, LogisticRegression

from stackdr import BlendEstimator, InputError
from stackdr.core import blend_estimate
from stackdr.io import (
    blended_models,
    blended_nuisances,
    read_results_json,
    result_to_dict,
    write_results_json,
)
from stackdr.reporting import write_report
from stackdr.search import PLS, SMOOTHED, STACKED_PROPENSITY
from tests.helpers import TREATED_MEAN, confounded_data

PROPENSITY = {
    "logit": LogisticRegression(),
    "flat": DummyClassifier(strategy="prior"),
    "sharp": LogisticRegression(C=100.0),
}
OUTCOME = {"ols": LinearRegression(), "mean": DummyRegressor()}
BASE_ROWS = ("prediction-loss stacking", "best-predicting pair", "mixed-minimax pair")
BASE_ROWS += ("minimax pair", SMOOTHED)


def fit(seed=31, n=500, target="ate", **settings):
    X, A, Y, _ = confounded_data(np.random.default_rng(seed), n)
    params = {"bootstrap": 0, "seed": 4, **settings}
    return BlendEstimator(target, PROPENSITY, OUTCOME, **params).fit(X, A, Y)


def row(result, name):
    return next(r for r in result.estimators if r.name == name)


@pytest.fixture(scope="module")
def pair():
    """The same fit with and without the stacked column."""
    return fit(), fit(stacked_propensity=False)


def test_stacked_column_is_the_stacked_propensity(pair):
    # Construction: the extra column's weight side is the target's transform of pi @ a, and its
    # row of the pair table is the DR estimate at that propensity with each outcome learner.
    stacked, plain = pair
    an = stacked.analysis
    assert an.stacked and not plain.analysis.stacked
    assert stacked.propensity_names == [*PROPENSITY, STACKED_PROPENSITY]
    assert list(stacked.alpha.index) == stacked.propensity_names
    assert list(plain.alpha.index) == list(PROPENSITY)
    base, inp = an.base_inputs[0], an.inputs[0]
    pi_stack = base.pi @ an.stack_alpha
    np.testing.assert_array_equal(inp.pi[:, -1], pi_stack)
    np.testing.assert_allclose(inp.P[0][:, -1], 1 / pi_stack, rtol=1e-15)
    np.testing.assert_allclose(inp.P[1][:, -1], 1 / (1 - pi_stack), rtol=1e-15)
    for j in range(2):
        pls_at_j = blend_estimate(base, an.stack_alpha, np.eye(2)[j], "probability").estimate
        assert stacked.pair_table.iloc[-1, j] == pytest.approx(pls_at_j, rel=1e-12)
    # The learners' rows are the same numbers as without the column.
    np.testing.assert_array_equal(stacked.pair_table.to_numpy()[:-1], plain.pair_table.to_numpy())
    np.testing.assert_array_equal(an.pair_se[:-1], plain.analysis.pair_se)


def test_rows_over_the_library_are_unchanged(pair):
    # PLS, the single pairs and the smoothed average are defined over the library's learners:
    # the same estimates and SEs to the last bit, and weight 0 on the stacked column.
    stacked, plain = pair
    for name in BASE_ROWS:
        on, off = row(stacked, name), row(plain, name)
        assert (on.estimate, on.se) == (off.estimate, off.se), name
        np.testing.assert_array_equal(on.alpha[:-1], off.alpha)
        assert on.alpha[-1] == 0.0
        np.testing.assert_array_equal(on.beta, off.beta)


def test_nests_prediction_loss_stacking():
    # With a tolerance far above any sensitivity the tie-break returns both anchors: the
    # stacked column's vertex and the NNLS outcome weights. The nuisances are then those of
    # prediction-loss stacking, so the estimates agree to round-off (1e-12).
    result = fit(tie_break_scale=1e6)
    main, pls = result.estimators[0], row(result, PLS)
    assert result.alpha[STACKED_PROPENSITY] == pytest.approx(1.0, abs=1e-12)
    np.testing.assert_allclose(result.beta, result.analysis.stack_beta, atol=1e-12)
    assert main.estimate == pytest.approx(pls.estimate, rel=1e-12)
    assert main.se == pytest.approx(pls.se, rel=1e-10)
    # Same nuisances, same pseudo-risk: PLS's is evaluated at its own propensity.
    assert main.pseudo_risk == pytest.approx(pls.pseudo_risk, rel=1e-9, abs=1e-15)


def test_other_blends_and_a_single_learner_are_left_alone():
    for blend in ("probability", "logit"):
        result = fit(blend=blend)
        assert not result.analysis.stacked and list(result.alpha.index) == list(PROPENSITY)
    X, A, Y, _ = confounded_data(np.random.default_rng(3), 300)
    one = BlendEstimator("ate", {"logit": LogisticRegression()}, OUTCOME, bootstrap=0).fit(X, A, Y)
    assert list(one.alpha.index) == ["logit"]


def test_repeats_and_bootstrap_keep_the_column():
    result = fit(repeats=2, bootstrap=20, tie_break_scale=1e6)
    an = result.analysis
    assert len(an.inputs) == 2 and an.Psi.shape == (4, 2)
    # Per repeat the stacked column uses that repeat's out-of-fold propensities.
    for base, inp in zip(an.base_inputs, an.inputs):
        np.testing.assert_array_equal(inp.pi[:, -1], base.pi @ an.stack_alpha)
    assert result.estimate == pytest.approx(row(result, PLS).estimate, rel=1e-12)
    boot = result.bootstrap
    assert list(boot.alpha.columns) == result.propensity_names
    np.testing.assert_allclose(boot.alpha.sum(axis=1), 1.0)
    assert np.isfinite(boot.estimates.to_numpy()).all()


def test_user_defined_target_and_credible_directions():
    # E[Y(1)] declared by the user; the stacked column uses its transform, 1 / pi.
    a = fit(target=TREATED_MEAN, directions="credible")
    b = fit(target="mean1", directions="credible")
    assert a.estimate == pytest.approx(b.estimate, rel=1e-12)
    inp = a.analysis.inputs[0]
    np.testing.assert_allclose(inp.P[0][:, -1], 1 / inp.pi[:, -1])
    prop_mask = a.analysis.masks[0]
    # Log-loss stacking is at least as good as its best learner, so the column is credible.
    assert prop_mask.shape == (4,) and prop_mask[-1]


def test_reserved_learner_name():
    X, A, Y, _ = confounded_data(np.random.default_rng(5), 200)
    library = {"logit": LogisticRegression(), STACKED_PROPENSITY: LogisticRegression(C=0.1)}
    with pytest.raises(InputError, match="is reserved for the stacked propensity"):
        BlendEstimator("ate", library, OUTCOME, bootstrap=0).fit(X, A, Y)
    ok = BlendEstimator("ate", library, OUTCOME, bootstrap=0, stacked_propensity=False)
    assert np.isfinite(ok.fit(X, A, Y).estimate)


def test_exports_carry_the_stacked_member(pair):
    stacked, _ = pair
    an = stacked.analysis
    table = blended_nuisances(stacked)
    alpha = stacked.alpha.to_numpy()
    np.testing.assert_allclose(table["propensity"], an.inputs[0].pi @ alpha)
    np.testing.assert_allclose(table["weight_mu1"], an.inputs[0].P[0] @ alpha)
    assert table["contribution"].mean() == pytest.approx(stacked.estimate, rel=1e-10)
    # Refitted on all rows: the stacked member is the probability-scale blend of the refitted
    # learners at the stacking weights; under the riesz blend of the ATE the propensity models
    # average 1/pi and 1/(1 - pi) over the members with the chosen weights.
    models = blended_models(stacked, propensity_learners=PROPENSITY, outcome_learners=OUTCOME)
    X = stacked.data.X
    members = {
        name: np.clip(model.fit(X, stacked.data.A).predict_proba(X)[:, 1], 0.01, 0.99)
        for name, model in PROPENSITY.items()
    }
    pi_stack = sum(w * members[name] for name, w in zip(PROPENSITY, an.stack_alpha))
    columns = np.column_stack([*members.values(), pi_stack])
    expected = 1 / ((1 / columns) @ alpha)
    np.testing.assert_allclose(models["propensity_mu1"].predict_proba(X)[:, 1], expected)


def test_results_json_round_trip_and_report(pair, tmp_path):
    stacked, _ = pair
    d = result_to_dict(stacked)
    assert d["pair_table"]["rows"][-1] == STACKED_PROPENSITY
    assert list(d["weights"]["propensity"]) == d["pair_table"]["rows"]
    for entry in d["estimators"]:
        assert list(entry["weights"]["propensity"]) == d["pair_table"]["rows"]
    assert {e["name"] for e in d["estimators"]} >= {SMOOTHED, PLS}
    path = write_results_json(d, tmp_path / "results.json")
    back = read_results_json(path)
    assert back["pair_table"] == d["pair_table"]
    assert back["weights"] == d["weights"]
    write_report(back, tmp_path / "report")
    page = (tmp_path / "report" / "report.html").read_text(encoding="utf-8")
    assert STACKED_PROPENSITY in page and SMOOTHED in page
