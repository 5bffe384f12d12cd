"""The command line, end to end: every target, file formats, hostile names, exit codes."""

import contextlib
import html
import io
import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from threadpoolctl import threadpool_limits

from stackdr.cli import _main as cli
from stackdr.cli._main import main, read_table
from stackdr.estimation import CATALOGUE, CAUTION
from stackdr.io import read_results_json
from stackdr.studies import simulate_demo
from tests.helpers import QUICK

# A continuous treatment needs regressions as propensity learners.
CONTINUOUS = QUICK.replace("logistic]", "linear]").replace(
    "constant-classifier", "constant-regressor"
)
# Precedence check: --folds and --seed on the command line override these; blend stays.
OVERRIDDEN = QUICK.replace("folds = 3", 'folds = 4\nseed = 9\nblend = "probability"')
HOSTILE = "<script>alert('x')</script> & $(touch pwned); rm -rf ~ | \"q\""


def estimate(root, data="plain.csv", target="ate", out="never"):
    """Arguments of `stackdr estimate` on a file of the test workspace."""
    return [
        "estimate",
        root / data,
        "--treatment",
        "programme",
        "--outcome",
        "sbp_change",
        "--target",
        target,
        "--out",
        root / out,
    ]


def run(args, capsys):
    code = main([str(a) for a in args])
    out, err = capsys.readouterr()
    return code, out, err


@pytest.fixture(scope="module")
def workspace(tmp_path_factory):
    root = tmp_path_factory.mktemp("cli")
    frame, _ = simulate_demo(n=160, seed=5)
    frame.to_csv(root / "plain.csv", index=False)
    frame.rename(columns={"sbp_change": HOSTILE}).to_csv(root / "hostile.csv", index=False)
    frame.to_parquet(root / "data.parquet")
    # Semicolon-separated, decimal commas, UTF-8 byte-order mark and quoted numbers, as
    # spreadsheet programs in many locales write them.
    text = frame.to_csv(index=False, sep=";", decimal=",", quoting=1)
    (root / "excel.csv").write_bytes(b"\xef\xbb\xbf" + text.encode("utf-8"))
    for name, body in (("quick", QUICK), ("continuous", CONTINUOUS), ("overridden", OVERRIDDEN)):
        (root / f"{name}.toml").write_text(body)
    return root, frame


RUNS = {
    # target: (data file, config, extra arguments)
    "ate": ("hostile.csv", "quick", ["--outcome", HOSTILE]),
    "att": ("plain.csv", "overridden", ["--outcome", "sbp_change", "--folds", "3", "--seed", 2]),
    "mean1": ("data.parquet", "quick", ["--outcome", "sbp_change", "--covariates", "age", "bmi"]),
    "mean0": ("excel.csv", "quick", ["--outcome", "sbp_change", "--blend", "logit"]),
    "cov": ("plain.csv", "continuous", ["--outcome", "sbp_change"]),
}


@pytest.fixture(scope="module")
def runs(workspace):
    """One `stackdr estimate` per target, shared by the tests below."""
    root, _ = workspace
    done = {}
    for target, (data, config, extra) in RUNS.items():
        treatment = "bmi" if target == "cov" else "programme"
        out = root / f"out-{target}"
        args = [root / data, "--treatment", treatment, "--target", target, "--out", out]
        args += ["--config", root / f"{config}.toml", *extra]
        stdout = io.StringIO()
        with contextlib.chdir(root), contextlib.redirect_stdout(stdout):
            code = main([str(a) for a in ["estimate", *args]])
        done[target] = (code, stdout.getvalue(), out)
    return done


@pytest.mark.parametrize("target", list(RUNS))
def test_estimate_end_to_end(runs, workspace, target):
    code, stdout, out = runs[target]
    root, frame = workspace
    assert code == 0
    for name in ("results.json", "report.html", "nuisances.csv"):
        assert (out / name).is_file()
    assert list(out.glob(".*.tmp")) == []
    results = read_results_json(out / "results.json")
    assert results["target"]["name"] == target and results["n"] == len(frame)
    assert results["run"]["command"] == "estimate"
    # The printed table and the cautions footer.
    assert "target-aimed stacking" in stdout and "prediction-loss stacking" in stdout
    assert CAUTION in " ".join(stdout.split())  # wrapped to 100 characters a line
    # nuisances.csv is the per-row decomposition of the saved estimate.
    table = pd.read_csv(out / "nuisances.csv")
    assert len(table) == len(frame)
    denominator = table["treatment"].sum() if target == "att" else len(table)
    assert table["contribution"].sum() / denominator == pytest.approx(results["estimate"])


def test_settings_reach_the_estimator(runs):
    att = read_results_json(runs["att"][2] / "results.json")["settings"]
    # Command line over config over defaults.
    assert att["folds"] == 3 and att["seed"] == 2 and att["blend"] == "probability"
    assert att["bootstrap"] == 10
    mean0 = read_results_json(runs["mean0"][2] / "results.json")
    assert mean0["settings"]["blend"] == "logit"
    mean1 = read_results_json(runs["mean1"][2] / "results.json")
    assert mean1["data"]["covariates"] == ["age", "bmi"]
    cov = read_results_json(runs["cov"][2] / "results.json")
    assert cov["diagnostics"]["propensity_kind"] == "regressor"
    assert cov["run"]["learners"]["propensity"]["constant"] == {"learner": "constant-regressor"}


def test_spreadsheet_csv_gives_the_same_answer_as_plain_csv(runs, workspace, capsys):
    root, _ = workspace
    out = root / "out-mean0-plain"
    quick = ["--config", root / "quick.toml", "--bootstrap", 0]
    args = [*estimate(root, "plain.csv", "mean0", out), "--blend", "logit", *quick]
    assert run(args, capsys)[0] == 0
    plain = read_results_json(out / "results.json")
    excel = read_results_json(runs["mean0"][2] / "results.json")
    assert plain["estimate"] == pytest.approx(excel["estimate"], rel=1e-12)


def test_hostile_column_name_is_escaped_in_the_report(runs, workspace):
    root, _ = workspace
    out = runs["ate"][2]
    results = read_results_json(out / "results.json")
    assert results["data"]["outcome"] == HOSTILE
    report = (out / "report.html").read_text(encoding="utf-8")
    assert "<script>" not in report
    assert html.escape(HOSTILE) in report
    assert not (root / "pwned").exists()


def test_report_rebuild_equals_original(runs, tmp_path, capsys):
    out = runs["ate"][2]
    code, stdout, _ = run(["report", out / "results.json", "--out", tmp_path], capsys)
    assert code == 0 and "report.html" in stdout
    original = (out / "report.html").read_bytes()
    assert (tmp_path / "report.html").read_bytes() == original
    assert sorted(p.name for p in (tmp_path / "figures").iterdir()) == sorted(
        p.name for p in (out / "figures").iterdir()
    )


def test_overwrite_replaces_results(runs, workspace, capsys):
    root, _ = workspace
    out = runs["mean1"][2]
    before = (out / "results.json").read_bytes()
    quick = ["--config", root / "quick.toml", "--bootstrap", 0]
    args = [*estimate(root, "data.parquet", "mean1", out), *quick]
    code, _, err = run(args, capsys)
    assert code == 2 and "already exists; pass --overwrite" in err
    assert (out / "results.json").read_bytes() == before
    assert run([*args, "--overwrite"], capsys)[0] == 0
    assert read_results_json(out / "results.json")["bootstrap"] is None


def test_learners_lists_the_catalogue(capsys):
    code, out, _ = run(["learners"], capsys)
    assert code == 0
    flat = " ".join(out.split())
    for name, entry in CATALOGUE.items():
        line = next(line for line in out.splitlines() if line.startswith(name + " "))
        assert entry.kind in line and " ".join(entry.description.split()) in flat
    assert "n_estimators=100" in out
    # Which learners use sampling weights: k nearest neighbours has no sample_weight.
    assert "logistic (classifier, weighted fits)" in out
    assert "knn-regressor (regressor, unweighted fits)" in out
    assert max(len(line) for line in out.splitlines()) <= 100


@pytest.mark.slow
def test_demo_command(tmp_path, capsys):
    with threadpool_limits(1):
        code, out, _ = run(
            [
                "demo",
                "--out",
                tmp_path,
                "--n",
                300,
                "--bootstrap",
                10,
                "--jobs",
                1,
                "--no-progress",
            ],
            capsys,
        )
    assert code == 0
    assert "simulated" in out.lower() and "true value" in out
    assert CAUTION in " ".join(out.split())
    for name in ("results.json", "report.html", "nuisances.csv", "demo_data.csv"):
        assert (tmp_path / name).is_file()
    results = read_results_json(tmp_path / "results.json")
    assert results["run"]["simulated"] is True and results["run"]["true_value"] == pytest.approx(
        -4.0
    )
    # The console names a widened (or unwidened but flagged) interval, as the report does.
    check = results["diagnostics"]["fold_check"]
    shown = check["corrected"] or check["alert"] or "above the gate" in check["sentence"]
    assert (check["sentence"] in " ".join(out.split())) == shown


# ----------------------------------------------------------------------------- bad input


def bad_inputs(root: Path) -> dict:
    """name -> (arguments, fragment the one-line message must contain)."""
    (root / "empty.csv").write_text("")
    (root / "header.csv").write_text("programme,sbp_change,age\n")
    frame, _ = simulate_demo(n=60, seed=3)
    frame.loc[4, "age"] = np.nan
    frame.to_csv(root / "gaps.csv", index=False)
    (root / "broken.toml").write_text("[settings\nfolds = 3\n")
    (root / "unknown.toml").write_text('[propensity.rf]\nlearner = "random-jungle"\n')
    (root / "typed.toml").write_text('[settings]\nbootstrap = "many"\n')
    (root / "taken").mkdir(exist_ok=True)
    (root / "taken" / "results.json").write_text("{}")
    (root / "notes.xlsx").write_text("x")
    (root / "bad.json").write_text("{not json")
    frame = frame.assign(
        w=np.linspace(0.5, 2.0, len(frame)),
        w_neg=np.where(np.arange(len(frame)) == 3, -0.5, 1.0),
        w_gap=np.where(np.arange(len(frame)) == 3, np.nan, 1.0),
        w_text=np.where(np.arange(len(frame)) == 3, "heavy", "1"),
        site="north",
    )
    frame.to_csv(root / "design.csv", index=False)
    base = estimate(root)
    design = [*estimate(root, data="design.csv"), "--covariates", "age"]
    return {
        "missing file": (["estimate", root / "absent.csv", *base[2:]], "not found"),
        "unknown column": ([*base, "--covariates", "age", "weight"], "'weight'"),
        "unknown treatment": (
            [*base[:3], "dose", *base[4:]],
            "treatment column 'dose' not found",
        ),
        "unknown target": ([*base[:7], "ATE", *base[8:]], "invalid choice: 'ATE'"),
        "treatment not 0/1": ([*base[:3], "age", *base[4:]], "must be coded 0/1"),
        "missing values": (
            ["estimate", root / "gaps.csv", *base[2:]],
            "covariates have missing values: 'age' (1)",
        ),
        "unreadable config": ([*base, "--config", root / "broken.toml"], "is not valid TOML"),
        "missing config": ([*base, "--config", root / "nope.toml"], "nope.toml' not found"),
        "unknown learner": (
            [*base, "--config", root / "unknown.toml"],
            "unknown learner 'random-jungle'",
        ),
        "wrong type in config": (
            [*base, "--config", root / "typed.toml"],
            "'bootstrap' must be a whole number",
        ),
        "existing results": ([*base[:-1], root / "taken"], "already exists; pass --overwrite"),
        "zero folds": ([*base, "--folds", 0], "--folds: folds must be >= 1"),
        "folds not a number": ([*base, "--folds", "five"], "invalid int value: 'five'"),
        "clip out of range": ([*base, "--clip", 0.7], "clip must be >= 0 and < 0.5"),
        "empty csv": (["estimate", root / "empty.csv", *base[2:]], "is empty"),
        "header only": (["estimate", root / "header.csv", *base[2:]], "no data rows"),
        "unsupported file": (["estimate", root / "notes.xlsx", *base[2:]], "'.xlsx'"),
        "no treatment given": ([*base[:2], *base[4:]], "missing --treatment"),
        "too many folds": ([*base, "--folds", 200], "fewer than the 200 needed"),
        "bad results file": (["report", root / "bad.json"], "is not valid JSON"),
        "unknown command": (["estimat"], "invalid choice: 'estimat'"),
        "weights column not found": ([*design, "--weights", "wt"], "weights column 'wt' not found"),
        "negative weights": ([*design, "--weights", "w_neg"], "'w_neg' has 1 negative values"),
        "missing weight": ([*design, "--weights", "w_gap"], "'w_gap' has 1 missing or infinite"),
        "text weights": ([*design, "--weights", "w_text"], "'w_text' is not numeric"),
        "one cluster": ([*design, "--clusters", "site"], "'site' has a single cluster"),
        "clusters column not found": (
            [*design, "--clusters", "ward"],
            "clusters column 'ward' not found",
        ),
    }


CASE_NAMES = [
    "missing file",
    "unknown column",
    "unknown treatment",
    "unknown target",
    "treatment not 0/1",
    "missing values",
    "unreadable config",
    "missing config",
    "unknown learner",
    "wrong type in config",
    "existing results",
    "zero folds",
    "folds not a number",
    "clip out of range",
    "empty csv",
    "header only",
    "unsupported file",
    "no treatment given",
    "too many folds",
    "bad results file",
    "unknown command",
    "weights column not found",
    "negative weights",
    "missing weight",
    "text weights",
    "one cluster",
    "clusters column not found",
]


@pytest.fixture(scope="module")
def bad(workspace):
    root, _ = workspace
    return bad_inputs(root)


def assert_one_line(err: str, fragment: str) -> None:
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith("stackdr"), err
    assert "error:" in lines[0] and fragment in lines[0], err
    assert "Traceback" not in err


@pytest.mark.parametrize("case", CASE_NAMES)
def test_user_mistakes_in_process(bad, case, capsys):
    args, fragment = bad[case]
    code, _, err = run(args, capsys)
    assert code == 2
    assert_one_line(err, fragment)


# Run as real processes too (exit status and stderr as a shell sees them); started together so
# their import time overlaps.
SUBPROCESS_CASES = ["missing file", "unknown target", "unreadable config", "existing results"]


@pytest.mark.slow
def test_user_mistakes_as_processes(bad, workspace):
    root, _ = workspace
    env = dict(os.environ)
    procs = {
        case: subprocess.Popen(
            [sys.executable, "-m", "stackdr.cli", *map(str, bad[case][0])],
            cwd=root,
            env=env,
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
            text=True,
        )
        for case in SUBPROCESS_CASES
    }
    for case, proc in procs.items():
        out, err = proc.communicate(timeout=120)
        assert proc.returncode == 2, (case, err)
        assert_one_line(err, bad[case][1])
        assert out == ""


def test_internal_error_exit_1_with_debug_hint(workspace, monkeypatch, capsys):
    root, _ = workspace

    def broken(path):
        raise RuntimeError("simulated bug")

    monkeypatch.setattr(cli, "read_table", broken)
    args = estimate(root)
    code, _, err = run(args, capsys)
    assert code == 1
    lines = err.strip().splitlines()
    assert len(lines) == 1 and "RuntimeError: simulated bug" in lines[0]
    assert "rerun with --debug" in lines[0]
    code, _, err = run([*args, "--debug"], capsys)
    assert code == 1 and "Traceback" in err


def test_interrupt_leaves_no_results_file(workspace, monkeypatch, capsys):
    root, _ = workspace
    from stackdr.io import _results_json as serialise

    def interrupted(*args, **kwargs):
        raise KeyboardInterrupt

    # Interrupt at the moment the atomic write would replace the file.
    monkeypatch.setattr(serialise.os, "replace", interrupted)
    out = root / "interrupted"
    args = [*estimate(root, out=out), "--config", root / "quick.toml", "--bootstrap", 0]
    code, _, err = run(args, capsys)
    assert code == 130 and "interrupted" in err
    assert not (out / "results.json").exists()
    assert list(out.glob("*.tmp")) == [] and list(out.glob(".*.tmp")) == []


# ----------------------------------------------------------------------------- reading files


def test_read_table_formats(tmp_path):
    expected = pd.DataFrame({"a": [1, 0, 1], "y": [1.5, -2.25, 3.0], "name": ["p", "q", "r"]})
    variants = {
        "comma.csv": b"a,y,name\n1,1.5,p\n0,-2.25,q\n1,3,r\n",
        "bom.csv": b"\xef\xbb\xbfa,y,name\n1,1.5,p\n0,-2.25,q\n1,3,r\n",
        "semicolon.csv": b"a;y;name\n1;1,5;p\n0;-2,25;q\n1;3;r\n",
        "quoted.csv": b'"a","y","name"\n"1","1.5","p"\n"0"," -2.25 ","q"\n"1","3","r"\n',
        "tab.tsv": b"a\ty\tname\n1\t1.5\tp\n0\t-2.25\tq\n1\t3\tr\n",
        "padded.csv": b" a , y ,name\n1, 1.5,p\n0,-2.25,q\n1,3,r\n",
        "crlf.csv": b"a;y;name\r\n1;1,5;p\r\n0;-2,25;q\r\n1;3;r\r\n",
        "latin1.csv": b"a,y,name\n1,1.5,p\n0,-2.25,q\n1,3,r\n",
    }
    for name, raw in variants.items():
        path = tmp_path / name
        path.write_bytes(raw)
        frame = read_table(path)
        assert list(frame.columns) == ["a", "y", "name"], name
        np.testing.assert_allclose(frame["a"].to_numpy(dtype=float), expected["a"], err_msg=name)
        np.testing.assert_allclose(frame["y"].to_numpy(dtype=float), expected["y"], err_msg=name)
        assert list(frame["name"]) == ["p", "q", "r"], name


def test_read_table_keeps_quoted_delimiters_in_names(tmp_path):
    path = tmp_path / "names.csv"
    path.write_text('"x;1","y|2",z\n1,2,3\n4,5,6\n')
    assert list(read_table(path).columns) == ["x;1", "y|2", "z"]


def test_read_table_latin1_fallback(tmp_path):
    path = tmp_path / "latin.csv"
    path.write_bytes("région,y\n1,2\n3,4\n".encode("latin-1"))
    assert list(read_table(path).columns) == ["région", "y"]


def test_results_file_is_valid_json_without_nan(runs):
    text = (runs["cov"][2] / "results.json").read_text()
    assert "NaN" not in text and "Infinity" not in text
    json.loads(text)
