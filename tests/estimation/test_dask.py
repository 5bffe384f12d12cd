"""Scale-out on dask.distributed: a study and a BlendEstimator fit on a two-worker cluster give
exactly the results of a local run with the same seeds."""

import numpy as np
import pandas as pd
import pytest

from stackdr import BlendEstimator
from stackdr.errors import InputError
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


@pytest.fixture(scope="module")
def client():
    # Worker processes, not threads: the weight search caches compiled convex programs per
    # process, and tasks must travel (pickled) as they would to a remote cluster.
    cluster = distributed.LocalCluster(
        n_workers=2, processes=True, threads_per_worker=1, dashboard_address=":0"
    )
    with cluster, distributed.Client(cluster, set_as_default=False) as c:
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
