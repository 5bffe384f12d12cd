"""Between-fold spread (Cochran's Q, DerSimonian-Laird tau^2), the heavy-tail share and the
widening of bootstrap intervals. The formulas are those of DerSimonian & Laird (1986),
Controlled Clinical Trials 7: 177-188 [recalled]: Q = sum w_k (theta_k - theta_w)^2 with
w_k = 1 / s_k^2, tau^2 = max(0, (Q - (K - 1)) / (sum w - sum w^2 / sum w))."""

import numpy as np
import pandas as pd
import pytest
from scipy.stats import chi2

from stackdr.inference import (
    BootstrapResult,
    fold_spread,
    paired_refit_ratio,
    refit_excess,
    top_row_share,
    widen_intervals,
)


def _folds(rng, means, size=200, sd=1.0):
    """Rows of K folds whose contributions have the given fold means (d = 1)."""
    H = np.concatenate([m + sd * rng.standard_normal(size) for m in means])
    labels = np.repeat(np.arange(len(means)), size)
    return H, np.ones_like(H), labels


def test_q_and_tau2_equal_a_hand_computation():
    rng = np.random.default_rng(4)
    H, d, labels = _folds(rng, [0.0, 0.3, -0.2, 0.5])
    spread = fold_spread(H, d, labels)
    # By hand, fold by fold [construction]: mean, IF SE with the fold's own mean.
    theta = np.array([H[labels == k].mean() for k in range(4)])
    s = np.array([np.sqrt(np.mean((H[labels == k] - theta[k]) ** 2) / 200) for k in range(4)])
    w = 1 / s**2
    pooled = np.sum(w * theta) / np.sum(w)
    q = np.sum(w * (theta - pooled) ** 2)
    tau2 = max(0.0, (q - 3) / (w.sum() - np.sum(w**2) / w.sum()))
    assert np.allclose(spread.estimates, theta)
    assert np.allclose(spread.standard_errors, s)
    assert spread.q == pytest.approx(q)
    assert spread.dispersion == pytest.approx(q / 3)
    assert spread.p_value == pytest.approx(chi2.sf(q, 3))
    assert spread.between_variance == pytest.approx(tau2)
    assert spread.between_variance > 0  # fold means 0.5 apart against SEs near 0.07


def test_fold_estimates_are_ratio_estimates_with_the_denominator():
    # With a denominator (e.g. the ATT's share of treated), theta_k = sum H / sum d on the fold.
    H = np.array([2.0, 0.0, 4.0, 1.0, 1.0, 3.0])
    d = np.array([1.0, 0.0, 1.0, 1.0, 0.0, 1.0])
    spread = fold_spread(H, d, np.array([0, 0, 0, 1, 1, 1]))
    assert spread.estimates.tolist() == [3.0, 2.5]


def test_folds_that_agree_give_no_between_fold_variance():
    # Identical folds: Q = 0, tau^2 = 0, p = 1 [construction].
    block = np.array([1.0, 4.0, 2.0, 7.0])
    spread = fold_spread(np.tile(block, 5), np.ones(20), np.repeat(np.arange(5), 4))
    assert spread.q == pytest.approx(0.0, abs=1e-12)
    assert spread.between_variance == 0.0
    assert spread.p_value == pytest.approx(1.0)


def test_homogeneous_folds_give_q_near_its_degrees_of_freedom():
    # Under homogeneity Q is about chi-squared with K - 1 df [recalled: Cochran 1954]: over many
    # draws its mean is near K - 1 and p < 0.05 in about 5% of draws.
    rng = np.random.default_rng(11)
    qs = np.array([fold_spread(*_folds(rng, [0.0] * 5, size=300)).q for _ in range(400)])
    assert np.mean(qs) == pytest.approx(4.0, abs=0.4)
    assert np.mean(chi2.sf(qs, 4) < 0.05) < 0.1


def test_one_fold_has_no_spread():
    spread = fold_spread(np.arange(6.0), np.ones(6), np.zeros(6, dtype=int))
    assert spread.folds == 1 and np.isnan(spread.p_value) and spread.between_variance == 0.0


def test_top_row_share():
    # 1% of 200 rows = the 2 largest |IF| [construction].
    influence = np.r_[np.ones(198), 10.0, -10.0]
    assert top_row_share(influence) == pytest.approx(200 / 398)
    assert top_row_share(np.ones(100)) == pytest.approx(0.01)
    assert top_row_share(np.zeros(5)) == 0.0


def _boot():
    return BootstrapResult(
        "multinomial",
        "percentile",
        0.95,
        pd.DataFrame({"a": [1.0, 2.0], "b": [3.0, 4.0]}),
        {"a": (0.0, 3.0), "b": (2.0, 5.0)},
        {"a": 1.0, "b": 2.0},
        pd.DataFrame(),
        pd.DataFrame(),
        pd.DataFrame(),
        0.0,
        2,
    )


def test_widen_intervals_adds_variance_and_keeps_asymmetry():
    boot = _boot()
    wider = widen_intervals(boot, {"a": 1.0, "b": 3.0}, {"a": 3.0, "b": 0.0})
    assert wider.standard_errors["a"] == pytest.approx(2.0)  # sqrt(1 + 3)
    # Interval about the estimate 1: ends 1 below and 2 above, doubled.
    assert wider.intervals["a"] == pytest.approx((-1.0, 5.0))
    assert wider.standard_errors["b"] == 2.0 and wider.intervals["b"] == (2.0, 5.0)
    assert boot.standard_errors["a"] == 1.0  # the input record is unchanged


def test_paired_refit_ratio_cancels_the_shared_draws():
    # Refit replicates = reweighting replicates + an independent refit part: the ratio is
    # sqrt(1 + refit variance / reweighting variance) up to noise [construction].
    rng = np.random.default_rng(3)
    shared = rng.normal(size=4000)
    ratio = paired_refit_ratio(shared + 0.5 * rng.normal(size=4000), shared, 0.0)
    assert ratio == pytest.approx(np.sqrt(1.25), rel=0.03)
    assert paired_refit_ratio(np.array([np.nan, 2.0]), np.array([5.0, 1.0]), 0.0) == 2.0
    assert np.isnan(paired_refit_ratio(np.ones(2), np.zeros(2), 0.0))


def test_refit_excess_shrinks_an_excess_within_its_noise_and_keeps_a_clear_one():
    # [construction] Refit = reweighting + an independent refit part of variance v: the excess
    # ratio^2 - 1 estimates v; with 5 pairs its jackknife SE is large, with 4000 small.
    rng = np.random.default_rng(7)
    shared = rng.normal(size=4000)
    ratio, excess, se = refit_excess(shared + rng.normal(size=4000), shared, 0.0, 1.0)
    assert ratio**2 - 1 == pytest.approx(1.0, abs=0.1) and se < 0.06
    # Positive-part shrinkage x (1 - (s / x)^2) leaves a clear excess nearly as it is.
    assert excess == pytest.approx((ratio**2 - 1) * (1 - (se / (ratio**2 - 1)) ** 2))
    # No refit noise at all: over many sets of 5 pairs the unshrunk excess, cut at 0, averages
    # well above 0, and the shrunk one much less.
    raw, shrunk = [], []
    for _ in range(400):
        base = rng.normal(size=5)
        other = base + 0.0 * rng.normal(size=5)
        twin = rng.normal(size=5)  # the refit replicate with the same spread, unpaired noise
        raw.append(refit_excess(twin, base, 0.0, 0.0)[1])
        shrunk.append(refit_excess(twin, base, 0.0, 1.0)[1])
        assert refit_excess(other, base, 0.0, 1.0)[1] == 0.0
    assert np.mean(shrunk) < 0.6 * np.mean(raw)
    # Degenerate inputs: no reweighting spread gives a NaN ratio and no excess; one pair has
    # no jackknife SE, so a positive shrinkage adds nothing while shrink = 0 keeps the excess.
    assert np.isnan(refit_excess(np.ones(3), np.zeros(3), 0.0, 1.0)[0])
    assert refit_excess(np.array([2.0]), np.array([1.0]), 0.0, 1.0)[1] == 0.0
    assert refit_excess(np.array([2.0]), np.array([1.0]), 0.0, 0.0)[1] == 3.0


def test_weighted_and_clustered_fold_estimates_use_the_fits_own_conventions():
    # Unit sampling weights and one row per cluster change nothing but the cluster factor
    # G / (G - 1) within each fold (Cameron & Miller 2015, common practice); integer weights
    # give each fold the estimate of its rows duplicated.
    from stackdr.core import estimate_from_rows

    rng = np.random.default_rng(3)
    H, d = rng.normal(2, 1, 40), np.ones(40)
    labels = np.repeat([0, 1, 2, 3], 10)
    plain = fold_spread(H, d, labels)
    ones = fold_spread(H, d, labels, sample_weight=np.ones(40))
    np.testing.assert_allclose(ones.estimates, plain.estimates)
    np.testing.assert_allclose(ones.standard_errors, plain.standard_errors)
    clustered = fold_spread(H, d, labels, cluster_codes=np.arange(40))
    np.testing.assert_allclose(clustered.standard_errors, plain.standard_errors * np.sqrt(10 / 9))
    w = rng.integers(1, 4, 40).astype(float)
    weighted = fold_spread(H, d, labels, sample_weight=w)
    first = estimate_from_rows(np.repeat(H[:10], w[:10].astype(int)), np.ones(int(w[:10].sum())))
    assert weighted.estimates[0] == pytest.approx(first.estimate)
    # A fold holding a single cluster has no cluster-robust SE, so Q is not computed.
    one_cluster = fold_spread(H, d, labels, cluster_codes=labels)
    assert np.isnan(one_cluster.p_value)
