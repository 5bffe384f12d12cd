"""Sampling weights and clustered rows (issue 14): outside references and the plumbing.

Variance conventions checked here (stated in stackdr/core/_pairtable.py):
- sampling weights: sqrt(sum_i (s_i IF_i)^2) / sum_i s_i, the HC0 sandwich SE of weighted least
  squares (statsmodels ``WLS(...).fit(cov_type="HC0")``);
- clusters: scores s_i IF_i summed within clusters, variance times G / (G - 1). statsmodels'
  ``cov_type="cluster"`` with its default ``use_correction=True`` multiplies by
  G / (G - 1) x (N - 1) / (N - K) (statsmodels.stats.sandwich_covariance.cov_cluster, read in
  the installed source, statsmodels 0.15); we use G / (G - 1) only (Cameron & Miller 2015,
  J. Human Resources 50(2):317-372), so the comparison removes (N - 1) / (N - K).
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy.special import expit
from sklearn.dummy import DummyClassifier, DummyRegressor
from sklearn.linear_model import LinearRegression, LogisticRegression

from stackdr import BlendEstimator
from stackdr.errors import InputError
from stackdr.estimation import make_folds
from stackdr.inference import draw_row_weights, resample_rows
from stackdr.studies import get_design
from tests.helpers import confounded_data

TARGETS = ["ate", "att", "mean1", "mean0", "cov"]


def _frame(n: int, seed: int) -> pd.DataFrame:
    X, A, Y, _ = confounded_data(np.random.default_rng(seed), n)
    frame = pd.DataFrame(X, columns=["x1", "x2", "x3"])
    frame["a"] = A.astype(float)
    frame["y"] = Y
    return frame


def _libraries() -> tuple[dict, dict]:
    return (
        {
            "logistic": LogisticRegression(C=1e4, tol=1e-12, max_iter=10_000),
            "constant": DummyClassifier(strategy="prior"),
        },
        {"linear": LinearRegression(), "constant": DummyRegressor()},
    )


def _constant_libraries() -> tuple[dict, dict]:
    return {"constant": DummyClassifier(strategy="prior")}, {"constant": DummyRegressor()}


def _fit_with(frame, target="ate", libraries=None, *, weights=None, clusters=None, **settings):
    """A fit without bootstrap (unless asked), 3 folds, seed 3."""
    plib, olib = libraries or _libraries()
    settings = {"folds": 3, "bootstrap": 0, "seed": 3, **settings}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return BlendEstimator(target, plib, olib, **settings).fit(
            frame, "a", "y", ["x1", "x2", "x3"], weights=weights, clusters=clusters
        )


# ----------------------------------------------------------------------------- frequency weights


def _duplicated(target: str, **settings):
    """Fits of frequency-weighted data and of the same data with rows duplicated, with fold
    labels that move duplicates together and the original row id as a column ``row``."""
    frame = _frame(150, seed=21)
    rng = np.random.default_rng(4)
    counts = rng.integers(1, 4, len(frame))
    folds = rng.integers(0, 3, len(frame))
    weighted = frame.assign(w=counts.astype(float), row=np.arange(len(frame)))
    duplicated = weighted.loc[weighted.index.repeat(counts)].reset_index(drop=True)
    roles = settings.pop("roles", {})
    a = _fit_with(weighted, target, folds=folds, weights="w", **roles, **settings)
    b = _fit_with(duplicated, target, folds=np.repeat(folds, counts), **roles, **settings)
    assert b.data.weights is None
    return a, b, len(frame)


def _same_rows(a, b, rel: float = 1e-7) -> None:
    for row_a, row_b in zip(a.estimators, b.estimators, strict=True):
        assert row_a.name == row_b.name
        assert row_a.estimate == pytest.approx(row_b.estimate, rel=rel, abs=rel)
        np.testing.assert_allclose(row_a.alpha, row_b.alpha, atol=1e-6)
        np.testing.assert_allclose(row_a.beta, row_b.beta, atol=1e-6)


@pytest.mark.parametrize("target", TARGETS)
def test_integer_weights_equal_duplicated_rows(target):
    # [construction] Integer frequency weights are row duplication: every weighted sum, loss,
    # stacking fit and learner fit (scikit-learn's sample_weight multiplies each row's loss)
    # equals the duplicated data's, provided the folds move duplicates together (fold labels
    # repeated with the rows). SEs differ by design: sampling weights use
    # sqrt(sum (w IF)^2) / sum w, duplicated rows sqrt(sum w IF^2) / sum w, so the noise floor
    # of the tie-break differs and the tie-break is off here.
    a, b, _ = _duplicated(target, tie_break=False)
    _same_rows(a, b)
    # [construction] With one cluster per original row on both sides the SEs agree too
    # (scores of a row's copies are summed), and so do the tie-break and the cluster
    # bootstrap, which draws the same weight per original row from the same generators.
    a, b, _ = _duplicated(target, bootstrap=20, roles={"clusters": "row"})
    _same_rows(a, b, rel=1e-6)
    for row_a, row_b in zip(a.estimators, b.estimators):
        assert row_a.se == pytest.approx(row_b.se, rel=1e-7)
        assert (row_a.low, row_a.high) == pytest.approx((row_b.low, row_b.high), rel=1e-6)


def test_sampling_weight_se_is_the_clustered_duplicated_se():
    # [construction] The sampling-weight SE equals the duplicated data's cluster-robust SE
    # with each original row as a cluster, up to the factor G / (G - 1).
    a, _, G = _duplicated("ate", tie_break=False)
    _, c, _ = _duplicated("ate", tie_break=False, roles={"clusters": "row"})
    assert a.se == pytest.approx(c.se * np.sqrt((G - 1) / G), rel=1e-7)


# ----------------------------------------------------------------------------- statsmodels


def _sample_with_clusters(seed: int, clusters: int = 40, n: int = 400) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    g = rng.integers(0, clusters, n)
    effect = rng.normal(size=clusters)[g]
    frame = pd.DataFrame(rng.normal(size=(n, 3)), columns=["x1", "x2", "x3"])
    frame["a"] = rng.binomial(1, expit(0.3 * frame.x1 + effect)).astype(float)
    frame["y"] = 1 + 2 * frame.a + frame.x1 + 2 * effect + rng.normal(size=n)
    frame["w"] = rng.uniform(0.2, 3.0, n)
    frame["g"] = g
    return frame


def test_constant_learners_weighted_ate_is_weighted_difference_with_wls_hc0_se():
    # Source: weighted least squares of Y on (1, A) has slope equal to the weighted difference
    # in means, and statsmodels' HC0 sandwich SE of that slope is sum w^2 e^2 based, the same
    # linearisation as our sampling-weight SE (statsmodels 0.15 WLS, cov_type="HC0" [checked]).
    # In-sample constant learners (folds=1) fit the weighted arm means and the weighted share.
    frame = _sample_with_clusters(5)
    result = _fit_with(frame, "ate", _constant_libraries(), folds=1, weights="w")
    w, a, y = frame.w.to_numpy(), frame.a.to_numpy(), frame.y.to_numpy()
    difference = np.average(y[a == 1], weights=w[a == 1]) - np.average(y[a == 0], weights=w[a == 0])
    assert result.estimate == pytest.approx(difference, rel=1e-12)
    wls = sm.WLS(y, sm.add_constant(a), weights=w).fit(cov_type="HC0")
    assert result.estimate == pytest.approx(wls.params[1], rel=1e-10)
    assert result.se == pytest.approx(wls.bse[1], rel=1e-8)


def test_constant_learners_clustered_se_matches_statsmodels_cluster():
    # Source: statsmodels OLS(y, [1, A]).fit(cov_type="cluster") (statsmodels 0.15). With
    # use_correction=False it applies no factor; ours is G / (G - 1) times that. Its default
    # (use_correction=True) is G / (G - 1) x (N - 1) / (N - 2) [checked in
    # statsmodels.stats.sandwich_covariance.cov_cluster].
    frame = _sample_with_clusters(6)
    result = _fit_with(frame, "ate", _constant_libraries(), folds=1, clusters="g")
    y, X, g = frame.y.to_numpy(), sm.add_constant(frame.a.to_numpy()), frame.g.to_numpy()
    G, N = np.unique(g).size, len(frame)
    raw = sm.OLS(y, X).fit(cov_type="cluster", cov_kwds={"groups": g, "use_correction": False})
    default = sm.OLS(y, X).fit(cov_type="cluster", cov_kwds={"groups": g})
    assert result.estimate == pytest.approx(raw.params[1], rel=1e-10)
    assert result.se == pytest.approx(raw.bse[1] * np.sqrt(G / (G - 1)), rel=1e-8)
    assert result.se * np.sqrt((N - 1) / (N - 2)) == pytest.approx(default.bse[1], rel=1e-8)
    # Weights and clusters together: WLS with the cluster covariance, same factor.
    both = _fit_with(frame, "ate", _constant_libraries(), folds=1, clusters="g", weights="w")
    wls = sm.WLS(y, X, weights=frame.w.to_numpy()).fit(
        cov_type="cluster", cov_kwds={"groups": g, "use_correction": False}
    )
    assert both.estimate == pytest.approx(wls.params[1], rel=1e-10)
    assert both.se == pytest.approx(wls.bse[1] * np.sqrt(G / (G - 1)), rel=1e-8)


# ----------------------------------------------------------------------------- Kang-Schafer


def test_kang_schafer_outcome_dependent_sampling_recovers_population_mean():
    # Source: Kang & Schafer (2007), Statistical Science 22(4):523-539 (design in
    # stackdr.studies; E[Y] = 210 [construction]). A sample drawn with inclusion probability
    # q = expit(-0.5 + (Y - 210) / 20), which depends on the (possibly unobserved) outcome,
    # over-represents large Y; weights 1 / q (known by design) recover the population mean.
    # The ATE variant shares every draw, so it gives the latent Y of non-respondents.
    seed, n = 17, 6000
    mean = get_design("kang-schafer").simulate(n, np.random.default_rng(seed))
    ate = get_design("kang-schafer-ate").simulate(n, np.random.default_rng(seed))
    latent = ate.frame["Y"] - 10 * ate.frame["T"]
    q = expit(-0.5 + (latent - 210) / 20)
    keep = np.random.default_rng(seed + 1).random(n) < q
    sample = mean.frame.loc[keep].assign(w=1 / q[keep]).reset_index(drop=True)
    libraries = (
        {"logistic": LogisticRegression(C=1e4, max_iter=5000)},
        {"linear": LinearRegression()},
    )
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        est = BlendEstimator("mean1", *libraries, folds=2, bootstrap=0, seed=1)
        weighted = est.fit(sample, "R", "Y", mean.covariates, weights="w")
        unweighted = est.fit(sample, "R", "Y", mean.covariates)
    assert abs(weighted.estimate - mean.truth) < 3 * weighted.se
    # The design matters: ignoring the weights misses by far more than 3 SE.
    assert abs(unweighted.estimate - mean.truth) > 10 * unweighted.se


# ----------------------------------------------------------------------------- plumbing


def test_unit_weights_agree_with_no_weights():
    # [construction] Weights all equal to one give the unweighted estimate (the arithmetic
    # differs, so to rounding, not bit for bit).
    frame = _frame(200, seed=8)
    plain = _fit_with(frame, "ate", bootstrap=20)
    ones = _fit_with(frame.assign(w=1.0), "ate", bootstrap=20, weights="w")
    for r0, r1 in zip(plain.estimators, ones.estimators):
        assert r1.estimate == pytest.approx(r0.estimate, rel=1e-9)
        assert r1.se == pytest.approx(r0.se, rel=1e-9)
        assert r1.low == pytest.approx(r0.low, rel=1e-6)


def test_cluster_folds_keep_clusters_whole_and_stratify():
    rng = np.random.default_rng(2)
    groups = rng.integers(0, 50, 600)
    A = rng.binomial(1, 0.3, 600).astype(float)
    labels = make_folds(A, 5, seed=1, groups=groups, repeats=2)
    for fold in labels:
        for g in np.unique(groups):
            assert np.unique(fold[groups == g]).size == 1
        shares = [A[fold == s].mean() for s in range(5)]
        assert max(shares) - min(shares) < 0.15
    with pytest.raises(InputError, match="split 1 clusters across folds"):
        split = (groups == 0).astype(int)
        split[np.flatnonzero(groups == 0)[0]] = 2
        make_folds(A, split, groups=groups)


def test_cluster_bootstrap_draws_share_weights_within_clusters():
    codes = np.repeat(np.arange(30), 4)
    for kind in ("multinomial", "bayesian"):
        w = draw_row_weights(np.random.default_rng(0), codes.size, kind, codes)
        assert np.all(w.reshape(30, 4) == w.reshape(30, 4)[:, :1])
        assert w.sum() == pytest.approx(codes.size)
    rows, new = resample_rows(np.random.default_rng(1), codes.size, codes)
    assert np.unique(new).size == 30 and rows.size == codes.size
    for g in np.unique(new):
        assert np.unique(codes[rows[new == g]]).size == 1


def test_clusters_end_to_end_with_both_bootstraps():
    frame = _sample_with_clusters(9, clusters=35, n=350)
    rows = _fit_with(frame, "ate", bootstrap=40)
    clustered = _fit_with(frame, "ate", bootstrap=40, clusters="g", weights="w")
    # The cluster effect enters treatment and outcome, so the cluster-robust SE is larger.
    assert clustered.se > rows.se
    assert clustered.sampling["clusters"]["count"] == 35
    assert clustered.sampling["weights"]["kish_effective_sample_size"] < len(frame)
    plib, olib = _libraries()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        refit = BlendEstimator(
            "ate", plib, olib, folds=3, bootstrap=8, bootstrap_kind="refit", seed=2
        ).fit(frame, "a", "y", ["x1", "x2", "x3"], clusters="g", weights="w")
    assert np.isfinite(refit.interval).all()


def test_learner_without_sample_weight_is_named_in_a_warning():
    from sklearn.neighbors import KNeighborsRegressor

    frame = _frame(120, seed=3).assign(w=2.0)
    plib, olib = _libraries()
    with pytest.warns(UserWarning, match="outcome learner knn"):
        result = BlendEstimator(
            "ate", plib, {**olib, "knn": KNeighborsRegressor()}, folds=3, bootstrap=0
        ).fit(frame, "a", "y", ["x1", "x2", "x3"], weights="w")
    assert result.sampling["weights"]["unweighted_learners"] == ["outcome:knn"]
    assert result.crossfit.weighted_fits["outcome:linear"] is True


def test_few_clusters_warn():
    frame = _sample_with_clusters(3, clusters=12, n=240)
    plib, olib = _libraries()
    with pytest.warns(UserWarning, match="only 12 clusters"):
        BlendEstimator("ate", plib, olib, folds=3, bootstrap=0).fit(
            frame, "a", "y", ["x1", "x2", "x3"], clusters="g"
        )


def test_results_json_report_and_exports_carry_the_design(tmp_path):
    from stackdr.io import blended_models, blended_nuisances, result_to_dict, write_results_json
    from stackdr.reporting import write_report

    frame = _sample_with_clusters(4, clusters=32, n=320)
    result = _fit_with(frame, "ate", bootstrap=10, weights="w", clusters="g")
    d = result_to_dict(result)
    assert d["schema"] == "stackdr-results/3"
    assert d["data"]["weights"]["column"] == "w"
    assert d["data"]["weights"]["kish_effective_sample_size"] == pytest.approx(
        frame.w.sum() ** 2 / (frame.w**2).sum()
    )
    assert d["data"]["clusters"] == {
        "column": "g",
        "count": 32,
        "smallest": int(frame.g.value_counts().min()),
        "median_size": float(frame.g.value_counts().median()),
        "largest": int(frame.g.value_counts().max()),
        "few": False,
    }
    write_results_json(d, tmp_path / "results.json")  # validates against the schema
    html = write_report(d, tmp_path).read_text()
    assert "Kish effective sample size" in html and "32 clusters" in html
    table = blended_nuisances(result)
    np.testing.assert_array_equal(table["sampling_weight"], frame.w)
    np.testing.assert_array_equal(table["cluster"], frame.g)
    assert (table.attrs["weights_column"], table.attrs["clusters_column"]) == ("w", "g")
    # [construction] Refits get the sampling weights: the weighted linear fit on the treated
    # equals numpy's weighted least squares.
    models = blended_models(
        result, propensity_learners=_libraries()[0], outcome_learners=_libraries()[1]
    )
    treated = frame.a == 1
    X = np.column_stack([np.ones(treated.sum()), frame.loc[treated, ["x1", "x2", "x3"]]])
    root = np.sqrt(frame.w[treated].to_numpy())
    coef = np.linalg.lstsq(X * root[:, None], frame.y[treated] * root, rcond=None)[0]
    linear = models["mu1"].estimators_["linear"]
    np.testing.assert_allclose([linear.intercept_, *linear.coef_], coef, rtol=1e-8)


def test_command_line_and_config_take_weights_and_clusters(tmp_path, capsys):
    import json

    from stackdr.cli import main
    from tests.helpers import QUICK_NO_BOOTSTRAP

    _sample_with_clusters(8, clusters=30, n=300).to_csv(tmp_path / "data.csv", index=False)
    config = QUICK_NO_BOOTSTRAP.replace("[settings]", '[settings]\nweights = "w"')
    (tmp_path / "design.toml").write_text(config)
    args = ["estimate", tmp_path / "data.csv", "--treatment", "a", "--outcome", "y"]
    args += ["--target", "ate", "--out", tmp_path / "fit", "--config", tmp_path / "design.toml"]
    assert main([str(a) for a in [*args, "--clusters", "g"]]) == 0
    out = capsys.readouterr().out
    assert "sampling weights column 'w'" in out and "clusters column 'g': 30 clusters" in out
    saved = json.loads((tmp_path / "fit" / "results.json").read_text())
    assert saved["data"]["weights"]["column"] == "w" and saved["data"]["clusters"]["count"] == 30
    assert "w" not in saved["data"]["covariates"] and "g" not in saved["data"]["covariates"]
