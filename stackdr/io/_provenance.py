"""Provenance of a run: which data file (by name and SHA-256), when, with which software and
which command, so a table in a paper can be traced to its inputs."""

from __future__ import annotations

import hashlib
import os
import platform
from importlib import metadata
from pathlib import Path

from stackdr._version import __version__

#: Packages whose versions are recorded (the numerical stack, the solvers and the figures).
RECORDED_PACKAGES = (
    "numpy",
    "scipy",
    "scikit-learn",
    "pandas",
    "cvxpy",
    "highspy",
    "clarabel",
    "matplotlib",
)


def versions() -> dict:
    """Versions of stackdr, Python and :data:`RECORDED_PACKAGES` (None when not installed)."""
    found = {"stackdr": __version__, "python": platform.python_version()}
    for name in RECORDED_PACKAGES:
        try:
            found[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            found[name] = None
    return found


def file_sha256(path) -> str:
    """SHA-256 of a file's bytes, as hex."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def relative_path(path, folder) -> str:
    """``path`` relative to ``folder`` (POSIX separators), so a results folder can move; the
    absolute path when the two share no root (another drive)."""
    path, folder = Path(path).absolute(), Path(folder).absolute()
    try:
        return Path(os.path.relpath(path, folder)).as_posix()
    except ValueError:
        return path.as_posix()


def input_record(path, out_dir, rows: int, columns: int) -> dict:
    """The ``provenance.input`` block: file name, path relative to the output folder, SHA-256,
    size and the table's shape as read."""
    path = Path(path)
    return {
        "file": path.name,
        "path": relative_path(path, out_dir),
        "sha256": file_sha256(path),
        "bytes": path.stat().st_size,
        "rows": int(rows),
        "columns": int(columns),
    }


def provenance(created_utc: str, *, command_line: str | None = None, input=None) -> dict:
    """The ``provenance`` block of ``results.json``.

    Parameters
    ----------
    created_utc : str
        When the fit was made (:attr:`stackdr.estimation.BlendResult.created_utc`).
    command_line : str, optional
        The full command line of a command-line run.
    input : dict, optional
        From :func:`input_record` (None for data passed in Python).

    Returns
    -------
    dict
    """
    return {
        "created_utc": created_utc,
        "command_line": command_line,
        "input": input,
        "versions": versions(),
        "platform": platform.platform(),
    }
