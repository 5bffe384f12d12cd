"""Monte Carlo studies of the main estimator: the replicate function, its oracle pair, and the
``stackdr simulate`` / ``stackdr study`` commands (end to end, hard kill and resume, rerun).

Designs with known truth: Lunceford & Davidian (2004), true ATE 2 [construction]; Kang & Schafer
(2007), true mean 210 and constant-effect ATE 10 [construction] (REFERENCES.md).
"""

import os
import pickle
import signal
import sqlite3
import subprocess
import sys
import time
from contextlib import closing
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from stackdr.cli import main
from stackdr.core import get_target
from stackdr.errors import InputError
from stackdr.reporting import ESTIMATOR_ORDER, html_report
from stackdr.studies import ORACLE, get_design, make_replicate, oracle_row, read_results, run_study

DESIGN = "lunceford-davidian"
N = 200
SEED = 5
SETTINGS = {"library": "parametric", "estimator": {"bootstrap": 0}}
ESTIMATORS = set(ESTIMATOR_ORDER)
TIMING = ["simulate_seconds", "seconds", "estimator_seconds"]
ROOT = Path(__file__).resolve().parents[2]


def _cli_args(path, reps, *extra):
    return [
        "simulate",
        "--design",
        DESIGN,
        "--n",
        str(N),
        "--reps",
        str(reps),
        "--library",
        "parametric",
        "--bootstrap",
        "0",
        "--seed",
        str(SEED),
        "--out",
        str(path),
        "--no-progress",
        *extra,
    ]


def _comparable(path):
    return read_results(path).drop(columns=TIMING).reset_index(drop=True)


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    """An uninterrupted 6-replicate study run through the Python API."""
    path = tmp_path_factory.mktemp("reference") / "reference.sqlite"
    run_study(
        path,
        DESIGN,
        N,
        6,
        make_replicate("parametric", bootstrap=0),
        seed=SEED,
        settings=SETTINGS,
        progress=False,
    )
    return path


@pytest.mark.slow
def test_cli_study_end_to_end(tmp_path, capsys, reference):
    path = tmp_path / "small.sqlite"
    assert main(_cli_args(path, 3)) == 0
    assert "3 replicates run, 0 already stored" in capsys.readouterr().out
    results = read_results(path)
    assert set(results["estimator"]) == ESTIMATORS
    assert sorted(results["rep"].unique()) == [0, 1, 2]
    # Bootstrap 0: every interval is the Wald interval estimate +- z SE.
    assert (results["interval_method"] == "wald").all()
    z = 1.959963984540054
    assert np.allclose(results["high"] - results["estimate"], z * results["se"])
    # The command line and the API run the same replicates.
    expected = _comparable(reference)
    pd.testing.assert_frame_equal(
        _comparable(path), expected[expected["rep"] < 3].reset_index(drop=True)
    )

    csv = tmp_path / "summary.csv"
    html = tmp_path / "summary.html"
    assert main(["study", str(path), "--csv", str(csv), "--html", str(html)]) == 0
    out = capsys.readouterr().out
    assert "lunceford-davidian (target ate, truth 2), n = 200" in out
    headers = ("bias", "SD", "RMSE", "median absolute error", "mean absolute error", "coverage")
    for header in (*headers, "mean width"):
        assert header in out
    summary = pd.read_csv(csv)
    assert set(summary["estimator"]) == ESTIMATORS
    assert (summary["reps"] == 3).all()
    main_row = summary[summary["estimator"] == "target-aimed stacking"].iloc[0]
    errors = results.loc[results["estimator"] == "target-aimed stacking", "estimate"] - 2.0
    assert main_row["bias"] == pytest.approx(errors.mean())
    assert main_row["rmse"] == pytest.approx(np.sqrt(np.mean(errors**2)))
    page = html.read_text()
    assert page.count("data:image/png;base64,") == 3
    assert "http://" not in page and "https://" not in page


def test_html_escapes_names(tmp_path):
    """A user estimator name with markup appears escaped, never as markup."""
    path = tmp_path / "markup.sqlite"

    def rows(data, seed):
        return [{"name": "<b>x</b>", "estimate": data.truth, "low": 1.0, "high": 3.0}]

    run_study(path, DESIGN, 50, 2, rows, progress=False)
    page = html_report(path)
    assert "<b>x</b>" not in page and "&lt;b&gt;x&lt;/b&gt;" in page


def _stored(path):
    # Read-only: a plain connect would create the file and make the run refuse to start.
    try:
        with closing(sqlite3.connect(f"{path.as_uri()}?mode=ro", uri=True, timeout=5)) as conn:
            return conn.execute("SELECT count(*) FROM replicates").fetchone()[0]
    except sqlite3.OperationalError:  # file or table not created yet
        return 0


@pytest.mark.slow
def test_kill_then_resume_equals_uninterrupted_run(tmp_path, capsys, reference):
    path = tmp_path / "killed.sqlite"
    env = dict(os.environ)
    proc = subprocess.Popen(
        [sys.executable, "-m", "stackdr.cli", *_cli_args(path, 6)],
        cwd=ROOT,
        env=env,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )
    deadline = time.monotonic() + 120
    while _stored(path) < 1 and proc.poll() is None and time.monotonic() < deadline:
        time.sleep(0.02)
    os.kill(proc.pid, signal.SIGKILL)
    proc.wait()
    assert proc.returncode == -signal.SIGKILL
    assert 1 <= _stored(path) < 6, "the kill must land mid-run"

    assert main(_cli_args(path, 6, "--resume")) == 0
    assert "already stored" in capsys.readouterr().out
    with sqlite3.connect(path) as conn:
        keys = conn.execute("SELECT rep FROM replicates ORDER BY rep").fetchall()
        per_rep = conn.execute("SELECT rep, count(*) FROM results GROUP BY rep").fetchall()
    assert [k[0] for k in keys] == list(range(6))
    assert all(count == len(ESTIMATORS) for _, count in per_rep)
    pd.testing.assert_frame_equal(_comparable(path), _comparable(reference))

    # Rerunning a finished study changes nothing.
    def snapshot():
        with sqlite3.connect(path) as conn:
            return (
                conn.execute("SELECT * FROM replicates ORDER BY rep").fetchall(),
                conn.execute("SELECT * FROM results ORDER BY rep, estimator").fetchall(),
                conn.execute("SELECT * FROM study ORDER BY key").fetchall(),
            )

    before = snapshot()
    assert main(_cli_args(path, 6, "--resume")) == 0
    assert "0 replicates run, 6 already stored" in capsys.readouterr().out
    assert snapshot() == before


def test_oracle_pair_matches_textbook_aipw_and_is_unbiased():
    """Oracle AIPW equals the usual ATE formula (Robins, Rotnitzky & Zhao 1994) row by row, and
    averages to the designs' known truths with near-nominal Wald coverage."""
    rng = np.random.default_rng(11)
    for name, target in (
        ("lunceford-davidian", "ate"),
        ("kang-schafer", "mean1"),
        ("kang-schafer-ate", "ate"),
    ):
        estimates, covered = [], []
        for _ in range(150):
            data = get_design(name).simulate(400, rng)
            a = data.frame[data.treatment].to_numpy().astype(float)
            y = np.nan_to_num(data.frame[data.outcome].to_numpy())
            row = oracle_row(data, get_target(target), a, y, clip=0.01)
            estimates.append(row["estimate"])
            covered.append(row["low"] <= data.truth <= row["high"])
        if name == "lunceford-davidian":
            pi = np.clip(data.true_propensity, 0.01, 0.99)
            mu1, mu0 = data.true_outcome[1], data.true_outcome[0]
            textbook = np.mean(mu1 - mu0 + a * (y - mu1) / pi - (1 - a) * (y - mu0) / (1 - pi))
            assert row["estimate"] == pytest.approx(textbook, rel=1e-12)
        estimates = np.asarray(estimates)
        mc_se = estimates.std(ddof=1) / np.sqrt(len(estimates))
        assert abs(estimates.mean() - data.truth) < 4 * mc_se, name
        # 150 replicates: binomial SD of coverage about 0.018 (common practice: 3-4 SD bands).
        assert 0.88 <= np.mean(covered) <= 1.0, name


def test_oracle_row_absent_without_true_nuisances():
    data = get_design(DESIGN).simulate(50, np.random.default_rng(0))
    data.true_propensity = None
    a = data.frame[data.treatment].to_numpy().astype(float)
    assert oracle_row(data, "ate", a, data.frame[data.outcome].to_numpy(), 0.01) is None


def test_oracle_row_in_study_is_close_to_truth(reference):
    results = read_results(reference)
    oracle = results[results["estimator"] == ORACLE]
    assert len(oracle) == 6 and (oracle["kind"] == "oracle").all()
    # n = 200: SD of the oracle ATE is about 0.2, so six replicates average within 0.5 of 2.
    assert abs(oracle["estimate"].mean() - 2.0) < 0.5
    assert (oracle["weights"].isna()).all()


def test_replicate_is_picklable_and_validates_settings():
    replicate = pickle.loads(pickle.dumps(make_replicate("parametric", tie_break_scale=1.0)))
    assert replicate.keywords == {
        "library": "parametric",
        "settings": {"tie_break_scale": 1.0},
        "cluster_aware": True,
    }
    with pytest.raises(InputError, match="unknown estimator setting 'n_jobs'"):
        make_replicate("default", n_jobs=2)
    with pytest.raises(InputError, match="unknown library 'tiny'"):
        make_replicate("tiny")
    with pytest.raises(InputError, match="bootstrap must be >= 0, got -1"):
        make_replicate("default", bootstrap=-1)
    with pytest.raises(InputError, match="unknown learner 'forest'"):
        make_replicate({"outcome": {"f": {"learner": "forest"}}})
    spec = {"propensity": {"lr": {"learner": "logistic", "C": 10.0}}}
    assert make_replicate(spec).keywords["library"] == spec


def test_cli_errors_are_one_line_exit_2(tmp_path, capsys):
    path = tmp_path / "s.sqlite"
    cases = [
        (
            ["simulate", "--design", "nope", "--n", "50", "--reps", "1", "--out", str(path)],
            "unknown design 'nope'",
        ),
        (["simulate", "--design", DESIGN], "simulate needs --n, --reps, --out"),
        (["study", str(tmp_path / "missing.sqlite")], "no study file"),
    ]
    config = tmp_path / "c.toml"
    config.write_text('[settings]\ntarget = "att"\n')
    cases.append(
        (_cli_args(path, 1, "--config", str(config)), "does not apply to a simulation study")
    )
    config2 = tmp_path / "c2.toml"
    config2.write_text('[outcome.lin]\nlearner = "linear"\n')
    cases.append((_cli_args(path, 1, "--config", str(config2)), "conflict"))
    for argv, message in cases:
        assert main(argv) == 2, argv
        err = capsys.readouterr().err
        assert message in err and err.count("\n") == 1, err
    assert main(_cli_args(path, 1)) == 0
    capsys.readouterr()
    assert main(_cli_args(path, 1)) == 2
    assert "--resume" in capsys.readouterr().err


def test_simulate_list_shows_designs_with_truth(capsys):
    assert main(["simulate", "--list"]) == 0
    out = capsys.readouterr().out
    lines = out.splitlines()
    at = next(i for i, s in enumerate(lines) if s.startswith("kang-schafer-ate "))
    # Kang & Schafer (2007) constant-effect variant: ATE 10 [construction].
    assert "target ate, truth 10)" in lines[at] and "Kang" in lines[at + 1]
    assert max(map(len, lines)) <= 100
