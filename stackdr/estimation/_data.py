"""One validation entry point: user data (DataFrame or arrays) to clean arrays.

Later layers trust what comes out of :func:`prepare_data`.
"""

from __future__ import annotations

import contextlib
import logging
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from stackdr.core import Target
from stackdr.errors import InputError, warn_user
from stackdr.estimation._diagnostics import FEW_CLUSTERS

log = logging.getLogger("stackdr")

# Outcomes (and continuous treatments) must lie within these magnitudes: standard errors square
# the values, and squares of larger or smaller numbers overflow or underflow double precision.
LARGEST_MAGNITUDE = 1e100
SMALLEST_MAGNITUDE = 1e-100


@dataclass(frozen=True)
class PreparedData:
    """Validated arrays.

    Attributes
    ----------
    X : ndarray (n, p)
        Numeric covariates (categoricals one-hot encoded).
    A : ndarray (n,)
        Treatment (0/1 floats for binary targets).
    Y : ndarray (n,)
        Outcome; rows whose outcome the target does not use hold 0.
    covariate_names, treatment_name, outcome_name : names for tables and files.
    notes : list of str
        What the validation changed (encodings), for logs and reports.
    weights : ndarray (n,) or None
        Sampling weights (finite, non-negative, positive total), or None.
    cluster_codes : ndarray (n,) of int or None
        Cluster of each row as codes 0..G-1 (in order of the sorted labels), or None.
    weights_name, clusters_name : str or None
        The columns they came from.
    fold_groups : ndarray (n,) of int or None
        Rows that must share a cross-fitting fold: in a refit-bootstrap resample, the copies of
        one original row (or of one original cluster), so that no copy is predicted by a model
        that was fitted on another copy. None: rows are independent (clusters, when given, are
        kept whole).
    """

    X: np.ndarray
    A: np.ndarray
    Y: np.ndarray
    covariate_names: list[str]
    treatment_name: str
    outcome_name: str
    notes: list[str] = field(default_factory=list)
    weights: np.ndarray | None = None
    cluster_codes: np.ndarray | None = None
    weights_name: str | None = None
    clusters_name: str | None = None
    fold_groups: np.ndarray | None = None

    @property
    def n(self) -> int:
        return int(self.A.shape[0])

    @property
    def clusters(self) -> int | None:
        """G, the number of clusters (None without clusters)."""
        return None if self.cluster_codes is None else int(self.cluster_codes.max()) + 1

    def take(self, rows: np.ndarray, cluster_codes: np.ndarray | None = None) -> PreparedData:
        """Rows ``rows`` (indices) of the data, e.g. for a resample; sampling weights follow
        their rows. ``cluster_codes`` gives the resample's clusters (a cluster drawn twice is
        two clusters); by default the rows keep theirs. The copies of one original row (of one
        original cluster, with clusters) share a ``fold_groups`` label, so cross-fitting keeps
        them in one fold."""
        original = self.cluster_codes[rows] if self.cluster_codes is not None else rows
        fold_groups = np.unique(original, return_inverse=True)[1].astype(np.int64)
        if cluster_codes is None and self.cluster_codes is not None:
            cluster_codes = np.unique(self.cluster_codes[rows], return_inverse=True)[1]
        return PreparedData(
            self.X[rows],
            self.A[rows],
            self.Y[rows],
            self.covariate_names,
            self.treatment_name,
            self.outcome_name,
            self.notes,
            None if self.weights is None else self.weights[rows],
            cluster_codes,
            self.weights_name,
            self.clusters_name,
            fold_groups,
        )


def _describe_values(values: np.ndarray, limit: int = 8) -> str:
    uniq = pd.unique(pd.Series(values).dropna())
    with contextlib.suppress(TypeError):  # sorted when comparable, so messages are stable
        uniq = sorted(uniq)
    shown = ", ".join(repr(v.item() if hasattr(v, "item") else v) for v in uniq[:limit])
    more = f" (and {len(uniq) - limit} more)" if len(uniq) > limit else ""
    return shown + more


def _numeric_vector(values, role: str, name: str) -> np.ndarray:
    series = pd.Series(np.asarray(values).ravel() if not isinstance(values, pd.Series) else values)
    if series.dtype == bool:
        return series.to_numpy(dtype=float)
    if not pd.api.types.is_numeric_dtype(series):
        converted = pd.to_numeric(series, errors="coerce")
        bad = series[converted.isna() & series.notna()]
        if len(bad):
            raise InputError(
                f"{role} column {name!r} is not numeric; values found include "
                f"{_describe_values(bad.to_numpy())}"
            )
        series = converted
    return series.to_numpy(dtype=float)


def _covariate_frame(frame: pd.DataFrame, notes: list[str]) -> tuple[np.ndarray, list[str]]:
    missing = frame.isna().sum()
    missing = missing[missing > 0]
    if len(missing):
        listed = ", ".join(f"{col!r} ({cnt})" for col, cnt in missing.items())
        raise InputError(
            f"covariates have missing values: {listed}; impute or drop these rows first"
        )
    for col in frame.columns:
        kind = frame[col].dtype
        # One-hot encoding would turn every distinct time into its own column.
        if pd.api.types.is_datetime64_any_dtype(kind) or pd.api.types.is_timedelta64_dtype(kind):
            raise InputError(
                f"covariate {col!r} holds dates or durations; convert it to a number first "
                "(for example days since a start date)"
            )
        if pd.api.types.is_complex_dtype(kind):
            raise InputError(f"covariate {col!r} holds complex numbers")
    categorical = [
        col
        for col in frame.columns
        if not pd.api.types.is_numeric_dtype(frame[col]) or frame[col].dtype == bool
    ]
    if categorical:
        encoded_cols = []
        for col in categorical:
            if frame[col].dtype == bool:
                frame[col] = frame[col].astype(float)
            else:
                encoded_cols.append(col)
        for col in encoded_cols:
            levels = frame[col].nunique()
            if levels > min(100, len(frame) / 2):
                warn_user(
                    f"covariate {col!r} has {levels} distinct text values in {len(frame)} rows "
                    f"and becomes {levels - 1} indicator columns; an identifier or free text "
                    "is not a covariate (leave it out with covariates=...)",
                    UserWarning,
                )
        if encoded_cols:
            frame = pd.get_dummies(frame, columns=encoded_cols, drop_first=True, dtype=float)
            note = "one-hot encoded non-numeric covariates: " + ", ".join(map(repr, encoded_cols))
            notes.append(note)
            log.info(note)
    values = frame.to_numpy(dtype=float)
    finite = np.isfinite(values)
    if not finite.all():
        bad_cols = [str(c) for c, ok in zip(frame.columns, finite.all(axis=0)) if not ok]
        raise InputError(f"covariates have infinite values in columns: {', '.join(bad_cols)}")
    return values, [str(c) for c in frame.columns]


def prepare_data(
    data,
    treatment,
    outcome,
    covariates=None,
    *,
    target: Target,
    folds: int = 5,
    weights=None,
    clusters=None,
) -> PreparedData:
    """Validate user data and return clean arrays.

    Parameters
    ----------
    data : pandas.DataFrame or array-like (n, p)
        A DataFrame holding every column, or the covariate matrix itself.
    treatment, outcome : str or array-like
        Column names when ``data`` is a DataFrame, otherwise arrays of length n.
    covariates : list of str, optional
        Covariate columns (DataFrame input); default every column but treatment and outcome.
        With array input, optional names for the columns of ``data``.
    target : Target
        Decides whether the treatment must be 0/1 and which rows need an outcome.
    folds : int
        Number of cross-fitting folds; each treatment arm needs at least this many rows.
    weights, clusters : str or array-like, optional
        Sampling weights and cluster labels: column names (DataFrame input; those columns are
        then not covariates) or arrays of length n. Weights must be numeric, finite,
        non-negative and not all zero; clusters any labels without missing values, at least two
        distinct ones.

    Returns
    -------
    PreparedData

    Examples
    --------
    Non-numeric covariates are one-hot encoded, and the notes say so.

    >>> from stackdr.core import get_target
    >>> frame = pd.DataFrame(
    ...     {
    ...         "treated": [1, 0, 1, 0, 1, 0],
    ...         "outcome": [2.5, 1.0, 3.0, 0.5, 2.0, 1.5],
    ...         "site": ["north", "south", "east", "north", "south", "east"],
    ...         "age": [34, 51, 47, 62, 29, 55],
    ...     }
    ... )
    >>> data = prepare_data(frame, "treated", "outcome", target=get_target("ate"), folds=2)
    >>> data.n, data.covariate_names
    (6, ['age', 'site_north', 'site_south'])
    >>> data.A.tolist()
    [1.0, 0.0, 1.0, 0.0, 1.0, 0.0]
    >>> data.notes
    ["one-hot encoded non-numeric covariates: 'site'"]
    """
    notes: list[str] = []
    if isinstance(data, pd.DataFrame):
        cols = [str(c) for c in data.columns]
        dupes = sorted({c for c in cols if cols.count(c) > 1})
        if dupes:
            raise InputError(f"duplicated column names: {', '.join(map(repr, dupes))}")
        for role, col in (("treatment", treatment), ("outcome", outcome)):
            if not isinstance(col, str):
                raise InputError(f"{role} must be a column name when data is a DataFrame")
            if col not in data.columns:
                raise InputError(f"{role} column {col!r} not found; columns are {cols}")
        if treatment == outcome:
            raise InputError(f"treatment and outcome are the same column {treatment!r}")
        design = _design_columns(data, treatment, outcome, weights, clusters)
        roles = (treatment, outcome, *design)
        if covariates is None:
            covariates = [c for c in data.columns if c not in roles]
        else:
            covariates = list(covariates)
            unknown = [c for c in covariates if c not in data.columns]
            if unknown:
                raise InputError(f"covariate columns not found: {', '.join(map(repr, unknown))}")
            clash = [c for c in covariates if c in roles]
            if clash:
                raise InputError(f"column {clash[0]!r} is given both as covariate and as role")
        if not covariates:
            raise InputError("no covariate columns: give at least one")
        a_raw, y_raw = data[treatment], data[outcome]
        x_frame = data[covariates].copy()
        t_name, y_name = treatment, outcome
        w_raw = None if weights is None else data[weights]
        g_raw = None if clusters is None else data[clusters]
        w_name, g_name = weights, clusters
    else:
        x = np.asarray(data)
        if x.ndim == 1:
            x = x[:, None]
        if x.ndim != 2:
            raise InputError(f"covariate array must be 2-D, got shape {x.shape}")
        names = list(covariates) if covariates is not None else [f"x{i}" for i in range(x.shape[1])]
        if len(names) != x.shape[1]:
            raise InputError(f"{len(names)} covariate names for {x.shape[1]} columns")
        x_frame = pd.DataFrame(x, columns=names)
        a_raw, y_raw = np.asarray(treatment), np.asarray(outcome)
        for role, arr in (("treatment", a_raw), ("outcome", y_raw)):
            if arr.ndim != 1 and not (arr.ndim == 2 and arr.shape[1] == 1):
                raise InputError(f"{role} must be one-dimensional, got shape {arr.shape}")
            if arr.shape[0] != x.shape[0]:
                raise InputError(
                    f"length mismatch: {role} has {arr.shape[0]} rows, covariates {x.shape[0]}"
                )
        t_name, y_name = "treatment", "outcome"
        w_raw, g_raw = weights, clusters
        w_name = None if weights is None else "weights"
        g_name = None if clusters is None else "clusters"
        for role, arr in (("weights", w_raw), ("clusters", g_raw)):
            if arr is not None and np.shape(arr)[0] != x.shape[0]:
                raise InputError(
                    f"length mismatch: {role} has {np.shape(arr)[0]} rows, covariates {x.shape[0]}"
                )

    n = len(x_frame)
    if n == 0:
        raise InputError("the data have zero rows")
    A = _treatment_vector(a_raw, t_name, target, folds)
    Y = _numeric_vector(y_raw, "outcome", y_name)
    needed = target.outcome_needed(A)
    missing_y = np.isnan(Y) & needed
    if missing_y.any():
        where = (
            ""
            if target.outcome_arm is None
            else f" among rows with {t_name} = {target.outcome_arm}"
        )
        raise InputError(
            f"outcome column {y_name!r} has {int(missing_y.sum())} missing values{where}"
        )
    if np.isinf(Y[needed]).any():
        raise InputError(f"outcome column {y_name!r} has infinite values")
    _check_magnitude(Y[needed], "outcome", y_name)
    if np.ptp(Y[needed]) == 0:
        warn_user(
            f"outcome column {y_name!r} is constant ({Y[needed][0]:g}) in the rows the target "
            "uses: every learner predicts it exactly, so the estimate is that trivial value "
            "with standard error 0; check that this is the intended column",
            UserWarning,
        )
    Y = np.where(needed, Y, 0.0)
    w = None if w_raw is None else sampling_weights(w_raw, str(w_name), A, t_name, target)
    codes = None if g_raw is None else cluster_codes(g_raw, str(g_name), folds)
    X, cov_names = _covariate_frame(x_frame, notes)
    return PreparedData(
        X,
        A,
        Y,
        cov_names,
        str(t_name),
        str(y_name),
        notes,
        w,
        codes,
        None if w_name is None else str(w_name),
        None if g_name is None else str(g_name),
    )


def _design_columns(data: pd.DataFrame, treatment, outcome, weights, clusters) -> list:
    """The weights and clusters columns, checked to exist and to differ from the other roles."""
    cols = [str(c) for c in data.columns]
    named = []
    for role, col in (("weights", weights), ("clusters", clusters)):
        if col is None:
            continue
        if not isinstance(col, str):
            raise InputError(f"{role} must be a column name when data is a DataFrame")
        if col not in data.columns:
            raise InputError(f"{role} column {col!r} not found; columns are {cols}")
        if col in (treatment, outcome, *named):
            raise InputError(f"{role} column {col!r} is already used as another role")
        named.append(col)
    return named


def sampling_weights(values, name: str, A: np.ndarray, treatment: str, target: Target):
    """Validated sampling weights: numeric, finite, non-negative, with positive total (and
    positive total in each arm for a binary treatment)."""
    series = pd.Series(values.to_numpy() if isinstance(values, pd.Series) else np.ravel(values))
    if series.dtype == bool or not pd.api.types.is_numeric_dtype(series):
        shown = _describe_values(series.to_numpy())
        raise InputError(f"weights column {name!r} is not numeric; values found include {shown}")
    w = series.to_numpy(dtype=float)
    bad = ~np.isfinite(w)
    if bad.any():
        raise InputError(
            f"weights column {name!r} has {int(bad.sum())} missing or infinite values "
            f"(first at row {int(np.flatnonzero(bad)[0])})"
        )
    if (w < 0).any():
        raise InputError(
            f"weights column {name!r} has {int((w < 0).sum())} negative values "
            f"(smallest {w.min():g}); sampling weights must be >= 0"
        )
    if w.sum() <= 0:
        raise InputError(f"weights column {name!r} is zero in every row")
    if target.binary_treatment:
        for arm in (0.0, 1.0):
            if w[A == arm].sum() <= 0:
                raise InputError(
                    f"weights column {name!r} is zero in every row with {treatment} = {int(arm)}"
                )
    return w


def cluster_codes(values, name: str, folds: int) -> np.ndarray:
    """Cluster labels as codes 0..G-1; at least two clusters, and at least ``folds``."""
    series = pd.Series(values.to_numpy() if isinstance(values, pd.Series) else np.ravel(values))
    missing = int(series.isna().sum())
    if missing:
        raise InputError(f"clusters column {name!r} has {missing} missing values")
    labels = series.astype(str) if series.dtype == object else series
    codes, uniques = pd.factorize(labels, sort=True)
    if len(uniques) < 2:
        raise InputError(
            f"clusters column {name!r} has a single cluster; cluster-robust inference needs "
            "at least two"
        )
    if folds > 1 and len(uniques) < folds:
        raise InputError(
            f"clusters column {name!r} has {len(uniques)} clusters, fewer than the {folds} folds"
        )
    if len(uniques) < FEW_CLUSTERS:
        warn_user(
            f"clusters column {name!r} has only {len(uniques)} clusters; cluster-robust standard "
            f"errors and the cluster bootstrap are unreliable with fewer than {FEW_CLUSTERS}",
            UserWarning,
        )
    return codes.astype(np.int64)


def _treatment_vector(values, name: str, target: Target, folds: int) -> np.ndarray:
    series = pd.Series(values.to_numpy() if isinstance(values, pd.Series) else np.ravel(values))
    n_missing = int(series.isna().sum())
    if n_missing:
        raise InputError(f"treatment column {name!r} has {n_missing} missing values")
    if target.binary_treatment:
        uniq = pd.unique(series)
        as_float = pd.to_numeric(series, errors="coerce") if series.dtype != bool else series
        ok = series.dtype == bool or (
            pd.api.types.is_numeric_dtype(as_float)
            and not as_float.isna().any()
            and set(np.unique(as_float.to_numpy(dtype=float))) <= {0.0, 1.0}
        )
        if not ok:
            raise InputError(
                f"treatment column {name!r} must be coded 0/1 for target {target.name!r}; "
                f"values found: {_describe_values(uniq)}"
            )
        A = as_float.to_numpy(dtype=float)
        counts = {arm: int((A == arm).sum()) for arm in (0.0, 1.0)}
        if min(counts.values()) == 0:
            only = 1 if counts[1.0] else 0
            raise InputError(
                f"treatment column {name!r} has a single level ({only}); both 0 and 1 are needed"
            )
        need = max(folds, 2)
        small = {arm: c for arm, c in counts.items() if c < need}
        if small:
            arm, c = next(iter(small.items()))
            raise InputError(
                f"treatment arm {name} = {int(arm)} has {c} rows, fewer than the {need} needed "
                f"for {folds} folds"
            )
        return A
    A = _numeric_vector(series, "treatment", name)
    if not np.isfinite(A).all():
        raise InputError(f"treatment column {name!r} has infinite values")
    _check_magnitude(A, "treatment", name)
    if np.unique(A).size < 2:
        raise InputError(f"treatment column {name!r} is constant")
    return A


def _check_magnitude(values: np.ndarray, role: str, name: str) -> None:
    largest = float(np.abs(values).max())
    if largest > LARGEST_MAGNITUDE or 0 < largest < SMALLEST_MAGNITUDE:
        raise InputError(
            f"{role} column {name!r} has values of magnitude up to {largest:.3g}; rescale it so "
            f"its largest value lies between {SMALLEST_MAGNITUDE:g} and {LARGEST_MAGNITUDE:g} "
            "(squares of such numbers leave double precision)"
        )
