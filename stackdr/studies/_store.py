"""The study file: one SQLite file (WAL mode) holding a Monte Carlo study.

Three tables: ``study`` (settings), ``replicates`` (one row per finished replicate: the "done"
marker, seeds, truth and timings) and ``results`` (one row per replicate and estimator). A
replicate's rows and its marker are written in a single transaction by the parent process, so a
study killed at any moment holds only whole replicates and can be resumed.

Every study records the code that produced it (:func:`code_fingerprint`: the package version and a
digest of the package's Python sources), in the study settings and on every replicate. Resuming a
study with different code is refused unless asked for explicitly, because a table that mixes
replicates from different versions of the estimator measures neither version.

Every access to the file goes through this module: creating and resuming it
(:func:`open_study`), writing a replicate (:func:`write_replicate`), reading the settings
(:func:`read_study_record`) and the connection the summaries query the results through
(:func:`connect`).
"""

from __future__ import annotations

import functools
import hashlib
import json
import sqlite3
from collections.abc import Mapping
from contextlib import closing
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np

from stackdr._version import __version__
from stackdr.errors import InputError, StackdrError

FORMAT = "stackdr-study/1"
# Waiting up to a minute for a lock covers a reader (e.g. a summary in another process) holding
# the file while the runner commits.
BUSY_TIMEOUT_SECONDS = 60.0

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


@functools.lru_cache(maxsize=1)
def code_fingerprint() -> str:
    """The package version and a digest of the package's Python sources, e.g. ``0.1.0+3f2a...``.

    Two installs give the same fingerprint exactly when every ``.py`` file of the package is the
    same, so it tells whether stored replicates came from the code now running. A user-supplied
    replicate function's own code is not covered.
    """
    root = Path(__file__).resolve().parents[1]  # the stackdr package folder
    digest = hashlib.sha256()
    for file in sorted(root.rglob("*.py")):
        digest.update(file.relative_to(root).as_posix().encode() + b"\0")
        digest.update(file.read_bytes() + b"\0")
    return f"{__version__}+{digest.hexdigest()[:12]}"


def connect(path: Path, create: bool) -> sqlite3.Connection:
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


def read_stored(conn: sqlite3.Connection, path: Path) -> dict[str, Any]:
    tables = {row[0] for row in conn.execute("SELECT name FROM sqlite_master WHERE type='table'")}
    if "study" not in tables:
        raise InputError(f"{path} is not a study file (no 'study' table)")
    stored = {key: json.loads(value) for key, value in conn.execute("SELECT key, value FROM study")}
    if stored.get("format") != FORMAT:
        raise InputError(f"{path} is not a study file of format {FORMAT!r}")
    return stored


def read_study_record(path: str | Path) -> dict[str, Any]:
    """The ``study`` table of the study file at ``path`` (seed, designs, settings, format,
    creation time and the code that started it) as a dict, values decoded from JSON.

    Raises ``FileNotFoundError`` when there is no file at ``path`` and
    :class:`~stackdr.errors.InputError` when the file is not a study file.
    """
    path = Path(path)
    with closing(connect(path, create=False)) as conn:
        return read_stored(conn, path)


def _json_default(value: Any) -> Any:
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    raise TypeError(f"{type(value).__name__} is not JSON-serialisable")


def to_json(value: Any, what: str) -> str:
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


def replicate_columns(conn: sqlite3.Connection) -> set[str]:
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
    if "code" not in replicate_columns(conn):  # a file from before code was recorded
        with conn:
            conn.execute("ALTER TABLE replicates ADD COLUMN code TEXT")


def open_study(
    path: Path, identity: dict[str, Any], resume: bool, allow_code_change: bool = False
) -> sqlite3.Connection:
    existed = path.exists()
    if existed and not resume:
        raise StudyExistsError(
            f"study file {path} already exists; pass resume=True to continue it "
            "(or choose a new path)"
        )
    conn = connect(path, create=True)
    try:
        has_tables = conn.execute("SELECT count(*) FROM sqlite_master").fetchone()[0] > 0
        if existed and has_tables:
            stored = read_stored(conn, path)
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
                    [(key, to_json(value, key)) for key, value in record.items()],
                )
    except BaseException:
        conn.close()
        raise
    return conn


def _now() -> str:
    return datetime.now(UTC).isoformat(timespec="seconds")


def write_replicate(conn: sqlite3.Connection, outcome: dict[str, Any]) -> None:
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
