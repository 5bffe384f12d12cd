"""The built-in simulation designs: Kang & Schafer (2007) and its variants, Lunceford &
Davidian (2004), and a sparse high-dimensional design of our own construction.

Tags used in the docstrings follow ``shared/REFERENCES.md``: [construction] the true value holds by
construction of the design; [recalled] a published fact reproduced from memory; [checked] a
published fact that was recomputed by running code.
"""

from __future__ import annotations

from functools import partial

import numpy as np
import pandas as pd
from scipy.special import expit

from stackdr.errors import InputError
from stackdr.studies._designs import Design, DesignData

# ---------------------------------------------------------------------------------------------
# Kang & Schafer (2007)


KANG_SCHAFER_SOURCE = (
    "Kang, J. D. Y. & Schafer, J. L. (2007). Demystifying double robustness. "
    "Statistical Science 22(4), 523-539. doi:10.1214/07-STS227"
)
_KS_Z = ["Z1", "Z2", "Z3", "Z4"]
_KS_X = ["X1", "X2", "X3", "X4"]


def kang_schafer_transform(z: np.ndarray) -> np.ndarray:
    """The transformed covariates X1..X4 that Kang & Schafer give to the analyst.

    ``X1 = exp(Z1/2)``, ``X2 = Z2/(1 + exp(Z1)) + 10``, ``X3 = (Z1 Z3/25 + 0.6)^3``,
    ``X4 = (Z2 + Z4 + 20)^2`` [checked against several public replications, REFERENCES.md].

    Parameters
    ----------
    z : numpy.ndarray
        Array of shape (n, 4) holding Z1..Z4.

    Returns
    -------
    numpy.ndarray
        Array of shape (n, 4) holding X1..X4.
    """
    z = np.asarray(z, dtype=float)
    if z.ndim != 2 or z.shape[1] != 4:
        raise InputError(f"z must have shape (n, 4), got {z.shape}")
    z1, z2, z3, z4 = z.T
    return np.column_stack(
        [
            np.exp(z1 / 2),
            z2 / (1 + np.exp(z1)) + 10,
            (z1 * z3 / 25 + 0.6) ** 3,
            (z2 + z4 + 20) ** 2,
        ]
    )


def _covariate_frame(z: np.ndarray, transformed: bool) -> tuple[pd.DataFrame, list[str]]:
    if transformed:
        return pd.DataFrame(kang_schafer_transform(z), columns=_KS_X), list(_KS_X)
    return pd.DataFrame(z, columns=_KS_Z), list(_KS_Z)


def simulate_kang_schafer(
    n: int, rng: np.random.Generator, *, ate: bool = False, transformed: bool = False
) -> DesignData:
    """Kang & Schafer (2007) design and its constant-effect ATE variant.

    Source: Kang & Schafer (2007), Statistical Science 22(4):523-539, as summarised in
    REFERENCES.md.

    Z1..Z4 iid N(0, 1); the indicator ``A ~ Bernoulli(expit(-Z1 + 0.5 Z2 - 0.25 Z3 - 0.1 Z4))``;
    noise N(0, 1); regression ``m(Z) = 210 + 27.4 Z1 + 13.7 (Z2 + Z3 + Z4)``.

    - ``ate=False`` (the original): A is the response indicator, column ``R``; ``Y = m(Z) + noise``
      is observed only where R = 1 and NaN elsewhere. Target ``"mean1"``, the mean of Y had
      everyone responded: E[Y] = 210 [construction]. Large-sample facts: P(R=1) = 0.5,
      E[Y | R=1] = 200, E[Y | R=0] = 220 [checked].
    - ``ate=True``: A is a treatment, column ``T``; ``Y = m(Z) + 10 T + noise`` is observed for
      everyone. Target ``"ate"``; ATE = ATT = 10 [construction].

    With ``transformed=True`` the analyst sees only X1..X4 of :func:`kang_schafer_transform`
    [checked] instead of Z1..Z4; the true propensity and regression are still those of Z. For a
    given generator state all four variants share every draw.

    Parameters
    ----------
    n : int
        Number of rows.
    rng : numpy.random.Generator
        Source of randomness.
    ate : bool, default False
        Constant-effect ATE variant instead of the missing-outcome mean.
    transformed : bool, default False
        Give the analyst the transformed covariates.

    Returns
    -------
    DesignData
    """
    # Draw order is fixed so that the variants share every draw for a given generator state.
    z = rng.standard_normal((n, 4))
    propensity = expit(z @ np.array([-1.0, 0.5, -0.25, -0.1]))
    indicator = (rng.random(n) < propensity).astype(int)
    noise = rng.standard_normal(n)
    regression = 210 + z @ np.array([27.4, 13.7, 13.7, 13.7])
    frame, covariates = _covariate_frame(z, transformed)
    suffix = "-transformed" if transformed else ""
    if ate:
        frame["T"] = indicator
        frame["Y"] = regression + 10 * indicator + noise
        return DesignData(
            frame=frame,
            treatment="T",
            outcome="Y",
            covariates=covariates,
            target="ate",
            truth=10.0,
            true_propensity=propensity,
            true_outcome={0: regression, 1: regression + 10},
            name="kang-schafer-ate" + suffix,
            notes="Constant treatment effect 10, so ATE = ATT = 10 by construction.",
        )
    frame["R"] = indicator
    # The outcome of a non-respondent is never seen, so it is not in the frame at all.
    frame["Y"] = np.where(indicator == 1, regression + noise, np.nan)
    return DesignData(
        frame=frame,
        treatment="R",
        outcome="Y",
        covariates=covariates,
        target="mean1",
        truth=210.0,
        true_propensity=propensity,
        # Y is missing at random given Z, so E[Y | R=a, Z] is the same regression for both a.
        true_outcome={0: regression, 1: regression.copy()},
        name="kang-schafer" + suffix,
        notes="E[Y] = 210 by construction; Y is NaN where R = 0 (unobserved).",
    )


# ---------------------------------------------------------------------------------------------
# Lunceford & Davidian (2004)

LUNCEFORD_DAVIDIAN_SOURCE = (
    "Lunceford, J. K. & Davidian, M. (2004). Stratification and weighting via the propensity "
    "score in estimation of causal treatment effects: a comparative study. "
    "Statistics in Medicine 23, 2937-2960."
)
# Order (X1, V1, X2, V2): corr(X1,V1) = corr(X2,V2) = 0.5, every other pair -0.5.
_LD_SIGMA = np.array(
    [
        [1.0, 0.5, -0.5, -0.5],
        [0.5, 1.0, -0.5, -0.5],
        [-0.5, -0.5, 1.0, 0.5],
        [-0.5, -0.5, 0.5, 1.0],
    ]
)
_LD_TAU = np.array([1.0, 1.0, -1.0, -1.0])


def simulate_lunceford_davidian(n: int, rng: np.random.Generator) -> DesignData:
    """Lunceford & Davidian (2004), strong association, xi = (-1, 1, 1).

    Source: Lunceford & Davidian (2004), Statistics in Medicine 23:2937-2960, as summarised in
    REFERENCES.md.

    ``X3 ~ Bernoulli(0.2)``; ``V3 | X3 ~ Bernoulli(0.75 X3 + 0.25 (1 - X3))``;
    ``(X1, V1, X2, V2) | X3 ~ N(tau, Sigma)`` with ``tau = (1, 1, -1, -1)`` if X3 = 1 and its
    negative if X3 = 0, Sigma with unit variances, corr(X1, V1) = corr(X2, V2) = 0.5 and all other
    correlations -0.5. Treatment ``Z ~ Bernoulli(expit(0.6 X1 - 0.6 X2 + 0.6 X3))`` (the "strong"
    association). ``Y = -X1 + X2 - X3 + 2 Z - V1 + V2 + V3 + N(0, 1)``. The treatment effect is
    the constant 2, so ATE = 2 [construction]. Covariates X1, X2, X3, V1, V2, V3.

    Parameters
    ----------
    n : int
        Number of rows.
    rng : numpy.random.Generator
        Source of randomness.

    Returns
    -------
    DesignData
    """
    x3 = (rng.random(n) < 0.2).astype(int)
    v3 = (rng.random(n) < np.where(x3 == 1, 0.75, 0.25)).astype(int)
    sign = np.where(x3 == 1, 1.0, -1.0)
    gaussian = sign[:, None] * _LD_TAU + rng.multivariate_normal(np.zeros(4), _LD_SIGMA, size=n)
    x1, v1, x2, v2 = gaussian.T
    propensity = expit(0.6 * x1 - 0.6 * x2 + 0.6 * x3)
    treated = (rng.random(n) < propensity).astype(int)
    control_mean = -x1 + x2 - x3 - v1 + v2 + v3
    outcome = control_mean + 2 * treated + rng.standard_normal(n)
    frame = pd.DataFrame(
        {"X1": x1, "X2": x2, "X3": x3, "V1": v1, "V2": v2, "V3": v3, "Z": treated, "Y": outcome}
    )
    return DesignData(
        frame=frame,
        treatment="Z",
        outcome="Y",
        covariates=["X1", "X2", "X3", "V1", "V2", "V3"],
        target="ate",
        truth=2.0,
        true_propensity=propensity,
        true_outcome={0: control_mean, 1: control_mean + 2},
        name="lunceford-davidian",
        notes="Constant treatment effect 2, so ATE = 2 by construction.",
    )


# ---------------------------------------------------------------------------------------------
# Sparse high-dimensional design (own construction)

SPARSE_BLOCKS = 10
SPARSE_BLOCK_SIZE = 5
SPARSE_RHO = 0.6
SPARSE_ATE = 1.0
SPARSE_PROPENSITY_BOUNDS = (0.05, 0.95)


def _sparse_propensity(x: np.ndarray) -> np.ndarray:
    # Squashing expit into [0.05, 0.95] guarantees overlap whatever the covariates.
    low, high = SPARSE_PROPENSITY_BOUNDS
    score = 0.9 * x[:, 0] - 0.6 * (x[:, 1] ** 2 - 1) + 0.8 * x[:, 0] * x[:, 5] + 0.5 * x[:, 10]
    return low + (high - low) * expit(score)


def _sparse_control_mean(x: np.ndarray) -> np.ndarray:
    return 1 + 2 * x[:, 0] + np.sin(np.pi * x[:, 1]) + 1.5 * np.abs(x[:, 5]) - 0.5 * x[:, 10]


def _sparse_effect(x: np.ndarray) -> np.ndarray:
    # Each added term has mean zero because every covariate is N(0, 1) marginally.
    return SPARSE_ATE + 0.5 * x[:, 1] + 0.5 * (x[:, 10] ** 2 - 1)


def simulate_sparse(n: int, rng: np.random.Generator) -> DesignData:
    """Sparse nonlinear design with 50 correlated covariates (own construction).

    Covariates X1..X50 form 10 blocks of 5; within a block they are a stationary Gaussian AR(1)
    sequence with correlation ``0.6^|i-j|`` and unit variances; blocks are independent. Only X1,
    X2, X6 and X11 enter the nuisances (X3..X5 are inactive proxies correlated with X1 and X2):

    - propensity ``P(A=1|X) = 0.05 + 0.9 expit(0.9 X1 - 0.6 (X2^2 - 1) + 0.8 X1 X6 + 0.5 X11)``,
      bounded in [0.05, 0.95] by construction;
    - ``E[Y | A=0, X] = 1 + 2 X1 + sin(pi X2) + 1.5 |X6| - 0.5 X11``;
    - effect ``tau(X) = 1 + 0.5 X2 + 0.5 (X11^2 - 1)``; ``Y = E[Y|A=0,X] + A tau(X) + N(0, 1)``.

    Because every Xj is N(0, 1) marginally, E[X2] = 0 and E[X11^2] = 1, so the true ATE is
    E[tau(X)] = 1 [construction]. X1 drives both treatment and outcome, so the difference in means
    is confounded.

    Parameters
    ----------
    n : int
        Number of rows.
    rng : numpy.random.Generator
        Source of randomness.

    Returns
    -------
    DesignData
    """
    innovations = rng.standard_normal((n, SPARSE_BLOCKS, SPARSE_BLOCK_SIZE))
    blocks = np.empty_like(innovations)
    blocks[:, :, 0] = innovations[:, :, 0]
    scale = np.sqrt(1 - SPARSE_RHO**2)
    for j in range(1, SPARSE_BLOCK_SIZE):
        blocks[:, :, j] = SPARSE_RHO * blocks[:, :, j - 1] + scale * innovations[:, :, j]
    x = blocks.reshape(n, SPARSE_BLOCKS * SPARSE_BLOCK_SIZE)
    propensity = _sparse_propensity(x)
    treated = (rng.random(n) < propensity).astype(int)
    control_mean = _sparse_control_mean(x)
    treated_mean = control_mean + _sparse_effect(x)
    outcome = np.where(treated == 1, treated_mean, control_mean) + rng.standard_normal(n)
    covariates = [f"X{j + 1}" for j in range(x.shape[1])]
    frame = pd.DataFrame(x, columns=covariates)
    frame["A"] = treated
    frame["Y"] = outcome
    return DesignData(
        frame=frame,
        treatment="A",
        outcome="Y",
        covariates=covariates,
        target="ate",
        truth=SPARSE_ATE,
        true_propensity=propensity,
        true_outcome={0: control_mean, 1: treated_mean},
        name="sparse",
        notes="ATE = 1 by construction (the effect's added terms have mean zero).",
    )


# ---------------------------------------------------------------------------------------------
# The built-in designs, as the registry lists them

BUILT_IN = [
    Design(
        "kang-schafer",
        "mean1",
        "Mean of Y missing at random (R = observed), correct covariates Z1..Z4; truth 210",
        KANG_SCHAFER_SOURCE,
        simulate_kang_schafer,
    ),
    Design(
        "kang-schafer-transformed",
        "mean1",
        "Mean of Y missing at random, analyst sees transformed covariates X1..X4; truth 210",
        KANG_SCHAFER_SOURCE,
        partial(simulate_kang_schafer, transformed=True),
    ),
    Design(
        "kang-schafer-ate",
        "ate",
        "Constant-effect ATE variant, correct covariates Z1..Z4; truth 10",
        KANG_SCHAFER_SOURCE,
        partial(simulate_kang_schafer, ate=True),
    ),
    Design(
        "kang-schafer-ate-transformed",
        "ate",
        "Constant-effect ATE variant, transformed covariates X1..X4; truth 10",
        KANG_SCHAFER_SOURCE,
        partial(simulate_kang_schafer, ate=True, transformed=True),
    ),
    Design(
        "lunceford-davidian",
        "ate",
        "Strong association, xi = (-1, 1, 1), six covariates; truth 2",
        LUNCEFORD_DAVIDIAN_SOURCE,
        simulate_lunceford_davidian,
    ),
    Design(
        "sparse",
        "ate",
        "50 correlated covariates, 4 active, nonlinear nuisances, overlap in [0.05, 0.95]; truth 1",
        "own construction (stackdr)",
        simulate_sparse,
    ),
]
