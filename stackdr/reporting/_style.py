"""The look of every figure: a journal-column style, colours, rendering to PNG (200 dpi), SVG and
PDF without timestamps or version metadata, and the text helpers for user names and axis labels.

The figures are drawn for a journal column: 3.5 inches wide (panels stacked, not side by side),
no text below 7 points at that size, the outcome's label and unit on the axes
(``presentation.outcome_label`` in the results), learner names wrapped rather than cut.
"""

from __future__ import annotations

import contextlib
import io
import textwrap

import matplotlib
import numpy as np
from matplotlib.figure import Figure

from stackdr.estimation import estimate_unit

#: Width of a journal column (inches): every figure is drawn at this width.
COLUMN_WIDTH = 3.5
DPI = 200
STYLE = {
    "font.size": 8,
    "axes.titlesize": 8.5,
    "axes.labelsize": 8,
    "xtick.labelsize": 7.5,
    "ytick.labelsize": 7.5,
    "legend.fontsize": 7.5,
    "legend.title_fontsize": 7.5,
    "axes.linewidth": 0.6,
    "lines.linewidth": 1.2,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "savefig.dpi": DPI,
    "savefig.bbox": "tight",
    "savefig.pad_inches": 0.03,
    "text.usetex": False,
    "pdf.fonttype": 42,
    "svg.hashsalt": "stackdr",
}
#: Smallest text size (points) of any annotation.
SMALL = 7
#: Formats written for every figure, with the metadata left out so the bytes depend only on
#: the content.
FORMATS = {
    "png": {"Software": None},
    "svg": {"Date": None, "Creator": None},
    "pdf": {"CreationDate": None, "ModDate": None, "Producer": None, "Creator": None},
}
MAIN_COLOUR = "#1b6ca8"
STACK_COLOUR = "#d9822b"
OTHER_COLOUR = "#6b6b6b"
TERNARY_RESOLUTION = 48
EDGE_POINTS = 101


@contextlib.contextmanager
def figure_style():
    """Matplotlib's default style plus ours, whatever the user's rcParams (restored after)."""
    with matplotlib.rc_context():
        matplotlib.rcdefaults()
        matplotlib.rcParams.update(STYLE)
        yield


def render(fig: Figure, fmt: str = "png") -> bytes:
    """Bytes of a figure in ``fmt`` ("png", "svg" or "pdf") without software or date tags."""
    buffer = io.BytesIO()
    fig.savefig(buffer, format=fmt, metadata=FORMATS[fmt])
    return buffer.getvalue()


def render_png(fig: Figure) -> bytes:
    """PNG bytes of a figure, without the software tag (so output depends only on content)."""
    return render(fig, "png")


def label(text: str, width: int = 32) -> str:
    """User text made safe for matplotlib: ``$`` would start mathtext, so it is escaped; long
    names are shortened for axis labels."""
    text = str(text)
    if len(text) > width:
        text = text[: width - 1] + "\u2026"
    return text.replace("$", r"\$")


def wrap(text: str, width: int = 16) -> str:
    """User text made safe for matplotlib and wrapped onto lines of about ``width``
    characters (at spaces and hyphens), never cut."""
    lines = textwrap.wrap(str(text), width, break_on_hyphens=True) or [""]
    return "\n".join(lines).replace("$", r"\$")


_SHORT_TARGETS = {
    "ate": "average effect",
    "att": "effect on the treated",
    "mean1": "mean under treatment",
    "mean0": "mean under control",
    "cov": "covariance",
}


def value_label(results: dict, what: str | None = None) -> str:
    """Axis label of an estimate: what it is and its unit (the outcome's label when given)."""
    name = results["target"]["name"]
    what = what or _SHORT_TARGETS.get(name, name)
    outcome = results["presentation"]["outcome_label"]
    unit = estimate_unit(name, outcome)
    if outcome and name != "cov":
        return wrap(f"{what}, {outcome}", 48)
    return wrap(f"{what} ({unit})", 48)


def unit_text(results: dict) -> str:
    return estimate_unit(results["target"]["name"], results["presentation"]["outcome_label"])


def _num(value) -> float:
    return np.nan if value is None else float(value)


def _array(values) -> np.ndarray:
    return np.array([[_num(v) for v in row] for row in values], dtype=float)


def _by_kind(results: dict, kind: str) -> dict | None:
    return next((row for row in results["estimators"] if row["kind"] == kind), None)


def _colour(kind: str) -> str:
    return {"target-aimed": MAIN_COLOUR, "prediction-loss": STACK_COLOUR}.get(kind, OTHER_COLOUR)


def _legend_below(fig: Figure, ax, handles=None, ncol: int = 1, **kwargs) -> None:
    handles, labels = ax.get_legend_handles_labels() if handles is None else handles
    if handles:
        fig.legend(handles, labels, loc="outside lower center", ncol=ncol, frameon=False, **kwargs)
