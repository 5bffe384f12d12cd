"""Tables a paper can take: the comparison of estimators, the pair table and a study's summary
as LaTeX (booktabs) and Markdown, with units in the headers and a caption that gives n, folds,
replicates and the confidence level.

Built only from saved results (a fit's results dict, a study's summary frame), so
``stackdr report`` rewrites the same files. Numbers follow :func:`stackdr.estimation.column_text`:
one format per column, the largest value with the requested significant digits.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

from stackdr.estimation import (
    BLEND_MEANINGS,
    column_decimals,
    column_text,
    estimate_unit,
    interval_sentence,
)


@dataclass(frozen=True)
class PaperTable:
    """A table with its caption: ``headers`` and ``rows`` are display text; ``numeric`` marks
    the right-aligned columns."""

    name: str
    caption: str
    headers: list
    rows: list
    numeric: list


# ----------------------------------------------------------------------------- rendering

_LATEX_SPECIAL = {
    "\\": r"\textbackslash{}",
    "&": r"\&",
    "%": r"\%",
    "$": r"\$",
    "#": r"\#",
    "_": r"\_",
    "{": r"\{",
    "}": r"\}",
    "~": r"\textasciitilde{}",
    "^": r"\textasciicircum{}",
}
_LATEX_SYMBOLS = {"\u00b2": r"$^2$", "\u00d7": r"$\times$", "\u00b1": r"$\pm$"}
_NEGATIVE = re.compile(r"(?<![\w.])-(?=\d)")


def latex_text(text: str, numeric: bool = False) -> str:
    """User text made safe for LaTeX; in numeric cells a leading minus becomes a math minus."""
    out = "".join(_LATEX_SPECIAL.get(ch, _LATEX_SYMBOLS.get(ch, ch)) for ch in str(text))
    return _NEGATIVE.sub("$-$", out) if numeric else out


def latex(table: PaperTable) -> str:
    """The table as a LaTeX ``table`` float with a booktabs ``tabular`` (needs
    ``\\usepackage{booktabs}``)."""
    spec = "".join("r" if num else "l" for num in table.numeric)
    head = " & ".join(latex_text(h) for h in table.headers) + r" \\"
    body = [
        " & ".join(latex_text(c, num) for c, num in zip(row, table.numeric)) + r" \\"
        for row in table.rows
    ]
    return "\n".join(
        [
            r"\begin{table}[htbp]",
            r"\centering",
            rf"\caption{{{latex_text(table.caption)}}}",
            rf"\label{{tab:stackdr-{table.name.replace('_', '-')}}}",
            rf"\begin{{tabular}}{{{spec}}}",
            r"\toprule",
            head,
            r"\midrule",
            *body,
            r"\bottomrule",
            r"\end{tabular}",
            r"\end{table}",
            "",
        ]
    )


def markdown(table: PaperTable) -> str:
    """The table as GitHub-flavoured Markdown under its caption (``Table: ...``)."""

    def cell(text) -> str:
        return str(text).replace("|", "\\|")

    rule = "|" + "|".join("---:" if num else "---" for num in table.numeric) + "|"
    lines = [
        f"Table: {table.caption}",
        "",
        "| " + " | ".join(cell(h) for h in table.headers) + " |",
        rule,
        *("| " + " | ".join(cell(c) for c in row) + " |" for row in table.rows),
        "",
    ]
    return "\n".join(lines)


# ----------------------------------------------------------------------------- fit tables


def _units(results: dict) -> tuple[str, str]:
    unit = estimate_unit(results["target"]["name"], results["presentation"]["outcome_label"])
    return unit, (f"({unit})\u00b2" if " " in unit else f"{unit}\u00b2")


def _design_text(results: dict) -> str:
    settings = results["settings"]
    repeats = results["diagnostics"]["repeats"]
    folds = settings.get("folds")
    text = f"n = {results['n']}; {folds} cross-fitting folds"
    return text + (f" ({repeats} fold assignments)" if repeats > 1 else "")


def comparison_table(results: dict) -> PaperTable:
    """Every estimator: blend, estimate, the SE of its interval's method, interval and
    pseudo-risk, with units and a caption."""
    rows = results["estimators"]
    digits = results["presentation"]["digits"]
    unit, squared = _units(results)
    iv = results["interval"]
    boot = results["bootstrap"]
    pct = f"{100 * iv['level']:g}%"
    ends = column_text([x[k] for k in ("estimate", "low", "high") for x in rows], digits)
    n = len(rows)
    estimates, lows, highs = ends[:n], ends[n : 2 * n], ends[2 * n :]
    body = [
        [
            x["name"],
            x["blend"],
            est,
            se,
            "Wald" if x["se_method"] == "wald" else "bootstrap",
            f"{lo} to {hi}",
            risk,
        ]
        for x, est, se, lo, hi, risk in zip(
            rows,
            estimates,
            column_text([x["se"] for x in rows], digits),
            lows,
            highs,
            column_text([x["pseudo_risk"] for x in rows], digits),
        )
    ]
    blends = sorted({x["blend"] for x in rows})
    caption = " ".join(
        [
            f"Estimators of the {results['target']['description']}"
            + (
                f" of {results['presentation']['outcome_label']}"
                if results["presentation"]["outcome_label"]
                else ""
            )
            + f". {_design_text(results)}.",
            interval_sentence(
                iv["level"],
                iv["method"],
                None if boot is None else boot["replicates"],
                None if boot is None else boot["kind"],
                any(x["se_method"] == "wald" for x in rows),
            ),
            "Blend: " + "; ".join(f"{b}, {BLEND_MEANINGS.get(b, b)}" for b in blends) + ".",
            f"Pseudo-risk: the {results['settings'].get('criterion', '')} criterion at each "
            f"row's own weights and blend, in {squared}.",
            *results["notes"],
        ]
    )
    return PaperTable(
        "comparison",
        caption,
        [
            "Estimator",
            "Blend",
            f"Estimate ({unit})",
            f"SE ({unit})",
            "SE from",
            f"{pct} interval ({unit})",
            f"Pseudo-risk ({squared})",
        ],
        body,
        [False, False, True, True, False, True, True],
    )


def pair_table(results: dict) -> PaperTable:
    """The pair table: estimate (SE) for every propensity learner (rows) and outcome learner
    (columns)."""
    pairs = results["pair_table"]
    digits = results["presentation"]["digits"]
    unit, _ = _units(results)
    values = column_text([v for row in pairs["values"] for v in row], digits)
    ses = column_text([v for row in pairs["standard_errors"] for v in row], digits)
    width = len(pairs["columns"])
    body = [
        [name] + [f"{values[k * width + j]} ({ses[k * width + j]})" for j in range(width)]
        for k, name in enumerate(pairs["rows"])
    ]
    caption = (
        f"Doubly robust estimate of the {results['target']['description']} ({unit}) for every "
        "pair of one propensity learner (rows) and one outcome learner (columns), with its "
        f"influence-function standard error in parentheses. {_design_text(results)}."
    )
    return PaperTable(
        "pair_table",
        caption,
        ["Propensity \\ outcome learner", *pairs["columns"]],
        body,
        [False] + [True] * width,
    )


def fit_tables(results: dict) -> list:
    """The tables of a fit: comparison and pair table."""
    return [comparison_table(results), pair_table(results)]


# ----------------------------------------------------------------------------- study tables


def with_mcse_column(values, mcses, digits: int) -> list:
    """``value (Monte Carlo SE)`` cells of one column, the SEs with the values' decimals (or in
    scientific notation with them); ``-`` for a missing value."""
    shown = column_text(values, digits, missing="-")
    decimals = column_decimals(values, digits)
    out = []
    for text, mcse in zip(shown, mcses):
        if text == "-" or mcse is None or mcse != mcse:
            out.append(text)
        elif decimals is None:
            out.append(f"{text} ({float(mcse):.{max(digits - 2, 0)}e})")
        else:
            out.append(f"{text} ({float(mcse):.{decimals}f})")
    return out
