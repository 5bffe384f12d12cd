"""Tests for the Monte Carlo study runner: storage, resume after a hard kill, parallel backends and
summaries.

The replicate function here is real: a difference in means (or the complete-case mean for the
Kang-Schafer missing-outcome design) with a bootstrap SE drawn with the replicate's seed, and an
inverse-probability-weighted estimator with the true propensity and an influence-function SE.
"""

import os
import re
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from stackdr import __version__ as stackdr_version
from stackdr.errors import InputError
from stackdr.studies import (
    MixedCodeWarning,
    ReplicateError,
    StudyCodeError,
    StudyExistsError,
    StudySettingsError,
    _store,
    _summaries,
    paired_differences,
    read_results,
    read_study_record,
    replicate_seeds,
    run_study,
    summarise_study,
)

DESIGNS = ["kang-schafer", "lunceford-davidian"]
NS = [120, 240]
REPS = 12
SEED = 7
SETTINGS = {"estimators": ["naive", "ipw"], "bootstrap": 50}
TIMING = ["simulate_seconds", "seconds"]


def difference_and_ipw(data, seed):
    """Two simple estimators of the design's target (mean1 or ate)."""
    a = data.frame[data.treatment].to_numpy()
    y = data.frame[data.outcome].to_numpy()
    p = data.true_propensity
    if data.target == "mean1":

        def naive(rows):
            return y[rows][a[rows] == 1].mean()

        contributions = a * np.where(a == 1, y, 0.0) / p
    else:

        def naive(rows):
            return y[rows][a[rows] == 1].mean() - y[rows][a[rows] == 0].mean()

        contributions = a * y / p - (1 - a) * y / (1 - p)
    rng = np.random.default_rng(seed)
    n = len(a)
    replicates = [naive(rng.integers(0, n, n)) for _ in range(SETTINGS["bootstrap"])]
    naive_se = float(np.std(replicates, ddof=1))
    estimate = contributions.mean()
    se = contributions.std(ddof=1) / np.sqrt(n)
    weights = 1 / np.where(a == 1, p, 1 - p)
    return [
        {"name": "naive", "estimate": naive(np.arange(n)), "se": naive_se},
        {
            "name": "ipw",
            "estimate": estimate,
            "se": se,
            "low": estimate - 1.96 * se,
            "high": estimate + 1.96 * se,
            "weights": {"largest": weights.max(), "share_treated": a.mean()},
            "effective_n": weights.sum() ** 2 / (weights**2).sum(),
        },
    ]


def with_unstable(data, seed):
    """Adds an estimator that fails (NaN) on odd seeds, to exercise failure counting."""
    rows = difference_and_ipw(data, seed)
    rows.append({"name": "unstable", "estimate": np.nan if seed % 2 else rows[1]["estimate"]})
    return rows


def _comparable(path):
    return read_results(path).drop(columns=TIMING)


def _study(path, fn=difference_and_ipw, reps=REPS, **kwargs):
    options = {"seed": SEED, "settings": SETTINGS, "progress": False} | kwargs
    return run_study(path, DESIGNS, NS, reps, fn, **options)


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    """An uninterrupted serial run of the standard small study."""
    path = tmp_path_factory.mktemp("reference") / "full.db"
    run = _study(path)
    assert run.completed == len(DESIGNS) * len(NS) * REPS and run.skipped == 0
    return path


def _count_done(path):
    try:
        with sqlite3.connect(path, timeout=5) as conn:
            return conn.execute("SELECT count(*) FROM replicates").fetchone()[0]
    except sqlite3.OperationalError:  # file or table not created yet
        return 0


KILL_SCRIPT = """
import sys
import time
sys.path.insert(0, {tests!r})
from test_study import DESIGNS, NS, REPS, SEED, SETTINGS, difference_and_ipw
from stackdr.studies._runner import run_study


def slow(data, seed):
    time.sleep(0.03)
    return difference_and_ipw(data, seed)


if __name__ == "__main__":
    run_study(sys.argv[1], DESIGNS, NS, REPS, slow, seed=SEED, settings=SETTINGS,
              resume=True, progress=False)
"""


@pytest.mark.slow
def test_resume_after_sigkill_matches_uninterrupted_run(tmp_path, reference):
    script = tmp_path / "run.py"
    script.write_text(KILL_SCRIPT.format(tests=str(Path(__file__).parent)))
    path = tmp_path / "killed.db"
    process = subprocess.Popen([sys.executable, str(script), str(path)])
    deadline = time.monotonic() + 120  # guard against a hang, not a timing check
    try:
        while _count_done(path) < 5:
            assert process.poll() is None, "study process ended before it could be killed"
            assert time.monotonic() < deadline, "study process made no progress"
            time.sleep(0.01)
    finally:
        process.send_signal(signal.SIGKILL)
        process.wait()
    total = len(DESIGNS) * len(NS) * REPS
    with sqlite3.connect(path) as conn:
        done = conn.execute("SELECT count(*) FROM replicates").fetchone()[0]
        rows_per_replicate = conn.execute(
            "SELECT count(*) FROM results r LEFT JOIN replicates p USING (design, n, rep) "
            "GROUP BY design, n, rep, p.rep IS NULL"
        ).fetchall()
    assert 5 <= done < total
    # Whole replicates only: each stored replicate has both rows and a done marker.
    assert rows_per_replicate == [(2,)] * done

    run = _study(path, resume=True)
    assert (run.skipped, run.completed) == (done, total - done)
    resumed = _comparable(path)
    assert not resumed.duplicated(["design", "n", "rep", "estimator"]).any()
    assert len(resumed) == 2 * total
    pd.testing.assert_frame_equal(resumed, _comparable(reference))


def test_rerunning_finished_study_changes_nothing(tmp_path):
    path = tmp_path / "study.db"
    _study(path)
    with sqlite3.connect(path) as conn:
        before = list(conn.iterdump())
    run = _study(path, resume=True)
    assert (run.completed, run.skipped) == (0, run.requested)
    with sqlite3.connect(path) as conn:
        assert list(conn.iterdump()) == before


def test_extending_a_study_adds_only_new_replicates(tmp_path, reference):
    path = tmp_path / "grow.db"
    run_study(
        path, DESIGNS, NS, 5, difference_and_ipw, seed=SEED, settings=SETTINGS, progress=False
    )
    run = _study(path, resume=True)
    assert (run.skipped, run.completed) == (len(DESIGNS) * len(NS) * 5, run.requested - 20)
    pd.testing.assert_frame_equal(_comparable(path), _comparable(reference))


def test_existing_file_and_mismatched_settings_raise(tmp_path):
    path = tmp_path / "study.db"
    run_study(
        path, "kang-schafer", 50, 2, difference_and_ipw, seed=1, settings={"a": 1}, progress=False
    )
    with pytest.raises(StudyExistsError, match="resume=True") as info:
        run_study(path, "kang-schafer", 50, 2, difference_and_ipw, seed=1, progress=False)
    assert isinstance(info.value, FileExistsError)

    def resume(**kwargs):
        options = {"seed": 1, "settings": {"a": 1}, "resume": True, "progress": False} | kwargs
        designs = options.pop("designs", "kang-schafer")
        return run_study(path, designs, 50, 2, difference_and_ipw, **options)

    with pytest.raises(StudySettingsError, match="seed: stored 1, given 2"):
        resume(seed=2)
    with pytest.raises(StudySettingsError, match=r"settings\['a'\]: stored 1, given 2"):
        resume(settings={"a": 2})
    with pytest.raises(StudySettingsError, match=r"settings\['b'\]: stored '<absent>'"):
        resume(settings={"a": 1, "b": 0})
    with pytest.raises(
        StudySettingsError, match="design 'sparse': stored absent, given target ate"
    ):
        resume(designs=["kang-schafer", "sparse"])
    assert resume().completed == 0


def test_resume_on_missing_file_starts_study_and_foreign_files_are_refused(tmp_path):
    assert (
        run_study(
            tmp_path / "new.db", "sparse", 60, 1, difference_and_ipw, resume=True, progress=False
        ).completed
        == 1
    )
    foreign = tmp_path / "other.db"
    with sqlite3.connect(foreign) as conn:
        conn.execute("CREATE TABLE t (x)")
    with pytest.raises(InputError, match="not a study file"):
        run_study(foreign, "sparse", 60, 1, difference_and_ipw, resume=True, progress=False)
    with pytest.raises(InputError, match="not a study file"):
        read_study_record(foreign)
    with pytest.raises(FileNotFoundError):
        read_results(tmp_path / "absent.db")
    with pytest.raises(FileNotFoundError):
        read_study_record(tmp_path / "absent.db")
    assert not (tmp_path / "absent.db").exists()


def test_study_record_holds_the_stored_settings(tmp_path):
    path = tmp_path / "study.db"
    run_study(
        path, "kang-schafer", 50, 1, difference_and_ipw, seed=3, settings={"a": 1}, progress=False
    )
    record = read_study_record(path)
    assert (record["seed"], record["designs"], record["settings"]) == (
        3,
        {"kang-schafer": "mean1"},
        {"a": 1},
    )
    assert record["format"] == "stackdr-study/1" and record["code"] == _store.code_fingerprint()


@pytest.mark.slow
def test_replicate_seeds_are_deterministic_and_distinct():
    seeds = replicate_seeds(7, "kang-schafer", 200, 3)
    assert seeds == replicate_seeds(7, "kang-schafer", 200, 3)
    variants = [
        replicate_seeds(8, "kang-schafer", 200, 3),
        replicate_seeds(7, "kang-schafer-transformed", 200, 3),
        replicate_seeds(7, "kang-schafer", 201, 3),
        replicate_seeds(7, "kang-schafer", 200, 4),
    ]
    assert len({seeds.data} | {v.data for v in variants}) == 5
    assert len({seeds.estimator} | {v.estimator for v in variants}) == 5
    assert 0 <= seeds.estimator < 2**32 and 0 <= seeds.data < 2**63
    # Stable across interpreters: a child with another string-hash salt derives the same seeds.
    code = (
        "from stackdr.studies._runner import replicate_seeds; "
        "s = replicate_seeds(7, 'kang-schafer', 200, 3); print(hash('salt'), s.data, s.estimator)"
    )
    salt = str(hash("salt") % 1000 + 1)  # differs from this interpreter's salt
    out = subprocess.run(
        [sys.executable, "-c", code],
        env=os.environ | {"PYTHONHASHSEED": salt},
        capture_output=True,
        text=True,
        check=True,
    ).stdout.split()
    assert int(out[0]) != hash("salt")
    assert [int(x) for x in out[1:]] == [seeds.data, seeds.estimator]
    with pytest.raises(InputError, match="seed must be a non-negative integer"):
        replicate_seeds(-1, "x", 1, 0)


def test_stored_rows_match_direct_computation(reference):
    from stackdr.studies import get_design

    results = read_results(reference)
    row = results[(results.design == "lunceford-davidian") & (results.n == 240)]
    row = row[(row.rep == 4) & (row.estimator == "ipw")].iloc[0]
    seeds = replicate_seeds(SEED, "lunceford-davidian", 240, 4)
    assert (row.data_seed, row.estimator_seed) == (seeds.data, seeds.estimator)
    data = get_design("lunceford-davidian").simulate(240, np.random.default_rng(seeds.data))
    direct = difference_and_ipw(data, seeds.estimator)[1]
    assert row.estimate == direct["estimate"] and row.truth == 2.0 and row.target == "ate"
    assert row.weights == pytest.approx(direct["weights"])
    assert row.effective_n == pytest.approx(direct["effective_n"])
    naive = results[(results.estimator == "naive")]
    assert naive["low"].isna().all() and naive["weights"].isna().all()


@pytest.mark.parametrize("how", ["loky", pytest.param("dask", marks=pytest.mark.slow)])
def test_parallel_backends_match_serial_run(tmp_path, reference, how):
    path = tmp_path / f"{how}.db"
    if how == "loky":
        _study(path, jobs=2)
    else:
        distributed = pytest.importorskip("distributed")
        # Threads keep start-up fast; the dask path through joblib is the same as with processes.
        cluster = distributed.LocalCluster(
            n_workers=2, processes=False, threads_per_worker=1, dashboard_address=":0"
        )
        with cluster, distributed.Client(cluster, set_as_default=False) as client:
            _study(path, backend="dask", cluster=client)
    pd.testing.assert_frame_equal(_comparable(path), _comparable(reference))


def test_summary_matches_hand_computation(tmp_path):
    path = tmp_path / "tiny.db"
    run_study(path, "lunceford-davidian", 150, 9, with_unstable, seed=3, progress=False)
    summary = summarise_study(path).set_index("estimator")
    results = read_results(path)
    assert list(summary.index) == ["ipw", "naive", "unstable"]
    # Formulas: Morris, White & Crowther (2019), Statistics in Medicine 38 [recalled].
    for name in ("ipw", "naive"):
        rows = results[results.estimator == name]
        est = rows["estimate"].to_numpy()
        err = est - 2.0
        got = summary.loc[name]
        assert got["reps"] == 9 and got["failed"] == 0 and got["truth"] == 2.0
        assert got["bias"] == pytest.approx(err.mean())
        assert got["bias_mcse"] == pytest.approx(err.std(ddof=1) / 3)
        assert got["sd"] == pytest.approx(est.std(ddof=1))
        assert got["sd_mcse"] == pytest.approx(est.std(ddof=1) / np.sqrt(16))
        rmse = np.sqrt(np.mean(err**2))
        assert got["rmse"] == pytest.approx(rmse)
        assert got["rmse_mcse"] == pytest.approx((err**2).std(ddof=1) / 3 / (2 * rmse))
        assert got["mae"] == pytest.approx(np.median(np.abs(err)))
        assert 0 < got["mae_mcse"] < np.abs(err).max()
        assert got["mean_se"] == pytest.approx(rows["se"].mean())
    ipw = results[results.estimator == "ipw"]
    covered = ((ipw["low"] <= 2.0) & (2.0 <= ipw["high"])).to_numpy()
    p = covered.mean()
    assert summary.loc["ipw", "coverage"] == pytest.approx(p)
    assert summary.loc["ipw", "coverage_mcse"] == pytest.approx(np.sqrt(p * (1 - p) / 9))
    width = (ipw["high"] - ipw["low"]).to_numpy()
    assert summary.loc["ipw", "width"] == pytest.approx(width.mean())
    assert summary.loc["ipw", "width_mcse"] == pytest.approx(width.std(ddof=1) / 3)
    assert np.isnan(summary.loc["naive", "coverage"])
    odd = int((results.loc[results.estimator == "unstable", "estimator_seed"] % 2).sum())
    assert 0 < odd < 9  # both branches occurred
    assert summary.loc["unstable", "failed"] == odd
    assert summary.loc["unstable", "reps"] == 9 - odd

    paired = paired_differences(path, "ipw", "naive").iloc[0]
    a = ipw["estimate"].to_numpy() - 2.0
    b = results.loc[results.estimator == "naive", "estimate"].to_numpy() - 2.0
    d = a**2 - b**2
    assert paired["pairs"] == 9
    assert paired["sq_error_diff"] == pytest.approx(d.mean())
    assert paired["sq_error_diff_mcse"] == pytest.approx(d.std(ddof=1) / 3)
    assert paired["abs_error_diff"] == pytest.approx(np.mean(np.abs(a) - np.abs(b)))
    assert paired["rmse_a"] == pytest.approx(summary.loc["ipw", "rmse"])
    assert paired_differences(path, "unstable", "ipw").iloc[0]["pairs"] == 9 - odd
    with pytest.raises(InputError, match="no estimator 'aipw'.*'ipw', 'naive', 'unstable'"):
        paired_differences(path, "aipw", "ipw")


def test_bootstrap_median_se_matches_asymptotic_formula():
    # Textbook result (common practice): the sample median of |e|, e ~ N(0,1), has asymptotic SE
    # 1 / (2 f(m) sqrt(R)) with m = 0.6745 and f(m) = 2 phi(m) the density of |e| at m.
    r = 4000
    values = np.abs(np.random.default_rng(0).standard_normal(r))
    m = 0.6744897501960817
    density = 2 * np.exp(-(m**2) / 2) / np.sqrt(2 * np.pi)
    expected = 1 / (2 * density * np.sqrt(r))
    got = _summaries._bootstrap_median_se(values)
    assert got == _summaries._bootstrap_median_se(values)  # fixed bootstrap seed
    assert abs(got / expected - 1) < 0.2


def test_replicate_errors_are_reported_and_finished_work_kept(tmp_path):
    path = tmp_path / "fails.db"

    def fails_on_third(data, seed):
        if len(data.frame) == 80 and seed == replicate_seeds(0, "sparse", 80, 2).estimator:
            raise ArithmeticError("singular")
        return difference_and_ipw(data, seed)

    with pytest.raises(ReplicateError, match=r"design 'sparse', n=80, replicate 2: .*singular"):
        run_study(path, "sparse", 80, 4, fails_on_third, progress=False)
    assert sorted(read_results(path)["rep"].unique()) == [0, 1]

    bad_rows = {
        "no 'estimate' key": lambda d, s: [{"name": "x"}],
        "appears twice": lambda d, s: [{"name": "x", "estimate": 1}] * 2,
        "list of dicts": lambda d, s: {"name": "x", "estimate": 1},
        "must be a number": lambda d, s: [{"name": "x", "estimate": "high"}],
        "no rows": lambda d, s: [],
        "cannot be stored as JSON": lambda d, s: [{"name": "x", "estimate": 1, "fit": object()}],
    }
    for i, (message, fn) in enumerate(bad_rows.items()):
        with pytest.raises(InputError, match=message):
            run_study(tmp_path / f"bad{i}.db", "sparse", 20, 1, fn, progress=False)


def test_argument_validation(tmp_path):
    path = tmp_path / "x.db"
    with pytest.raises(InputError, match="unknown design 'nope'"):
        run_study(path, ["nope"], 10, 1, difference_and_ipw, progress=False)
    with pytest.raises(InputError, match="positive integer, got 0"):
        run_study(path, "sparse", [10, 0], 1, difference_and_ipw, progress=False)
    with pytest.raises(InputError, match="reps"):
        run_study(path, "sparse", 10, 0, difference_and_ipw, progress=False)
    with pytest.raises(InputError, match="cluster is only used"):
        run_study(path, "sparse", 10, 1, difference_and_ipw, cluster=2, progress=False)
    with pytest.raises(InputError, match="settings cannot be stored as JSON"):
        run_study(path, "sparse", 10, 1, difference_and_ipw, settings={"f": len}, progress=False)
    assert not path.exists()


def _extend(path, **kwargs):
    """Resume the standard small study with one more replicate per (design, n)."""
    return _study(path, reps=REPS + 1, resume=True, **kwargs)


def test_resuming_with_different_code_is_refused_unless_allowed(tmp_path, monkeypatch):
    # Replicates of one summary table should come from one version of the estimator.
    path = tmp_path / "study.db"
    first = _store.code_fingerprint()
    assert first.startswith(stackdr_version + "+") and first == _store.code_fingerprint()
    _study(path)
    monkeypatch.setattr(_store, "code_fingerprint", lambda: "9.9.9+feedbeefcafe")
    with pytest.raises(StudyCodeError, match=rf"started by stackdr {re.escape(first)}"):
        _extend(path)
    assert _count_done(path) == len(DESIGNS) * len(NS) * REPS  # nothing written
    run = _extend(path, allow_code_change=True)
    assert run.completed == len(DESIGNS) * len(NS)
    codes = read_results(path).groupby("rep")["code"].unique()
    assert all(list(c) == [first] for c in codes.loc[: REPS - 1])
    assert list(codes.loc[REPS]) == ["9.9.9+feedbeefcafe"]
    with pytest.warns(MixedCodeWarning, match="2 versions of the stackdr code"):
        summarise_study(path)
    # Resuming again with the same (new) code still needs the permission: the study started
    # with other code.
    with pytest.raises(StudyCodeError):
        _extend(path)


def test_files_from_before_code_was_recorded(tmp_path):
    path = tmp_path / "old.db"
    _study(path)
    with sqlite3.connect(path) as conn:  # make it look like a file of the earlier layout
        conn.execute("ALTER TABLE replicates DROP COLUMN code")
        conn.execute("DELETE FROM study WHERE key = 'code'")
    assert read_results(path)["code"].isna().all()
    with pytest.raises(StudyCodeError, match="a version that did not record its code"):
        _extend(path)
    _extend(path, allow_code_change=True)
    codes = read_results(path)["code"]
    assert codes.isna().sum() > 0 and (codes == _store.code_fingerprint()).sum() > 0
    with pytest.warns(MixedCodeWarning, match="unrecorded"):
        summarise_study(path)


@pytest.mark.slow
def test_cli_refuses_a_code_change_with_one_line(tmp_path, monkeypatch, capsys):
    from stackdr.cli import main

    out = tmp_path / "cli.sqlite"
    args = [
        "simulate",
        "--design",
        "lunceford-davidian",
        "--n",
        "200",
        "--reps",
        "1",
        "--library",
        "parametric",
        "--bootstrap",
        "0",
        "--out",
        str(out),
        "--no-progress",
    ]
    assert main(args) == 0
    monkeypatch.setattr(_store, "code_fingerprint", lambda: "9.9.9+feedbeefcafe")
    capsys.readouterr()
    assert main([*args[:6], "2", *args[7:], "--resume"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "--allow-code-change" in err[0] and "Traceback" not in err[0]
    assert main([*args[:6], "2", *args[7:], "--resume", "--allow-code-change"]) == 0
    assert main(["study", str(out)]) == 0
    assert "2 versions of the stackdr code" in capsys.readouterr().err
