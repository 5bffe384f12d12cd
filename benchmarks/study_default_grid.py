"""The default weighting against prediction-loss stacking (PLS) on a wide grid of designs.

Every cell runs the estimator at its defaults through the study runner (one study file per
library and bootstrap setting, so a stopped run resumes); the target-aimed row and the PLS row
come from the same fit of every replicate, so their squared errors are paired. Cells:

- Kang & Schafer (2007) transformed covariates, mean and ATE variants, n = 200 and 1000, with the
  parametric-only libraries (every learner misspecified) and the default libraries;
- Lunceford & Davidian (2004), the sparse design, and three designs of our own
  (``smooth-consistent``, ``poor-overlap``, ``nsw-semi-synthetic``) with the default libraries.

The parametric ATE cell at n = 1000 also runs the reweighting bootstrap (B = 200), for the
ratio of bootstrap SE to Monte Carlo SD and the interval coverage at the default.

Writes ``results/study_default_grid.md`` and ``.csv`` (paired squared-error differences with
Monte Carlo SEs, RMSE ratios, bias and SD per estimator). Usage::

    python benchmarks/study_default_grid.py --seed 2027 --jobs 2 [--reps-scale 0.5] [--report]
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd

from stackdr.reporting import markdown_table
from stackdr.search import MAIN, PLS, SMOOTHED, UNTESTED
from stackdr.studies import (
    StudyCodeError,
    make_replicate,
    paired_differences,
    read_results,
    read_study_record,
    run_study,
    summarise_study,
)

RESULTS = Path(__file__).resolve().parent / "results"
# (label, library, bootstrap, [(design, n, replicates), ...])
CELLS = [
    (
        "parametric",
        "parametric",
        0,
        [
            ("kang-schafer-ate-transformed", 200, 300),
            ("kang-schafer-transformed", 200, 300),
            ("kang-schafer-transformed", 1000, 300),
        ],
    ),
    ("parametric-boot", "parametric", 200, [("kang-schafer-ate-transformed", 1000, 200)]),
    (
        "default",
        "default",
        0,
        [
            ("kang-schafer-ate-transformed", 200, 200),
            ("kang-schafer-ate-transformed", 1000, 100),
            ("poor-overlap", 1000, 100),
            ("smooth-consistent", 500, 200),
            ("nsw-semi-synthetic", 1000, 100),
            ("lunceford-davidian", 1000, 100),
            ("kang-schafer-transformed", 200, 200),
            ("kang-schafer-transformed", 1000, 100),
            ("sparse", 1000, 100),
        ],
    ),
]


def path_for(label: str, design: str, n: int, seed: int) -> Path:
    """One study file per cell (a study file fixes its designs and sizes)."""
    return RESULTS / f"grid_{label}_{design}_n{n}_seed{seed}.sqlite"


def run(seed: int, jobs: int, scale: float) -> None:
    for label, library, bootstrap, cells in CELLS:
        replicate = make_replicate(library, bootstrap=bootstrap)
        for design, n, reps in cells:
            started = time.perf_counter()
            try:
                done = run_study(
                    path_for(label, design, n, seed),
                    design,
                    n,
                    max(2, int(round(reps * scale))),
                    replicate,
                    seed=seed,
                    jobs=jobs,
                    resume=True,
                    settings={"library": library, "bootstrap": bootstrap},
                    progress=False,
                )
            except StudyCodeError:
                # A cell finished by other code stays as it is (one code per cell; the report
                # lists every fingerprint); extending it would mix code within the cell.
                print(f"{label} {design} n={n}: kept as stored (other code)", flush=True)
                continue
            print(
                f"[{time.strftime('%H:%M:%S')}] {label} {design} n={n}: {done.completed} run, "
                f"{done.skipped} stored, {time.perf_counter() - started:.0f} s",
                flush=True,
            )


def _fmt(value: float, se: float) -> str:
    star = "*" if abs(value) > 2 * se else ""
    return f"{value:+.3g} ({se:.2g}){star}"


def _kept_share(results: pd.DataFrame, design: str, n: int) -> float:
    """Share of replicates whose headline is not PLS's estimate (the contrast test kept the
    searched weights, and they differ from PLS's)."""
    cell = results[(results["design"] == design) & (results["n"] == n)]
    wide = cell.pivot_table(index="rep", columns="estimator", values="estimate")
    scale = np.maximum(1.0, np.abs(wide[PLS]))
    return float(np.mean(np.abs(wide[MAIN] - wide[PLS]) > 1e-9 * scale))


def _paired_by_cell(path: Path, name: str) -> dict:
    """Row ``name`` against PLS, by (design, n); empty for a study file from before that row
    existed (the smoothed selector, the contrast test)."""
    try:
        paired = paired_differences(path, name, PLS)
    except (KeyError, ValueError):
        return {}
    return {(r["design"], r["n"]): r for _, r in paired.iterrows()}


def report(seed: int) -> pd.DataFrame:
    rows = []
    for label, library, bootstrap, cells in CELLS:
        for design, n, _ in cells:
            path = path_for(label, design, n, seed)
            if not path.exists():
                continue
            summary = summarise_study(path)
            paired = paired_differences(path, MAIN, PLS)
            smoothed = _paired_by_cell(path, SMOOTHED)
            untested = _paired_by_cell(path, UNTESTED)
            results = read_results(path)
            for _, p in paired.iterrows():
                cell = summary[(summary["design"] == p["design"]) & (summary["n"] == p["n"])]
                main = cell[cell["estimator"] == MAIN].iloc[0]
                pls = cell[cell["estimator"] == PLS].iloc[0]
                row = {
                    "library": library,
                    "design": p["design"],
                    "n": int(p["n"]),
                    "pairs": int(p["pairs"]),
                    "RMSE default": round(p["rmse_a"], 4),
                    "RMSE PLS": round(p["rmse_b"], 4),
                    "ratio": round(p["rmse_a"] / p["rmse_b"], 3),
                    "sq. error diff (MC SE)": _fmt(p["sq_error_diff"], p["sq_error_diff_mcse"]),
                    "bias default": round(main["bias"], 4),
                    "SD default": round(main["sd"], 4),
                    "bias PLS": round(pls["bias"], 4),
                    "SD PLS": round(pls["sd"], 4),
                }
                # The smoothed selector (pair weights proportional to exp(-tau x risk / scale))
                # against the same PLS replicates, where the cell's study stored it.
                smooth = smoothed.get((p["design"], p["n"]))
                if smooth is not None:
                    row["RMSE smoothed"] = round(smooth["rmse_a"], 4)
                    row["smoothed - PLS (MC SE)"] = _fmt(
                        smooth["sq_error_diff"], smooth["sq_error_diff_mcse"]
                    )
                # The search's own weights before the contrast test, and the share of data
                # sets where the test kept them (the headline differs from PLS).
                plain = untested.get((p["design"], p["n"]))
                if plain is not None:
                    row["no test - PLS (MC SE)"] = _fmt(
                        plain["sq_error_diff"], plain["sq_error_diff_mcse"]
                    )
                    row["ratio no test"] = round(plain["rmse_a"] / plain["rmse_b"], 3)
                    row["test kept search"] = round(_kept_share(results, p["design"], p["n"]), 3)
                if bootstrap:
                    mine = results[
                        (results["estimator"] == MAIN)
                        & (results["design"] == p["design"])
                        & (results["n"] == p["n"])
                    ]
                    row["boot SE / MC SD"] = round(
                        float(np.nanmedian(mine["bootstrap_se"])) / main["sd"], 3
                    )
                    coverage = f"{main['coverage']:.3f} ({main['coverage_mcse']:.3f})"
                    row["coverage (MC SE)"] = coverage
                rows.append(row)
    frame = pd.DataFrame(rows)
    codes = sorted(
        {
            read_study_record(path)["code"]
            for label, _, _, cells in CELLS
            for design, n, _ in cells
            if (path := path_for(label, design, n, seed)).exists()
        }
    )
    RESULTS.mkdir(exist_ok=True)
    frame.to_csv(RESULTS / f"study_default_grid_seed{seed}.csv", index=False)
    head = (
        f"# Default weighting vs prediction-loss stacking, study seed {seed}\n\n"
        f"Code fingerprint of the package that ran the replicates: {', '.join(codes)} (version "
        "and digest of the package sources, recorded in every study file). Paired squared-error "
        "difference = mean over replicates of (default error^2 - PLS error^2), MC SE = SD of "
        "the differences / sqrt(pairs); * beyond 2 MC SE; negative favours the default. "
        "`no test`: the search's own weights before the contrast test (the row "
        "'target-aimed, no contrast test', same fits); `test kept search`: share of data sets "
        "whose headline is not PLS's estimate.\n\n"
    )
    (RESULTS / f"study_default_grid_seed{seed}.md").write_text(
        head + markdown_table(frame.astype(object).where(frame.notna(), "").astype(str)) + "\n"
    )
    print(frame.to_string(index=False))
    return frame


def main() -> None:
    global RESULTS
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seed", type=int, default=2027)
    parser.add_argument("--jobs", type=int, default=1)
    parser.add_argument("--reps-scale", type=float, default=1.0)
    parser.add_argument("--report", action="store_true", help="only summarise stored results")
    parser.add_argument(
        "--folder",
        type=Path,
        default=RESULTS,
        help="where the study files and the tables go (a fresh folder runs the whole grid at "
        "the current code)",
    )
    args = parser.parse_args()
    RESULTS = args.folder
    RESULTS.mkdir(parents=True, exist_ok=True)
    if not args.report:
        run(args.seed, args.jobs, args.reps_scale)
    report(args.seed)


if __name__ == "__main__":
    sys.exit(main())
