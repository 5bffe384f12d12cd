"""A clustered design (issue 14): rows grouped in 50-200 clusters with random cluster effects in
the treatment and in the outcome (own construction, truth documented).

``clustered-effects``, for n rows:

- G = min(200, max(50, n // 20)) clusters; each row falls in a cluster uniformly at random.
- Per cluster, independent draws u_g ~ N(0, 0.8^2) (treatment), v_g ~ N(0, 1) (outcome level)
  and w_g ~ N(0, 1) (effect).
- Per row X1, X2 iid N(0, 1); A ~ Bernoulli(expit(0.5 X1 - 0.5 X2 + u_g));
  Y = 1 + X1 - 0.5 X2 + (2 + w_g) A + v_g + N(0, 1).

Truth: the ATE over the population of clusters is E[2 + w_g] = 2 [construction]. The cluster
effects are independent of each other, so u_g is not a confounder: given X the treatment is
ignorable and E[Y | A = a, X] = 1 + X1 - 0.5 X2 + 2a (linear) [construction]. The propensity given
X integrates u_g out, P(A = 1 | X) = E_u[expit(0.5 X1 - 0.5 X2 + u)], computed by 40-point
Gauss-Hermite quadrature [construction; checked against the share of treated rows in 10^6
draws]. Rows of one cluster share v_g and w_g, and their treatments share u_g, so influence
functions are correlated within clusters: standard errors that treat rows as independent are
too small, cluster-robust ones are not.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy.special import expit

from stackdr.studies._designs import Design, DesignData

CLUSTERED_ATE = 2.0
_TREATMENT_SD = 0.8
_NODES, _WEIGHTS = np.polynomial.hermite_e.hermegauss(40)


def cluster_count(n: int) -> int:
    """G = min(200, max(50, n // 20)): 50 clusters up to n = 1000, 200 from n = 4000."""
    return int(min(200, max(50, n // 20)))


def clustered_propensity(x: np.ndarray) -> np.ndarray:
    """P(A = 1 | X) with the treatment's cluster effect integrated out (Gauss-Hermite)."""
    score = 0.5 * x[:, 0] - 0.5 * x[:, 1]
    values = expit(score[:, None] + _TREATMENT_SD * _NODES[None, :])
    return values @ (_WEIGHTS / _WEIGHTS.sum())


def simulate_clustered(n: int, rng: np.random.Generator) -> DesignData:
    """One data set of the ``clustered-effects`` design (see the module docstring)."""
    groups = cluster_count(n)
    cluster = rng.integers(0, groups, n)
    u, v, w = (rng.standard_normal(groups) for _ in range(3))
    x = rng.standard_normal((n, 2))
    treated = rng.random(n) < expit(0.5 * x[:, 0] - 0.5 * x[:, 1] + _TREATMENT_SD * u[cluster])
    mu0 = 1.0 + x[:, 0] - 0.5 * x[:, 1]
    y = mu0 + (CLUSTERED_ATE + w[cluster]) * treated + v[cluster] + rng.standard_normal(n)
    frame = pd.DataFrame({"X1": x[:, 0], "X2": x[:, 1], "A": treated.astype(int), "Y": y})
    frame["cluster"] = cluster
    return DesignData(
        frame=frame,
        treatment="A",
        outcome="Y",
        covariates=["X1", "X2"],
        target="ate",
        truth=CLUSTERED_ATE,
        true_propensity=clustered_propensity(x),
        true_outcome={0: mu0, 1: mu0 + CLUSTERED_ATE},
        name="clustered-effects",
        notes="ATE = 2 over clusters by construction; column 'cluster' holds the clusters.",
        clusters="cluster",
    )


CLUSTERED_DESIGNS = [
    Design(
        "clustered-effects",
        "ate",
        "50-200 clusters with random effects in treatment, outcome level and effect; truth 2",
        "own construction",
        simulate_clustered,
    )
]
