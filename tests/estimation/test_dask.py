"""Scale-out on dask.distributed: a study and a BlendEstimator fit on a two-worker cluster give
exactly the results of a local run with the same seeds."""

import os
from contextlib import contextmanager
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from sklearn.base import BaseEstimator, ClassifierMixin
from sklearn.linear_model import LogisticRegression

from stackdr import BlendEstimator
from stackdr.errors import InputError, WorkerLostError
from stackdr.estimation import (
    check_cluster,
    dask_jobs,
    parallel_backend,
    parametric_outcome_library,
    parametric_propensity_library,
)
from stackdr.search import ESTIMATOR_ORDER
from stackdr.studies import get_design, make_replicate, read_results, run_study

distributed = pytest.importorskip("distributed")
TIMING = ["simulate_seconds", "seconds", "estimator_seconds"]


@contextmanager
def _two_workers():
    """A client of a fresh local cluster of two single-threaded worker processes. Processes,
    not threads: the weight search caches compiled convex programs per process, and tasks must
    travel (pickled) as they would to a remote cluster."""
    cluster = distributed.LocalCluster(
        n_workers=2, processes=True, threads_per_worker=1, dashboard_address=":0"
    )
    with cluster, distributed.Client(cluster, set_as_default=False) as c:
        yield c


@pytest.fixture(scope="module")
def client():
    with _two_workers() as c:
        yield c


def _study(path, **kwargs):
    run_study(
        path,
        ["lunceford-davidian", "kang-schafer"],
        150,
        2,
        make_replicate("parametric", bootstrap=20),
        seed=3,
        progress=False,
        **kwargs,
    )
    return read_results(path).drop(columns=TIMING)


@pytest.mark.slow
def test_study_on_cluster_equals_local_run(tmp_path, client):
    local = _study(tmp_path / "local.sqlite")
    remote = _study(tmp_path / "dask.sqlite", backend="dask", cluster=client)
    # Two designs, two replicates, every comparison row and the oracle pair.
    assert len(local) == 2 * 2 * len(ESTIMATOR_ORDER)
    pd.testing.assert_frame_equal(remote, local)


@pytest.mark.slow
@pytest.mark.parametrize("kind", ["multinomial", "refit"])
def test_estimator_on_cluster_equals_local_fit(client, kind):
    data = get_design("lunceford-davidian").simulate(240, np.random.default_rng(8))
    settings = {
        "propensity_learners": parametric_propensity_library(),
        "outcome_learners": parametric_outcome_library(),
        "bootstrap": 3 if kind == "refit" else 30,
        "bootstrap_kind": kind,
        "seed": 4,
    }
    columns = (data.frame, data.treatment, data.outcome, data.covariates)
    local = BlendEstimator("ate", **settings).fit(*columns)
    remote = BlendEstimator("ate", backend="dask", cluster=client, **settings).fit(*columns)
    pd.testing.assert_frame_equal(remote.comparison(), local.comparison())
    np.testing.assert_array_equal(remote.crossfit.propensity, local.crossfit.propensity)
    pd.testing.assert_frame_equal(remote.bootstrap.estimates, local.bootstrap.estimates)
    # Where the work ran is not part of what was computed.
    assert "backend" not in remote.settings and "cluster" not in remote.settings


def test_backend_settings_are_checked():
    with pytest.raises(InputError, match="backend must be None or one of"):
        check_cluster("spark", None)
    with pytest.raises(InputError, match="cluster is only used with backend='dask'"):
        check_cluster(None, "tcp://127.0.0.1:8786")
    with pytest.raises(InputError, match="positive local cluster size"):
        check_cluster("dask", 0)
    with pytest.raises(InputError, match="backend must be one of None, dask, got 'threads'"):
        BlendEstimator(backend="threads").fit(np.zeros((10, 1)), np.ones(10), np.ones(10))
    with parallel_backend(None):
        pass
    assert dask_jobs(None) == -1 and dask_jobs(1) == -1 and dask_jobs(4) == 4


@pytest.mark.slow
def test_estimate_command_on_a_local_cluster(tmp_path):
    # `stackdr estimate --local-cluster 2` runs the learner fits on dask and writes the same
    # estimate as the local run.
    import json

    from stackdr.cli import main
    from stackdr.studies import simulate_demo

    frame, _ = simulate_demo(300, seed=5)
    data = tmp_path / "d.csv"
    frame.to_csv(data, index=False)
    config = tmp_path / "c.toml"
    config.write_text("[propensity.logistic]\n[outcome.linear]\n")
    common = [
        "estimate",
        str(data),
        "--treatment",
        "programme",
        "--outcome",
        "sbp_change",
        "--target",
        "ate",
        "--config",
        str(config),
        "--bootstrap",
        "0",
        "--no-progress",
    ]
    assert main([*common, "--out", str(tmp_path / "local")]) == 0
    assert main([*common, "--local-cluster", "2", "--out", str(tmp_path / "dask")]) == 0
    local = json.loads((tmp_path / "local" / "results.json").read_text())
    remote = json.loads((tmp_path / "dask" / "results.json").read_text())
    assert remote["estimate"] == local["estimate"]
    assert main([*common, "--local-cluster", "0", "--out", str(tmp_path / "bad")]) == 2


class _ExitsWorker(BaseEstimator, ClassifierMixin):
    """Penalised logistic regression whose fit ends its own process while ``marker`` does not
    exist (it creates the file first, so ``once=True`` kills exactly one worker). The process
    exit stands for a worker lost mid-run: out of memory, a pre-empted machine, a crashed native
    library."""

    def __init__(self, marker="", once=True):
        self.marker = marker
        self.once = once

    def fit(self, X, y):
        if not os.path.exists(self.marker) or not self.once:
            Path(self.marker).touch()
            os._exit(1)
        self.model_ = LogisticRegression(C=0.05).fit(X, y)
        self.classes_ = self.model_.classes_
        return self

    def predict_proba(self, X):
        return self.model_.predict_proba(X)


def _lossy_fit(marker, once, **kwargs):
    data = get_design("lunceford-davidian").simulate(200, np.random.default_rng(9))
    learners = {"logistic": LogisticRegression(), "exits": _ExitsWorker(str(marker), once)}
    return BlendEstimator(
        "ate",
        propensity_learners=learners,
        outcome_learners=parametric_outcome_library(),
        bootstrap=0,
        seed=2,
        **kwargs,
    ).fit(data.frame, data.treatment, data.outcome, data.covariates)


@pytest.mark.slow
def test_a_worker_killed_mid_run_has_its_task_rerun(tmp_path):
    # The first fit of the lossy learner kills its worker; the nanny starts a new one and the
    # scheduler reruns the lost task, so the fit equals the local run (the local run is made
    # after the marker exists, so its learner fits normally). A job whose task keeps killing
    # workers stops with one line (next test).
    marker = tmp_path / "killed-once"
    with _two_workers() as c:
        remote = _lossy_fit(marker, True, backend="dask", cluster=c)
    assert marker.exists()
    local = _lossy_fit(marker, True)
    # Equal up to summation order: the rerun fit ran in another process, where this learner
    # (plain lbfgs logistic regression) can differ in the last bit.
    np.testing.assert_allclose(remote.crossfit.propensity, local.crossfit.propensity, rtol=1e-12)
    pd.testing.assert_frame_equal(
        remote.comparison(), local.comparison(), check_exact=False, rtol=1e-9
    )


@pytest.mark.slow
def test_a_task_that_keeps_killing_workers_stops_the_job_with_one_line(tmp_path):
    with _two_workers() as c:
        with pytest.raises(WorkerLostError, match="a dask worker died each time it ran task"):
            _lossy_fit(tmp_path / "always", False, backend="dask", cluster=c)


class _ReplicateExitsWorkerOnce:
    """A study's replicate function whose first call anywhere ends its worker process."""

    def __init__(self, inner, marker):
        self.inner, self.marker = inner, marker

    def __call__(self, data, seed):
        if not os.path.exists(self.marker):
            Path(self.marker).touch()
            os._exit(1)
        return self.inner(data, seed)


@pytest.mark.slow
def test_a_study_whose_worker_is_killed_equals_the_local_run(tmp_path):
    # The lost replicate is rerun on another worker; every replicate is stored once.
    replicate = _ReplicateExitsWorkerOnce(make_replicate("parametric"), str(tmp_path / "m"))
    settings = {"designs": ["lunceford-davidian"], "seed": 3, "progress": False}
    with _two_workers() as c:
        run_study(
            tmp_path / "d.sqlite",
            ns=150,
            reps=3,
            replicate_fn=replicate,
            backend="dask",
            cluster=c,
            **settings,
        )
    assert (tmp_path / "m").exists()
    run_study(tmp_path / "l.sqlite", ns=150, reps=3, replicate_fn=replicate, **settings)
    remote = read_results(tmp_path / "d.sqlite").drop(columns=TIMING)
    local = read_results(tmp_path / "l.sqlite").drop(columns=TIMING)
    assert sorted(set(remote["rep"])) == [0, 1, 2]
    pd.testing.assert_frame_equal(remote, local, check_exact=False, rtol=1e-9)
