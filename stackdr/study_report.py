"""Readable summaries of a Monte Carlo study: aligned text, markdown and a self-contained HTML
page with embedded figures.

Every number comes from :func:`stackdr.study.summarise_study` (performance per design, sample
size and estimator, each with its Monte Carlo standard error) and :func:`stackdr.study.read_results`
(replicate-level errors and chosen weights).
"""

from __future__ import annotations

import math

import pandas as pd

# (summary column, its MC SE column, header) in display order.
MEASURES = (
    ("bias", "bias_mcse", "bias"),
    ("sd", "sd_mcse", "SD"),
    ("rmse", "rmse_mcse", "RMSE"),
    ("mae", "mae_mcse", "MAE (median)"),
    ("coverage", "coverage_mcse", "coverage"),
    ("width", "width_mcse", "mean width"),
)


def _number(value: float, digits: int = 4) -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "-"
    return f"{value:.{digits}g}"


def with_mcse(value: float, mcse: float, digits: int = 4) -> str:
    """``value (mcse)`` with ``digits`` significant digits, or ``-`` when missing."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "-"
    if mcse is None or (isinstance(mcse, float) and math.isnan(mcse)):
        return _number(value, digits)
    return f"{_number(value, digits)} ({_number(mcse, 2)})"


def display_table(summary: pd.DataFrame) -> pd.DataFrame:
    """The summary as strings: one row per design, n and estimator; each measure printed as
    ``value (Monte Carlo SE)``."""
    rows = []
    for _, r in summary.iterrows():
        row = {
            "design": r["design"],
            "n": str(int(r["n"])),
            "estimator": r["estimator"],
            "reps": str(int(r["reps"])),
        }
        for value, mcse, header in MEASURES:
            row[header] = with_mcse(r[value], r[mcse])
        rows.append(row)
    return pd.DataFrame(
        rows, columns=["design", "n", "estimator", "reps"] + [m[2] for m in MEASURES]
    )


def text_table(frame: pd.DataFrame) -> str:
    """Aligned plain-text rendering of a table of strings (first columns left-aligned)."""
    cells = frame.astype(str)
    widths = {c: max(len(str(c)), *(len(v) for v in cells[c])) for c in cells.columns}
    left = {c for c in cells.columns if c in ("design", "estimator", "library", "setting")}

    def fmt(c, v):
        return v.ljust(widths[c]) if c in left else v.rjust(widths[c])

    lines = ["  ".join(fmt(c, str(c)) for c in cells.columns)]
    lines += ["  ".join(fmt(c, v) for c, v in zip(cells.columns, row)) for row in cells.values]
    return "\n".join(lines)


def markdown_table(frame: pd.DataFrame) -> str:
    """GitHub-flavoured markdown rendering of a table (values shown with ``str``)."""
    cells = frame.astype(str)
    head = "| " + " | ".join(map(str, cells.columns)) + " |"
    rule = "|" + "|".join("---" for _ in cells.columns) + "|"
    body = ["| " + " | ".join(v.replace("|", "\\|") for v in row) + " |" for row in cells.values]
    return "\n".join([head, rule, *body])


def summary_text(summary: pd.DataFrame) -> str:
    """Per design and sample size, an aligned table of every estimator's performance."""
    if summary.empty:
        return "no finished replicates"
    blocks = []
    table = display_table(summary)
    for (design, n), group in table.groupby(["design", "n"], sort=False):
        target = summary.loc[summary["design"] == design, "target"].iloc[0]
        truth = summary.loc[(summary["design"] == design) & (summary["n"] == int(n)), "truth"].iloc[
            0
        ]
        blocks.append(
            f"{design} (target {target}, truth {_number(truth, 6)}), n = {n}\n"
            + text_table(group.drop(columns=["design", "n"]))
        )
    return (
        "\n\n".join(blocks)
        + "\n\nValues are Monte Carlo estimates with their Monte Carlo SE in parentheses."
    )
