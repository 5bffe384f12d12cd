"""Readable summaries of a Monte Carlo study: aligned text, markdown and a self-contained HTML
page with embedded figures.

Every number comes from :func:`stackdr.studies.summarise_study` (performance per design, sample
size and estimator, each with its Monte Carlo standard error) and
:func:`stackdr.studies.read_results` (replicate-level errors and chosen weights).
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pandas as pd
from matplotlib.figure import Figure

from stackdr.estimation import DEFAULT_DIGITS, LINE_WIDTH
from stackdr.reporting._html import escape, figure, page, paragraph, table
from stackdr.reporting._style import (
    MAIN_COLOUR,
    OTHER_COLOUR,
    STACK_COLOUR,
    figure_style,
    label,
    render_png,
)
from stackdr.reporting._tables import PaperTable, with_mcse_column
from stackdr.search import ESTIMATOR_ORDER
from stackdr.studies import read_results, read_study_record, summarise_study

# (summary column, its MC SE column, header) in display order.
MEASURES = (
    ("bias", "bias_mcse", "bias"),
    ("sd", "sd_mcse", "SD"),
    ("rmse", "rmse_mcse", "RMSE"),
    ("mae", "mae_mcse", "median absolute error"),
    ("mean_abs_error", "mean_abs_error_mcse", "mean absolute error"),
    ("coverage", "coverage_mcse", "coverage"),
    ("width", "width_mcse", "mean width"),
)


_NUMERIC_CELL = r"[-+0-9.eE%() ]*|nan|inf"


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


def display_table(summary: pd.DataFrame, digits: int = DEFAULT_DIGITS) -> pd.DataFrame:
    """The summary as strings: one row per design, n and estimator; each measure printed as
    ``value (Monte Carlo SE)``, one format per measure within each design and n."""
    parts = []
    for _, group in summary.groupby(["design", "n"], sort=False):
        part = pd.DataFrame(
            {
                "design": group["design"],
                "n": group["n"].astype(int).astype(str),
                "estimator": group["estimator"],
                "reps": group["reps"].astype(int).astype(str),
            }
        )
        for value, mcse, header in MEASURES:
            part[header] = with_mcse_column(list(group[value]), list(group[mcse]), digits)
        parts.append(part)
    columns = ["design", "n", "estimator", "reps"] + [m[2] for m in MEASURES]
    if not parts:
        return pd.DataFrame(columns=columns)
    return pd.concat(parts, ignore_index=True)[columns]


#: Below this many replicates a study summary's Monte Carlo SEs are too rough to lean on.
FEW_REPLICATES = 20


def few_replicates_note(summary: pd.DataFrame) -> str | None:
    """A warning when any cell of the summary rests on fewer than 20 replicates."""
    if summary.empty or summary["reps"].min() >= FEW_REPLICATES:
        return None
    return (
        f"the summary rests on as few as {int(summary['reps'].min())} replicates per cell "
        f"(fewer than {FEW_REPLICATES}); its Monte Carlo SEs are rough and a coverage of 1.00 "
        "(0.00) only means every interval covered"
    )


def study_tables(summary: pd.DataFrame, level: float, digits: int = DEFAULT_DIGITS) -> list:
    """One paper table per design and n: every measure with its Monte Carlo SE, and a caption
    with the design, truth, n, replicates and confidence level."""
    tables = []
    shown = display_table(summary, digits)
    for (design, n), group in shown.groupby(["design", "n"], sort=False):
        rows = summary[(summary["design"] == design) & (summary["n"] == int(n))]
        reps = sorted(set(rows["reps"].astype(int)))
        reps_text = str(reps[0]) if len(reps) == 1 else f"{reps[0]} to {reps[-1]}"
        caption = (
            f"Monte Carlo study: design {design} (target {rows['target'].iloc[0]}, truth "
            f"{rows['truth'].iloc[0]:.6g}), n = {n}, {reps_text} replicates per estimator. "
            f"Coverage of {100 * level:g}% intervals; errors are estimate minus truth, in outcome "
            "units. Monte Carlo standard errors in parentheses."
        )
        body = group.drop(columns=["design", "n"])
        tables.append(
            PaperTable(
                f"study_{design}_n{n}",
                caption,
                list(body.columns),
                body.values.tolist(),
                [False] + [True] * (body.shape[1] - 1),
            )
        )
    return tables


def text_table(frame: pd.DataFrame) -> str:
    """Aligned plain-text rendering of a table of strings (first columns left-aligned)."""
    cells = frame.astype(str)
    widths = {c: max(len(str(c)), *(len(v) for v in cells[c])) for c in cells.columns}
    # Words read best left-aligned, numbers (with their MC SE in parentheses) right-aligned.
    left = {c for c in cells.columns if not cells[c].str.fullmatch(_NUMERIC_CELL).all()}

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


def _narrow_tables(frame: pd.DataFrame) -> str:
    """Aligned text tables within 100 characters a line: the measures split over as many
    tables as needed, each starting with the estimator and replicate columns."""
    keys, measures = list(frame.columns[:2]), list(frame.columns[2:])
    parts, current = [], []
    for column in measures:
        trial = text_table(frame[keys + current + [column]])
        if current and max(map(len, trial.splitlines())) > LINE_WIDTH:
            parts.append(current)
            current = []
        current.append(column)
    parts.append(current)
    return "\n\n".join(text_table(frame[keys + part]) for part in parts)


def summary_text(summary: pd.DataFrame, digits: int = DEFAULT_DIGITS) -> str:
    """Per design and sample size, an aligned table of every estimator's performance."""
    if summary.empty:
        return "no finished replicates"
    blocks = []
    table = display_table(summary, digits)
    for (design, n), group in table.groupby(["design", "n"], sort=False):
        target = summary.loc[summary["design"] == design, "target"].iloc[0]
        truth = summary.loc[(summary["design"] == design) & (summary["n"] == int(n)), "truth"].iloc[
            0
        ]
        blocks.append(
            f"{design} (target {target}, truth {_number(truth, 6)}), n = {n}\n"
            + _narrow_tables(group.drop(columns=["design", "n"]))
        )
    return (
        "\n\n".join(blocks)
        + "\n\nValues are Monte Carlo estimates with their Monte Carlo SE in parentheses."
    )


# ------------------------------------------------------------------------------------ ordering


# The comparison table's order; other estimators (user replicate functions) follow by name.
def _estimator_rank(name: str) -> tuple[int, str]:
    return (ESTIMATOR_ORDER.index(name) if name in ESTIMATOR_ORDER else len(ESTIMATOR_ORDER), name)


def ordered(summary: pd.DataFrame) -> pd.DataFrame:
    """Summary rows sorted by design, n and the comparison table's estimator order."""
    if summary.empty:
        return summary
    rank = summary["estimator"].map(_estimator_rank)
    return (
        summary.assign(_rank=rank)
        .sort_values(["design", "n", "_rank"], kind="stable")
        .drop(columns="_rank")
        .reset_index(drop=True)
    )


# ---------------------------------------------------------------------------------------- HTML


def _level(record: dict) -> float:
    settings = record.get("settings", {})
    estimator = settings.get("estimator", settings) if isinstance(settings, dict) else {}
    level = estimator.get("level", 0.95) if isinstance(estimator, dict) else 0.95
    return float(level)


def error_figure(results: pd.DataFrame, names: list[str]):
    """Box plots of estimate - truth per estimator (one design and n)."""
    error = results["estimate"] - results["truth"]
    errors = [error[results["estimator"] == name].dropna().to_numpy() for name in names]
    fig = Figure(figsize=(7.0, 0.45 * len(names) + 1.2))
    ax = fig.add_subplot()
    positions = list(range(len(names), 0, -1))
    parts = ax.boxplot(
        errors, positions=positions, orientation="horizontal", widths=0.6, patch_artist=True
    )
    colours = {ESTIMATOR_ORDER[0]: MAIN_COLOUR, ESTIMATOR_ORDER[2]: STACK_COLOUR}
    for box, name in zip(parts["boxes"], names):
        box.set_facecolor(colours.get(name, OTHER_COLOUR))
        box.set_alpha(0.55)
    ax.axvline(0.0, color="black", lw=0.8)
    ax.set_yticks(positions, [label(n) for n in names])
    ax.set_xlabel("estimate - truth")
    return fig


def coverage_figure(summary: pd.DataFrame, level: float):
    """Coverage per estimator with +-1.96 Monte Carlo SE bars and the nominal level."""
    rows = summary[np.isfinite(summary["coverage"].to_numpy(dtype=float))]
    fig = Figure(figsize=(7.0, 0.45 * max(len(rows), 1) + 1.2))
    ax = fig.add_subplot()
    positions = np.arange(len(rows), 0, -1)
    ax.errorbar(
        rows["coverage"],
        positions,
        xerr=1.96 * rows["coverage_mcse"].fillna(0.0),
        fmt="o",
        color=MAIN_COLOUR,
        capsize=3,
    )
    ax.axvline(level, color="black", ls="--", lw=0.9, label=f"nominal {level:g}")
    ax.set_yticks(positions, [label(n) for n in rows["estimator"]])
    ax.set_xlabel("coverage (bars: +-1.96 Monte Carlo SE)")
    ax.set_xlim(min(0.5, float(rows["coverage"].min()) - 0.05) if len(rows) else 0.5, 1.01)
    ax.legend(loc="lower left")
    return fig


def weight_figure(results: pd.DataFrame):
    """Distribution over replicates of target-aimed stacking's weight on each learner, or None
    when no weights were stored."""
    rows = results[results["estimator"] == ESTIMATOR_ORDER[0]]
    stored = [w for w in rows["weights"] if isinstance(w, dict)]
    sides = [
        s for s in ("propensity", "outcome") if any(isinstance(w.get(s), dict) for w in stored)
    ]
    if not sides:
        return None
    fig = Figure(figsize=(9.0, 3.2))
    for i, side in enumerate(sides):
        frame = pd.DataFrame([w.get(side, {}) for w in stored]).fillna(0.0)
        ax = fig.add_subplot(1, len(sides), i + 1)
        ax.boxplot(
            [frame[c].to_numpy() for c in frame.columns],
            widths=0.6,
            patch_artist=True,
            boxprops={"facecolor": MAIN_COLOUR, "alpha": 0.45},
        )
        ax.set_xticks(range(1, frame.shape[1] + 1), [label(c, 16) for c in frame.columns])
        ax.tick_params(axis="x", labelrotation=30)
        ax.set_ylim(-0.03, 1.03)
        ax.set_title(f"{side} weights")
    fig.tight_layout()
    return fig


def html_report(path: str | Path, summary: pd.DataFrame | None = None) -> str:
    """A self-contained HTML page for a study file: settings, the summary table with Monte Carlo
    SEs, and per design and n the error distributions, coverage with Monte Carlo error bars and
    the distribution of target-aimed stacking's chosen weights. Built with the same page shell,
    style and escaping as the fit report (:mod:`._html`): figures are embedded PNGs, all text is
    HTML-escaped, nothing is loaded from elsewhere.

    Parameters
    ----------
    path : str or pathlib.Path
        Study file.
    summary : DataFrame, optional
        :func:`stackdr.studies.summarise_study` output (computed when not given).

    Returns
    -------
    str
    """
    record = read_study_record(path)
    summary = ordered(summarise_study(path) if summary is None else summary)
    results = read_results(path)
    level = _level(record)
    few = few_replicates_note(summary)
    parts = [
        paragraph(
            "Values are Monte Carlo estimates with their Monte Carlo standard errors in "
            "parentheses; coverage is of each estimator's stored interval (bootstrap when the "
            "study ran one, else Wald)."
        ),
        paragraph(f"Caution: {few}.", "note") if few else "",
        "<h2>Settings</h2>\n",
        f"<pre>{escape(json.dumps(record, indent=2, sort_keys=True))}</pre>\n",
    ]
    with figure_style():
        for (design, n), group in summary.groupby(["design", "n"], sort=False):
            truth = group["truth"].iloc[0]
            parts.append(
                f"<h2>{escape(design)}, n = {int(n)} "
                f"(target {escape(group['target'].iloc[0])}, truth {truth:g})</h2>\n"
            )
            shown = display_table(group).drop(columns=["design", "n"])
            measures = [c for c in shown.columns if c != "estimator"]
            rows = shown.itertuples(index=False)
            parts.append(table(list(shown.columns), rows, align_right=measures))
            replicates = results[(results["design"] == design) & (results["n"] == n)]
            names = list(group["estimator"])
            parts.append(
                figure(
                    render_png(error_figure(replicates, names)), "Error distribution per estimator"
                )
            )
            parts.append(
                figure(
                    render_png(coverage_figure(group, level)),
                    "Interval coverage with Monte Carlo error",
                )
            )
            weights = weight_figure(replicates)
            if weights is not None:
                parts.append(
                    figure(
                        render_png(weights),
                        "Weights chosen by target-aimed stacking across replicates",
                    )
                )
    return page(
        f"stackdr study: {path}", "".join(parts), heading=f"Monte Carlo study {Path(path).name}"
    )
