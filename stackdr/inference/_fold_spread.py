"""Between-fold spread of a cross-fitted estimate: what the reweighting bootstrap cannot see.

The reweighting bootstrap keeps every out-of-fold prediction fixed, so the variability that comes
from refitting the learners is missing from its replicates. With K cross-fitting folds, fold k's
rows are predicted by a model fitted on the other folds only, so the K fold-specific estimates
theta_k (the estimate computed on fold k's rows alone, at the final blended nuisances) differ by
sampling noise *and* by how much the K fitted models differ from each other. Treating the folds
as K studies of one quantity, Cochran's Q and the DerSimonian-Laird between-study variance
(DerSimonian & Laird 1986, Controlled Clinical Trials 7: 177-188) measure the second part:

    w_k = 1 / s_k^2,  theta_w = sum w_k theta_k / sum w_k,  Q = sum w_k (theta_k - theta_w)^2,
    tau^2 = max(0, (Q - (K - 1)) / (sum w_k - sum w_k^2 / sum w_k)),

with s_k the influence-function SE of theta_k. Under fixed nuisances and no between-fold
heterogeneity Q is about chi-squared with K - 1 degrees of freedom, so ``Q / (K - 1)`` (the
dispersion ratio) is near 1. A large ratio flags learners whose fitted models move the estimate
more than sampling noise does: unstable fits whose uncertainty only the refit bootstrap measures.

The module also gives the share of the influence-function variance carried by the top 1% of rows
(a heavy-tail measure of the inverse weights). Pure functions on arrays.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
from scipy.stats import chi2

from stackdr.core import estimate_from_rows

#: Share of rows whose squared influence values :func:`top_row_share` adds up.
TOP_ROWS = 0.01


@dataclass(frozen=True)
class FoldSpread:
    """Fold-specific estimates and their heterogeneity.

    Attributes
    ----------
    estimates : ndarray (K,)
        theta_k, the estimate on fold k's rows.
    standard_errors : ndarray (K,)
        Influence-function SE of each theta_k.
    q : float
        Cochran's Q.
    dispersion : float
        Q / (K - 1); about 1 when the folds agree up to sampling noise.
    p_value : float
        P(chi-squared with K - 1 degrees of freedom > Q).
    between_variance : float
        DerSimonian-Laird tau^2 (0 when Q <= K - 1).
    """

    estimates: np.ndarray
    standard_errors: np.ndarray
    q: float
    dispersion: float
    p_value: float
    between_variance: float

    @property
    def folds(self) -> int:
        return int(self.estimates.size)


def fold_spread(
    H: np.ndarray,
    d: np.ndarray,
    labels: np.ndarray,
    sample_weight: np.ndarray | None = None,
    cluster_codes: np.ndarray | None = None,
) -> FoldSpread:
    """Cochran's Q and the DerSimonian-Laird tau^2 over cross-fitting folds.

    Parameters
    ----------
    H : ndarray (n,)
        Row contributions at the final nuisances (the estimate is sum H / sum d).
    d : ndarray (n,)
        Row denominators.
    labels : ndarray (n,)
        Fold of each row (0 .. K - 1).
    sample_weight, cluster_codes : ndarray (n,), optional
        Sampling weights and cluster codes: each fold's estimate is then the weighted one and
        its SE the sandwich or cluster-robust one of ``estimate_from_rows`` (folds keep clusters
        whole, so each fold's clusters are its own).

    Returns
    -------
    FoldSpread

    Examples
    --------
    Two folds that agree exactly give Q = 0 and tau^2 = 0:

    >>> H = np.array([1.0, 3.0, 1.0, 3.0])
    >>> spread = fold_spread(H, np.ones(4), np.array([0, 0, 1, 1]))
    >>> spread.estimates.tolist(), spread.q, spread.between_variance
    ([2.0, 2.0], 0.0, 0.0)
    """
    H = np.asarray(H, dtype=float)
    d = np.asarray(d, dtype=float)
    labels = np.asarray(labels)
    folds = np.unique(labels)
    theta = np.empty(folds.size)
    se = np.empty(folds.size)
    for i, fold in enumerate(folds):
        rows = labels == fold
        weights = None if sample_weight is None else np.asarray(sample_weight)[rows]
        codes = None
        if cluster_codes is not None:
            codes = np.unique(np.asarray(cluster_codes)[rows], return_inverse=True)[1]
            if codes.max() < 1:  # one cluster in the fold: no cluster-robust SE
                theta[i], se[i] = np.nan, np.nan
                continue
        fit = estimate_from_rows(H[rows], d[rows], weights, codes)
        theta[i], se[i] = fit.estimate, fit.se
    K = folds.size
    if K < 2 or not np.all(se > 0):
        return FoldSpread(theta, se, 0.0, float("nan"), float("nan"), 0.0)
    w = 1.0 / se**2
    pooled = float(w @ theta / w.sum())
    q = float(w @ (theta - pooled) ** 2)
    scale = float(w.sum() - (w**2).sum() / w.sum())
    tau2 = max(0.0, (q - (K - 1)) / scale)
    return FoldSpread(theta, se, q, q / (K - 1), float(chi2.sf(q, K - 1)), tau2)


def top_row_share(influence: np.ndarray, share: float = TOP_ROWS) -> float:
    """Share of sum IF^2 carried by the ``share`` of rows with the largest |IF| (at least one).

    About ``share`` x (a few) for light tails; near 1 when a handful of extreme inverse weights
    carry the variance.

    Examples
    --------
    >>> top_row_share(np.r_[np.ones(99), 10.0])
    0.5025125628140703
    """
    sq = np.sort(np.asarray(influence, dtype=float) ** 2)[::-1]
    total = sq.sum()
    if total == 0:
        return 0.0
    top = max(1, int(np.ceil(share * sq.size)))
    return float(sq[:top].sum() / total)


def widen_intervals(boot, estimates: dict, added: dict):
    """The bootstrap record with ``added[name]`` (a variance) added to each estimator's SE and
    its interval widened about the estimate by the ratio of new to old SE (keeping the
    interval's asymmetry). Estimators with nothing added keep their numbers.

    Parameters
    ----------
    boot : BootstrapResult
    estimates : dict name -> float
        Point estimates, the centres of the widening.
    added : dict name -> float
        Variance added to each estimator's bootstrap SE squared.

    Returns
    -------
    BootstrapResult
        A copy; ``boot`` is unchanged.
    """
    ses, intervals = dict(boot.standard_errors), dict(boot.intervals)
    for name, extra in added.items():
        old = ses.get(name)
        if old is None or not extra > 0 or not old > 0:
            continue
        new = float(np.sqrt(old**2 + extra))
        factor, centre = new / old, estimates[name]
        low, high = intervals[name]
        intervals[name] = (centre - factor * (centre - low), centre + factor * (high - centre))
        ses[name] = new
    return replace(boot, standard_errors=ses, intervals=intervals)


def paired_refit_ratio(refit: np.ndarray, reweighted: np.ndarray, estimate: float) -> float:
    """sqrt(sum_b (refit_b - estimate)^2 / sum_b (reweighted_b - estimate)^2) over the replicates
    both bootstraps drew with the same rows (replicate b of each uses the same generator).

    The refit bootstrap's extra spread, measured against the reweighting bootstrap on shared row
    draws: the row-sampling part common to both cancels in the ratio, so a few refit
    replicates estimate it far more precisely than their own SD would (a ratio estimator with
    common random numbers). Replicates that failed (NaN) are left out of both sums.

    Examples
    --------
    >>> paired_refit_ratio(np.array([1.0, -2.0]), np.array([0.5, -1.0]), 0.0)
    2.0
    """
    refit = np.asarray(refit, dtype=float)
    reweighted = np.asarray(reweighted, dtype=float)[: refit.size]
    ok = np.isfinite(refit) & np.isfinite(reweighted)
    den = float(np.sum((reweighted[ok] - estimate) ** 2))
    if den == 0.0:
        return float("nan")
    return float(np.sqrt(np.sum((refit[ok] - estimate) ** 2) / den))


def refit_excess(
    refit: np.ndarray, reweighted: np.ndarray, estimate: float, shrink: float = 0.0
) -> tuple[float, float, float]:
    """The refit calibration's variance excess over the paired replicates, shrunk for its noise.

    With e_b = refit_b - estimate and u_b = reweighted_b - estimate over the M replicates both
    bootstraps drew with the same rows, r^2 = sum e_b^2 / sum u_b^2 (the square of
    :func:`paired_refit_ratio`) and the excess is x = max(0, r^2 - 1): the reweighting variance
    times x is what refitting adds. With few replicates x is noisy, and since it is cut at 0 its
    noise only ever widens. Its leave-one-pair-out jackknife SE s_x (over the M pairs) measures
    that noise, and the excess used is the positive-part shrinkage

        x * max(0, 1 - (shrink * s_x / x)^2),

    which keeps an excess that is large against its noise and drops one that is not
    (``shrink`` = 0: the unshrunk x, the rule before the seventh round).

    Returns
    -------
    (ratio, excess, excess_se) : tuple of float
        r, the shrunk excess (0 when r <= 1) and s_x; NaN ratio and excess 0 when the
        reweighting replicates do not move.

    Examples
    --------
    Every pair doubles its deviation (r^2 = 4): the jackknife sees no noise, nothing is shrunk.

    >>> refit_excess(np.array([2.0, -4.0, 2.0]), np.array([1.0, -2.0, 1.0]), 0.0, 1.0)
    (2.0, 3.0, 0.0)
    """
    refit = np.asarray(refit, dtype=float)
    reweighted = np.asarray(reweighted, dtype=float)[: refit.size]
    ok = np.isfinite(refit) & np.isfinite(reweighted)
    e2 = (refit[ok] - estimate) ** 2
    u2 = (reweighted[ok] - estimate) ** 2
    den = float(u2.sum())
    if den == 0.0:
        return float("nan"), 0.0, float("nan")
    ratio2 = float(e2.sum()) / den
    m = e2.size
    se = float("nan")
    if m > 1:
        rest = den - u2
        with np.errstate(divide="ignore", invalid="ignore"):
            loo = (e2.sum() - e2) / rest
        if np.all(np.isfinite(loo)):
            se = float(np.sqrt((m - 1) / m * np.sum((loo - loo.mean()) ** 2)))
    excess = max(ratio2 - 1.0, 0.0)
    if excess > 0 and shrink > 0:
        if not np.isfinite(se):
            excess = 0.0
        elif se > 0:
            excess *= max(0.0, 1.0 - (shrink * se / excess) ** 2)
    return float(np.sqrt(ratio2)), float(excess), se
