"""The clustered design (own construction, stackdr/studies/_design_clustered.py) and the study
replicate's cluster-aware switch."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.special import expit

from stackdr.studies import get_design, make_replicate, oracle_row
from stackdr.studies._design_clustered import clustered_propensity

LIBRARY = {
    "propensity": {"logistic": {"learner": "logistic"}},
    "outcome": {"linear": {"learner": "linear"}},
}


def test_clustered_design_truth_and_clusters():
    data = get_design("clustered-effects").simulate(8000, np.random.default_rng(5))
    assert data.frame["cluster"].nunique() == 200
    assert data.clusters == "cluster" and "cluster" not in data.covariates
    # [construction] AIPW at the true nuisances is unbiased for ATE = 2; its cluster-robust SE
    # covers the cluster-level effect variation.
    codes = data.frame["cluster"].to_numpy()
    A, Y = data.frame["A"].to_numpy(float), data.frame["Y"].to_numpy()
    row = oracle_row(data, "ate", A, Y, 0.01, cluster_codes=codes)
    assert abs(row["estimate"] - data.truth) < 3 * row["se"]
    assert row["se"] > oracle_row(data, "ate", A, Y, 0.01)["se"]


def test_quadrature_propensity_matches_simulation():
    # [construction] P(A = 1 | X) integrates the N(0, 0.8^2) cluster effect out; checked here
    # against a Monte Carlo average over 200,000 draws of that effect.
    x = np.array([[0.0, 0.0], [1.5, -0.5], [-2.0, 1.0]])
    u = 0.8 * np.random.default_rng(0).standard_normal(200_000)
    simulated = [expit(0.5 * a - 0.5 * b + u).mean() for a, b in x]
    np.testing.assert_allclose(clustered_propensity(x), simulated, atol=2e-3)


def test_replicate_switches_clusters():
    data = get_design("clustered-effects").simulate(1000, np.random.default_rng(2))
    aware = make_replicate(LIBRARY, bootstrap=0)(data, 3)
    rows = make_replicate(LIBRARY, cluster_aware=False, bootstrap=0)(data, 3)
    assert aware[0]["se"] > rows[0]["se"]
    assert aware[-1]["name"] == rows[-1]["name"] == "oracle pair"
    assert aware[-1]["estimate"] == pytest.approx(rows[-1]["estimate"])
