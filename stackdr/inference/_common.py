"""Shared records of both bootstraps: the settings record inference works from, the replicate
distribution with its intervals, independent per-replicate generators and row weights."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from stackdr.errors import InputError

REWEIGHTING_KINDS = ("multinomial", "bayesian")


@dataclass(frozen=True)
class InferenceSettings:
    """What a bootstrap needs to know of the run, as a record (not the estimator object).

    Attributes
    ----------
    replicates : int
        B.
    kind : {"multinomial", "bayesian", "refit"}
    interval : {"percentile", "basic"}
    seed : int
        Seeds the per-replicate generators.
    n_jobs : int or None
        Workers over chunks (reweighting) or replicates (refit).
    progress : bool
    chunk_size : int or None
        Replicates per matrix product (reweighting); default sized from a memory budget.
    """

    replicates: int
    kind: str = "multinomial"
    interval: str = "percentile"
    seed: int = 0
    n_jobs: int | None = 1
    progress: bool = False
    chunk_size: int | None = None

    def check_replicates(self) -> int:
        """B, which a bootstrap needs to be at least 1."""
        if self.replicates < 1:
            raise InputError(f"bootstrap replicates must be >= 1, got {self.replicates}")
        return self.replicates


@dataclass
class BootstrapResult:
    """Replicate distribution and intervals.

    Attributes
    ----------
    kind : "multinomial", "bayesian" or "refit"
    method : "percentile" or "basic"
    estimates : DataFrame (B x estimators)
        Every replicate's estimate of every comparison estimator.
    intervals : dict name -> (low, high)
    standard_errors : dict name -> bootstrap SE
    alpha, beta : DataFrame (B x learners)
        Target-aimed weights chosen in each replicate.
    selection_frequency : DataFrame
        Share of replicates in which each learner received weight above 1%, and its mean weight.
    tie_break_share : float
        Share of replicates in which the tie-break moved the weights.
    """

    kind: str
    method: str
    level: float
    estimates: pd.DataFrame
    intervals: dict
    standard_errors: dict
    alpha: pd.DataFrame
    beta: pd.DataFrame
    selection_frequency: pd.DataFrame
    tie_break_share: float
    chunk_size: int
    seconds: dict = field(default_factory=dict)

    @property
    def replicates(self) -> int:
        return len(self.estimates)


def replicate_generators(seed: int, replicates: int) -> list:
    """One independent generator per replicate, so results do not depend on chunking or
    worker count."""
    children = np.random.SeedSequence([seed, 0xB007]).spawn(replicates)
    return [np.random.default_rng(c) for c in children]


def draw_row_weights(
    rng: np.random.Generator, n: int, kind: str, cluster_codes: np.ndarray | None = None
) -> np.ndarray:
    """Multinomial counts (the ordinary bootstrap) or mean-one exponential weights (Bayesian).

    With ``cluster_codes`` (0..G-1 per row) one weight is drawn per cluster (G draws) and every
    row of a cluster carries its cluster's weight: the cluster bootstrap."""
    if cluster_codes is not None:
        return draw_row_weights(rng, int(cluster_codes.max()) + 1, kind)[cluster_codes]
    if kind == "multinomial":
        return np.bincount(rng.integers(0, n, n), minlength=n).astype(float)
    w = rng.standard_exponential(n)
    return w * (n / w.sum())


def resample_rows(rng: np.random.Generator, n: int, cluster_codes: np.ndarray | None = None):
    """Rows of one refit-bootstrap resample and their clusters: n rows drawn with replacement,
    or G whole clusters drawn with replacement (a cluster drawn twice becomes two clusters of
    the resample). Returns (rows, cluster codes of the resample or None)."""
    if cluster_codes is None:
        return rng.integers(0, n, n), None
    groups = int(cluster_codes.max()) + 1
    members = np.split(
        np.argsort(cluster_codes, kind="stable"),
        np.cumsum(np.bincount(cluster_codes, minlength=groups))[:-1],
    )
    drawn = rng.integers(0, groups, groups)
    rows = np.concatenate([members[g] for g in drawn])
    codes = np.repeat(np.arange(groups), [members[g].size for g in drawn])
    return rows, codes


def _interval(est: float, reps: np.ndarray, level: float, method: str) -> tuple[float, float]:
    reps = reps[np.isfinite(reps)]
    lo_q, hi_q = np.quantile(reps, [(1 - level) / 2, (1 + level) / 2])
    if method == "percentile":
        return float(lo_q), float(hi_q)
    return float(2 * est - hi_q), float(2 * est - lo_q)


def summarise_replicates(result, est, alphas, betas, moved, kind, method, chunk, stage):
    """Intervals, SEs and selection stability from replicate estimates and weights."""
    level = result.level
    names = list(est)
    frame = pd.DataFrame(est)
    point = {row.name: row.estimate for row in result.estimators}
    intervals = {nm: _interval(point[nm], frame[nm].to_numpy(), level, method) for nm in names}
    ses = {
        nm: float(np.nanstd(frame[nm].to_numpy(), ddof=1)) if len(frame) > 1 else np.nan
        for nm in names
    }
    cf = result.crossfit
    a = pd.DataFrame(alphas, columns=result.analysis.propensity_names)
    b = pd.DataFrame(betas, columns=cf.outcome_names)
    freq = pd.concat(
        [
            pd.DataFrame(
                {
                    "side": "propensity",
                    "learner": a.columns,
                    "share_weighted": (a.dropna() > 0.01).mean().to_numpy(),
                    "mean_weight": a.mean().to_numpy(),
                }
            ),
            pd.DataFrame(
                {
                    "side": "outcome",
                    "learner": b.columns,
                    "share_weighted": (b.dropna() > 0.01).mean().to_numpy(),
                    "mean_weight": b.mean().to_numpy(),
                }
            ),
        ],
        ignore_index=True,
    )
    return BootstrapResult(
        kind,
        method,
        level,
        frame,
        intervals,
        ses,
        a,
        b,
        freq,
        float(moved.mean()) if moved.size else 0.0,
        chunk,
        stage,
    )
