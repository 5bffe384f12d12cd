"""Fuzzing the command line and the configuration loader (hypothesis, bounded example counts).

Whatever the input, exactly one of two things may happen: a valid result (exit 0, a
``results.json`` with finite numbers and no NaN/Infinity token) or exit code 2 with one line
``stackdr: error: ...`` on stderr. Never a traceback, never exit 1, never a file outside
``--out`` (the work folder and a private temporary folder are compared before and after).
``COUNTS`` tallies what was tried and how it ended; it is printed at the end (pytest -s).
"""

from __future__ import annotations

import contextlib
import copy
import csv
import io
import json
import os
import re
import shutil
import subprocess
import sys
import tempfile
from collections import Counter
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, Phase, given, settings
from hypothesis import strategies as st

from stackdr.cli import main
from stackdr.errors import InputError
from stackdr.estimation import BlendEstimator
from stackdr.io import estimator_kwargs, load_config, resolve_settings
from tests import helpers
from tests.helpers import QUICK

# Whole pipeline runs (report figures included) cost about two seconds each: few examples, no
# shrinking. Cheap inputs that fail in validation get more. STACKDR_FUZZ_SCALE=10 (say) runs ten
# times as many examples of each, for a longer hunt outside the suite.
SCALE = int(os.environ.get("STACKDR_FUZZ_SCALE", "1"))
PIPELINE = settings(
    max_examples=10 * SCALE,
    deadline=None,
    derandomize=True,
    database=None,
    phases=(Phase.explicit, Phase.generate),
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture],
)
CHEAP = settings(
    max_examples=120 * SCALE,
    deadline=None,
    derandomize=True,
    database=None,
    suppress_health_check=[HealthCheck.function_scoped_fixture],
)

# A small bootstrap so the bootstrap figures and intervals are exercised too.
FUZZ_CONFIG = QUICK.replace("bootstrap = 10", "bootstrap = 5")
COUNTS: Counter = Counter()
MESSAGES: Counter = Counter()
# "stackdr: error: ..." from the tool, "stackdr estimate: error: ..." from the option parser.
ONE_LINE_ERROR = re.compile(r"^stackdr( [a-z]+)?: error: \S")


@pytest.fixture(scope="module", autouse=True)
def tally():
    """Print what was tried and how it ended once the module is done (visible with -s)."""
    yield
    print("\nfuzz tally:", dict(sorted(COUNTS.items())))
    print("command-line errors seen:", *sorted(MESSAGES.items()), sep="\n  ")


# ----------------------------------------------------------------------------- the oracle


def tree(root: Path) -> set:
    return {p.relative_to(root) for p in root.rglob("*")}


def _no_constant(token: str):
    raise AssertionError(f"results.json holds the non-JSON token {token}")


def run_cli(workspace: Path, args: list, out: Path, label: str) -> int:
    """Run ``stackdr`` in process inside ``workspace`` and check the two allowed outcomes."""
    shutil.rmtree(out, ignore_errors=True)  # examples share the workspace
    before = tree(workspace)
    err = io.StringIO()
    with (
        contextlib.chdir(workspace),
        contextlib.redirect_stderr(err),
        contextlib.redirect_stdout(io.StringIO()),
    ):
        code = main([str(a) for a in args])
    stderr = err.getvalue()
    lines = stderr.splitlines()
    assert "Traceback" not in stderr, stderr
    assert code in (0, 2), stderr
    if code == 2:
        assert len(lines) == 1 and ONE_LINE_ERROR.match(lines[0]), stderr
        assert not (out / "results.json").exists()
    else:
        assert all(line.startswith("stackdr: warning: ") for line in lines), stderr
        text = (out / "results.json").read_text(encoding="utf-8")
        results = json.loads(text, parse_constant=_no_constant)
        assert isinstance(results["estimate"], float) and np.isfinite(results["estimate"])
        assert isinstance(results["se"], float)
    new = {p for p in tree(workspace) - before if out not in (workspace / p).parents}
    new.discard(out.relative_to(workspace))
    assert new == set(), new
    if code == 2:
        MESSAGES[re.sub(r"'[^']*'|\d+(\.\d+)?", "_", lines[0])[:70]] += 1
    COUNTS[f"{label} tried"] += 1
    COUNTS[f"{label} {'ran' if code == 0 else 'clear error'}"] += 1
    return code


@pytest.fixture
def workspace(tmp_path, monkeypatch):
    """A work folder holding the quick config, and a private temporary folder that must stay
    empty."""
    private = tmp_path / "private-tmp"
    private.mkdir()
    monkeypatch.setattr(tempfile, "tempdir", str(private))
    monkeypatch.setenv("TMPDIR", str(private))
    root = tmp_path / "work"
    root.mkdir()
    (root / "quick.toml").write_text(FUZZ_CONFIG)
    yield root
    assert list(private.iterdir()) == []


def estimate_args(data: str, out: str, target: str = "ate", config: str = "quick.toml") -> list:
    """Arguments relative to the working folder."""
    return helpers.estimate_args(Path(), data, out, config=config, target=target)


# ----------------------------------------------------------------------------- random CSVs

JUNK = ["", "NA", "nan", "inf", "-inf", "yes", "1e400", "1,5", " 2 ", "<b>", "$(id)", "\u00e9"]


@st.composite
def csv_texts(draw) -> tuple[bytes, str]:
    """A small CSV: mostly sound data with a chance of each kind of damage (hypothesis starts
    from the first choices, so the sound ones come first)."""
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    n = draw(st.sampled_from([30, 20, 30, 12, 5, 2, 1, 0]))
    names = ["a", "y", "x1", "x2"]
    if draw(st.booleans()):
        names = draw(st.permutations(names))
    if draw(st.integers(0, 7)) == 7:
        names = names[: draw(st.integers(1, 3))]  # a role column may be missing
    if draw(st.integers(0, 7)) == 7:
        names = [*names, draw(st.sampled_from([*names, "<i>x</i>", "x 1", ""]))]
    x = rng.normal(size=(n, 2)) * draw(st.sampled_from([1.0, 1e-6, 1e8]))
    a = rng.binomial(1, 0.5, n)
    columns = {
        "a": a.astype(str) if draw(st.booleans()) else a.astype(float).astype(str),
        "y": (2 * a + x[:, 0] + rng.normal(size=n)).astype(str),
        "x1": x[:, 0].astype(str),
        "x2": x[:, 1].astype(str),
    }
    if draw(st.integers(0, 7)) == 7:
        columns["y"] = np.full(n, "3.0")
    if draw(st.integers(0, 7)) == 7:
        columns["a"] = np.where(a == 1, "yes", "no")
    damaged_cells = draw(st.sampled_from([0, 0, 0, 1, 2, 3])) if n else 0
    for _ in range(damaged_cells):
        col = draw(st.sampled_from(list(columns)))
        columns[col] = columns[col].astype(object)
        columns[col][draw(st.integers(0, n - 1))] = draw(st.sampled_from(JUNK))
    delimiter = draw(st.sampled_from([",", ";", "\t", "|"]))
    quoting = draw(st.sampled_from([csv.QUOTE_MINIMAL, csv.QUOTE_ALL]))
    buffer = io.StringIO()
    writer = csv.writer(buffer, delimiter=delimiter, quoting=quoting, lineterminator="\n")
    writer.writerow(names)
    for i in range(n):
        writer.writerow([columns[c][i] if c in columns else "0" for c in names])
    bom = b"\xef\xbb\xbf" if draw(st.booleans()) else b""
    target = draw(st.sampled_from(["ate", "att", "mean1", "mean0", "cov"]))
    return bom + buffer.getvalue().encode("utf-8"), target


@pytest.mark.slow
@PIPELINE
@given(case=csv_texts())
def test_random_small_csvs(workspace, case):
    content, target = case
    (workspace / "data.csv").write_bytes(content)
    out = workspace / "out"
    run_cli(workspace, estimate_args("data.csv", "out", target), out, "random CSV")


@CHEAP
@given(content=st.binary(max_size=600))
def test_random_bytes_as_data(workspace, content):
    (workspace / "data.csv").write_bytes(content)
    out = workspace / "out"
    code = run_cli(workspace, estimate_args("data.csv", "out"), out, "random bytes as data")
    assert code == 2


# ----------------------------------------------------------------------------- configuration

SETTING_NAMES = [
    "data",
    "treatment",
    "outcome",
    "covariates",
    "target",
    "folds",
    "repeats",
    "bootstrap",
    "bootstrap_kind",
    "blend",
    "criterion",
    "tie_break",
    "tie_break_scale",
    "clip",
    "seed",
    "jobs",
    "level",
    "interval",
    "directions",
    "direction_tolerance",
    "outcome_mode",
    "on_error",
    "foldz",
    "learner",
]
TOML_VALUES = st.one_of(
    st.integers(-(2**63), 2**63 - 1).map(str),
    st.sampled_from(["nan", "inf", "-inf", "0.0", "1e-300", "1e308", "0.5", "-0", "1.0"]),
    st.floats(allow_nan=False, allow_infinity=False).map(repr),
    st.sampled_from(["true", "false", "[]", '["a", 3]', '["x1"]', "{}", '""', '"ate"']),
    st.text(max_size=12).map(json.dumps),
)
SECTIONS = st.sampled_from(
    [
        "[settings]",
        "[propensity.logistic]",
        "[propensity.f]",
        "[outcome.linear]",
        "[outcome.k]",
        "[propensity]",
        "[extras]",
        "[[settings]]",
        "",
    ]
)
LEARNER_LINES = st.sampled_from(
    [
        'learner = "forest-classifier"',
        'learner = "knn-regressor"',
        'learner = "no-such-learner"',
        "n_estimators = 0",
        "n_neighbors = -3",
        'max_features = "banana"',
        "C = -1.0",
        "learner = 3",
    ]
)


@st.composite
def toml_texts(draw) -> str:
    lines = []
    for _ in range(draw(st.integers(1, 4))):
        lines.append(draw(SECTIONS))
        for _ in range(draw(st.integers(0, 4))):
            if draw(st.booleans()):
                lines.append(draw(LEARNER_LINES))
            else:
                lines.append(f"{draw(st.sampled_from(SETTING_NAMES))} = {draw(TOML_VALUES)}")
    return "\n".join(lines) + "\n"


def load_and_check(path: Path) -> str:
    """Load a configuration and check its settings the way a run would, without fitting."""
    try:
        config = load_config(path)
        values, _ = resolve_settings({}, config)
        BlendEstimator(**{**estimator_kwargs(values), "target": "ate"})._validate_params()
        for side in ("propensity", "outcome"):
            config.library(side)
    except InputError as exc:
        assert str(exc).strip()
        return "clear error"
    return "accepted"


@CHEAP
@given(text=toml_texts())
def test_config_loader_structured(tmp_path, text):
    path = tmp_path / "run.toml"
    path.write_text(text, encoding="utf-8")
    outcome = load_and_check(path)
    COUNTS["structured config tried"] += 1
    COUNTS[f"structured config {outcome}"] += 1


@CHEAP
@given(content=st.binary(max_size=400))
def test_config_loader_random_bytes(tmp_path, content):
    path = tmp_path / "run.toml"
    path.write_bytes(content)
    outcome = load_and_check(path)
    COUNTS["config bytes tried"] += 1
    COUNTS[f"config bytes {outcome}"] += 1


@settings(CHEAP, max_examples=30 * SCALE)
@given(text=toml_texts())
def test_cli_with_random_configs(workspace, text):
    # Configurations the loader accepts could start long default runs; those are covered by the
    # loader tests above, so only rejected ones go through the command line here.
    (workspace / "run.toml").write_text(text, encoding="utf-8")
    if load_and_check(workspace / "run.toml") == "accepted":
        return
    (workspace / "data.csv").write_text("a,y,x1\n1,2.0,0.5\n0,1.0,0.1\n")
    out = workspace / "out"
    code = run_cli(workspace, estimate_args("data.csv", "out", config="run.toml"), out, "config")
    assert code == 2


# ----------------------------------------------------------------------------- random flags

VALUE_FLAGS = [
    "--folds",
    "--repeats",
    "--bootstrap",
    "--bootstrap-kind",
    "--blend",
    "--criterion",
    "--tie-break-scale",
    "--clip",
    "--seed",
    "--covariates",
    "--treatment",
    "--target",
]
FLAG_VALUES = ["2", "0.5", "logit", "minimax", "bayesian", "x1", "a", "y", "ate", "cov", "refit"]
FLAG_VALUES += ["-1", "0", "1", "nan", "inf", "1e9", "", "--", "\u00e9", "<b>"]


@pytest.mark.slow
@settings(PIPELINE, max_examples=8 * SCALE)
@given(
    pairs=st.lists(
        st.tuples(st.sampled_from(VALUE_FLAGS), st.sampled_from(FLAG_VALUES)), max_size=3
    ),
    loose=st.lists(st.sampled_from(["--no-tie-break", "--overwrite", *VALUE_FLAGS, *FLAG_VALUES])),
)
def test_random_flags(workspace, pairs, loose):
    extra = [token for pair in pairs for token in pair] + loose[:1]
    rng = np.random.default_rng(5)
    rows = ["a,y,x1,x2"] + [
        f"{int(a)},{2 * a + x1 + rng.normal():.4f},{x1:.4f},{rng.normal():.4f}"
        for a, x1 in zip(rng.binomial(1, 0.5, 40), rng.normal(size=40))
    ]
    (workspace / "data.csv").write_text("\n".join(rows) + "\n")
    out = workspace / "out"
    run_cli(workspace, [*estimate_args("data.csv", "out"), *extra], out, "random flags")


# ----------------------------------------------------------------------------- damaged results


@pytest.fixture(scope="module")
def saved_results(tmp_path_factory) -> dict:
    """A genuine results.json (small run) to damage."""
    root = tmp_path_factory.mktemp("saved")
    (root / "quick.toml").write_text(FUZZ_CONFIG)
    (root / "data.csv").write_text(
        "a,y,x1\n" + "".join(f"{i % 2},{(i * 7) % 5 + i % 2},{(i * 3) % 7}\n" for i in range(30))
    )
    with contextlib.redirect_stdout(io.StringIO()), contextlib.redirect_stderr(io.StringIO()):
        assert main([str(a) for a in helpers.estimate_args(root, "data.csv", "out")]) == 0
    return json.loads((root / "out" / "results.json").read_text(encoding="utf-8"))


def _places(value, path=()) -> list:
    """Paths to every dict entry and the first items of every list."""
    found = [path] if path else []
    if isinstance(value, dict):
        for key, item in value.items():
            found += _places(item, (*path, key))
    elif isinstance(value, list):
        for index, item in enumerate(value[:2]):
            found += _places(item, (*path, index))
    return found


DAMAGE = [None, "x", -1, 0, 1e308, [], {}, True, [1, 2], "NaN", 3.5, {"a": 1}]


@pytest.mark.slow
@settings(PIPELINE, max_examples=16 * SCALE)
@given(
    edits=st.lists(
        st.tuples(st.integers(0, 10**6), st.integers(-1, len(DAMAGE) - 1)), min_size=1, max_size=3
    )
)
def test_report_from_damaged_results(workspace, saved_results, edits):
    results = json.loads(json.dumps(saved_results))
    for where, what in edits:
        places = _places(results)
        *parents, last = places[where % len(places)]
        holder = results
        for key in parents:
            holder = holder[key]
        if what < 0 and isinstance(holder, dict):
            del holder[last]
        else:
            holder[last] = copy.deepcopy(DAMAGE[what])
    (workspace / "results.json").write_text(json.dumps(results))
    out = workspace / "rebuilt"
    shutil.rmtree(out, ignore_errors=True)
    before = tree(workspace)
    err = io.StringIO()
    with contextlib.redirect_stderr(err), contextlib.redirect_stdout(io.StringIO()):
        code = main(["report", str(workspace / "results.json"), "--out", str(out)])
    lines = err.getvalue().splitlines()
    assert code in (0, 2) and "Traceback" not in err.getvalue(), err.getvalue()
    if code == 2:
        assert len(lines) == 1 and ONE_LINE_ERROR.match(lines[0]), err.getvalue()
        MESSAGES[re.sub(r"'[^']*'|\d+(\.\d+)?", "_", lines[0])[:70]] += 1
    assert {p for p in tree(workspace) - before if not str(p).startswith("rebuilt")} == set()
    COUNTS["damaged results tried"] += 1
    COUNTS[f"damaged results {'ran' if code == 0 else 'clear error'}"] += 1


# ----------------------------------------------------------------------------- as processes


@pytest.mark.slow
def test_garbage_as_real_processes(tmp_path):
    """Two damaged inputs as the shell sees them: exit status 2, one stderr line, and nothing
    left in the process's temporary folder."""
    private = tmp_path / "tmp"
    private.mkdir()
    rng = np.random.default_rng(17)
    (tmp_path / "noise.csv").write_bytes(rng.integers(0, 256, 2000, dtype=np.uint8).tobytes())
    (tmp_path / "noise.toml").write_bytes(b"[settings]\nfolds = \xff\xfe\n")
    (tmp_path / "ok.csv").write_text("a,y,x1\n1,2.0,0.5\n0,1.0,0.1\n")
    env = {**os.environ, "TMPDIR": str(private)}
    commands = {
        "noise data": estimate_args("noise.csv", "out1"),
        "noise config": estimate_args("ok.csv", "out2", config="noise.toml"),
    }
    procs = {
        name: subprocess.Popen(
            [sys.executable, "-m", "stackdr.cli", *args],
            cwd=tmp_path,
            env=env,
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
            text=True,
        )
        for name, args in commands.items()
    }
    for name, proc in procs.items():
        stdout, stderr = proc.communicate(timeout=120)
        assert proc.returncode == 2, (name, stderr)
        lines = stderr.splitlines()
        assert len(lines) == 1 and ONE_LINE_ERROR.match(lines[0]), (name, stderr)
        assert stdout == ""
        COUNTS["processes tried"] += 1
        COUNTS["processes clear error"] += 1
    assert list(private.iterdir()) == []
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted(
        ["tmp", "noise.csv", "noise.toml", "ok.csv"]
    )
