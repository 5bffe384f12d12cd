"""Cross-fitting: folds, parallel learner fits, out-of-fold predictions for every learner.

Every (repetition, fold, learner) fit is one joblib task, so the same code runs on local
processes or on a dask.distributed cluster (``joblib.parallel_config(backend="dask")``).
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field

import numpy as np
from joblib import Parallel, delayed
from sklearn.base import clone
from sklearn.model_selection import GroupKFold, KFold, StratifiedGroupKFold, StratifiedKFold
from sklearn.utils.validation import has_fit_parameter

from stackdr.core import Target
from stackdr.errors import InputError, LearnerError, PositivityWarning, warn_user
from stackdr.estimation._data import PreparedData
from stackdr.estimation._parallel import native_threads, threads_per_fit
from stackdr.estimation._settings import validate_params


@dataclass
class CrossFitResult:
    """Out-of-fold predictions of every learner.

    Attributes
    ----------
    fold_labels : ndarray (R, n)
        Fold of each row in each of R repetitions.
    propensity : ndarray (R, n, K1)
        Out-of-fold E[A | X] per propensity learner, clipped to [clip, 1 - clip] for a binary
        treatment.
    propensity_raw : ndarray (R, n, K1)
        The same before clipping.
    outcome : dict head -> ndarray (R, n, K2)
        Out-of-fold outcome regressions per head ("mu1", "mu0", "m").
    observed : ndarray (R, n, K2)
        Prediction of each row's own outcome (the head of its observed arm), NaN where no head
        applies; used for prediction losses and prediction-loss stacking.
    observed_mask : ndarray (n,)
        Rows where ``observed`` is defined and the outcome is used.
    clip_counts : ndarray (R, K1, 2)
        Rows clipped at the lower and upper bound per learner.
    failures : dict
        ``"side:learner"`` -> message for learners dropped after failing.
    fit_seconds : dict
        Total fitting seconds per ``"side:learner"``.
    weighted_fits : dict
        With sampling weights: ``"side:learner"`` -> whether the learner was fitted with them
        (False: it takes no ``sample_weight`` and was fitted unweighted). Empty without weights.
    jackknife_rows : ndarray (m,) or None
        Rows every fold's models also predicted (all rows up to :data:`JACKKNIFE_ROWS`, else a
        seeded sample of that many), for the fold-model jackknife; None when not requested, in
        sample, or with one fold.
    fold_propensity : ndarray (R, K, m, K1) or None
        Propensity predictions on ``jackknife_rows`` of the models fitted without fold k, clipped
        as the out-of-fold ones are.
    fold_outcome : dict head -> ndarray (R, K, m, K2), or None
        The same for the outcome heads.
    """

    fold_labels: np.ndarray
    propensity: np.ndarray
    propensity_raw: np.ndarray
    outcome: dict
    observed: np.ndarray
    observed_mask: np.ndarray
    propensity_names: list
    outcome_names: list
    clip: float
    clip_counts: np.ndarray
    in_sample: bool
    propensity_kind: str
    outcome_mode: str
    failures: dict = field(default_factory=dict)
    fit_seconds: dict = field(default_factory=dict)
    weighted_fits: dict = field(default_factory=dict)
    jackknife_rows: np.ndarray | None = None
    fold_propensity: np.ndarray | None = None
    fold_outcome: dict | None = None

    @property
    def repeats(self) -> int:
        return int(self.fold_labels.shape[0])


def make_folds(
    A: np.ndarray,
    folds: int | np.ndarray = 5,
    *,
    seed: int = 0,
    stratify: bool = True,
    repeats: int = 1,
    groups: np.ndarray | None = None,
) -> np.ndarray:
    """Fold labels of shape (repeats, n).

    ``folds`` is the number of folds (stratified on a binary treatment when ``stratify``), 1 for
    in-sample fitting, or an array of user labels (for example clusters that must stay whole).
    With ``groups`` (cluster codes 0..G-1) generated folds keep every cluster whole
    (scikit-learn's ``StratifiedGroupKFold``, stratified on the treatment as far as whole
    clusters allow, or ``GroupKFold``), and user labels must not split a cluster.
    """
    n = A.shape[0]
    if groups is not None and not np.isscalar(folds):
        labels = np.asarray(folds)
        if labels.shape == (n,):
            _, codes = np.unique(labels, return_inverse=True)
            per_cluster = np.zeros((int(groups.max()) + 1, codes.max() + 1), dtype=bool)
            per_cluster[groups, codes] = True
            split = np.flatnonzero(per_cluster.sum(axis=1) > 1)
            if split.size:
                raise InputError(
                    f"fold labels split {split.size} clusters across folds; a cluster must lie "
                    "in one fold"
                )
    if not np.isscalar(folds):
        labels = np.asarray(folds)
        if labels.shape != (n,):
            raise InputError(f"fold labels have shape {labels.shape}, expected ({n},)")
        if repeats != 1:
            raise InputError("repeated splitting needs generated folds, not fixed fold labels")
        _, codes = np.unique(labels, return_inverse=True)
        if codes.max() < 1:
            raise InputError("fold labels name a single fold; give at least two")
        return codes[None, :].astype(np.int64)
    if isinstance(folds, bool) or int(folds) != folds or folds < 1:
        raise InputError(f"folds must be a whole number >= 1, got {folds!r}")
    folds = int(folds)
    if folds == 1:
        return np.zeros((1, n), dtype=np.int64)
    if folds > n:
        raise InputError(f"{folds} folds for {n} rows")
    if groups is not None and folds > int(groups.max()) + 1:
        raise InputError(f"{folds} folds for {int(groups.max()) + 1} clusters; use fewer folds")
    out = np.empty((repeats, n), dtype=np.int64)
    seeds = np.random.SeedSequence(seed).generate_state(repeats)
    for r in range(repeats):
        rs = int(seeds[r])
        if groups is not None:
            grouped = (
                StratifiedGroupKFold(folds, shuffle=True, random_state=rs)
                if stratify
                else GroupKFold(folds, shuffle=True, random_state=rs)
            )
            for s, (_, test) in enumerate(grouped.split(np.zeros(n), A, groups)):
                out[r, test] = s
            continue
        splitter = (
            StratifiedKFold(folds, shuffle=True, random_state=rs)
            if stratify
            else KFold(folds, shuffle=True, random_state=rs)
        )
        for s, (_, test) in enumerate(splitter.split(np.zeros(n), A if stratify else None)):
            out[r, test] = s
    return out


#: Most rows the fold-model jackknife evaluates every fold's models on (a seeded sample above it):
#: enough to measure how much the fitted models move the estimate, at a bounded prediction cost.
JACKKNIFE_ROWS = 2000


def jackknife_rows(n: int, seed: int, cap: int = JACKKNIFE_ROWS) -> np.ndarray:
    """The rows the fold-model jackknife evaluates: all ``n`` rows up to ``cap``, else a sorted
    sample of ``cap`` rows drawn with ``seed``.

    Examples
    --------
    >>> jackknife_rows(5, 0).tolist()
    [0, 1, 2, 3, 4]
    >>> jackknife_rows(10_000, 0, cap=3).shape
    (3,)
    """
    if n <= cap:
        return np.arange(n)
    rng = np.random.default_rng([int(seed), 4021])
    return np.sort(rng.choice(n, size=cap, replace=False))


def _predict(est, X, kind):
    if kind == "classifier":
        proba = np.asarray(est.predict_proba(X))
        classes = list(getattr(est, "classes_", [0, 1]))
        if proba.shape != (X.shape[0], len(classes)) or 1 not in classes:
            raise ValueError(
                f"predict_proba returned shape {proba.shape} for {X.shape[0]} rows and classes "
                f"{np.asarray(classes).tolist()}"
            )
        return proba[:, classes.index(1)]
    return np.asarray(est.predict(X), dtype=float).reshape(-1)


def accepts_sample_weight(estimator) -> bool:
    """Whether ``estimator.fit`` takes ``sample_weight`` (for a Pipeline: its last step, to
    which the weights are routed; earlier steps such as scalers are fitted unweighted)."""
    steps = getattr(estimator, "steps", None)
    return has_fit_parameter(steps[-1][1] if steps else estimator, "sample_weight")


def sample_weight_arguments(estimator, sample_weight) -> dict:
    """Keyword arguments of ``fit`` that pass ``sample_weight`` (none when it is None)."""
    if sample_weight is None:
        return {}
    steps = getattr(estimator, "steps", None)
    return {f"{steps[-1][0]}__sample_weight" if steps else "sample_weight": sample_weight}


def _fit_and_predict(estimator, train: tuple, test_inputs: list, kind, threads: int = 1):
    """One task: fit a clone on ``train = (X, y, sample_weight or None)``, predict on each test
    input, with at most ``threads`` native threads (the cap applies wherever the task runs: this
    process, a local worker or a dask worker). Errors are returned, not raised, so the caller
    can name the learner and apply the library's failure policy.

    The arrays travel inside a tuple and a list on purpose: joblib's dask backend would scatter
    bare arrays to a single worker, and losing that worker would lose the data of the tasks
    still waiting for it; inside the task, they are rerun elsewhere with the task."""
    X_train, y_train, sample_weight = train
    start = time.perf_counter()
    try:
        with native_threads(threads):
            est = clone(estimator)
            est.fit(X_train, y_train, **sample_weight_arguments(est, sample_weight))
            preds = [_predict(est, X, kind) for X in test_inputs]
        for X, p in zip(test_inputs, preds):
            if p.shape != (X.shape[0],):
                raise ValueError(f"returned {p.shape[0]} predictions for {X.shape[0]} rows")
            if not np.all(np.isfinite(p)):
                raise ValueError(f"returned {int((~np.isfinite(p)).sum())} non-finite predictions")
            if kind == "classifier" and (p.min() < 0 or p.max() > 1):
                raise ValueError(
                    f"returned probabilities outside [0, 1] (range {p.min():.3g} to {p.max():.3g})"
                )
        return preds, time.perf_counter() - start, None
    except Exception as exc:  # noqa: BLE001 - any learner failure is reported by name
        return None, time.perf_counter() - start, f"{type(exc).__name__}: {exc}"


# Relative cost per training row of a fit, by the kind of model (measured on the default
# library: bagged full trees and boosting dominate, linear models are cheap). Unknown learners
# count as medium; only the order of dispatch depends on it.
_COST_BY_KIND = (
    (("Forest", "Trees", "Bagging"), 10.0),
    (("Boosting",), 4.0),
    (("Neighbors", "SVC", "SVR", "Kernel", "MLP"), 3.0),
    (("Spline", "Polynomial"), 2.0),
    (("Dummy",), 0.05),
)


def expected_cost(estimator, rows: int) -> float:
    """A rough relative cost of fitting ``estimator`` on ``rows`` rows, used only to order the
    dispatch of fits (longest first). Pipelines count every step."""
    steps = getattr(estimator, "steps", None)
    parts = [step for _, step in steps] if steps else [estimator]
    total = 0.0
    for part in parts:
        name = type(part).__name__
        weight = next((w for keys, w in _COST_BY_KIND if any(k in name for k in keys)), 1.0)
        total += weight
    return total * rows


def cross_fit(
    data: PreparedData,
    target: Target,
    propensity_library: dict,
    outcome_library: dict,
    *,
    folds: int | np.ndarray = 5,
    repeats: int = 1,
    seed: int = 0,
    clip: float = 0.01,
    outcome_mode: str = "separate",
    on_error: str = "drop",
    n_jobs: int | None = 1,
    threads: int | None = None,
    progress: bool = False,
    jackknife: bool = False,
) -> CrossFitResult:
    """Fit every learner on every training split and collect out-of-fold predictions.

    Parameters
    ----------
    data : PreparedData
    target : Target
    propensity_library, outcome_library : dict name -> estimator
        Estimators are cloned before every fit, never mutated.
    folds : int or array
        Number of folds, 1 for in-sample fits (for parametric learners and reference checks
        only: flexible learners overfit in sample), or fold labels per row.
    repeats : int
        Independent fold assignments (combined downstream by the median).
    seed : int
        Seeds the fold assignment.
    clip : float
        Propensities are clipped to [clip, 1 - clip] (binary treatment only).
    outcome_mode : {"separate", "pooled"}
        Per-arm outcome models, or one model with the treatment as a feature.
    on_error : {"drop", "raise"}
        What to do with a learner that fails in any fold.
    n_jobs : int
        joblib workers.
    threads : int, optional
        Native threads per learner fit (default one; see
        :func:`~stackdr.estimation.threads_per_fit`).
    jackknife : bool
        Also predict :func:`jackknife_rows` with every fold's models (``fold_propensity``,
        ``fold_outcome``), for the fold-model jackknife of the refitting noise. The out-of-fold
        predictions are made by the same calls as without it, so they do not change.

    Notes
    -----
    The (learner x fold) fits are dispatched longest-expected-first (:func:`expected_cost`), so
    the slowest learner's last fold does not run alone at the end; results are collected by
    task, so the order changes no number.
    """
    validate_params({"outcome_mode": outcome_mode, "on_error": on_error, "clip": clip})
    X, A, Y = data.X, data.A, data.Y
    n = data.n
    binary = bool(np.isin(A, (0.0, 1.0)).all())
    prop_kind = "classifier" if binary else "regressor"
    labels = make_folds(
        A,
        folds,
        seed=seed,
        stratify=binary,
        repeats=repeats,
        groups=data.cluster_codes if data.fold_groups is None else data.fold_groups,
    )
    weights = data.weights
    weighted = {}
    if weights is not None:
        for side, library in (("propensity", propensity_library), ("outcome", outcome_library)):
            for name, est in library.items():
                weighted[f"{side}:{name}"] = accepts_sample_weight(est)
        unweighted = [key.replace(":", " learner ", 1) for key, ok in weighted.items() if not ok]
        if unweighted:
            warn_user(
                f"learners fitted without the sampling weights (their fit takes no "
                f"sample_weight): {', '.join(unweighted)}; the estimate, its SE and the "
                "stacking still use the weights"
            )
    in_sample = bool(np.isscalar(folds) and folds == 1)
    needed = target.outcome_needed(A)
    heads = target.outcome_heads
    n_folds = int(labels.max()) + 1
    if binary and not in_sample:
        for r in range(labels.shape[0]):
            for s in range(n_folds):
                train = labels[r] != s
                for arm in (0.0, 1.0):
                    if (A[train] == arm).sum() < 2:
                        raise InputError(
                            f"fold {s} leaves fewer than 2 rows with {data.treatment_name} = "
                            f"{int(arm)} for training; use fewer folds"
                        )

    per_fit = threads_per_fit(n_jobs, threads)
    extra = jackknife_rows(n, seed) if (jackknife and not in_sample and n_folds > 1) else None
    X_extra = None if extra is None else X[extra]
    tasks, keys, costs = [], [], []
    for r in range(labels.shape[0]):
        for s in range(n_folds):
            test = np.arange(n) if in_sample else np.flatnonzero(labels[r] == s)
            train = np.arange(n) if in_sample else np.flatnonzero(labels[r] != s)
            for name, est in propensity_library.items():
                sw = weights[train] if weighted.get(f"propensity:{name}") else None
                tests = [X[test]] if extra is None else [X[test], X_extra]
                tasks.append(
                    delayed(_fit_and_predict)(
                        est, (X[train], A[train], sw), tests, prop_kind, per_fit
                    )
                )
                keys.append(("propensity", name, r, s, test, None))
                costs.append(expected_cost(est, train.size))
            for name, est in outcome_library.items():
                for fit_rows, inputs, unit_heads in _outcome_units(
                    X, A, train, test, needed, heads, outcome_mode, extra
                ):
                    sw = weights[fit_rows] if weighted.get(f"outcome:{name}") else None
                    tasks.append(
                        delayed(_fit_and_predict)(
                            est, (inputs[0], Y[fit_rows], sw), inputs[1], "regressor", per_fit
                        )
                    )
                    keys.append(("outcome", name, r, s, test, unit_heads))
                    costs.append(expected_cost(est, fit_rows.size))
    # Longest expected first (stable, so equal costs keep their natural order).
    order = sorted(range(len(tasks)), key=lambda i: -costs[i])
    tasks = [tasks[i] for i in order]
    keys = [(i, *keys[i]) for i in order]

    results = Parallel(n_jobs=n_jobs, return_as="generator")(tasks)
    if progress:
        from tqdm.auto import tqdm

        results = tqdm(results, total=len(tasks), desc="learner fits", unit="fit")

    R = labels.shape[0]
    prop = {name: np.full((R, n), np.nan) for name in propensity_library}
    outc = {name: {h: np.full((R, n), np.nan) for h in heads} for name in outcome_library}
    if extra is not None:
        shape = (R, n_folds, extra.size)
        fold_prop = {name: np.full(shape, np.nan) for name in propensity_library}
        fold_outc = {name: {h: np.full(shape, np.nan) for h in heads} for name in outcome_library}
    # A learner's reported failure is its first in fold order, whatever the dispatch order.
    first_failure: dict[str, tuple[int, str]] = {}
    seconds: dict[str, float] = {}
    # results first: the progress bar only closes when its generator is exhausted.
    for (preds, secs, err), (index, side, name, r, s, test, unit_heads) in zip(results, keys):
        key = f"{side}:{name}"
        seconds[key] = seconds.get(key, 0.0) + secs
        if err is not None:
            if key not in first_failure or index < first_failure[key][0]:
                first_failure[key] = (index, err)
            continue
        if side == "propensity":
            prop[name][r, test] = preds[0]
            if extra is not None:
                fold_prop[name][r, s] = preds[1]
        else:
            for head, p in zip(unit_heads, preds):
                outc[name][head][r, test] = p
            if extra is not None:
                for head, p in zip(unit_heads, preds[len(unit_heads) :]):
                    fold_outc[name][head][r, s] = p

    failures = {key: msg for key, (_, msg) in sorted(first_failure.items(), key=lambda kv: kv[1])}
    for key, msg in failures.items():
        side, name = key.split(":", 1)
        text = f"{side} learner {name!r} failed and was dropped: {msg}"
        if on_error == "raise":
            raise LearnerError(text)
        warn_user(text)
    prop_names = [k for k in propensity_library if f"propensity:{k}" not in failures]
    out_names = [k for k in outcome_library if f"outcome:{k}" not in failures]
    for side, names in (("propensity", prop_names), ("outcome", out_names)):
        if not names:
            raise LearnerError(f"every {side} learner failed; the {side} library is empty")

    raw = np.stack([prop[k] for k in prop_names], axis=-1)
    if prop_kind == "classifier":
        low, high = raw < clip, raw > 1 - clip
        clip_counts = np.stack([low.sum(axis=1), high.sum(axis=1)], axis=-1)
        clipped = np.clip(raw, clip, 1 - clip)
        _warn_clipping(clip_counts, prop_names, n, clip)
    else:
        clip_counts = np.zeros((R, len(prop_names), 2), dtype=np.int64)
        clipped = raw.copy()
    outcome = {h: np.stack([outc[k][h] for k in out_names], axis=-1) for h in heads}
    observed, observed_mask = _observed_predictions(outcome, A, needed)
    fold_propensity = fold_outcome = None
    if extra is not None:
        fold_propensity = np.stack([fold_prop[k] for k in prop_names], axis=-1)
        if prop_kind == "classifier":
            fold_propensity = np.clip(fold_propensity, clip, 1 - clip)
        fold_outcome = {h: np.stack([fold_outc[k][h] for k in out_names], axis=-1) for h in heads}
    return CrossFitResult(
        fold_labels=labels,
        propensity=clipped,
        propensity_raw=raw,
        outcome=outcome,
        observed=observed,
        observed_mask=observed_mask,
        propensity_names=prop_names,
        outcome_names=out_names,
        clip=clip,
        clip_counts=clip_counts,
        in_sample=in_sample,
        propensity_kind=prop_kind,
        outcome_mode=outcome_mode,
        failures=failures,
        fit_seconds=seconds,
        weighted_fits={k: v for k, v in weighted.items() if k not in failures},
        jackknife_rows=extra,
        fold_propensity=fold_propensity,
        fold_outcome=fold_outcome,
    )


def _warn_clipping(clip_counts: np.ndarray, names: list, n: int, clip: float) -> None:
    """One warning naming every learner whose out-of-fold propensities were clipped, with the
    share of rows (mean over repetitions), largest first."""
    shares = clip_counts.sum(axis=-1).mean(axis=0) / n
    order = [k for k in np.argsort(-shares, kind="stable") if shares[k] > 0]
    if not order:
        return
    listed = ", ".join(f"{names[k]!r} {100 * shares[k]:.1f}% of rows" for k in order)
    warn_user(
        f"positivity: propensities outside [{clip:g}, {1 - clip:g}] were clipped for "
        f"{len(order)} of {len(names)} propensity learners ({listed}); overlap between the "
        "arms is in doubt for those rows and their estimates lean on the clipping bound",
        PositivityWarning,
    )


def _outcome_units(X, A, train, test, needed, heads, mode, extra=None):
    """The fits an outcome learner needs on one split: (fit rows, (X_fit, [X_test...]), heads
    predicted). With ``extra`` rows, the test inputs of the heads on ``test`` are followed by
    the same heads on ``extra``."""
    train_needed = train[needed[train]]
    arm_heads = [h for h in heads if h in ("mu1", "mu0")]
    sets = [test] if extra is None else [test, extra]
    if "m" in heads:
        yield train_needed, (X[train_needed], [X[rows] for rows in sets]), ["m"]
    if not arm_heads:
        return
    if mode == "pooled":
        XA = np.column_stack([X[train_needed], A[train_needed]])
        tests = [
            np.column_stack([X[rows], np.full(rows.size, float(h[-1]))])
            for rows in sets
            for h in arm_heads
        ]
        yield train_needed, (XA, tests), arm_heads
        return
    for h in arm_heads:
        rows = train_needed[A[train_needed] == float(h[-1])]
        yield rows, (X[rows], [X[t] for t in sets]), [h]


def _observed_predictions(outcome: dict, A: np.ndarray, needed: np.ndarray):
    first = next(iter(outcome.values()))
    observed = np.full_like(first, np.nan)
    mask = np.zeros(A.shape[0], dtype=bool)
    if "m" in outcome:
        observed[:] = outcome["m"]
        mask[:] = True
    for arm in (0, 1):
        head = f"mu{arm}"
        if head in outcome:
            rows = A == arm
            observed[:, rows, :] = outcome[head][:, rows, :]
            mask |= rows
    return observed, mask & needed
