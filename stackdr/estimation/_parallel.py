"""Where joblib work runs (this process, local workers, or a dask.distributed cluster) and how
many native threads each learner fit may use.

Every parallel loop in stackdr is a ``joblib.Parallel`` call, so moving work to a cluster is a
matter of the joblib backend in force around the call. :func:`dask_backend` makes joblib's dask
backend current for a block, connecting to (or starting) a cluster; :func:`parallel_backend`
does that for a named backend setting and nothing otherwise. Results do not depend on where the
work ran: every task carries its own seeds and results are collected in task order.
"""

from __future__ import annotations

import functools
import os
from collections.abc import Iterator
from contextlib import contextmanager, nullcontext
from typing import Any

import numpy as np
from joblib import parallel_config
from threadpoolctl import threadpool_limits

from stackdr.errors import InputError, WorkerLostError

BACKENDS = ("dask",)


def _is_positive_count(value: Any) -> bool:
    return isinstance(value, (int, np.integer)) and not isinstance(value, bool) and value >= 1


def check_cluster(backend: str | None, cluster: Any) -> None:
    """Validate a (backend, cluster) pair of settings.

    Parameters
    ----------
    backend : None or "dask"
    cluster : None, str, int or distributed.Client
        Only with ``backend="dask"``: a scheduler address, the number of workers of a local
        cluster, or an existing client.

    Raises
    ------
    stackdr.errors.InputError
        Unknown backend, a cluster without the dask backend, a cluster value of the wrong kind,
        or dask.distributed not installed.
    """
    if backend is None:
        if cluster is not None:
            raise InputError("cluster is only used with backend='dask'")
        return
    if backend not in BACKENDS:
        raise InputError(f"backend must be None or one of {BACKENDS}, got {backend!r}")
    try:
        from distributed import Client
    except ImportError:
        raise InputError(
            "backend='dask' needs dask.distributed (pip install 'stackdr[distributed]')"
        ) from None
    if not (cluster is None or isinstance(cluster, (str, Client)) or (_is_positive_count(cluster))):
        raise InputError(
            "cluster must be a scheduler address (str), a positive local cluster size (int) or a "
            f"distributed.Client, got {cluster!r}"
        )
    if isinstance(cluster, str) and not cluster.strip():
        raise InputError("cluster scheduler address is empty")


@functools.cache
def _loss_aware_dask_backend() -> str:
    """Register (once per process) and name joblib's dask backend with one change: a task that
    fails in dask itself (not in our code), e.g. after its workers died too often, is reported to
    joblib as an error. joblib 1.6's dask backend only stores such a failure and never tells the
    waiting ``Parallel`` call, which then waits forever."""
    import asyncio

    from joblib import register_parallel_backend
    from joblib._dask import DaskDistributedBackend

    class LossAwareDaskBackend(DaskDistributedBackend):
        async def _collect(self):
            while self._continue:
                async for future, result in self.waiting_futures:
                    done = self._results.pop(future)
                    callback = self._callbacks.pop(future)
                    if future.status == "error":
                        error = result[1]
                        done.set_exception(error)
                        callback(error)  # joblib raises it where the results are read
                    else:
                        done.set_result(result)
                        callback(result)
                await asyncio.sleep(0.01)

    register_parallel_backend(_DASK_BACKEND_NAME, LossAwareDaskBackend)
    return _DASK_BACKEND_NAME


_DASK_BACKEND_NAME = "dask-loss-aware"


@contextmanager
def dask_backend(cluster: Any = None, jobs: int = 1) -> Iterator[Any]:
    """Run joblib work inside the block on a dask.distributed cluster.

    Parameters
    ----------
    cluster : None, str, int or distributed.Client
        A scheduler address (a client is opened and closed around the block), the number of
        single-threaded workers of a local cluster to start and close afterwards, or an existing
        client (left open). Default: the current client if there is one, otherwise a local
        cluster of ``max(jobs, 1)`` workers.
    jobs : int
        Local cluster size when ``cluster`` is None and no client exists.

    Yields
    ------
    distributed.Client
        The client joblib's dask backend uses.

    Notes
    -----
    Give workers one thread each (``dask worker --nthreads 1``; local clusters started here
    do): the weight search keeps compiled convex programs per process, and two threads solving
    with the same program at once fail.
    """
    check_cluster("dask", cluster)
    from distributed import Client, LocalCluster, get_client

    owned: list[Any] = []
    if cluster is None:
        try:
            cluster = get_client()
        except ValueError:  # no current client: start a local cluster
            cluster = max(int(jobs), 1)
    if isinstance(cluster, Client):
        client = cluster
    elif isinstance(cluster, str):
        try:
            client = Client(cluster, set_as_default=False)
        except OSError as error:
            raise InputError(f"cannot reach the dask scheduler at {cluster!r}: {error}") from None
        owned.append(client)
    else:
        local = LocalCluster(n_workers=int(cluster), threads_per_worker=1, dashboard_address=":0")
        client = Client(local, set_as_default=False)
        owned += [client, local]
    from distributed import KilledWorker

    try:
        with parallel_config(backend=_loss_aware_dask_backend(), client=client):
            yield client
    except KilledWorker as error:
        # The scheduler reruns the tasks of a worker that dies on the other workers; only a
        # task that kills its worker again and again ends up here.
        raise WorkerLostError(
            f"a dask worker died each time it ran task {error.task!r} (the scheduler's "
            "'distributed.scheduler.allowed-failures' limit); nothing was written, and a study "
            "resumes from its stored replicates when rerun"
        ) from None
    finally:
        for resource in owned:
            resource.close()


def parallel_backend(backend: str | None, cluster: Any = None, jobs: int = 1):
    """Context for a ``backend`` setting: :func:`dask_backend` for ``"dask"``, otherwise a
    context that changes nothing.

    Parameters
    ----------
    backend : None or "dask"
    cluster : see :func:`dask_backend`
    jobs : int
        Local cluster size when dask starts its own cluster.
    """
    check_cluster(backend, cluster)
    if backend == "dask":
        return dask_backend(cluster, jobs)
    return nullcontext()


def dask_jobs(jobs: int | None) -> int:
    """n_jobs for a joblib call on the dask backend: an explicit count above one is kept,
    otherwise -1, which sizes the work to the cluster (joblib runs ``n_jobs=1`` in this process
    whatever the backend)."""
    return int(jobs) if jobs is not None and jobs > 1 else -1


def available_cores() -> int:
    """Cores this process may run on (the affinity mask where the platform has one)."""
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # platforms without affinity masks
        return os.cpu_count() or 1


def worker_count(n_jobs: int | None) -> int:
    """Processes a joblib call with ``n_jobs`` runs at once (-1: one per core)."""
    if n_jobs is None:
        return 1
    if n_jobs < 0:
        return max(1, available_cores() + 1 + int(n_jobs))
    return max(1, int(n_jobs))


def threads_per_fit(n_jobs: int | None, threads: int | None = 1) -> int:
    """Native threads (OpenMP, BLAS) one learner fit may use.

    The budget: ``--jobs J`` runs J workers, each fit with ``threads`` native threads, so a
    run occupies J x threads cores. Native thread pools left uncapped start one thread per
    core in every process, and two runs (or a run and a study) on one machine then
    oversubscribe it: OpenMP threads spin while they wait, and boosting fits were measured
    about ten times slower on a busy machine. One thread per fit gave the same estimates and,
    on the 2-core machine, about the same time for a single run.
    """
    return max(1, int(threads)) if threads is not None else 1


@contextmanager
def native_threads(limit: int) -> Iterator[None]:
    """Cap OpenMP and BLAS thread pools of this process inside the block."""
    with threadpool_limits(limits=int(limit)):
        yield
