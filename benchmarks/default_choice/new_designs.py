"""Three new simulation designs with documented truth (issue 10, research harness only).

Same conventions as ``stackdr/designs.py``: ``simulate(n, rng) -> DesignData`` with the true
target value, the true propensity P(A=1 | X) and the true outcome regressions
``{0: E[Y | A=0, X], 1: E[Y | A=1, X]}`` at every row. Tags: [construction] the true value holds
by construction of the design.

- ``smooth-consistent``: every flexible learner consistent (smooth nuisances, overlap in
  [0.1, 0.9]); ATE 2.
- ``poor-overlap``: about 25% of rows have a true propensity below 0.05; ATE 2.
- ``nsw-semi-synthetic``: covariates resampled from the NSW experimental sample (Dehejia & Wahba
  1999, 445 rows, via the ``causaldata`` package), simulated treatment and outcome; ATE 1.5
  (thousand dollars).

``get(name)`` returns a :class:`stackdr.designs.Design` (not registered in the package's
registry; this file lives outside the package).
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np
import pandas as pd
from scipy.special import expit

from stackdr.designs import Design, DesignData

# ---------------------------------------------------------------------------------------------
# (a) smooth-consistent

SMOOTH_ATE = 2.0
SMOOTH_BOUNDS = (0.1, 0.9)


def smooth_propensity(x: np.ndarray) -> np.ndarray:
    low, high = SMOOTH_BOUNDS
    score = 0.8 * x[:, 0] - 0.6 * x[:, 1] + 0.6 * np.sin(x[:, 2]) + 0.3 * x[:, 0] * x[:, 3]
    return low + (high - low) * expit(score)


def smooth_control_mean(x: np.ndarray) -> np.ndarray:
    return (
        1.0
        + x[:, 0]
        + 0.5 * x[:, 1] ** 2
        + np.sin(1.5 * x[:, 2])
        + 0.5 * x[:, 3] * x[:, 4]
        - 0.5 * x[:, 4]
    )


def smooth_effect(x: np.ndarray) -> np.ndarray:
    # X1^2 - 1 and sin(pi X2) both have mean exactly 0 when X1, X2 ~ N(0, 1) (the second is
    # an odd function of a symmetric variable).
    return SMOOTH_ATE + 0.5 * (x[:, 0] ** 2 - 1) + 0.5 * np.sin(np.pi * x[:, 1])


def simulate_smooth_consistent(n: int, rng: np.random.Generator) -> DesignData:
    """Smooth nonlinear design where every flexible learner is consistent (own construction).

    X1..X5 iid N(0, 1).

    - ``P(A=1|X) = 0.1 + 0.8 expit(0.8 X1 - 0.6 X2 + 0.6 sin(X3) + 0.3 X1 X4)``, in [0.1, 0.9]
      by construction;
    - ``E[Y|A=0,X] = 1 + X1 + 0.5 X2^2 + sin(1.5 X3) + 0.5 X4 X5 - 0.5 X5``;
    - effect ``tau(X) = 2 + 0.5 (X1^2 - 1) + 0.5 sin(pi X2)``; ``Y = E[Y|A=0,X] + A tau(X) +
      N(0, 1)``.

    E[X1^2] = 1 and E[sin(pi X2)] = 0 exactly (odd function, symmetric law), so the ATE is
    E[tau(X)] = 2 [construction]. X1 drives treatment, outcome and effect, so the difference in
    means is confounded.
    """
    x = rng.standard_normal((n, 5))
    propensity = smooth_propensity(x)
    treated = (rng.random(n) < propensity).astype(int)
    mu0 = smooth_control_mean(x)
    mu1 = mu0 + smooth_effect(x)
    y = np.where(treated == 1, mu1, mu0) + rng.standard_normal(n)
    cols = [f"X{j + 1}" for j in range(5)]
    frame = pd.DataFrame(x, columns=cols)
    frame["A"] = treated
    frame["Y"] = y
    return DesignData(
        frame=frame,
        treatment="A",
        outcome="Y",
        covariates=cols,
        target="ate",
        truth=SMOOTH_ATE,
        true_propensity=propensity,
        true_outcome={0: mu0, 1: mu1},
        name="smooth-consistent",
        notes="ATE = 2 by construction (the effect's added terms have mean exactly zero).",
    )


# ---------------------------------------------------------------------------------------------
# (b) poor-overlap

OVERLAP_ATE = 2.0


def overlap_propensity(x: np.ndarray) -> np.ndarray:
    return expit(-1.0 + 2.5 * x[:, 0] - 1.5 * x[:, 1])


def simulate_poor_overlap(n: int, rng: np.random.Generator) -> DesignData:
    """Poor overlap: many true propensities below 0.05 (own construction).

    X1..X4 iid N(0, 1); ``P(A=1|X) = expit(-1 + 2.5 X1 - 1.5 X2)``. The linear score is
    N(-1, 2.5^2 + 1.5^2 = 8.5), so P(pi < 0.05) = Phi((logit(0.05) + 1) / sqrt(8.5)) = about
    0.25 and P(pi > 0.95) = about 0.09 [construction; checked by simulation in the sanity check].

    - ``E[Y|A=0,X] = 1 + X1 + 0.5 X1^2 - X2 + 0.5 X3 + sin(X4)``;
    - effect ``tau(X) = 2 + X1 + 0.5 (X3^2 - 1)``; ``Y = E[Y|A=0,X] + A tau(X) + N(0, 1)``.

    E[X1] = 0 and E[X3^2] = 1, so the ATE is 2 [construction]. The effect varies with X1, the
    covariate that drives the lack of overlap, so extrapolation into regions with almost no
    treated (or control) rows matters.
    """
    x = rng.standard_normal((n, 4))
    propensity = overlap_propensity(x)
    treated = (rng.random(n) < propensity).astype(int)
    mu0 = 1 + x[:, 0] + 0.5 * x[:, 0] ** 2 - x[:, 1] + 0.5 * x[:, 2] + np.sin(x[:, 3])
    mu1 = mu0 + OVERLAP_ATE + x[:, 0] + 0.5 * (x[:, 2] ** 2 - 1)
    y = np.where(treated == 1, mu1, mu0) + rng.standard_normal(n)
    cols = [f"X{j + 1}" for j in range(4)]
    frame = pd.DataFrame(x, columns=cols)
    frame["A"] = treated
    frame["Y"] = y
    return DesignData(
        frame=frame,
        treatment="A",
        outcome="Y",
        covariates=cols,
        target="ate",
        truth=OVERLAP_ATE,
        true_propensity=propensity,
        true_outcome={0: mu0, 1: mu1},
        name="poor-overlap",
        notes="ATE = 2 by construction; about 25% of rows have pi < 0.05.",
    )


# ---------------------------------------------------------------------------------------------
# (c) nsw-semi-synthetic

NSW_COLUMNS = ["age", "educ", "black", "hisp", "marr", "nodegree", "re74", "re75"]
NSW_ATE = 1.5  # thousand dollars


@lru_cache(maxsize=1)
def nsw_covariates() -> pd.DataFrame:
    """The 445-row NSW experimental sample (Dehejia & Wahba 1999), covariates only, from the
    ``causaldata`` package (``nsw_mixtape``)."""
    from causaldata import nsw_mixtape

    data = nsw_mixtape.load_pandas().data
    return data[NSW_COLUMNS].astype(float).reset_index(drop=True)


def _nsw_features(c: pd.DataFrame) -> dict:
    return {
        "age": c["age"].to_numpy(),
        "educ": c["educ"].to_numpy(),
        "black": c["black"].to_numpy(),
        "hisp": c["hisp"].to_numpy(),
        "marr": c["marr"].to_numpy(),
        "nodegree": c["nodegree"].to_numpy(),
        "r74": c["re74"].to_numpy() / 1000.0,
        "r75": c["re75"].to_numpy() / 1000.0,
    }


def nsw_propensity(c: pd.DataFrame) -> np.ndarray:
    f = _nsw_features(c)
    score = (
        -0.2
        - 0.04 * (f["age"] - 25)
        - 0.15 * (f["educ"] - 10)
        + 0.5 * f["black"]
        + 0.3 * f["hisp"]
        - 0.5 * f["marr"]
        + 0.3 * f["nodegree"]
        - 0.08 * f["r74"]
        - 0.12 * f["r75"]
        + 0.6 * (f["r75"] == 0)
    )
    return expit(score)


def nsw_control_mean(c: pd.DataFrame) -> np.ndarray:
    f = _nsw_features(c)
    return (
        3.0
        + 0.1 * (f["age"] - 25)
        - 0.003 * (f["age"] - 25) ** 2
        + 0.35 * (f["educ"] - 10)
        - 0.8 * f["black"]
        + 0.3 * f["hisp"]
        + 0.6 * f["marr"]
        + 0.25 * f["r74"]
        + 1.2 * np.sqrt(f["r75"])
        - 1.0 * (f["r74"] == 0) * (f["r75"] == 0)
    )


@lru_cache(maxsize=1)
def _nsw_effect_centres() -> tuple[float, float]:
    f = _nsw_features(nsw_covariates())
    return float(np.mean(f["nodegree"])), float(np.mean(np.sqrt(f["r75"])))


def nsw_effect(c: pd.DataFrame) -> np.ndarray:
    f = _nsw_features(c)
    m_nodegree, m_sqrt75 = _nsw_effect_centres()
    return NSW_ATE - 1.0 * (f["nodegree"] - m_nodegree) + 0.6 * (np.sqrt(f["r75"]) - m_sqrt75)


def simulate_nsw_semi_synthetic(n: int, rng: np.random.Generator) -> DesignData:
    """Semi-synthetic design on the NSW experimental covariates (own construction).

    Covariates: n rows drawn with replacement from the 445 rows of the NSW experimental sample
    (Dehejia & Wahba 1999; ``causaldata.nsw_mixtape``), columns age, educ, black, hisp, marr,
    nodegree, re74, re75 (dollars). The observed NSW treatment and outcome are NOT used. With
    r74 = re74/1000, r75 = re75/1000:

    - propensity ``expit(-0.2 - 0.04 (age-25) - 0.15 (educ-10) + 0.5 black + 0.3 hisp
      - 0.5 marr + 0.3 nodegree - 0.08 r74 - 0.12 r75 + 0.6 1{r75=0})`` (lower earnings and less
      schooling, more treatment: confounded);
    - ``E[Y|A=0,X] = 3 + 0.1 (age-25) - 0.003 (age-25)^2 + 0.35 (educ-10) - 0.8 black
      + 0.3 hisp + 0.6 marr + 0.25 r74 + 1.2 sqrt(r75) - 1{r74=0, r75=0}`` (thousand dollars);
    - effect ``tau(X) = 1.5 - (nodegree - m1) + 0.6 (sqrt(r75) - m2)`` with m1, m2 the means of
      nodegree and sqrt(r75) over the 445 source rows;
    - ``Y = E[Y|A=0,X] + A tau(X) + 4 eps``, eps ~ N(0, 1) (thousand dollars).

    The covariate law of the design is the empirical distribution of the 445 source rows, so
    E[nodegree] = m1 and E[sqrt(r75)] = m2 exactly and the ATE is E[tau(X)] = 1.5 thousand
    dollars [construction].
    """
    source = nsw_covariates()
    idx = rng.integers(0, len(source), size=n)
    cov = source.iloc[idx].reset_index(drop=True)
    propensity = nsw_propensity(cov)
    treated = (rng.random(n) < propensity).astype(int)
    mu0 = nsw_control_mean(cov)
    mu1 = mu0 + nsw_effect(cov)
    y = np.where(treated == 1, mu1, mu0) + 4.0 * rng.standard_normal(n)
    frame = cov.copy()
    frame["A"] = treated
    frame["Y"] = y
    return DesignData(
        frame=frame,
        treatment="A",
        outcome="Y",
        covariates=list(NSW_COLUMNS),
        target="ate",
        truth=NSW_ATE,
        true_propensity=propensity,
        true_outcome={0: mu0, 1: mu1},
        name="nsw-semi-synthetic",
        notes="ATE = 1.5 (thousand dollars) by construction over the empirical covariate law.",
    )


_DESIGNS = {
    "smooth-consistent": Design(
        "smooth-consistent",
        "ate",
        "Smooth nonlinear nuisances, overlap in [0.1, 0.9], five covariates; truth 2",
        "own construction",
        simulate_smooth_consistent,
    ),
    "poor-overlap": Design(
        "poor-overlap",
        "ate",
        "About 25% of propensities below 0.05, heterogeneous effect; truth 2",
        "own construction",
        simulate_poor_overlap,
    ),
    "nsw-semi-synthetic": Design(
        "nsw-semi-synthetic",
        "ate",
        "NSW experimental covariates resampled, simulated treatment and outcome; truth 1.5",
        "own construction on Dehejia & Wahba (1999) covariates",
        simulate_nsw_semi_synthetic,
    ),
}


def get(name: str) -> Design:
    return _DESIGNS[name]


def names() -> list[str]:
    return list(_DESIGNS)
