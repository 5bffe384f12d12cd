"""The pair table Psi and everything computed from row-level DR contributions (DESIGN 2-3).

Psi[k, j] is the cross-fitted DR estimate with propensity learner k and outcome learner j. It is
computed with matrix products over rows, never as an n x K1 x K2 array.

Sampling weights and clusters (issue 14). :class:`PairInputs` may carry sampling weights ``s``
and integer cluster codes. Every weighted sum over rows then carries ``s`` (times any bootstrap
row weights), so each estimate is the weighted-population one, ``sum s H / sum s d``. Standard
errors are the linearisation (sandwich) form for sampling weights,
``sqrt(sum_i (s_i IF_i)^2) / sum_i s_i``, which is the HC0 standard error of weighted least
squares; with clusters the scores ``s_i IF_i`` are summed within clusters first and the variance
is multiplied by G / (G - 1) (Cameron & Miller 2015, J. Human Resources 50(2):317-372, common
practice). Without weights and clusters the arithmetic is exactly the unweighted one.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
from scipy.special import expit, logit

from stackdr.core._targets import Target
from stackdr.errors import InputError

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
    sample_weight: np.ndarray | None = None
    cluster_codes: np.ndarray | None = None

    @property
    def n(self) -> int:
        return int(self.d.shape[0])

    @property
    def shape(self) -> tuple[int, int]:
        return self.P[0].shape[1], self.B[0].shape[1]


def pair_inputs(
    target: Target,
    crossfit,
    A: np.ndarray,
    Y: np.ndarray,
    repeat: int = 0,
    *,
    sample_weight: np.ndarray | None = None,
    cluster_codes: np.ndarray | None = None,
) -> PairInputs:
    """Assemble the row-level ingredients for repetition ``repeat`` of a cross-fit, with
    optional sampling weights and cluster codes (0..G-1) carried to every sum and SE."""
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
        None if sample_weight is None else np.asarray(sample_weight, dtype=float),
        None if cluster_codes is None else np.asarray(cluster_codes, dtype=np.int64),
    )


def with_stacked_propensity(inp: PairInputs, weights: np.ndarray) -> PairInputs:
    """The inputs with one more propensity column: the probability-scale blend ``pi @ weights``
    (the prediction-loss stacked propensity when ``weights`` are the log-loss stacking weights).

    Its weight-side values are the target's transforms of the blended propensity (e.g.
    ``1 / (pi @ weights)``), exactly the nuisance prediction-loss stacking uses, so under the
    riesz blend the vertex of the new column reproduces the prediction-loss stacking estimate
    at any outcome weights. A convex combination of clipped propensities needs no clipping.

    Parameters
    ----------
    inp : PairInputs
    weights : numpy.ndarray (K1,)
        Convex weights of the propensity learners.

    Returns
    -------
    PairInputs
        K1 + 1 propensity columns, the new one last; the outcome side is shared.

    Examples
    --------
    >>> from types import SimpleNamespace
    >>> from stackdr.core import get_target, pair_inputs
    >>> A, Y = np.array([1.0, 0.0]), np.array([2.0, 1.0])
    >>> crossfit = SimpleNamespace(
    ...     propensity=np.array([[[0.5, 0.25], [0.5, 0.75]]]),
    ...     outcome={"mu1": np.zeros((1, 2, 1)), "mu0": np.zeros((1, 2, 1))},
    ...     propensity_kind="classifier",
    ... )
    >>> inp = pair_inputs(get_target("ate"), crossfit, A, Y)
    >>> with_stacked_propensity(inp, np.array([0.5, 0.5])).P[0].tolist()
    [[2.0, 4.0, 2.6666666666666665], [2.0, 1.3333333333333333, 1.6]]
    """
    stacked = inp.pi @ np.asarray(weights, dtype=float)
    P = [
        np.column_stack([P, np.asarray(t(stacked), dtype=float)])
        for P, t in zip(inp.P, inp.transforms)
    ]
    return replace(inp, P=P, pi=np.column_stack([inp.pi, stacked]))


def _weights(inp: PairInputs, row_weights: np.ndarray | None) -> np.ndarray:
    """Row weights of a sum: the given (bootstrap) weights times the sampling weights."""
    sampling = inp.sample_weight
    if row_weights is None:
        return np.ones(inp.n) if sampling is None else sampling
    w = np.asarray(row_weights, dtype=float)
    if sampling is None:
        return w
    return w * (sampling if w.ndim == 1 else sampling[:, None])


def pair_table(inp: PairInputs, row_weights: np.ndarray | None = None) -> np.ndarray:
    """Psi (K1 x K2) by matrix products; ``row_weights`` gives a weighted (bootstrap) version.

    Examples
    --------
    An ATE on four rows with two propensity learners (a constant 0.5 and one that varies) and
    two outcome learners (zero, which gives the inverse-probability-weighting estimate, and the
    arm means). The cross-fit holds predictions shaped (repetitions, rows, learners).

    >>> from types import SimpleNamespace
    >>> from stackdr.core import get_target, pair_inputs
    >>> A = np.array([1.0, 1.0, 0.0, 0.0])
    >>> Y = np.array([3.0, 5.0, 1.0, 2.0])
    >>> pi = np.array([[0.5, 0.8], [0.5, 0.6], [0.5, 0.4], [0.5, 0.2]])
    >>> mu1 = np.array([[0.0, 4.0]] * 4)
    >>> mu0 = np.array([[0.0, 1.5]] * 4)
    >>> crossfit = SimpleNamespace(
    ...     propensity=pi[None],
    ...     outcome={"mu1": mu1[None], "mu0": mu0[None]},
    ...     propensity_kind="classifier",
    ... )
    >>> pair_table(pair_inputs(get_target("ate"), crossfit, A, Y)).round(4).tolist()
    [[2.5, 2.5], [1.9792, 2.6562]]
    """
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
    return _from_base(inp, _blend_base(inp, blend), alphas, blend)


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


def _blend_base(inp: PairInputs, blend: str, rows=slice(None)) -> np.ndarray:
    """The per-row quantity a nonlinear blend mixes linearly: logit(pi) or pi (n x K1)."""
    if blend not in BLENDS or blend == "riesz":
        raise InputError(f"a per-row blend base exists for probability and logit, not {blend!r}")
    if blend == "logit" and inp.propensity_kind != "classifier":
        raise InputError("the logit blend needs a binary treatment (probabilities)")
    return logit(inp.pi[rows]) if blend == "logit" else inp.pi[rows]


def _from_base(inp: PairInputs, base: np.ndarray, alphas: np.ndarray, blend: str) -> list:
    """Weight-side values of each component, (n, m) arrays, from the blend base."""
    mixed = base @ alphas.T
    pi = expit(mixed) if blend == "logit" else mixed
    return [np.asarray(t(pi), dtype=float) for t in inp.transforms]


def _linear_terms(inp: PairInputs, rows=slice(None)) -> tuple[list, np.ndarray]:
    """G_c = [h1_c B_c | h3_c] (n x (K2 + 1)) per component, whose products with p_c(alpha) give
    the alpha-dependent numerator of phi, and the alpha-free part sum_c h2_c B_c + h4 (n x K2)."""
    G = [
        np.hstack([(h1[rows])[:, None] * B[rows], (h3[rows])[:, None]])
        for B, h1, h3 in zip(inp.B, inp.h1, inp.h3)
    ]
    free = sum(h2[rows][:, None] * B[rows] for B, h2 in zip(inp.B, inp.h2)) + inp.h4[rows][:, None]
    return G, free


def _lattice_codes(points: np.ndarray, resolution: int) -> np.ndarray:
    """Integer code of each row of ``points`` as a lattice point with denominator
    ``resolution`` (the counts in base resolution + 1), or -1 where the row is not exactly one."""
    counts = np.rint(points * resolution)
    exact = np.all(counts / resolution == points, axis=1) & np.all(counts >= 0, axis=1)
    radix = float(resolution + 1) ** np.arange(points.shape[1])
    return np.where(exact, counts @ radix, -1.0).astype(np.int64)


def lattice_phi(
    inp: PairInputs,
    blend: str,
    row_weights: np.ndarray,
    points: np.ndarray,
    batch: int = 256,
) -> np.ndarray:
    """phi at fixed propensity weights for many sets of row weights at once: (c, m, K2).

    Row weights enter phi linearly, so for every point the weighted sums over rows of all c
    replicates are one matrix product ``Z' p_c(points)`` with ``Z`` the row terms times the
    weights (n x c(K2 + 1)); the weight-side values at the points are computed once for all
    replicates. ``points`` are processed ``batch`` at a time to bound memory.

    Parameters
    ----------
    inp : PairInputs
    blend : {"probability", "logit"}
    row_weights : array_like, shape (n, c)
        One column of row weights per replicate.
    points : array_like, shape (m, K1)
        Propensity weights (e.g. a simplex lattice).
    batch : int, default 256
        Points per matrix product.

    Returns
    -------
    numpy.ndarray, shape (c, m, K2)
        Agrees with :func:`phi` for each column of ``row_weights`` up to round-off.
    """
    W = _weights(inp, row_weights)
    points = np.atleast_2d(np.asarray(points, dtype=float))
    n, c = W.shape
    K2 = inp.shape[1]
    base = _blend_base(inp, blend)
    G, free = _linear_terms(inp)
    Z = [(W[:, :, None] * g[:, None, :]).reshape(n, -1) for g in G]
    out = np.empty((c, points.shape[0], K2))
    for start in range(0, points.shape[0], batch):
        block = slice(start, start + batch)
        p_alpha = _from_base(inp, base, points[block], blend)
        num = sum(z.T @ p for z, p in zip(Z, p_alpha)).reshape(c, K2 + 1, -1)
        out[:, block, :] = np.transpose(num[:, :K2, :] + num[:, K2:, :], (0, 2, 1))
    out += (W.T @ free)[:, None, :]
    return out / (W.T @ inp.d)[:, None, None]


class WeightedPhi:
    """phi(alpha) for one set of row weights, with the per-row work done once.

    :func:`phi` recomputes the blend base (e.g. logit(pi)) and the weighted row products on every
    call; a replicate's weight search calls phi a few hundred times with the same row weights.
    This keeps, on the rows with nonzero weight only (a multinomial draw leaves about 37% out),
    the blend base and per component the weighted terms ``w G_c`` (see :func:`lattice_phi`), so
    a call costs the blend itself and one small matrix product per component. Values at a
    fixed lattice computed beforehand (by :func:`lattice_phi`, for many replicates at once) can
    be attached with ``known``: calls return those rows by exact lookup.

    Parameters
    ----------
    inp : PairInputs
    blend : {"probability", "logit"}
    row_weights : array_like, shape (n,)
    known : (int, array_like, array_like), optional
        ``(resolution, points, values)``: lattice points with that denominator (m, K1) and phi
        there (m, K2) for these row weights (ignored when ``(resolution + 1) ** K1 >= 2 ** 53``).
    """

    def __init__(self, inp: PairInputs, blend: str, row_weights, known=None):
        w = _weights(inp, row_weights)
        rows = np.flatnonzero(w)
        self.inp, self.blend = inp, blend
        self.base = _blend_base(inp, blend, rows)
        G, free = _linear_terms(inp, rows)
        self.terms = [w[rows][:, None] * g for g in G]
        self.free = w[rows] @ free
        self.denominator = w[rows] @ inp.d[rows]
        self.K2 = inp.shape[1]
        self.known = None
        # Lattice codes must stay exact integers in floating point; beyond that every call is
        # evaluated directly.
        if known is not None and float(known[0] + 1) ** inp.shape[0] < 2.0**53:
            resolution, points, values = known
            codes = _lattice_codes(np.asarray(points, dtype=float), resolution)
            order = np.argsort(codes)
            self.known = (resolution, codes[order], np.asarray(values, dtype=float)[order])

    def _direct(self, alphas: np.ndarray) -> np.ndarray:
        p_alpha = _from_base(self.inp, self.base, alphas, self.blend)
        total = sum(p.T @ t for p, t in zip(p_alpha, self.terms))
        return (total[:, : self.K2] + total[:, self.K2 :] + self.free) / self.denominator

    def __call__(self, alphas) -> np.ndarray:
        """phi at propensity weights ``alphas`` (m, K1): (m, K2)."""
        alphas = np.atleast_2d(np.asarray(alphas, dtype=float))
        if self.known is None:
            return self._direct(alphas)
        resolution, codes, values = self.known
        wanted = _lattice_codes(alphas, resolution)
        at = np.minimum(np.searchsorted(codes, wanted), codes.size - 1)
        found = codes[at] == wanted
        out = np.empty((alphas.shape[0], self.K2))
        out[found] = values[at[found]]
        if not found.all():
            out[~found] = self._direct(alphas[~found])
        return out


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


def influence_standard_error(
    influence: np.ndarray,
    sample_weight: np.ndarray | None = None,
    cluster_codes: np.ndarray | None = None,
) -> np.ndarray:
    """SE from influence values (n,) or (n, m), one per column.

    Unweighted and unclustered: ``sqrt(mean(IF^2) / n)``. With sampling weights s:
    ``sqrt(sum (s IF)^2) / sum s`` (the sandwich form, HC0 for weighted least squares). With
    cluster codes 0..G-1: the scores ``s IF`` are summed within clusters and the variance
    ``G / (G - 1) sum_g (sum_{i in g} s_i IF_i)^2 / (sum s)^2`` (the small-sample factor
    G / (G - 1) of Cameron & Miller 2015, without the (n - 1) / (n - p) regression factor).

    Examples
    --------
    >>> infl = np.array([1.0, -1.0, 2.0, -2.0])
    >>> float(influence_standard_error(infl))
    0.7905694150420949
    >>> float(influence_standard_error(infl, cluster_codes=np.array([0, 0, 1, 1])))
    0.0
    """
    if sample_weight is None and cluster_codes is None:
        return np.sqrt(np.mean(influence**2, axis=0) / influence.shape[0])
    w = np.ones(influence.shape[0]) if sample_weight is None else sample_weight
    scores = influence * (w if influence.ndim == 1 else w[:, None])
    if cluster_codes is None:
        return np.sqrt(np.sum(scores**2, axis=0)) / w.sum()
    groups = int(cluster_codes.max()) + 1
    sums = np.zeros((groups, *scores.shape[1:]))
    np.add.at(sums, cluster_codes, scores)
    return np.sqrt(groups / (groups - 1) * np.sum(sums**2, axis=0)) / w.sum()


def estimate_from_rows(
    H: np.ndarray,
    d: np.ndarray,
    sample_weight: np.ndarray | None = None,
    cluster_codes: np.ndarray | None = None,
) -> RowEstimate:
    """psi = sum s H / sum s d, influence (H - psi d) / (weighted mean of d), SE by
    :func:`influence_standard_error` (s = 1 without sampling weights)."""
    if sample_weight is None:
        dbar = d.mean()
        psi = H.sum() / d.sum()
    else:
        dbar = (sample_weight @ d) / sample_weight.sum()
        psi = (sample_weight @ H) / (sample_weight @ d)
    infl = (H - psi * d) / dbar
    se = influence_standard_error(infl, sample_weight, cluster_codes)
    return RowEstimate(float(psi), float(se), infl)


def blend_estimate(inp: PairInputs, alpha, beta, blend: str = "riesz") -> RowEstimate:
    """DR estimate, influence function and SE at blended nuisances."""
    H = row_contributions(inp, alpha, beta, blend)
    return estimate_from_rows(H, inp.d, inp.sample_weight, inp.cluster_codes)


def pair_rows(inp: PairInputs, k: int) -> np.ndarray:
    """Row contributions H_i of every pair (k, j) for one propensity learner k: (n, K2)."""
    H = np.repeat(inp.h4[:, None], inp.shape[1], axis=1)
    for P, B, h1, h2, h3 in zip(inp.P, inp.B, inp.h1, inp.h2, inp.h3):
        p = P[:, k][:, None]
        H += B * (p * h1[:, None] + h2[:, None]) + p * h3[:, None]
    return H


def pair_influence(inp: PairInputs, k: int) -> np.ndarray:
    """Influence-function values of every pair (k, j) for one propensity learner k: (n, K2),
    ``(H - psi d) / mean(d)`` (weighted sums and mean with sampling weights)."""
    H = pair_rows(inp, k)
    if inp.sample_weight is None:
        psi = H.sum(axis=0) / inp.d.sum()
        dbar = inp.d.mean()
    else:
        w = inp.sample_weight
        psi = (w @ H) / (w @ inp.d)
        dbar = (w @ inp.d) / w.sum()
    return (H - inp.d[:, None] * psi[None, :]) / dbar


def pair_standard_errors(inp: PairInputs) -> np.ndarray:
    """Influence-function SE of every pair (K1 x K2); one pass per propensity learner, so memory
    stays at n x K2."""
    K1, K2 = inp.shape
    se = np.empty((K1, K2))
    for k in range(K1):
        se[k] = influence_standard_error(
            pair_influence(inp, k), inp.sample_weight, inp.cluster_codes
        )
    return se


def contrast_standard_error(inp: PairInputs, first, second, blend: str = "riesz") -> float:
    """SE of psi(first) - psi(second), each an (alpha, beta) pair, from paired row contributions.

    Used as the noise floor of a sensitivity: differences below it are not distinguishable from
    sampling noise.
    """
    a = blend_estimate(inp, *first, blend)
    b = blend_estimate(inp, *second, blend)
    diff = a.influence - b.influence
    return float(influence_standard_error(diff, inp.sample_weight, inp.cluster_codes))
