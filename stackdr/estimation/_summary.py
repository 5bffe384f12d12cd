"""The printed and notebook form of a fit: :class:`ResultSummary`, and the words for units and
intervals that the summary, the report and the exported tables share."""

from __future__ import annotations

import html
import re
import textwrap
from dataclasses import dataclass

import pandas as pd

from stackdr.estimation._numbers import DEFAULT_DIGITS, column_text

#: Console and summary lines stay within this many characters.
LINE_WIDTH = 100

_UNIT = re.compile(r"\(([^()]+)\)\s*$")


def outcome_unit(outcome_label: str | None) -> str | None:
    """The unit in a label's closing parentheses: ``"change in SBP (mmHg)"`` -> ``"mmHg"``.

    Examples
    --------
    >>> outcome_unit("change in systolic pressure (mmHg)"), outcome_unit("earnings")
    ('mmHg', None)
    """
    if not outcome_label:
        return None
    match = _UNIT.search(outcome_label)
    return match.group(1).strip() if match else None


def estimate_unit(target_name: str, outcome_label: str | None) -> str:
    """Unit of an estimate: the outcome's (times the treatment's for the covariance target)."""
    unit = outcome_unit(outcome_label) or "outcome units"
    return f"{unit} \u00d7 treatment units" if target_name == "cov" else unit


def units_sentence(target_name: str, outcome_label: str | None) -> str:
    """Where the numbers' units are stated once: estimates, SEs and intervals in the estimate's
    unit, pseudo-risks in its square."""
    unit = estimate_unit(target_name, outcome_label)
    squared = f"({unit})\u00b2" if " " in unit else f"{unit}\u00b2"
    return (
        f"Estimates, SEs and interval ends in {unit}; pseudo-risk (squared movement of the "
        f"estimate under a swap of learners) in {squared}."
    )


def interval_sentence(
    level: float, method: str, replicates: int | None, kind: str | None, wald_rows: bool
) -> str:
    """How the intervals were made and which SE stands beside them (``wald_rows``: some rows
    have Wald intervals although a bootstrap ran)."""
    pct = f"{100 * level:g}%"
    wald = "Wald (estimate \u00b1 z \u00d7 influence-function SE; SE from: Wald)"
    if method == "wald" or not replicates:
        return f"Intervals: {pct} {wald}; they ignore that the weights were chosen from the data."
    text = (
        f"Intervals: {pct} bootstrap {method} from {replicates} {kind} replicates that rerun the "
        "weight search, with the bootstrap SE beside them (SE from: bootstrap)"
    )
    return text + (f"; rows the bootstrap did not cover: {wald}." if wald_rows else ".")


def wrapped(text: str, indent: str = "") -> str:
    """Text wrapped to :data:`LINE_WIDTH` characters, continuation lines indented."""
    return textwrap.fill(
        text, LINE_WIDTH, subsequent_indent=indent, break_on_hyphens=False, break_long_words=False
    )


@dataclass(frozen=True, eq=False)
class ResultSummary:
    """A fit's summary: the comparison table with its context, as text, HTML or a DataFrame.

    ``str(summary)`` (and so ``print``) gives the aligned text; notebooks show the HTML.

    Attributes
    ----------
    title : str
        What was estimated.
    details : str
        Rows and the main settings, one line.
    table : pandas.DataFrame
        One row per estimator (:meth:`BlendResult.comparison`).
    level : float
        Confidence level of the intervals.
    weights : dict of str to pandas.Series
        Target-aimed weights of the ``"propensity"`` and ``"outcome"`` libraries.
    sensitivities : str
        Sensitivities at the chosen weights and whether the tie-break moved them, one line.
    caution : str
        The standing caution on a causal reading.
    notes : tuple of str
        Sentences the comparison needs (the blends of the rows; whether the data separate the
        target-aimed from the prediction-loss weights).
    intervals : str
        How the intervals were made and which SE stands beside them.
    units : str
        The units of the numbers.
    fold_check : str
        Whether the cross-fitting folds agree (the between-fold check), one or two sentences.
    digits : int
        Significant digits of the largest value of each numeric column.
    """

    title: str
    details: str
    table: pd.DataFrame
    level: float
    weights: dict
    sensitivities: str
    caution: str
    notes: tuple = ()
    intervals: str = ""
    units: str = ""
    digits: int = DEFAULT_DIGITS
    fold_check: str = ""

    def as_frame(self) -> pd.DataFrame:
        """The comparison table (a copy).

        Returns
        -------
        pandas.DataFrame
        """
        return self.table.copy()

    def shown(self) -> pd.DataFrame:
        """The comparison as display text: each numeric column in one format (estimate and
        interval ends share their decimals)."""
        t, d = self.table, self.digits
        pct = f"{100 * self.level:g}%"
        ends = column_text([*t["estimate"], *t["low"], *t["high"]], d)
        n = len(t)
        return pd.DataFrame(
            {
                "estimator": t["estimator"],
                "blend": t["blend"],
                "estimate": ends[:n],
                "SE": column_text(t["se"], d),
                "SE from": ["Wald" if m == "wald" else m for m in t["se_method"]],
                f"{pct} low": ends[n : 2 * n],
                f"{pct} high": ends[2 * n :],
                "pseudo-risk": column_text(t["pseudo_risk"], d),
            }
        )

    def _footer(self) -> list:
        return [self.intervals, self.fold_check, self.units, *self.notes]

    def as_text(self) -> str:
        """The summary as aligned plain text, lines within 100 characters.

        Returns
        -------
        str
        """
        cells = self.shown()
        widths = {c: max(len(c), *(len(v) for v in cells[c])) for c in cells.columns}
        left = ("estimator", "blend", "SE from")

        def line(values) -> str:
            return "  ".join(
                v.ljust(widths[c]) if c in left else v.rjust(widths[c])
                for c, v in zip(cells.columns, values)
            ).rstrip()

        lines = [self.title, self.details, "", line(cells.columns)]
        lines += [line(row) for row in cells.itertuples(index=False)]
        lines += [""] + [wrapped(text) for text in self._footer() if text]
        lines += ["", "Weights (target-aimed):"]
        for side, series in self.weights.items():
            text = "  ".join(f"{k} {v:.3f}" for k, v in series.items())
            lines.append(wrapped(f"  {side:<11}{text}", " " * 13))
        lines += [wrapped(self.sensitivities), "", wrapped("Caution: " + self.caution)]
        return "\n".join(lines)

    def as_html(self) -> str:
        """The summary as an HTML fragment (all text escaped; no scripts or styles).

        Returns
        -------
        str
        """
        weights = "; ".join(
            f"{side}: " + ", ".join(f"{k} {v:.3f}" for k, v in series.items())
            for side, series in self.weights.items()
        )
        e = html.escape
        footer = "".join(f"<p>{e(text)}</p>" for text in self._footer() if text)
        return (
            f"<div><p><strong>{e(self.title)}</strong><br>{e(self.details)}</p>"
            f"{self.shown().to_html(index=False, escape=True)}{footer}"
            f"<p>Weights (target-aimed): {e(weights)}</p><p>{e(self.sensitivities)}</p>"
            f"<p>Caution: {e(self.caution)}</p></div>"
        )

    def __str__(self) -> str:
        return self.as_text()

    def __repr__(self) -> str:
        return self.as_text()

    def _repr_html_(self) -> str:
        return self.as_html()
