"""Tests for the simulation designs against published large-sample facts and their construction.

Tolerances are multiples of a Monte Carlo standard error computed from the simulated sample
itself, so a check fails only if the simulated value is implausibly far from the reference.
"""

import numpy as np
import pandas as pd
import pytest
from scipy import integrate, special, stats

from stackdr.core import influence_standard_error
from stackdr.studies import (
    DesignData,
    get_design,
    kang_schafer_transform,
    list_designs,
    register_design,
)
from stackdr.studies import _design_library as library
from stackdr.studies import _design_registry as registry

Z_CRIT = 4.0  # a 4-SE band: false alarm probability about 6e-5 per check


def _within(value: float, reference: float, se: float) -> bool:
    return abs(value - reference) <= Z_CRIT * se


def _roles(data: DesignData):
    frame = data.frame
    return frame[data.treatment].to_numpy(), frame[data.outcome].to_numpy()


def _oracle_contributions(data: DesignData) -> np.ndarray:
    """Per-row AIPW contributions with the true nuisances (unbiased for the truth)."""
    a, y = _roles(data)
    p, m0, m1 = data.true_propensity, data.true_outcome[0], data.true_outcome[1]
    if data.target == "mean1":
        return m1 + a * (np.where(a == 1, y, 0.0) - m1) / p
    return m1 - m0 + a * (y - m1) / p - (1 - a) * (y - m0) / (1 - p)


@pytest.fixture(scope="module")
def ks_large():
    return get_design("kang-schafer").simulate(400_000, np.random.default_rng(2007))


def test_kang_schafer_large_sample_facts(ks_large):
    # Kang & Schafer (2007), Statistical Science 22(4): P(R=1) = 0.5, E[Y|R=1] = 200,
    # E[Y|R=0] = 220 (REFERENCES.md, [checked] with 4e6 draws).
    r, y = _roles(ks_large)
    n = len(r)
    assert _within(r.mean(), 0.5, np.sqrt(0.25 / n))
    y1, y0_full = y[r == 1], ks_large.true_outcome[0][r == 0]
    # The published 200 / 220 are rounded; Stein's lemma gives the exact values
    # 210 -/+ 25.345 E[expit'(eta)] / 0.5 with eta ~ N(0, 1.3225), which differ from 200 / 220 by
    # about 0.002. Add that to the Monte Carlo band.
    assert abs(y1.mean() - 200) <= Z_CRIT * y1.std() / np.sqrt(len(y1)) + 0.01
    # Y is unobserved where R = 0, so use the true regression plus the known N(0,1) noise variance.
    se0 = np.sqrt((y0_full.var() + 1) / len(y0_full))
    assert abs(y0_full.mean() - 220) <= Z_CRIT * se0 + 0.01
    assert ks_large.true_propensity.min() < 0.02  # extreme weights (REFERENCES.md, [checked])


def test_kang_schafer_conditional_mean_matches_quadrature(ks_large):
    # Re-derivation (Stein's lemma): E[Y | R=1] = 210 + Cov(lin, eta) E[expit'(eta)] / P(R=1),
    # Cov(lin, eta) = -27.4 + 13.7 (0.5 - 0.25 - 0.1), Var(eta) = 1 + 0.25 + 0.0625 + 0.01.
    scale = np.sqrt(1.3225)

    def density_slope(e):
        return special.expit(e) * (1 - special.expit(e)) * stats.norm.pdf(e, scale=scale)

    slope, _ = integrate.quad(density_slope, -np.inf, np.inf)
    exact = 210 + (-27.4 + 13.7 * 0.15) * slope / 0.5
    r, y = _roles(ks_large)
    y1 = y[r == 1]
    assert abs(exact - 200) < 0.01
    assert _within(y1.mean(), exact, y1.std() / np.sqrt(len(y1)))


def test_kang_schafer_outcome_missing_exactly_where_unobserved(ks_large):
    r, y = _roles(ks_large)
    assert set(np.unique(r)) == {0, 1}
    assert np.array_equal(np.isnan(y), r == 0)
    assert ks_large.target == "mean1" and ks_large.truth == 210
    assert ks_large.covariates == ["Z1", "Z2", "Z3", "Z4"]


@pytest.mark.parametrize(
    ("correct", "transformed"),
    [
        ("kang-schafer", "kang-schafer-transformed"),
        ("kang-schafer-ate", "kang-schafer-ate-transformed"),
    ],
)
def test_transformed_variant_is_function_of_z(correct, transformed):
    # Kang & Schafer (2007) transforms (REFERENCES.md, [checked]); written out again here so the
    # check does not reuse the module's own formula.
    good = get_design(correct).simulate(500, np.random.default_rng(5))
    bad = get_design(transformed).simulate(500, np.random.default_rng(5))
    z1, z2, z3, z4 = good.frame[["Z1", "Z2", "Z3", "Z4"]].to_numpy().T
    expected = np.column_stack(
        [np.exp(z1 / 2), z2 / (1 + np.exp(z1)) + 10, (z1 * z3 / 25 + 0.6) ** 3, (z2 + z4 + 20) ** 2]
    )
    assert bad.covariates == ["X1", "X2", "X3", "X4"]
    np.testing.assert_allclose(bad.frame[bad.covariates].to_numpy(), expected, rtol=1e-13)
    np.testing.assert_allclose(kang_schafer_transform(np.column_stack([z1, z2, z3, z4])), expected)
    assert not set(bad.frame.columns) & {"Z1", "Z2", "Z3", "Z4"}
    # Same rows apart from what the analyst sees; true nuisances still come from Z.
    for column in (good.treatment, good.outcome):
        np.testing.assert_array_equal(good.frame[column], bad.frame[column])
    np.testing.assert_array_equal(good.true_propensity, bad.true_propensity)
    for arm in (0, 1):
        np.testing.assert_array_equal(good.true_outcome[arm], bad.true_outcome[arm])


def test_kang_schafer_propensity_and_outcome_formulas():
    # Kang & Schafer (2007): logit P(R=1) = -Z1 + 0.5 Z2 - 0.25 Z3 - 0.1 Z4 and
    # E[Y|Z] = 210 + 27.4 Z1 + 13.7 (Z2 + Z3 + Z4); ATE variant adds 10 T (REFERENCES.md).
    data = get_design("kang-schafer-ate").simulate(1000, np.random.default_rng(3))
    z1, z2, z3, z4 = data.frame[["Z1", "Z2", "Z3", "Z4"]].to_numpy().T
    np.testing.assert_allclose(
        data.true_propensity, 1 / (1 + np.exp(-(-z1 + 0.5 * z2 - 0.25 * z3 - 0.1 * z4)))
    )
    regression = 210 + 27.4 * z1 + 13.7 * (z2 + z3 + z4)
    np.testing.assert_allclose(data.true_outcome[0], regression)
    np.testing.assert_allclose(data.true_outcome[1], regression + 10)
    residual = data.frame["Y"] - regression - 10 * data.frame["T"]
    assert abs(residual.std() - 1) < 0.15  # N(0,1) noise, SE of the sd about 0.022
    assert data.truth == 10 and data.target == "ate"


def test_lunceford_davidian_structure():
    # Lunceford & Davidian (2004), Statistics in Medicine 23: structure in REFERENCES.md.
    data = get_design("lunceford-davidian").simulate(200_000, np.random.default_rng(2004))
    f = data.frame
    n = len(f)
    assert data.covariates == ["X1", "X2", "X3", "V1", "V2", "V3"]
    assert data.truth == 2 and data.target == "ate"
    # Strong association: logit P(Z=1) = 0.6 X1 - 0.6 X2 + 0.6 X3.
    np.testing.assert_allclose(
        data.true_propensity, 1 / (1 + np.exp(-0.6 * (f.X1 - f.X2 + f.X3))), rtol=1e-12
    )
    # xi = (-1, 1, 1): Y = -X1 + X2 - X3 + 2 Z - V1 + V2 + V3 + N(0,1); constant effect 2.
    control = -f.X1 + f.X2 - f.X3 - f.V1 + f.V2 + f.V3
    np.testing.assert_allclose(data.true_outcome[0], control, atol=1e-12)
    np.testing.assert_allclose(data.true_outcome[1] - data.true_outcome[0], 2.0)
    assert np.mean(data.true_outcome[1] - data.true_outcome[0]) == pytest.approx(2.0)
    # X3 ~ Bernoulli(0.2); V3 | X3 ~ Bernoulli(0.75 X3 + 0.25 (1 - X3)).
    assert _within(f.X3.mean(), 0.2, np.sqrt(0.16 / n))
    for x3, p in [(1, 0.75), (0, 0.25)]:
        v3 = f.V3[f.X3 == x3]
        assert _within(v3.mean(), p, np.sqrt(p * (1 - p) / len(v3)))
    # Given X3 = 1: means (1, 1, -1, -1) for (X1, V1, X2, V2); corr 0.5 within pairs, -0.5 across.
    stratum = f.loc[f.X3 == 1, ["X1", "V1", "X2", "V2"]]
    m = len(stratum)
    np.testing.assert_array_less(np.abs(stratum.mean() - [1, 1, -1, -1]), Z_CRIT / np.sqrt(m))
    corr = stratum.corr().to_numpy()
    expected = np.array(
        [[1, 0.5, -0.5, -0.5], [0.5, 1, -0.5, -0.5], [-0.5, -0.5, 1, 0.5], [-0.5, -0.5, 0.5, 1]]
    )
    # SE of a sample correlation is about (1 - r^2)/sqrt(m).
    np.testing.assert_array_less(np.abs(corr - expected), Z_CRIT * 0.75 / np.sqrt(m) + 1e-12)


@pytest.mark.parametrize("name", list_designs())
def test_oracle_aipw_recovers_truth(name):
    # Common practice: AIPW with the true propensity and outcome regression is unbiased for the
    # target, so its sample mean lies within a few influence-function SEs of the stated truth.
    # With clustered rows the SE is cluster-robust (common practice; factor G / (G - 1)).
    data = get_design(name).simulate(100_000, np.random.default_rng(11))
    h = _oracle_contributions(data)
    se = h.std() / np.sqrt(len(h))
    if data.clusters is not None:
        codes = np.unique(data.frame[data.clusters], return_inverse=True)[1]
        se = float(influence_standard_error(h - h.mean(), cluster_codes=codes))
    assert _within(h.mean(), data.truth, se)


def test_sparse_design_construction():
    data = get_design("sparse").simulate(100_000, np.random.default_rng(8))
    x = data.frame[data.covariates].to_numpy()
    a, y = _roles(data)
    assert x.shape[1] == 50 and data.treatment == "A"
    lo, hi = library.SPARSE_PROPENSITY_BOUNDS
    assert lo <= data.true_propensity.min() and data.true_propensity.max() <= hi
    # Stationary AR(1) blocks of 5: corr 0.6 at lag 1, 0.36 at lag 2, zero across blocks.
    corr = np.corrcoef(x[:, :10], rowvar=False)
    band = Z_CRIT / np.sqrt(len(x))
    assert abs(corr[0, 1] - 0.6) < band and abs(corr[0, 2] - 0.36) < band
    assert abs(corr[0, 5]) < band and abs(corr[4, 5]) < band
    np.testing.assert_allclose(x.std(axis=0), 1, atol=0.02)
    # Truth by construction: mean effect is 1.
    effect = data.true_outcome[1] - data.true_outcome[0]
    assert _within(effect.mean(), 1.0, effect.std() / np.sqrt(len(effect)))
    # Confounding: the difference in means is far from the truth.
    naive = y[a == 1].mean() - y[a == 0].mean()
    assert abs(naive - data.truth) > 0.5


def test_sparse_inactive_covariates_do_not_matter():
    x = np.random.default_rng(1).standard_normal((200, 50))
    active = [0, 1, 5, 10]
    shuffled = np.random.default_rng(2).standard_normal((200, 50))
    shuffled[:, active] = x[:, active]
    for function in (
        library._sparse_propensity,
        library._sparse_control_mean,
        library._sparse_effect,
    ):
        np.testing.assert_array_equal(function(x), function(shuffled))
    changed = x.copy()
    changed[:, 10] += 1
    assert not np.allclose(library._sparse_propensity(x), library._sparse_propensity(changed))


@pytest.mark.parametrize("name", list_designs())
def test_same_seed_same_data(name):
    design = get_design(name)
    first = design.simulate(300, np.random.default_rng(42))
    second = design.simulate(300, np.random.default_rng(42))
    other = design.simulate(300, np.random.default_rng(43))
    pd.testing.assert_frame_equal(first.frame, second.frame)
    np.testing.assert_array_equal(first.true_propensity, second.true_propensity)
    assert not first.frame.equals(other.frame)
    assert first.name == name and len(first.frame) == 300


def test_unknown_design_lists_valid_names():
    with pytest.raises(ValueError, match="unknown design 'kang-shafer'") as info:
        get_design("kang-shafer")
    for name in list_designs():
        assert name in str(info.value)


def test_simulate_validates_arguments():
    design = get_design("sparse")
    with pytest.raises(ValueError, match="positive integer"):
        design.simulate(0, np.random.default_rng(0))
    with pytest.raises(TypeError, match="numpy.random.Generator"):
        design.simulate(10, 0)


@pytest.fixture()
def private_registry(monkeypatch):
    monkeypatch.setattr(registry, "_REGISTRY", dict(registry._REGISTRY))


def test_register_design_tuple_form(private_registry):
    def randomised_trial(n, rng):
        a = rng.integers(0, 2, n)
        x = rng.standard_normal(n)
        return pd.DataFrame({"x": x, "a": a, "y": x + 3 * a + rng.standard_normal(n)}), 3.0

    design = register_design(
        "trial", randomised_trial, "ate", "coin-flip trial", treatment="a", outcome="y"
    )
    assert "trial" in list_designs() and get_design("trial") is design
    data = design.simulate(50, np.random.default_rng(0))
    assert data.covariates == ["x"] and data.truth == 3.0 and data.true_propensity is None
    assert design.source == "user-supplied" and design.target == "ate"
    with pytest.raises(ValueError, match="already registered"):
        register_design("trial", randomised_trial, "ate", "again", treatment="a", outcome="y")


def test_register_design_data_form_and_errors(private_registry):
    def reuse_lunceford(n, rng):
        return library.simulate_lunceford_davidian(n, rng)

    register_design("ld-copy", reuse_lunceford, "ate", "copy")
    a = get_design("ld-copy").simulate(100, np.random.default_rng(9))
    b = get_design("lunceford-davidian").simulate(100, np.random.default_rng(9))
    pd.testing.assert_frame_equal(a.frame, b.frame)

    register_design("no-roles", lambda n, rng: (pd.DataFrame({"y": np.zeros(n)}), 0.0), "cov", "")
    with pytest.raises(ValueError, match="treatment= and outcome="):
        get_design("no-roles").simulate(5, np.random.default_rng(0))
    register_design("wrong-target", reuse_lunceford, "att", "")
    with pytest.raises(ValueError, match="target 'att'"):
        get_design("wrong-target").simulate(5, np.random.default_rng(0))
    with pytest.raises(ValueError, match="unknown target"):
        register_design("bad", reuse_lunceford, "median", "")
    with pytest.raises(ValueError, match="outcome column 'nope'"):
        DesignData(pd.DataFrame({"a": [0, 1]}), "a", "nope", [], "ate", 0.0)


@pytest.mark.parametrize("name", ["smooth-consistent", "poor-overlap", "nsw-semi-synthetic"])
def test_added_designs_truth_by_oracle_aipw(name):
    # [construction] truths of the three added designs (ATE 2, 2 and 1.5): AIPW at the true
    # nuisances, unclipped, lands within 3 SE of the truth; the mean of the true effect
    # function over the rows is close to the truth (sampling error only).
    from stackdr.studies import oracle_row

    data = get_design(name).simulate(20_000, np.random.default_rng(2026))
    A = data.frame[data.treatment].to_numpy(float)
    Y = data.frame[data.outcome].to_numpy(float)
    row = oracle_row(data, data.target, A, Y, 0.0)
    assert abs(row["estimate"] - data.truth) < 3 * row["se"]
    effect = data.true_outcome[1] - data.true_outcome[0]
    assert abs(effect.mean() - data.truth) < 0.1 * max(1.0, abs(data.truth))
    if name == "poor-overlap":
        assert (np.minimum(data.true_propensity, 1 - data.true_propensity) < 0.05).mean() > 0.15
