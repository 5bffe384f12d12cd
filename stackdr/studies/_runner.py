"""Monte Carlo study runner: simulate, estimate, store, resume and summarise.

A study runs every combination of design, sample size ``n`` and replicate index. Each replicate
gets its own seeds, derived from (study seed, design name, n, replicate index) alone, so its
result does not depend on the order in which replicates run, on the number of workers or on the
parallel backend. The per-replicate work is a function argument::

    replicate_fn(design_data: DesignData, seed: int) -> list[dict]

returning one row per estimator with keys

- ``name`` (str, required): the estimator's name, unique within the replicate;
- ``estimate`` (float, required; None or NaN when the estimator failed);
- ``se``, ``low``, ``high`` (float, optional): standard error and interval bounds;
- ``weights`` (dict or None, optional): stored as JSON (e.g. blend weights per learner);
- any other keys are extra fields, stored together as JSON and returned as columns by
  :func:`read_results` (e.g. ``tau``, ``tie_break_active``, ``seconds``). Values must be
  JSON-serialisable (numpy scalars and arrays are converted).

Results live in one SQLite file (WAL mode), with three tables: ``study`` (settings), ``replicates``
(one row per finished replicate: the "done" marker, seeds, truth and timings) and ``results``
(one row per replicate and estimator). A replicate's rows and its marker are written in a single
transaction by the parent process, so a study killed at any moment holds only whole replicates
and can be resumed.

Every study records the code that produced it (:func:`code_fingerprint`: the package version and a
digest of the package's Python sources), in the study settings and on every replicate. Resuming a
study with different code is refused unless asked for explicitly, because a table that mixes
replicates from different versions of the estimator measures neither version.
"""

from __future__ import annotations

import functools
import hashlib
import json
import math
import sqlite3
import time
import warnings
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from contextlib import closing, nullcontext
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from joblib import Parallel, delayed
from tqdm import tqdm

from stackdr.errors import InputError, StackdrError
from stackdr.estimation import check_cluster, dask_backend, dask_jobs
from stackdr.studies._designs import Design, DesignData, get_design

FORMAT = "stackdr-study/1"
STANDARD_FIELDS = ("name", "estimate", "se", "low", "high", "weights")
# Waiting up to a minute for a lock covers a reader (e.g. a summary in another process) holding
# the file while the runner commits.
BUSY_TIMEOUT_SECONDS = 60.0
MEDIAN_BOOTSTRAP_DRAWS = 1000
MEDIAN_BOOTSTRAP_SEED = 20070101
_BOOTSTRAP_CHUNK = 100

_SCHEMA = (
    "CREATE TABLE study (key TEXT PRIMARY KEY, value TEXT NOT NULL)",
    """CREATE TABLE replicates (
    design TEXT NOT NULL, n INTEGER NOT NULL, rep INTEGER NOT NULL,
    data_seed INTEGER NOT NULL, estimator_seed INTEGER NOT NULL, truth REAL,
    simulate_seconds REAL, seconds REAL, finished_at TEXT, code TEXT,
    PRIMARY KEY (design, n, rep)
    )""",
    """CREATE TABLE results (
    design TEXT NOT NULL, n INTEGER NOT NULL, rep INTEGER NOT NULL, estimator TEXT NOT NULL,
    estimate REAL, se REAL, low REAL, high REAL, truth REAL, weights TEXT, extra TEXT,
    PRIMARY KEY (design, n, rep, estimator)
    )""",
)


class StudyExistsError(StackdrError, FileExistsError):
    """A new study was started on a file that already holds one."""


class StudySettingsError(InputError):
    """A study was resumed with settings that differ from the stored ones."""


class StudyCodeError(StudySettingsError):
    """A study was resumed by code that differs from the code that started it."""


class MixedCodeWarning(UserWarning):
    """A study summary mixes replicates run by different versions of the code."""


@functools.lru_cache(maxsize=1)
def code_fingerprint() -> str:
    """The package version and a digest of the package's Python sources, e.g. ``0.1.0+3f2a...``.

    Two installs give the same fingerprint exactly when every ``.py`` file of the package is the
    same, so it tells whether stored replicates came from the code now running. A user-supplied
    replicate function's own code is not covered.
    """
    import stackdr

    root = Path(stackdr.__file__).resolve().parent
    digest = hashlib.sha256()
    for file in sorted(root.rglob("*.py")):
        digest.update(file.relative_to(root).as_posix().encode() + b"\0")
        digest.update(file.read_bytes() + b"\0")
    return f"{stackdr.__version__}+{digest.hexdigest()[:12]}"


class ReplicateError(StackdrError, RuntimeError):
    """The replicate function failed; the message names the design, n and replicate."""


@dataclass(frozen=True)
class ReplicateSeeds:
    """Seeds of one replicate.

    Attributes
    ----------
    data : int
        Seed of the generator that simulates the data (63 bits).
    estimator : int
        Seed handed to the replicate function (32 bits, accepted as ``random_state`` by
        scikit-learn).
    """

    data: int
    estimator: int


@dataclass(frozen=True)
class StudyRun:
    """What one call of :func:`run_study` did.

    Attributes
    ----------
    path : pathlib.Path
        The study file.
    requested : int
        Replicates asked for (designs x ns x reps).
    skipped : int
        Of those, replicates already finished before this call.
    completed : int
        Replicates run and stored by this call.
    seconds : float
        Wall time of this call.
    """

    path: Path
    requested: int
    skipped: int
    completed: int
    seconds: float


def _is_count(value: Any, minimum: int) -> bool:
    return isinstance(value, (int, np.integer)) and not isinstance(value, bool) and value >= minimum


def replicate_seeds(seed: int, design: str, n: int, rep: int) -> ReplicateSeeds:
    """Derive the seeds of one replicate from the study seed and its coordinates.

    The design name enters through SHA-256 (stable across processes and Python versions, unlike
    the salted built-in ``hash``); numpy's ``SeedSequence`` mixes it with the other coordinates.

    Parameters
    ----------
    seed : int
        Study seed (non-negative).
    design : str
        Design name.
    n : int
        Sample size.
    rep : int
        Replicate index (non-negative).

    Returns
    -------
    ReplicateSeeds
    """
    for label, value in (("seed", seed), ("n", n), ("rep", rep)):
        if not _is_count(value, 0):
            raise InputError(f"{label} must be a non-negative integer, got {value!r}")
    name_key = int.from_bytes(hashlib.sha256(design.encode("utf-8")).digest()[:16], "little")
    words = np.random.SeedSequence([int(seed), name_key, int(n), int(rep)]).generate_state(3)
    data_seed = (int(words[0]) << 31) | (int(words[1]) >> 1)
    return ReplicateSeeds(data=data_seed, estimator=int(words[2]))


# ---------------------------------------------------------------------------------------------
# Storage


def _connect(path: Path, create: bool) -> sqlite3.Connection:
    if not create and not path.exists():
        raise FileNotFoundError(f"no study file at {path}")
    # mode=rw refuses to create a missing file when only reading.
    uri = path.resolve().as_uri() + ("" if create else "?mode=rw")
    try:
        conn = sqlite3.connect(uri, uri=True, timeout=BUSY_TIMEOUT_SECONDS)
    except sqlite3.OperationalError as error:  # e.g. a missing or read-only folder
        raise InputError(f"cannot open study file {path} ({error})") from None
    try:
        conn.execute(f"PRAGMA busy_timeout = {int(BUSY_TIMEOUT_SECONDS * 1000)}")
        conn.execute("PRAGMA journal_mode = WAL")
        # NORMAL keeps every committed transaction through a process crash (SIGKILL); only a
        # power loss can drop the last few, which resume then reruns.
        conn.execute("PRAGMA synchronous = NORMAL")
    except sqlite3.DatabaseError as error:
        conn.close()
        raise InputError(f"{path} is not a study file ({error})") from None
    return conn


def _read_stored(conn: sqlite3.Connection, path: Path) -> dict[str, Any]:
    tables = {row[0] for row in conn.execute("SELECT name FROM sqlite_master WHERE type='table'")}
    if "study" not in tables:
        raise InputError(f"{path} is not a study file (no 'study' table)")
    stored = {key: json.loads(value) for key, value in conn.execute("SELECT key, value FROM study")}
    if stored.get("format") != FORMAT:
        raise InputError(f"{path} is not a study file of format {FORMAT!r}")
    return stored


def _json_default(value: Any) -> Any:
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    raise TypeError(f"{type(value).__name__} is not JSON-serialisable")


def _to_json(value: Any, what: str) -> str:
    try:
        return json.dumps(value, sort_keys=True, default=_json_default, allow_nan=True)
    except (TypeError, ValueError) as error:
        raise InputError(f"{what} cannot be stored as JSON: {error}") from None


def _settings_differences(stored: Mapping[str, Any], given: Mapping[str, Any]) -> list[str]:
    differences = []
    if stored["seed"] != given["seed"]:
        differences.append(f"seed: stored {stored['seed']}, given {given['seed']}")
    for name in sorted(set(stored["designs"]) | set(given["designs"])):
        old, new = stored["designs"].get(name), given["designs"].get(name)
        if old != new:
            old, new = ("absent" if t is None else f"target {t}" for t in (old, new))
            differences.append(f"design {name!r}: stored {old}, given {new}")
    old_settings, new_settings = stored["settings"], given["settings"]
    for key in sorted(set(old_settings) | set(new_settings)):
        old, new = old_settings.get(key, "<absent>"), new_settings.get(key, "<absent>")
        if old != new:
            differences.append(f"settings[{key!r}]: stored {old!r}, given {new!r}")
    return differences


def _replicate_columns(conn: sqlite3.Connection) -> set[str]:
    return {row[1] for row in conn.execute("PRAGMA table_info(replicates)")}


def _check_code(
    conn: sqlite3.Connection, path: Path, stored: Mapping[str, Any], allow_change: bool
) -> None:
    """Refuse to resume with different code unless ``allow_change``. Which code ran each
    replicate is kept on the replicate itself (column ``code``)."""
    current = code_fingerprint()
    if stored.get("code") == current:
        return
    if not allow_change:
        recorded = stored.get("code") or "a version that did not record its code"
        raise StudyCodeError(
            f"cannot resume {path}: it was started by stackdr {recorded} and this is "
            f"stackdr {current}; replicates from different code would be mixed in one table. "
            "Start a new study file, or allow it explicitly (--allow-code-change, Python: "
            "allow_code_change=True); each replicate keeps the code that ran it"
        )
    if "code" not in _replicate_columns(conn):  # a file from before code was recorded
        with conn:
            conn.execute("ALTER TABLE replicates ADD COLUMN code TEXT")


def _open_study(
    path: Path, identity: dict[str, Any], resume: bool, allow_code_change: bool = False
) -> sqlite3.Connection:
    existed = path.exists()
    if existed and not resume:
        raise StudyExistsError(
            f"study file {path} already exists; pass resume=True to continue it "
            "(or choose a new path)"
        )
    conn = _connect(path, create=True)
    try:
        has_tables = conn.execute("SELECT count(*) FROM sqlite_master").fetchone()[0] > 0
        if existed and has_tables:
            stored = _read_stored(conn, path)
            differences = _settings_differences(stored, identity)
            if differences:
                raise StudySettingsError(
                    f"cannot resume {path}: settings differ from the stored study: "
                    + "; ".join(differences)
                )
            _check_code(conn, path, stored, allow_code_change)
        else:
            record = {
                **identity,
                "format": FORMAT,
                "created_at": _now(),
                "code": code_fingerprint(),
            }
            # Explicit BEGIN: Python's sqlite3 would run the CREATE statements outside the
            # transaction, and a crash in between would leave a file without settings.
            conn.execute("BEGIN IMMEDIATE")
            with conn:
                for statement in _SCHEMA:
                    conn.execute(statement)
                conn.executemany(
                    "INSERT INTO study (key, value) VALUES (?, ?)",
                    [(key, _to_json(value, key)) for key, value in record.items()],
                )
    except BaseException:
        conn.close()
        raise
    return conn


def _now() -> str:
    return datetime.now(UTC).isoformat(timespec="seconds")


def _write_replicate(conn: sqlite3.Connection, outcome: dict[str, Any]) -> None:
    key = (outcome["design"], outcome["n"], outcome["rep"])
    # One transaction: either every row of the replicate and its done marker, or nothing.
    with conn:
        conn.executemany(
            "INSERT INTO results (design, n, rep, estimator, estimate, se, low, high, truth, "
            "weights, extra) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
            [(*key, *row[:5], outcome["truth"], *row[5:]) for row in outcome["rows"]],
        )
        conn.execute(
            "INSERT INTO replicates (design, n, rep, data_seed, estimator_seed, truth, "
            "simulate_seconds, seconds, finished_at, code) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
            (
                *key,
                outcome["data_seed"],
                outcome["estimator_seed"],
                outcome["truth"],
                outcome["simulate_seconds"],
                outcome["seconds"],
                _now(),
                code_fingerprint(),
            ),
        )


# ---------------------------------------------------------------------------------------------
# Running


def _as_float(value: Any, field: str, where: str) -> float | None:
    if value is None:
        return None
    try:
        number = float(value)
    except (TypeError, ValueError):
        raise InputError(f"{where}: field {field!r} must be a number, got {value!r}") from None
    return None if math.isnan(number) else number


def _normalise_rows(rows: Any, where: str) -> list[tuple]:
    if isinstance(rows, Mapping) or not isinstance(rows, Iterable):
        raise InputError(f"{where}: replicate_fn must return a list of dicts, got {rows!r:.80}")
    normalised, names = [], set()
    for row in rows:
        if not isinstance(row, Mapping):
            raise InputError(f"{where}: every row must be a dict, got {row!r:.80}")
        for field in ("name", "estimate"):
            if field not in row:
                raise InputError(f"{where}: row {dict(row)!r:.80} has no {field!r} key")
        name = row["name"]
        if not isinstance(name, str) or not name:
            raise InputError(f"{where}: estimator name must be a non-empty string, got {name!r}")
        if name in names:
            raise InputError(f"{where}: estimator {name!r} appears twice")
        names.add(name)
        weights = row.get("weights")
        if weights is not None and not isinstance(weights, Mapping):
            raise InputError(f"{where}: weights of {name!r} must be a dict or None")
        extra = {k: v for k, v in row.items() if k not in STANDARD_FIELDS}
        normalised.append(
            (
                name,
                *(_as_float(row.get(f), f, f"{where}, {name!r}") for f in STANDARD_FIELDS[1:5]),
                None if weights is None else _to_json(dict(weights), f"weights of {name!r}"),
                _to_json(extra, f"extra fields of {name!r}") if extra else None,
            )
        )
    if not normalised:
        raise InputError(f"{where}: replicate_fn returned no rows")
    return normalised


def _run_replicate(
    design: Design,
    n: int,
    rep: int,
    seeds: ReplicateSeeds,
    replicate_fn: Callable[[DesignData, int], list[dict]],
) -> dict[str, Any]:
    where = f"design {design.name!r}, n={n}, replicate {rep}"
    try:
        start = time.perf_counter()
        data = design.simulate(n, np.random.default_rng(seeds.data))
        simulated = time.perf_counter()
        rows = replicate_fn(data, seeds.estimator)
        finished = time.perf_counter()
    except Exception as error:
        raise ReplicateError(f"{where}: {error!r}") from error
    return {
        "design": design.name,
        "n": n,
        "rep": rep,
        "rows": _normalise_rows(rows, where),
        "truth": data.truth,
        "data_seed": seeds.data,
        "estimator_seed": seeds.estimator,
        "simulate_seconds": simulated - start,
        "seconds": finished - simulated,
    }


def _resolve_designs(designs: str | Design | Sequence[str | Design]) -> list[Design]:
    if isinstance(designs, (str, Design)):
        designs = [designs]
    resolved = []
    for design in designs:
        if isinstance(design, str):
            resolved.append(get_design(design))
        elif isinstance(design, Design):
            resolved.append(design)
        else:
            raise TypeError(f"designs must be names or Design records, got {design!r}")
    names = [d.name for d in resolved]
    if not names:
        raise InputError("designs is empty")
    if len(set(names)) != len(names):
        raise InputError(f"designs has repeated names: {names}")
    return resolved


def _resolve_sizes(ns: int | Iterable[int]) -> list[int]:
    sizes = [ns] if isinstance(ns, (int, np.integer)) else list(ns)
    if not sizes:
        raise InputError("ns is empty")
    for n in sizes:
        if not _is_count(n, 1):
            raise InputError(f"every sample size in ns must be a positive integer, got {n!r}")
    if len(set(sizes)) != len(sizes):
        raise InputError(f"ns has repeated sizes: {sizes}")
    return [int(n) for n in sizes]


def run_study(
    path: str | Path,
    designs: str | Design | Sequence[str | Design],
    ns: int | Iterable[int],
    reps: int,
    replicate_fn: Callable[[DesignData, int], list[dict]],
    *,
    seed: int = 0,
    jobs: int = 1,
    resume: bool = False,
    backend: str | None = None,
    cluster: Any = None,
    settings: Mapping[str, Any] | None = None,
    progress: bool = True,
    allow_code_change: bool = False,
) -> StudyRun:
    """Run (or resume) a Monte Carlo study and store every replicate in a SQLite file.

    Parameters
    ----------
    path : str or pathlib.Path
        Study file. A new study refuses an existing file unless ``resume=True``.
    designs : str, Design, or sequence of them
        Design names from the registry (:func:`stackdr.designs.list_designs`) or Design records.
    ns : int or iterable of int
        Sample sizes.
    reps : int
        Replicates per (design, n); indices ``0 .. reps-1``. Resuming with a larger ``reps`` (or
        more ``ns``) extends a study.
    replicate_fn : callable
        ``replicate_fn(design_data, seed) -> list[dict]``, see the module docstring for the row
        format. Must be picklable (cloudpickle) when run in parallel.
    seed : int, default 0
        Study seed; together with (design, n, replicate index) it fixes every replicate's data and
        estimator seed (:func:`replicate_seeds`).
    jobs : int, default 1
        Parallel workers for joblib (-1: all cores). With ``jobs=1`` and no ``backend`` the
        replicates run in this process.
    resume : bool, default False
        Continue the study in an existing file, skipping finished replicates. Without an existing
        file a new study is started.
    backend : str, optional
        joblib backend name (``"loky"``, ``"threading"``, ...) or ``"dask"`` to run through
        joblib's dask backend on a ``distributed`` cluster (see ``cluster``).
    cluster : str, int or distributed.Client, optional
        Only with ``backend="dask"``: a scheduler address, the number of single-threaded workers
        of a local cluster to start (and close afterwards), or an existing client. Default: the
        current dask client if there is one, otherwise a local cluster of ``max(jobs, 1)``
        workers.
    settings : mapping, optional
        JSON-serialisable description of the study (learner library, options...). Stored with the
        study; a resume must pass the same settings, seed and designs.
    progress : bool, default True
        Show a progress bar (stderr).
    allow_code_change : bool, default False
        Resume a study that was started by different stackdr code (see
        :func:`code_fingerprint`). Off by default: the replicates of one table should come from
        one version of the estimator. Each replicate records the code that ran it (column
        ``code`` of :func:`read_results`) and :func:`summarise_study` warns about mixed codes.

    Returns
    -------
    StudyRun
        Counts of skipped and completed replicates.

    Raises
    ------
    StudyExistsError
        The file exists and ``resume`` is False.
    StudySettingsError
        Resuming with a different seed, design list or settings; the message names each
        difference. Its subclass ``StudyCodeError``: resuming with different code.
    ReplicateError
        ``replicate_fn`` failed; replicates finished before the failure stay stored.
    """
    started = time.perf_counter()
    if not callable(replicate_fn):
        raise TypeError(f"replicate_fn must be callable, got {replicate_fn!r}")
    design_list = _resolve_designs(designs)
    sizes = _resolve_sizes(ns)
    if not _is_count(reps, 1):
        raise InputError(f"reps must be a positive integer, got {reps!r}")
    if isinstance(jobs, bool) or not isinstance(jobs, (int, np.integer)) or jobs == 0:
        raise InputError(f"jobs must be a non-zero integer, got {jobs!r}")
    if cluster is not None and backend != "dask":
        raise InputError("cluster is only used with backend='dask'")
    if backend == "dask":
        check_cluster(backend, cluster)
    replicate_seeds(seed, "", 0, 0)  # validates the seed before any file is touched
    settings = {} if settings is None else settings
    if not isinstance(settings, Mapping):
        raise TypeError(f"settings must be a mapping, got {type(settings).__name__}")
    identity = {
        "seed": int(seed),
        "designs": {d.name: d.target for d in design_list},
        # A JSON round trip makes tuples, numpy scalars and key order compare as stored.
        "settings": json.loads(_to_json(dict(settings), "settings")),
    }
    path = Path(path)
    with closing(_open_study(path, identity, resume, allow_code_change)) as conn:
        done = set(conn.execute("SELECT design, n, rep FROM replicates"))
        todo = [
            (design, n, rep)
            for design in design_list
            for n in sizes
            for rep in range(int(reps))
            if (design.name, n, rep) not in done
        ]
        requested = len(design_list) * len(sizes) * int(reps)
        tasks = (
            (design, n, rep, replicate_seeds(seed, design.name, n, rep), replicate_fn)
            for design, n, rep in todo
        )
        with tqdm(total=len(todo), disable=not progress, desc="replicates") as bar:
            for outcome in _execute(tasks, jobs, backend, cluster):
                _write_replicate(conn, outcome)
                bar.update()
    return StudyRun(
        path=path,
        requested=requested,
        skipped=requested - len(todo),
        completed=len(todo),
        seconds=time.perf_counter() - started,
    )


def _execute(
    tasks: Iterator[tuple], jobs: int, backend: str | None, cluster: Any
) -> Iterator[dict[str, Any]]:
    if backend is None and jobs == 1:
        for task in tasks:
            yield _run_replicate(*task)
        return
    if backend == "dask":
        context, backend, jobs = dask_backend(cluster, jobs), None, dask_jobs(jobs)
    else:
        context = nullcontext()
    with context:
        yield from Parallel(n_jobs=jobs, backend=backend, return_as="generator_unordered")(
            delayed(_run_replicate)(*task) for task in tasks
        )


# ---------------------------------------------------------------------------------------------
# Reading and summarising


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
    with closing(_connect(path, create=False)) as conn:
        stored = _read_stored(conn, path)
        code = "p.code" if "code" in _replicate_columns(conn) else "NULL AS code"
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
        sd, sd_mcse, rmse, rmse_mcse, mae, mae_mcse, coverage, coverage_mcse, width, width_mcse,
        mean_se, mean_se_mcse.
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
