"""Monte Carlo study runner: simulate, estimate, store and resume.

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
  :func:`~stackdr.studies.read_results` (e.g. ``tau``, ``tie_break_active``, ``seconds``).
  Values must be JSON-serialisable (numpy scalars and arrays are converted).

The parent process stores each finished replicate in the study file (``_store.py``) in one
transaction, so a study killed at any moment holds only whole replicates and can be resumed;
:func:`~stackdr.studies.summarise_study` reads it back.
"""

from __future__ import annotations

import hashlib
import json
import math
import time
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from contextlib import closing, nullcontext
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from joblib import Parallel, delayed
from tqdm import tqdm

from stackdr.errors import InputError, StackdrError
from stackdr.estimation import check_cluster, dask_backend, dask_jobs
from stackdr.studies._design_registry import get_design
from stackdr.studies._designs import Design, DesignData
from stackdr.studies._store import open_study, to_json, write_replicate

STANDARD_FIELDS = ("name", "estimate", "se", "low", "high", "weights")


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
                None if weights is None else to_json(dict(weights), f"weights of {name!r}"),
                to_json(extra, f"extra fields of {name!r}") if extra else None,
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
        "settings": json.loads(to_json(dict(settings), "settings")),
    }
    path = Path(path)
    with closing(open_study(path, identity, resume, allow_code_change)) as conn:
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
                write_replicate(conn, outcome)
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
