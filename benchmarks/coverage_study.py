"""Coverage of the reweighting-bootstrap and Wald intervals with the default libraries.

Designs: Lunceford & Davidian (2004), strong association (true ATE 2), and Kang & Schafer (2007)
with the correct covariates Z1..Z4 (mean of an outcome missing at random, true mean 210);
n = 1000, 200 replicates each, reweighting bootstrap B = 200. For every estimator: empirical
coverage and mean width of the 95% percentile bootstrap interval and of the Wald interval
(influence-function SE), with Monte Carlo SEs. Goal: coverage 0.93-0.97 for target-aimed and
prediction-loss stacking.

``--wider`` runs the other built-in designs whose default libraries hold a consistent learner
instead (``smooth-consistent``: smooth nuisances every flexible learner can fit, ATE 2; ``sparse``:
a few active covariates, ATE 1; ``nsw-semi-synthetic``: NSW covariates with a simulated effect,
ATE 1.5), same n, B and seed, in their own study file and tables (``coverage_wider.*``).

Runs in stages of replicates (resumable study file ``results/coverage.sqlite``, or
``coverage_wider.sqlite``); the tables are rewritten after every stage.

Usage: .venv/bin/python benchmarks/coverage_study.py [--wider] [--stages 25 50 100 200] [--jobs 2]
       [--report]
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import time
from pathlib import Path

import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402

from stackdr.reporting import (  # noqa: E402
    ESTIMATOR_ORDER,
    markdown_table,
    text_table,
    with_mcse,
)  # noqa: E402
from stackdr.studies import (  # noqa: E402
    make_replicate,  # noqa: E402
    read_results,
    run_study,
)

RESULTS = Path(__file__).resolve().parent / "results"
# design set -> (study file stem, output stem, designs)
SETS = {
    "main": ("coverage", "coverage_study", ["lunceford-davidian", "kang-schafer"]),
    "wider": (
        "coverage_wider",
        "coverage_wider",
        ["smooth-consistent", "sparse", "nsw-semi-synthetic"],
    ),
}
N = 1000
BOOTSTRAP = 200


def study_file(which: str) -> Path:
    """The resumable study file of a design set."""
    return RESULTS / f"{SETS[which][0]}.sqlite"


FOCUS = ("target-aimed stacking", "prediction-loss stacking")


def coverage(frame: pd.DataFrame, low: str, high: str) -> dict:
    """Coverage and mean width of the interval [low, high], each with its MC SE."""
    ok = frame[np.isfinite(frame[low]) & np.isfinite(frame[high])]
    m = len(ok)
    hit = ((ok[low] <= ok["truth"]) & (ok["truth"] <= ok[high])).to_numpy()
    width = (ok[high] - ok[low]).to_numpy()
    p = float(hit.mean()) if m else math.nan
    return {
        "m": m,
        "coverage": p,
        "coverage_mcse": math.sqrt(p * (1 - p) / m) if m else math.nan,
        "width": float(width.mean()) if m else math.nan,
        "width_mcse": float(width.std(ddof=1) / math.sqrt(m)) if m > 1 else math.nan,
    }


def report(which: str = "main") -> None:
    _, out, designs = SETS[which]
    path = study_file(which)
    if not path.exists():
        print("no results yet")
        return
    results = read_results(path)
    codes = sorted(set(results["code"].fillna("not recorded")))
    rows = []
    for (design, estimator), group in results.groupby(["design", "estimator"], sort=False):
        boot = coverage(group, "low", "high")
        wald = coverage(group, "wald_low", "wald_high")
        error = (group["estimate"] - group["truth"]).to_numpy()
        rows.append(
            {
                "design": design,
                "estimator": estimator,
                "reps": boot["m"],
                "bias": float(np.mean(error)),
                "sd": float(np.std(group["estimate"], ddof=1)) if len(group) > 1 else math.nan,
                "mean_wald_se": float(group["se"].mean()),
                "mean_bootstrap_se": float(group["bootstrap_se"].mean())
                if "bootstrap_se" in group
                else math.nan,
                **{f"bootstrap_{k}": v for k, v in boot.items() if k != "m"},
                **{f"wald_{k}": v for k, v in wald.items() if k != "m"},
            }
        )
    table = pd.DataFrame(rows)
    rank = {name: i for i, name in enumerate(ESTIMATOR_ORDER)}
    table = table.sort_values(
        ["design", "estimator"], key=lambda c: c.map(rank) if c.name == "estimator" else c
    ).reset_index(drop=True)
    table.to_csv(RESULTS / f"{out}.csv", index=False)
    payload = {"n": N, "bootstrap": BOOTSTRAP, "designs": designs, "rows": rows}
    (RESULTS / f"{out}.json").write_text(json.dumps(payload, indent=2))
    shown = pd.DataFrame(
        {
            "design": table["design"],
            "estimator": table["estimator"],
            "reps": table["reps"],
            "bias": table["bias"].map(lambda v: f"{v:.3g}"),
            "SD": table["sd"].map(lambda v: f"{v:.3g}"),
            "mean Wald SE": table["mean_wald_se"].map(lambda v: f"{v:.3g}"),
            "mean boot SE": table["mean_bootstrap_se"].map(lambda v: f"{v:.3g}"),
            "boot coverage": [
                with_mcse(v, s, 3)
                for v, s in zip(table["bootstrap_coverage"], table["bootstrap_coverage_mcse"])
            ],
            "boot width": [
                with_mcse(v, s, 3)
                for v, s in zip(table["bootstrap_width"], table["bootstrap_width_mcse"])
            ],
            "Wald coverage": [
                with_mcse(v, s, 3)
                for v, s in zip(table["wald_coverage"], table["wald_coverage_mcse"])
            ],
            "Wald width": [
                with_mcse(v, s, 3) for v, s in zip(table["wald_width"], table["wald_width_mcse"])
            ],
        }
    )
    focus = shown[shown["estimator"].isin(FOCUS)]
    text = [
        f"# Interval coverage, default libraries, n = {N}: {', '.join(designs)}",
        "",
        f"Written {time.strftime('%Y-%m-%d %H:%M')} by benchmarks/coverage_study.py. "
        f"95% intervals: reweighting bootstrap (B = {BOOTSTRAP}, percentile) and Wald "
        "(influence-function SE). Monte Carlo SEs in parentheses. Goal 0.93-0.97.",
        "",
        f"Code that ran the replicates: {', '.join(codes)}."
        + (
            " A file without a recorded code was run at git commit 5957cf6, just before study "
            "files began to record it."
            if "not recorded" in codes
            else ""
        ),
        "",
        "## Target-aimed and prediction-loss stacking",
        "",
        markdown_table(focus),
        "",
        "## Every estimator (the oracle pair has only a Wald interval: both columns show it)",
        "",
        markdown_table(shown),
        "",
    ]
    (RESULTS / f"{out}.md").write_text("\n".join(text))
    print(text_table(focus))
    print(f"wrote {RESULTS / out}.md, .csv and .json")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--stages", type=int, nargs="+", default=[25, 50, 100, 200])
    parser.add_argument("--report", action="store_true", help="only rewrite the tables")
    parser.add_argument("--jobs", type=int, default=1, help="replicates in parallel")
    parser.add_argument(
        "--wider", action="store_true", help="the other designs with a consistent learner"
    )
    args = parser.parse_args()
    which = "wider" if args.wider else "main"
    RESULTS.mkdir(parents=True, exist_ok=True)
    if not args.report:
        replicate = make_replicate("default", bootstrap=BOOTSTRAP)
        for reps in args.stages:
            run = run_study(
                study_file(which),
                SETS[which][2],
                [N],
                reps,
                replicate,
                seed=2004,
                jobs=args.jobs,
                resume=True,
                settings={"library": "default", "bootstrap": BOOTSTRAP},
                progress=False,
            )
            print(
                f"[{time.strftime('%H:%M:%S')}] reps {reps}: {run.completed} run, "
                f"{run.skipped} stored, {run.seconds:.0f} s",
                flush=True,
            )
            report(which)
    report(which)


if __name__ == "__main__":
    sys.exit(main())
