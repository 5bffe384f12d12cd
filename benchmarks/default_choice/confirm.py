"""Confirmation run (issue 10): the screening finalists on a fresh study seed.

The finalists were fixed on the screening seed 2007 (screen_summary.md) before seed 2027 was
drawn. This module only runs the harness of screen.py / screen_extra.py, unchanged in its
candidate definitions, for the finalists (``--candidates``) on study seed 2027 (``--seed``;
cache2027/, results2027/), and writes ``confirm_summary.md``.

Usage::

    . ./env.sh
    $PY screen.py --seed 2027 --candidates riesz_c0.5,prob_c0.25,plsvertex_c0.5,plsvertex_c1,oracle \
        --cell ksate_n200_param --reps 300 --minutes 3
    $PY confirm.py            # summary only
"""

from __future__ import annotations

import sys
import time

import numpy as np
import pandas as pd

import screen
from stackdr.estimator import MAIN, PLS

CONFIRM_SEED = 2027
FINALISTS = ["riesz_c0.5", "prob_c0.25", "plsvertex_c0.5", "plsvertex_c1", "oracle"]

SHOWN = [
    ("riesz_c0.5", PLS, "PLS (prediction-loss stacking)"),
    ("riesz_c0.5", MAIN, "1 riesz c=0.5 (today's default)"),
    ("prob_c0.25", MAIN, "2 probability c=0.25"),
    ("plsvertex_c0.5", MAIN, "6'' riesz + PLS propensity column, c=0.5"),
    ("plsvertex_c1", MAIN, "6'' riesz + PLS propensity column, c=1"),
    ("oracle", "oracle pair", "  oracle pair (true nuisances)"),
]

# Cells in the brief's priority order, with the replicate targets of the brief.
PLAN = [
    ("ksate_n200_param", 300),
    ("ksate_n1000_param", 300),
    ("ksmean_n200_param", 300),
    ("ksmean_n1000_param", 300),
    ("ksate_n200_default", 200),
    ("ksate_n1000_default", 200),
    ("smooth_n500_default", 100),
    ("overlap_n1000_default", 100),
    ("nsw_n1000_default", 100),
    ("ld_n1000_default", 60),
    ("sparse_n1000_default", 60),
]


def tables_for(seed: int) -> dict:
    screen.configure(seed)
    saved = screen.SHOWN
    screen.SHOWN = SHOWN
    try:
        return {
            c: screen.cell_summary(c) for c, _ in PLAN if screen.csv_path(c).exists()
        }
    finally:
        screen.SHOWN = saved


def overview(tables: dict, title: str) -> list[str]:
    cells = list(tables)
    labels = [lab for cand, name, lab in SHOWN if not (cand == "riesz_c0.5" and name == PLS)]
    out = [title, ""]
    for group in (cells[:6], cells[6:]):
        if not group:
            continue
        header = ["setting"] + [f"{screen.SHORT[c]} (R={tables[c][1]['reps']})" for c in group]
        out += ["| " + " | ".join(header) + " |", "|" + "---|" * len(header)]
        for lab in labels:
            row = [lab]
            for c in group:
                t = tables[c][0].set_index("setting")
                if lab in t.index:
                    r = t.loc[lab]
                    row.append(f"{r['ratio to PLS']}; {r['paired sq-err diff (MC SE)']}")
                else:
                    row.append("")
            out.append("| " + " | ".join(row) + " |")
        out.append("")
    return out


def paired_frames(seed: int, cell: str) -> pd.DataFrame | None:
    """Per-replicate errors, one column per finalist row (PLS, candidates' target-aimed rows)."""
    screen.configure(seed)
    path = screen.csv_path(cell)
    if not path.exists():
        return None
    df = pd.read_csv(path)
    for suffix in ("_extra",):
        extra = screen.RESULTS / f"{cell}{suffix}.csv"
        if extra.exists():
            df = pd.concat([df, pd.read_csv(extra)], ignore_index=True)
    df["err"] = df["estimate"] - df["truth"]
    cols = {}
    for cand, name, label in SHOWN[:-1]:
        sub = df[(df.candidate == cand) & (df.estimator == name)].set_index("rep")["err"]
        cols["PLS" if name == PLS else cand] = sub
    return pd.DataFrame(cols).dropna()


def _mean_se(x: pd.Series) -> tuple[float, float, int]:
    return float(x.mean()), float(x.std(ddof=1) / np.sqrt(len(x))), len(x)


def _fmt(m: float, se: float) -> str:
    return f"{m:+.3g} ({se:.2g}){'*' if abs(m) > 2 * se else ''}"


def supplement_lines() -> list[str]:
    """Secondary evidence (not the confirmation criterion): (a) the paired mean estimate shift
    candidate minus PLS, which shows whether a candidate moves the estimate systematically; (b)
    the paired squared-error difference with the five largest paired differences dropped; (c)
    the two seeds pooled (independent replicate sets; R-weighted mean, SE combined)."""
    cands = [c for c, name, _ in SHOWN[1:-1]]
    out = [
        "## Supplement (secondary; the confirmation criterion is the seed-2027 table above)",
        "",
        "(a) paired mean estimate shift, candidate minus PLS (MC SE); (b) paired sq-err diff "
        "without the 5 largest paired differences; (c) paired sq-err diff pooled over seeds "
        "2007 + 2027 (R-weighted mean of the two seeds' means, SE = sqrt(sum R_s^2 SE_s^2) / "
        "sum R_s). Dropping the largest differences is one-sided and so favours the "
        "candidate; (b) only tells whether a positive (worse) mean depends on a few "
        "replicates. It is not an estimate of the paired difference.",
        "",
    ]
    header = ["cell", "candidate", "(a) shift, 2027", "(a) shift, 2007", "(b) 2027 w/o top 5",
              "(c) pooled sq-err diff (R)"]
    out += ["| " + " | ".join(header) + " |", "|" + "---|" * len(header)]
    for cell, _ in PLAN:
        new = paired_frames(CONFIRM_SEED, cell)
        old = paired_frames(screen.SCREEN_SEED, cell)
        if new is None:
            continue
        for cand in cands:
            if cand not in new:
                continue
            row = [screen.SHORT[cell], cand]
            shifts = []
            for frame in (new, old):
                if frame is None or cand not in frame:
                    shifts.append("")
                    continue
                m, se, _ = _mean_se(frame[cand] - frame["PLS"])
                shifts.append(_fmt(m, se))
            row += shifts
            d = new[cand] ** 2 - new["PLS"] ** 2
            trimmed = d.drop(d.sort_values(ascending=False).index[:5])
            row.append(_fmt(*_mean_se(trimmed)[:2]))
            parts = [_mean_se(f[cand] ** 2 - f["PLS"] ** 2) for f in (new, old)
                     if f is not None and cand in f]
            R = sum(p[2] for p in parts)
            m = sum(p[0] * p[2] for p in parts) / R
            se = np.sqrt(sum((p[1] * p[2]) ** 2 for p in parts)) / R
            row.append(f"{_fmt(m, se)} (R={R})")
            out.append("| " + " | ".join(row) + " |")
    screen.configure(CONFIRM_SEED)
    return out + [""]


def write_confirm_summary() -> None:
    confirm = tables_for(CONFIRM_SEED)
    screening = tables_for(screen.SCREEN_SEED)
    screen.configure(CONFIRM_SEED)
    missing = [c for c, _ in PLAN if c not in confirm]
    short_runs = [
        f"{c} ({confirm[c][1]['reps']} of {target} planned)"
        for c, target in PLAN
        if c in confirm and confirm[c][1]["reps"] < target
    ]
    lines = [
        "# Confirmation run (issue 10): finalists on study seed 2027",
        "",
        f"Written {time.strftime('%Y-%m-%d %H:%M')} by benchmarks/default_choice/confirm.py (harness "
        "screen.py / screen_extra.py, candidate definitions unchanged from the screening run) at "
        "stackdr commit c82f2bd (worktree <checkout of c82f2bd>). Study seed 2027: replicate r of "
        "a cell uses `replicate_seeds(2027, design, n, r)` for data and estimator seed; cross-fits "
        "in cache2027/, per-replicate rows in results2027/<cell>.csv. The finalists were fixed "
        "on seed 2007 before any seed-2027 data were drawn. Bootstrap off; every candidate on "
        "the same cross-fit per replicate (paired). `paired sq-err diff` = mean over replicates "
        "of (candidate error^2 - PLS error^2); MC SE = SD of the paired differences / sqrt(R); "
        "* = beyond 2 MC SE (negative favours the candidate). Ratio = candidate RMSE / PLS RMSE.",
        "",
        "Run notes: drivers run_confirm.sh then run_confirm2.sh (log run_confirm.log), one "
        "python process at a time, single-threaded; about 39 minutes of wall time in all. The "
        "machine was shared (load 3.5-6 on 2 cores), so replicates took about 1.5-2x the "
        "screening times; after the first default-library cells were cut short by their "
        "minute budgets, the remaining plan was changed to top up the Kang-Schafer "
        "default-library cells (priority 2) before the new designs, and the sparse cell was "
        "dropped. Harness checked before the run: on seed 2007 the --candidates path gives "
        "the stored screening rows exactly (10 cached replicates in 3 cells, max |estimate "
        "difference| 0; check_refactor.py).",
        "",
        "Cells not run: " + (", ".join(missing) if missing else "none") + ".",
        "",
        "Cells stopped before the planned replicate count: "
        + (", ".join(short_runs) if short_runs else "none")
        + ".",
        "",
    ]
    lines += overview(confirm, "## Seed 2027 (confirmation): ratio to PLS RMSE; paired sq-err diff (MC SE)")
    lines += overview(
        screening,
        "## Seed 2007 (screening, for reference; same rows as screen_summary.md)",
    )
    lines += supplement_lines()
    lines += [
        "## Candidate rules",
        "",
        "- 1 today's default: blend=\"riesz\", tie_break_scale=0.5 (estimator setting).",
        "- 2 blend=\"probability\", tie_break_scale=0.25 (estimator setting).",
        "- 6'' the prediction-loss-stacking propensity sum_k a_k pi_k is added as one more "
        "propensity learner; riesz search and tie-break unchanged except that the "
        "propensity-side anchor is that column's vertex; c = tie-break scale "
        "(screen_extra.pls_vertex_riesz).",
        "",
    ]
    for cell, (table, timing) in confirm.items():
        design, n, library = screen.CELLS[cell]
        ana = ", ".join(f"{k} {v:.2f}" for k, v in timing["analyse_s"].items())
        lines += [
            f"## {cell}: {design}, n = {n}, {library} library, seed 2027, R = {timing['reps']}",
            "",
            f"Seconds per replicate: cross-fit {timing['fit_s']:.1f}; analyse/candidate: {ana}.",
            "",
            screen.markdown(table),
            "",
        ]
    (screen.ROOT / "confirm_summary.md").write_text("\n".join(lines))


if __name__ == "__main__":
    sys.exit(write_confirm_summary())
