"""Overlap diagnostics of a fit: blended propensity, effective sample sizes, clipping.

Pure functions of the fit's ingredients (out-of-fold propensities, the pair-table inputs, the
treatment and the chosen propensity weights); :attr:`stackdr.estimation.BlendResult.diagnostics`
gathers them into one :class:`Diagnostics` record, which the saved results and the report only
format.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy.special import expit, logit

from stackdr.core import blended_weight_side

# Fixed bins for the overlap histogram so that reports of different fits are comparable.
OVERLAP_EDGES = np.linspace(0.0, 1.0, 41)
# Below this many clusters cluster-robust SEs are known to be too small (common practice;
# Cameron & Miller 2015, J. Human Resources 50(2), section VI).
FEW_CLUSTERS = 30
# Arm name and treatment code, in the order the report shows them.
ARM_CODES = {"treated": 1, "control": 0}


def blended_propensity(propensity: np.ndarray, alpha: np.ndarray, blend: str) -> np.ndarray:
    """Probability-scale propensity at the propensity weights ``alpha``.

    The logit blend averages logits; the riesz and probability blends are shown as the
    probability average (the riesz blend itself averages weight-side values such as 1/pi, so
    this is a readable summary of overlap, not the quantity it blends).

    Parameters
    ----------
    propensity : ndarray (n, K)
        Out-of-fold propensity of every learner (one fold assignment).
    alpha : ndarray (K,)
        Propensity weights.
    blend : {"riesz", "probability", "logit"}

    Returns
    -------
    ndarray (n,)

    Examples
    --------
    >>> blended_propensity(np.array([[0.2, 0.6]]), np.array([0.5, 0.5]), "riesz").tolist()
    [0.4]
    """
    if blend == "logit":
        return expit(logit(propensity) @ alpha)
    return propensity @ alpha


def weight_side_values(inputs, alpha: np.ndarray, blend: str) -> np.ndarray:
    """Per-row weight-side magnitude sum_c |p_c(X_i) h1_c(O_i)| at the propensity weights.

    For the ATE under the riesz blend this is sum_k alpha_k / pi_k among the treated and
    sum_k alpha_k / (1 - pi_k) among controls: the weight each row carries in the estimate.

    Parameters
    ----------
    inputs : stackdr.core.PairInputs
        Pair-table inputs of one fold assignment.
    alpha : ndarray (K,)
        Propensity weights.
    blend : {"riesz", "probability", "logit"}

    Returns
    -------
    ndarray (n,)
    """
    p_alpha = blended_weight_side(inputs, np.asarray(alpha)[None, :], blend)
    return sum(np.abs(p[:, 0] * h1) for p, h1 in zip(p_alpha, inputs.h1))


def effective_sample_size(weights: np.ndarray) -> float | None:
    """Kish's effective sample size (sum w)^2 / sum w^2.

    Parameters
    ----------
    weights : array_like (n,)
        Non-negative row weights.

    Returns
    -------
    float or None
        None when every weight is zero (the rows carry no weight at all).

    Examples
    --------
    >>> effective_sample_size([1.0, 1.0, 2.0])
    2.6666666666666665
    >>> effective_sample_size([0.0, 0.0]) is None
    True
    """
    weights = np.asarray(weights, dtype=float)
    total_sq = float(np.sum(weights**2))
    if total_sq == 0.0:
        return None
    return float(np.sum(weights) ** 2 / total_sq)


@dataclass(frozen=True)
class OverlapHistogram:
    """Counts of the blended propensity per arm in fixed bins.

    Attributes
    ----------
    edges : ndarray (bins + 1,)
        Bin edges on [0, 1].
    counts : dict of str to ndarray (bins,)
        Rows per bin for each arm (``"treated"``, ``"control"``).
    """

    edges: np.ndarray
    counts: dict


@dataclass(frozen=True)
class Diagnostics:
    """Overlap and clipping of a fit at its chosen propensity weights.

    The arm fields are None for a continuous treatment (no arms to compare).

    Attributes
    ----------
    clip : float
        Out-of-fold propensities were clipped to [clip, 1 - clip].
    clipped : dict of str to (int, int)
        Per propensity learner: predictions clipped at the lower and the upper bound, summed
        over fold assignments.
    blended_propensity : ndarray (n,) or None
        Probability-scale propensity at the chosen weights (first fold assignment); see
        :func:`blended_propensity`.
    weight_values : ndarray (n,) or None
        Weight-side magnitude of every row at the chosen weights; see
        :func:`weight_side_values`.
    arm_sizes : dict of str to int, or None
        Rows per arm.
    propensity_range : dict of str to (float, float) or None, or None
        Lowest and highest blended propensity per arm (None for an empty arm).
    effective_sample_size : dict of str to float or None, or None
        Kish's effective sample size of the weight-side values per arm.
    overlap_histogram : OverlapHistogram or None
    """

    clip: float
    clipped: dict
    blended_propensity: np.ndarray | None = field(default=None, repr=False)
    weight_values: np.ndarray | None = field(default=None, repr=False)
    arm_sizes: dict | None = None
    propensity_range: dict | None = None
    effective_sample_size: dict | None = None
    overlap_histogram: OverlapHistogram | None = field(default=None, repr=False)


def fit_diagnostics(
    *,
    clip: float,
    clip_counts: np.ndarray,
    learner_names,
    binary: bool,
    propensity: np.ndarray | None = None,
    inputs=None,
    treatment: np.ndarray | None = None,
    alpha: np.ndarray | None = None,
    blend: str | None = None,
) -> Diagnostics:
    """Overlap and clipping diagnostics from a fit's ingredients.

    Parameters
    ----------
    clip : float
        Clipping bound of the out-of-fold propensities.
    clip_counts : ndarray (K, 2)
        Predictions clipped low and high per propensity learner (summed over fold assignments).
    learner_names : sequence of str
        Propensity learners, in the order of ``clip_counts``.
    binary : bool
        Whether the treatment is binary; the remaining arguments are needed only then.
    propensity : ndarray (n, K'), optional
        Out-of-fold propensities of one fold assignment, one column per propensity column of
        the weight search (K' = K, or K + 1 with the stacked propensity last).
    inputs : stackdr.core.PairInputs, optional
        Pair-table inputs of the same fold assignment and columns.
    treatment : ndarray (n,), optional
        Treatment codes 0 and 1.
    alpha : ndarray (K',), optional
        Chosen propensity weights.
    blend : str, optional
        The fit's blend.

    Returns
    -------
    Diagnostics
    """
    clipped = {str(name): (int(lo), int(hi)) for name, (lo, hi) in zip(learner_names, clip_counts)}
    if not binary:
        return Diagnostics(clip=clip, clipped=clipped)
    pi = blended_propensity(propensity, alpha, blend)
    weights = weight_side_values(inputs, alpha, blend)
    arms = {arm: treatment == code for arm, code in ARM_CODES.items()}
    return Diagnostics(
        clip=clip,
        clipped=clipped,
        blended_propensity=pi,
        weight_values=weights,
        arm_sizes={arm: int(rows.sum()) for arm, rows in arms.items()},
        propensity_range={
            arm: (float(pi[rows].min()), float(pi[rows].max())) if rows.any() else None
            for arm, rows in arms.items()
        },
        effective_sample_size={
            arm: effective_sample_size(weights[rows]) for arm, rows in arms.items()
        },
        overlap_histogram=OverlapHistogram(
            edges=OVERLAP_EDGES.copy(),
            counts={
                arm: np.histogram(pi[rows], bins=OVERLAP_EDGES)[0] for arm, rows in arms.items()
            },
        ),
    )


def sampling_summary(data, weighted_fits: dict | None = None) -> dict:
    """The sampling design of a fit: sampling weights and clusters, as plain values.

    Parameters
    ----------
    data : PreparedData
        Validated data (its ``weights``, ``cluster_codes`` and their column names).
    weighted_fits : dict, optional
        ``"side:learner"`` -> whether that learner was fitted with the sampling weights.

    Returns
    -------
    dict
        ``weights``: None, or the column, total, smallest and largest weight, rows with weight
        zero, Kish's effective sample size and the learners fitted without the weights;
        ``clusters``: None, or the column, number of clusters G, smallest, median and largest
        cluster size, and whether G is below 30 (:data:`FEW_CLUSTERS`).

    Examples
    --------
    >>> from types import SimpleNamespace
    >>> data = SimpleNamespace(weights=np.array([1.0, 1.0, 2.0]), weights_name="w",
    ...                        cluster_codes=None, clusters_name=None)
    >>> sampling_summary(data)["weights"]["kish_effective_sample_size"]
    2.6666666666666665
    """
    out = {"weights": None, "clusters": None}
    if data.weights is not None:
        w = data.weights
        fits = weighted_fits or {}
        out["weights"] = {
            "column": data.weights_name,
            "total": float(w.sum()),
            "min": float(w.min()),
            "max": float(w.max()),
            "zero_rows": int((w == 0).sum()),
            "kish_effective_sample_size": effective_sample_size(w),
            "unweighted_learners": [key for key, ok in fits.items() if not ok],
        }
    if data.cluster_codes is not None:
        sizes = np.bincount(data.cluster_codes)
        out["clusters"] = {
            "column": data.clusters_name,
            "count": int(sizes.size),
            "smallest": int(sizes.min()),
            "median_size": float(np.median(sizes)),
            "largest": int(sizes.max()),
            "few": bool(sizes.size < FEW_CLUSTERS),
        }
    return out


def sampling_sentence(sampling: dict, n: int) -> str:
    """The sampling design in words (empty without weights and clusters), for the printed
    summary and the report.

    Examples
    --------
    >>> clusters = {"column": "school", "count": 12, "smallest": 20, "largest": 41, "few": True}
    >>> print(sampling_sentence({"weights": None, "clusters": clusters}, 300))  # doctest: +ELLIPSIS
    Clusters 'school': 12 (20 to 41 rows each); ... fewer than 30 clusters: the SEs are unreliable.
    """
    parts = []
    weights, clusters = sampling["weights"], sampling["clusters"]
    if weights is not None:
        ess = weights["kish_effective_sample_size"]
        parts.append(
            f"Sampling weights {weights['column']!r}: estimates are for the weighted "
            f"population; Kish effective sample size {ess:.1f} of {n} rows."
        )
    if clusters is not None:
        text = (
            f"Clusters {clusters['column']!r}: {clusters['count']} ({clusters['smallest']} to "
            f"{clusters['largest']} rows each); folds keep them whole, SEs are cluster-robust "
            "and the bootstrap draws clusters"
        )
        few = f"; fewer than {FEW_CLUSTERS} clusters: the SEs are unreliable."
        parts.append(text + (few if clusters["few"] else "."))
    return " ".join(parts)
