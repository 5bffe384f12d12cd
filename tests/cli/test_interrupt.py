"""Interruption and output-folder safety of ``stackdr estimate``, as real processes.

Ctrl-C (SIGINT) while learners are fitting or while the bootstrap runs must end the process
with exit code 130 and one line, leave no ``results.json`` (nor temporary files) and no worker
processes behind. The output folder is created when missing, and an existing ``results.json``
is only replaced with ``--overwrite``.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import threading
import time
import uuid
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from stackdr.cli import main
from stackdr.io import read_results_json
from tests.helpers import QUICK, QUICK_NO_BOOTSTRAP, confounded_data, estimate_args

# Learners slow enough that a run is still fitting when the signal arrives.
SLOW = """
[settings]
folds = 2
bootstrap = 0

[propensity.forest]
learner = "forest-classifier"
n_estimators = 4000

[outcome.forest]
learner = "forest-regressor"
n_estimators = 4000
"""
# Fast learners but a bootstrap long enough to be interrupted.
LONG_BOOTSTRAP = QUICK.replace("bootstrap = 10", "bootstrap = 100000").replace(
    "progress = false", "progress = true"
)


@pytest.fixture(scope="module")
def root(tmp_path_factory) -> Path:
    root = tmp_path_factory.mktemp("interrupt")
    X, A, Y, _ = confounded_data(np.random.default_rng(8), 150)
    frame = pd.DataFrame(X, columns=["x1", "x2", "x3"]).assign(a=A, y=Y)
    frame.to_csv(root / "data.csv", index=False)
    (root / "slow.toml").write_text(SLOW)
    (root / "long.toml").write_text(LONG_BOOTSTRAP)
    (root / "quick.toml").write_text(QUICK_NO_BOOTSTRAP)
    return root


def command(root: Path, config: str, out: Path, *extra) -> list:
    arguments = estimate_args(root, "data.csv", out, config=config)
    return [sys.executable, "-m", "stackdr.cli", *map(str, arguments), *map(str, extra)]


def processes_with(marker: str) -> list[int]:
    """Live processes whose environment holds ``marker`` (the run and any worker it started)."""
    found = []
    for entry in Path("/proc").iterdir():
        if entry.name.isdigit():
            try:
                if marker.encode() in (entry / "environ").read_bytes():
                    found.append(int(entry.name))
            except OSError:
                continue
    return found


def interrupt_when(args: list, cue: str, marker: str) -> tuple[int, str]:
    """Start ``args``, send SIGINT shortly after ``cue`` appears on stderr, return (code,
    stderr)."""
    env = {**os.environ, "STACKDR_TEST_MARKER": marker}
    # A shell without job control starts background jobs with SIGINT ignored, and the child
    # would inherit that; restore the default so the run sees the Ctrl-C a terminal would send.
    proc = subprocess.Popen(
        args,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.PIPE,
        text=True,
        env=env,
        preexec_fn=lambda: signal.signal(signal.SIGINT, signal.SIG_DFL),
    )
    seen, chunks = threading.Event(), []

    def read() -> None:
        for char in iter(lambda: proc.stderr.read(1), ""):
            chunks.append(char)
            if not seen.is_set() and cue in "".join(chunks[-200:]):
                seen.set()

    reader = threading.Thread(target=read, daemon=True)
    reader.start()
    assert seen.wait(120), "".join(chunks)
    time.sleep(0.5)  # well inside the work, not at its first instruction
    assert proc.poll() is None, "the run ended before it could be interrupted"
    proc.send_signal(signal.SIGINT)
    code = proc.wait(timeout=60)
    reader.join(timeout=10)
    return code, "".join(chunks)


def assert_clean_interrupt(code: int, stderr: str, out: Path, marker: str) -> None:
    assert code == 130, stderr
    assert "Traceback" not in stderr
    # Progress bars redraw with carriage returns; the last line is the tool's one message.
    last = stderr.replace("\r", "\n").strip().splitlines()[-1]
    assert last == "stackdr: interrupted (files are written whole or not at all)"
    assert not (out / "results.json").exists()
    leftovers = list(out.rglob("*.tmp")) if out.exists() else []
    assert leftovers == []
    deadline = time.monotonic() + 20
    while processes_with(marker) and time.monotonic() < deadline:
        time.sleep(0.2)
    assert processes_with(marker) == [], "worker processes outlived the interrupted run"


@pytest.mark.slow
@pytest.mark.parametrize("jobs", [1, 2])
def test_ctrl_c_while_fitting(root, jobs):
    out = root / f"fitting-{jobs}"
    marker = uuid.uuid4().hex
    code, stderr = interrupt_when(
        command(root, "slow.toml", out, "--jobs", jobs), "learner fits", marker
    )
    assert_clean_interrupt(code, stderr, out, marker)


@pytest.mark.slow
def test_ctrl_c_during_the_bootstrap(root):
    out = root / "bootstrap"
    marker = uuid.uuid4().hex
    code, stderr = interrupt_when(command(root, "long.toml", out), "bootstrap:", marker)
    assert_clean_interrupt(code, stderr, out, marker)


def test_missing_output_folder_is_created_and_results_are_kept(root, capsys):
    # In process: the same main() the console script calls, without three interpreter starts.
    out = root / "new" / "nested" / "run"
    args = [str(a) for a in command(root, "quick.toml", out)[3:]]
    assert main(args) == 0
    saved = (out / "results.json").read_bytes()
    assert read_results_json(out / "results.json")["n"] == 150
    capsys.readouterr()

    assert main([*args, "--seed", "3"]) == 2
    lines = capsys.readouterr().err.strip().splitlines()
    assert len(lines) == 1 and "already exists; pass --overwrite to replace it" in lines[0]
    assert (out / "results.json").read_bytes() == saved

    assert main([*args, "--seed", "3", "--overwrite"]) == 0
    assert read_results_json(out / "results.json")["settings"]["seed"] == 3


def test_child_process_warnings_are_filtered(monkeypatch, capsys):
    # The pool's resource tracker may warn after an interrupt that a folder is already gone;
    # the filter the run exports to its child processes keeps the closing line last.
    monkeypatch.setenv("PYTHONWARNINGS", "default")
    assert main(["learners"]) == 0
    assert os.environ["PYTHONWARNINGS"] == "default,ignore:resource_tracker:UserWarning"
    probe = subprocess.run(
        [sys.executable, "-c", "import warnings; warnings.warn('resource_tracker: gone')"],
        capture_output=True,
        text=True,
        env=dict(os.environ),
    )
    assert probe.stderr == ""
