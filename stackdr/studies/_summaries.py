"""Summaries of a stored study: every row (:func:`read_results`), the performance of every
estimator per design and sample size with Monte Carlo standard errors (:func:`summarise_study`)
and paired comparisons of two estimators (:func:`paired_differences`)."""

from __future__ import annotations

import json
import math
import warnings
from contextlib import closing
from pathlib import Path

import numpy as np
import pandas as pd

from stackdr.errors import InputError
from stackdr.studies._store import connect, read_stored, replicate_columns

MEDIAN_BOOTSTRAP_DRAWS = 1000
MEDIAN_BOOTSTRAP_SEED = 20070101
_BOOTSTRAP_CHUNK = 100


class MixedCodeWarning(UserWarning):
    """A study summary mixes replicates run by different versions of the code."""


def read_results(path: str | Path) -> pd.DataFrame:
    """All stored rows of a study, one per (design, n, replicate, estimator).

    Parameters
    ----------
    path : str or pathlib.Path
        Study file.

    Returns
    -------
    pandas.DataFrame
        Columns design, target, n, rep, estimator, estimate, se, low, high, truth, weights (dict or
        None), the replicate's data_seed, estimator_seed, simulate_seconds, seconds, code (the
        :func:`code_fingerprint` that ran it; None in files from before it was recorded), and
        one column per extra field. Sorted by design, n, rep, estimator.
    """
    path = Path(path)
    with closing(connect(path, create=False)) as conn:
        stored = read_stored(conn, path)
        code = "p.code" if "code" in replicate_columns(conn) else "NULL AS code"
        frame = pd.read_sql_query(
            "SELECT r.design, r.n, r.rep, r.estimator, r.estimate, r.se, r.low, r.high, r.truth, "
            "r.weights, r.extra, p.data_seed, p.estimator_seed, p.simulate_seconds, p.seconds, "
            f"{code} FROM results r JOIN replicates p USING (design, n, rep) "
            "ORDER BY r.design, r.n, r.rep, r.estimator",
            conn,
        )
    for column in ("estimate", "se", "low", "high", "truth"):
        frame[column] = frame[column].astype(float)
    frame.insert(1, "target", frame["design"].map(stored["designs"]))
    # NULL comes back as None or NaN depending on the column's other values.
    frame["weights"] = [json.loads(w) if isinstance(w, str) else None for w in frame["weights"]]
    extras = pd.DataFrame(
        [json.loads(e) if isinstance(e, str) else {} for e in frame.pop("extra")],
        index=frame.index,
    )
    return pd.concat([frame, extras], axis=1)


def _bootstrap_median_se(values: np.ndarray) -> float:
    """Monte Carlo SE of a median by the nonparametric bootstrap over replicates.

    ``MEDIAN_BOOTSTRAP_DRAWS`` resamples from a generator seeded with ``MEDIAN_BOOTSTRAP_SEED``, so
    the value is reproducible; resamples are drawn in chunks to bound memory.
    """
    if len(values) < 2:
        return math.nan
    rng = np.random.default_rng(MEDIAN_BOOTSTRAP_SEED)
    medians = []
    for start in range(0, MEDIAN_BOOTSTRAP_DRAWS, _BOOTSTRAP_CHUNK):
        draws = min(_BOOTSTRAP_CHUNK, MEDIAN_BOOTSTRAP_DRAWS - start)
        index = rng.integers(0, len(values), size=(draws, len(values)))
        medians.append(np.median(values[index], axis=1))
    return float(np.std(np.concatenate(medians), ddof=1))


def _mean_and_mcse(values: np.ndarray) -> tuple[float, float]:
    if len(values) == 0:
        return math.nan, math.nan
    if len(values) == 1:
        return float(values[0]), math.nan
    return float(values.mean()), float(values.std(ddof=1) / math.sqrt(len(values)))


def _performance(group: pd.DataFrame) -> dict[str, float]:
    ok = group[np.isfinite(group["estimate"])]
    estimate, truth = ok["estimate"].to_numpy(), ok["truth"].to_numpy()
    error = estimate - truth
    reps = len(error)
    row: dict[str, float] = {"reps": reps, "failed": len(group) - reps}
    row["truth"] = float(truth.mean()) if reps else math.nan
    row["mean"] = float(estimate.mean()) if reps else math.nan
    row["bias"], row["bias_mcse"] = _mean_and_mcse(error)
    sd = float(np.std(estimate, ddof=1)) if reps > 1 else math.nan
    row["sd"], row["sd_mcse"] = sd, sd / math.sqrt(2 * (reps - 1)) if reps > 1 else math.nan
    mse, mse_mcse = _mean_and_mcse(error**2)
    row["rmse"] = math.sqrt(mse) if reps else math.nan
    # Delta method: d sqrt(m) = dm / (2 sqrt(m)).
    row["rmse_mcse"] = mse_mcse / (2 * row["rmse"]) if reps > 1 and mse > 0 else math.nan
    row["mae"] = float(np.median(np.abs(error))) if reps else math.nan
    row["mae_mcse"] = _bootstrap_median_se(np.abs(error))
    row["mean_abs_error"], row["mean_abs_error_mcse"] = _mean_and_mcse(np.abs(error))
    with_interval = ok[np.isfinite(ok["low"]) & np.isfinite(ok["high"])]
    covered = (with_interval["low"] <= with_interval["truth"]) & (
        with_interval["truth"] <= with_interval["high"]
    )
    row["coverage"] = float(covered.mean()) if len(covered) else math.nan
    row["coverage_mcse"] = (
        math.sqrt(row["coverage"] * (1 - row["coverage"]) / len(covered))
        if len(covered)
        else math.nan
    )
    row["width"], row["width_mcse"] = _mean_and_mcse(
        (with_interval["high"] - with_interval["low"]).to_numpy()
    )
    row["mean_se"], row["mean_se_mcse"] = _mean_and_mcse(
        ok["se"].to_numpy()[np.isfinite(ok["se"].to_numpy())]
    )
    return row


def summarise_study(path: str | Path) -> pd.DataFrame:
    """Performance of every estimator per design and sample size, with Monte Carlo SEs.

    Errors are ``estimate - truth`` with the truth stored on each row. Replicates whose estimate
    is missing count in ``failed`` and are left out of every other column. Monte Carlo standard
    errors (Morris, White & Crowther 2019, Statistics in Medicine 38:2074-2102 [recalled]):

    - ``bias_mcse = sd(error) / sqrt(reps)``; ``sd_mcse = sd / sqrt(2 (reps - 1))``;
    - ``rmse_mcse`` by the delta method from the MC SE of the mean squared error,
      ``sd(error^2) / sqrt(reps) / (2 rmse)``;
    - ``mae`` is the median absolute error; ``mae_mcse`` the bootstrap SE of that median over
      replicates (1000 resamples, fixed seed, see ``MEDIAN_BOOTSTRAP_SEED``);
      ``mean_abs_error`` is the mean absolute error, ``mean_abs_error_mcse`` its sd over
      sqrt(reps);
    - ``coverage_mcse = sqrt(p (1 - p) / m)`` and ``width_mcse = sd(width) / sqrt(m)`` over the
      m replicates with a finite interval; ``mean_se`` averages the reported standard errors.

    Parameters
    ----------
    path : str or pathlib.Path
        Study file.

    Returns
    -------
    pandas.DataFrame
        One row per (design, n, estimator): target, reps, failed, truth, mean, bias, bias_mcse,
        sd, sd_mcse, rmse, rmse_mcse, mae, mae_mcse, mean_abs_error, mean_abs_error_mcse,
        coverage, coverage_mcse, width, width_mcse, mean_se, mean_se_mcse.
    """
    results = read_results(path)
    codes = results["code"].fillna("unrecorded").unique()
    if len(codes) > 1:
        warnings.warn(
            f"{path}: the replicates come from {len(codes)} versions of the stackdr code "
            f"({', '.join(sorted(codes))}); the summary mixes them",
            MixedCodeWarning,
            stacklevel=2,
        )
    rows = [
        {"design": design, "target": group["target"].iloc[0], "n": n, "estimator": estimator}
        | _performance(group)
        for (design, n, estimator), group in results.groupby(["design", "n", "estimator"])
    ]
    summary = pd.DataFrame(rows)
    if not summary.empty:
        summary[["reps", "failed"]] = summary[["reps", "failed"]].astype(int)
    return summary


def paired_differences(path: str | Path, estimator_a: str, estimator_b: str) -> pd.DataFrame:
    """Paired comparison of two estimators over the replicates where both gave an estimate.

    Both estimators see the same data in every replicate, so the replicate-level differences in
    squared error (and in absolute error) have far smaller Monte Carlo noise than the difference
    of two separately estimated RMSEs. A negative difference favours ``estimator_a``.

    Parameters
    ----------
    path : str or pathlib.Path
        Study file.
    estimator_a, estimator_b : str
        Estimator names as stored.

    Returns
    -------
    pandas.DataFrame
        One row per (design, n): estimator_a, estimator_b, pairs, rmse_a, rmse_b,
        sq_error_diff (mean of (a - truth)^2 - (b - truth)^2), sq_error_diff_mcse (its sd over
        sqrt(pairs)), abs_error_diff, abs_error_diff_mcse.
    """
    results = read_results(path)
    known = sorted(results["estimator"].unique())
    for name in (estimator_a, estimator_b):
        if name not in known:
            raise InputError(f"no estimator {name!r} in {path}; stored estimators: {known}")
    keys = ["design", "n", "rep"]
    errors = {
        label: results.loc[results["estimator"] == name, keys].assign(
            **{label: (results["estimate"] - results["truth"])[results["estimator"] == name]}
        )
        for label, name in (("a", estimator_a), ("b", estimator_b))
    }
    paired = errors["a"].merge(errors["b"], on=keys).dropna(subset=["a", "b"])
    rows = []
    for (design, n), group in paired.groupby(["design", "n"]):
        a, b = group["a"].to_numpy(), group["b"].to_numpy()
        sq, sq_mcse = _mean_and_mcse(a**2 - b**2)
        ab, ab_mcse = _mean_and_mcse(np.abs(a) - np.abs(b))
        rows.append(
            {
                "design": design,
                "n": n,
                "estimator_a": estimator_a,
                "estimator_b": estimator_b,
                "pairs": len(group),
                "rmse_a": float(np.sqrt(np.mean(a**2))),
                "rmse_b": float(np.sqrt(np.mean(b**2))),
                "sq_error_diff": sq,
                "sq_error_diff_mcse": sq_mcse,
                "abs_error_diff": ab,
                "abs_error_diff_mcse": ab_mcse,
            }
        )
    return pd.DataFrame(rows)
