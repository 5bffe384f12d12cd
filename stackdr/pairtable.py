"""The pair table Psi and everything computed from row-level DR contributions (DESIGN 2-3).

Psi[k, j] is the cross-fitted DR estimate with propensity learner k and outcome learner j. It is
computed with matrix products over rows, never as an n x K1 x K2 array.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.special import expit, logit

from .crossfit import CrossFitResult
from .errors import InputError
from .targets import Target

BLENDS = ("riesz", "probability", "logit")


@dataclass(frozen=True)
class PairInputs:
    """Row-level ingredients of one cross-fitting repetition.

    P[c] (n, K1) and B[c] (n, K2) are the weight-side and outcome-side values of component c for
    every learner; h1[c], h2[c], h3[c], h4 and the denominator d are row functions; pi (n, K1) is
    the clipped propensity (used by the ``probability`` and ``logit`` blends).
    """

    P: list
    B: list
    h1: list
    h2: list
    h3: list
    h4: np.ndarray
    d: np.ndarray
    pi: np.ndarray
    transforms: list
    propensity_kind: str

    @property
    def n(self) -> int:
        return int(self.d.shape[0])

    @property
    def shape(self) -> tuple[int, int]:
        return self.P[0].shape[1], self.B[0].shape[1]


def pair_inputs(
    target: Target, crossfit: CrossFitResult, A: np.ndarray, Y: np.ndarray, repeat: int = 0
) -> PairInputs:
    """Assemble the row-level ingredients for repetition ``repeat`` of a cross-fit."""
    rows = target.row_functions(A, Y)
    pi = crossfit.propensity[repeat]
    P, B = [], []
    with np.errstate(divide="ignore"):
        for comp in target.components:
            P.append(np.asarray(comp.weight_transform(pi), dtype=float))
            B.append(crossfit.outcome[comp.outcome_head][repeat])
    for c, p in enumerate(P):
        if not np.all(np.isfinite(p)):
            raise InputError(
                f"weight-side values of component {c} are not finite; the propensity hits 0 or 1 "
                "(raise the clipping bound)"
            )
    return PairInputs(
        P,
        B,
        rows["h1"],
        rows["h2"],
        rows["h3"],
        rows["h4"],
        rows["d"],
        pi,
        [c.weight_transform for c in target.components],
        crossfit.propensity_kind,
    )


def _weights(inp: PairInputs, row_weights: np.ndarray | None) -> np.ndarray:
    return np.ones(inp.n) if row_weights is None else np.asarray(row_weights, dtype=float)


def pair_table(inp: PairInputs, row_weights: np.ndarray | None = None) -> np.ndarray:
    """Psi (K1 x K2) by matrix products; ``row_weights`` gives a weighted (bootstrap) version."""
    w = _weights(inp, row_weights)
    K1, K2 = inp.shape
    total = np.zeros((K1, K2))
    for P, B, h1, h2, h3 in zip(inp.P, inp.B, inp.h1, inp.h2, inp.h3):
        total += (P * (w * h1)[:, None]).T @ B
        total += ((w * h2) @ B)[None, :]
        total += ((w * h3) @ P)[:, None]
    total += w @ inp.h4
    return total / (w @ inp.d)


def blended_weight_side(inp: PairInputs, alphas: np.ndarray, blend: str) -> list:
    """Weight-side values of each component at propensity weights ``alphas`` (m, K1): list of
    (n, m) arrays."""
    alphas = np.atleast_2d(np.asarray(alphas, dtype=float))
    if blend == "riesz":
        return [P @ alphas.T for P in inp.P]
    if blend not in BLENDS:
        raise InputError(f"unknown blend {blend!r}; choose one of {', '.join(BLENDS)}")
    if blend == "logit":
        if inp.propensity_kind != "classifier":
            raise InputError("the logit blend needs a binary treatment (probabilities)")
        pi = expit(logit(inp.pi) @ alphas.T)
    else:
        pi = inp.pi @ alphas.T
    return [np.asarray(t(pi), dtype=float) for t in inp.transforms]


def phi(
    inp: PairInputs, alphas: np.ndarray, blend: str, row_weights: np.ndarray | None = None
) -> np.ndarray:
    """phi(alpha)_j = psi(alpha, e_j) for a batch of propensity weights: (m, K2)."""
    w = _weights(inp, row_weights)
    p_alpha = blended_weight_side(inp, alphas, blend)
    m = p_alpha[0].shape[1]
    total = np.zeros((m, inp.shape[1]))
    for p, B, h1, h2, h3 in zip(p_alpha, inp.B, inp.h1, inp.h2, inp.h3):
        total += (p * (w * h1)[:, None]).T @ B
        total += ((w * h2) @ B)[None, :]
        total += ((w * h3) @ p)[:, None]
    total += w @ inp.h4
    return total / (w @ inp.d)


def row_contributions(inp: PairInputs, alpha, beta, blend: str = "riesz") -> np.ndarray:
    """H_i at blended nuisances (alpha, beta): length-n array."""
    p_alpha = blended_weight_side(inp, np.asarray(alpha, dtype=float)[None, :], blend)
    beta = np.asarray(beta, dtype=float)
    H = inp.h4.copy()
    for p, B, h1, h2, h3 in zip(p_alpha, inp.B, inp.h1, inp.h2, inp.h3):
        p = p[:, 0]
        b = B @ beta
        H += b * p * h1 + b * h2 + p * h3
    return H


@dataclass(frozen=True)
class RowEstimate:
    """An estimate with its influence-function values and standard error."""

    estimate: float
    se: float
    influence: np.ndarray


def estimate_from_rows(H: np.ndarray, d: np.ndarray) -> RowEstimate:
    """psi = sum H / sum d, influence (H - psi d) / mean(d), SE = sqrt(mean(IF^2) / n)."""
    dbar = d.mean()
    psi = H.sum() / d.sum()
    infl = (H - psi * d) / dbar
    return RowEstimate(float(psi), float(np.sqrt(np.mean(infl**2) / H.shape[0])), infl)


def blend_estimate(inp: PairInputs, alpha, beta, blend: str = "riesz") -> RowEstimate:
    """DR estimate, influence function and SE at blended nuisances."""
    return estimate_from_rows(row_contributions(inp, alpha, beta, blend), inp.d)


def pair_rows(inp: PairInputs, k: int) -> np.ndarray:
    """Row contributions H_i of every pair (k, j) for one propensity learner k: (n, K2)."""
    H = np.repeat(inp.h4[:, None], inp.shape[1], axis=1)
    for P, B, h1, h2, h3 in zip(inp.P, inp.B, inp.h1, inp.h2, inp.h3):
        p = P[:, k][:, None]
        H += B * (p * h1[:, None] + h2[:, None]) + p * h3[:, None]
    return H


def pair_standard_errors(inp: PairInputs) -> np.ndarray:
    """Influence-function SE of every pair (K1 x K2); one pass per propensity learner, so memory
    stays at n x K2."""
    K1, K2 = inp.shape
    n = inp.n
    dbar = inp.d.mean()
    se = np.empty((K1, K2))
    for k in range(K1):
        H = pair_rows(inp, k)
        psi = H.sum(axis=0) / inp.d.sum()
        infl = (H - inp.d[:, None] * psi[None, :]) / dbar
        se[k] = np.sqrt(np.mean(infl**2, axis=0) / n)
    return se


def contrast_standard_error(inp: PairInputs, first, second, blend: str = "riesz") -> float:
    """SE of psi(first) - psi(second), each an (alpha, beta) pair, from paired row contributions.

    Used as the noise floor of a sensitivity: differences below it are not distinguishable from
    sampling noise.
    """
    a = blend_estimate(inp, *first, blend)
    b = blend_estimate(inp, *second, blend)
    diff = a.influence - b.influence
    return float(np.sqrt(np.mean(diff**2) / inp.n))
