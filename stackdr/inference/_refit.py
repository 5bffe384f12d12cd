"""The refit bootstrap: resample rows and redo cross-fitting, learner fits and the weight
search in every replicate (expensive, honest about learner variability too)."""

from __future__ import annotations

import time
import warnings
from collections.abc import Callable

import numpy as np
from joblib import Parallel, delayed

from stackdr.errors import InputError, StackdrError, warn_user
from stackdr.inference._common import (
    BootstrapResult,
    InferenceSettings,
    replicate_generators,
    resample_rows,
    summarise_replicates,
)


def _refit_one(fit_sample: Callable, prepared, drawn):
    """One refit replicate: (estimates, alpha, beta, tie-break moved), or the reason it could
    not be fitted. A resample can leave an arm too small for the folds or make every learner of
    a side fail; that replicate is left out rather than ending the run. ``drawn`` is (rows,
    cluster codes of the resample or None)."""
    rows, codes = drawn
    data = prepared.take(rows) if codes is None else prepared.take(rows, codes)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            res = fit_sample(data)
    except StackdrError as exc:
        return f"{type(exc).__name__}: {exc}"
    return (
        {row.name: row.estimate for row in res.estimators},
        res.alpha,
        res.beta,
        res.tie_break_active,
    )


def refit_bootstrap(
    settings: InferenceSettings,
    result,
    fit_sample: Callable,
    *,
    n_jobs: int | None = None,
) -> BootstrapResult:
    """Resample rows and redo cross-fitting, learner fits and the weight search in each
    replicate (parallel through joblib). The copies of a row drawn more than once share a fold
    (``PreparedData.fold_groups``), so no copy is predicted by a model fitted on another copy:
    with flexible learners that memorise their training rows such leakage would make the
    replicates' out-of-fold predictions partly in-sample. With clusters whole clusters are
    resampled (copies of a cluster share a fold), and sampling weights travel with their rows.

    Parameters
    ----------
    settings : InferenceSettings
    result : BlendResult
        The full-sample fit (its validated data are resampled).
    fit_sample : callable
        ``fit_sample(prepared_data) -> BlendResult`` without a bootstrap: the estimator's
        cross-fit and analysis on one resample (a picklable bound method of a clone of the
        estimator, so replicates can run in other processes).
    n_jobs : int, optional
        Workers (default ``settings.n_jobs``).
    """
    B = settings.check_replicates()
    method = settings.interval
    prepared = result.data
    gens = replicate_generators(settings.seed, B)
    n = prepared.n
    t0 = time.perf_counter()
    clusters = prepared.cluster_codes
    tasks = (delayed(_refit_one)(fit_sample, prepared, resample_rows(g, n, clusters)) for g in gens)
    run = Parallel(n_jobs=settings.n_jobs if n_jobs is None else n_jobs, return_as="generator")(
        tasks
    )
    if settings.progress:
        from tqdm.auto import tqdm

        run = tqdm(run, total=B, desc="refit bootstrap", unit="replicate")
    names = [row.name for row in result.estimators]
    est = {name: np.full(B, np.nan) for name in names}
    alphas = np.zeros((B, len(result.alpha)))
    betas = np.zeros((B, len(result.beta)))
    moved = np.zeros(B, dtype=bool)
    failed = []
    for b, outcome in enumerate(run):
        if isinstance(outcome, str):
            failed.append(outcome)
            alphas[b], betas[b] = np.nan, np.nan
            continue
        vals, a, bb, mv = outcome
        for name in names:
            est[name][b] = vals.get(name, np.nan)
        # A learner that failed in a replicate was dropped there: its weight is zero.
        alphas[b] = a.reindex(result.alpha.index, fill_value=0.0).to_numpy()
        betas[b] = bb.reindex(result.beta.index, fill_value=0.0).to_numpy()
        moved[b] = mv
    if len(failed) == B:
        raise InputError(f"no refit bootstrap replicate could be fitted; the first: {failed[0]}")
    if failed:
        warn_user(
            f"{len(failed)} of {B} refit bootstrap replicates could not be fitted and were left "
            f"out of the interval (the first: {failed[0]})",
            RuntimeWarning,
        )
    stage = {"total": time.perf_counter() - t0}
    return summarise_replicates(result, est, alphas, betas, moved, "refit", method, 1, stage)
