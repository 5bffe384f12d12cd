"""Figures of a saved result, drawn only from the results dict (see :mod:`stackdr.io`).

The figures draw; the maths they show comes from the core (:func:`stackdr.core.value_range`,
:func:`stackdr.search.simplex_lattice`) or is stored in the results.

Every figure is a :class:`matplotlib.figure.Figure` made without pyplot (no global state, no
display needed) inside a fixed style, and rendered to PNG bytes without timestamps or version
metadata, so the same results dict always gives byte-identical images.
"""

from __future__ import annotations

import contextlib
import io
from itertools import combinations

import matplotlib
import numpy as np
from matplotlib.figure import Figure
from matplotlib.ticker import MaxNLocator
from matplotlib.tri import Triangulation

from stackdr.core import value_range
from stackdr.search import simplex_lattice

STYLE = {
    "font.size": 9.5,
    "axes.titlesize": 10.5,
    "axes.labelsize": 9.5,
    "legend.fontsize": 8.5,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "savefig.dpi": 110,
    "savefig.bbox": "tight",
    "text.usetex": False,
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


def render_png(fig: Figure) -> bytes:
    """PNG bytes of a figure, without the software tag (so output depends only on content)."""
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", metadata={"Software": None})
    return buffer.getvalue()


def label(text: str, width: int = 32) -> str:
    """User text made safe for matplotlib: ``$`` would start mathtext, so it is escaped; long
    names are shortened for axis labels."""
    text = str(text)
    if len(text) > width:
        text = text[: width - 1] + "\u2026"
    return text.replace("$", r"\$")


def _num(value) -> float:
    return np.nan if value is None else float(value)


def _array(values) -> np.ndarray:
    return np.array([[_num(v) for v in row] for row in values], dtype=float)


def _by_kind(results: dict, kind: str) -> dict | None:
    return next((row for row in results["estimators"] if row["kind"] == kind), None)


# ------------------------------------------------------------------------------ landscape


def ternary_surface(V: np.ndarray, mask=None, resolution: int = TERNARY_RESOLUTION):
    """Sensitivity range(w @ V) on the simplex lattice of a 3-learner side.

    Parameters
    ----------
    V : ndarray (3, m)
        Rows are the side's learners (the pair table, or its transpose for the outcome side).
    mask : boolean ndarray (m,), optional
        Direction learners over which the range is taken.
    resolution : int
        Lattice denominator: weights with coordinates in {0, 1/r, ..., 1}.

    Returns
    -------
    weights : ndarray (p, 3), values : ndarray (p,)
    """
    weights = simplex_lattice(3, int(resolution))
    return weights, value_range(weights @ V, mask)


def ternary_xy(weights: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Barycentric weights to the plane: vertices at (0, 0), (1, 0) and (1/2, sqrt(3)/2)."""
    weights = np.atleast_2d(weights)
    return weights[:, 1] + 0.5 * weights[:, 2], weights[:, 2] * np.sqrt(3) / 2


def edge_slices(V: np.ndarray, mask=None, points: int = EDGE_POINTS):
    """Sensitivity along every edge of the simplex: ``{(k, l): values}`` at ``t`` in [0, 1],
    weights (1 - t) e_k + t e_l.

    Returns
    -------
    t : ndarray (points,), slices : dict (k, l) -> ndarray (points,)
    """
    t = np.linspace(0.0, 1.0, points)
    slices = {
        (k, l): value_range((1 - t)[:, None] * V[k] + t[:, None] * V[l], mask)
        for k, l in combinations(range(V.shape[0]), 2)
    }
    return t, slices


def landscape_kind(k: int) -> str:
    """How the landscape of a side with ``k`` learners is drawn."""
    if k == 3:
        return "ternary"
    return "edges" if k >= 2 else "single"


def side_inputs(results: dict, side: str):
    """(V, learner names, direction mask, chosen weights, prediction-loss weights) of a side:
    propensity-side weights move the outcome-direction range and vice versa."""
    table = results["pair_table"]
    Psi = _array(table["values"])
    directions = results["sensitivities"]["direction_learners"]
    stack = _by_kind(results, "prediction-loss")
    if side == "propensity":
        V, names, others = Psi, table["rows"], table["columns"]
        mask = np.isin(others, directions["outcome"])
    else:
        V, names, others = Psi.T, table["columns"], table["rows"]
        mask = np.isin(others, directions["propensity"])
    chosen = np.array([_num(v) for v in results["weights"][side].values()])
    stacked = (
        None if stack is None else np.array([_num(v) for v in stack["weights"][side].values()])
    )
    return V, names, mask if mask.any() else None, chosen, stacked


# ------------------------------------------------------------------------------------ figures


def estimator_forest(results: dict) -> Figure:
    """Forest-style plot: every estimator with its reported interval (and Wald interval)."""
    rows = results["estimators"]
    fig = Figure(figsize=(8, 1.3 + 0.42 * len(rows)))
    ax = fig.add_subplot()
    y = np.arange(len(rows))[::-1]
    for yi, row in zip(y, rows):
        colour = {"target-aimed": MAIN_COLOUR, "prediction-loss": STACK_COLOUR}.get(
            row["kind"], OTHER_COLOUR
        )
        est = _num(row["estimate"])
        ax.plot(
            [_num(row["wald_low"]), _num(row["wald_high"])],
            [yi - 0.18] * 2,
            color="#b5b5b5",
            lw=1.5,
            solid_capstyle="butt",
        )
        ax.plot([_num(row["low"]), _num(row["high"])], [yi, yi], color=colour, lw=2.5)
        ax.plot([est], [yi], "o", color=colour, ms=6)
    ax.axvline(_num(results["estimate"]), color=MAIN_COLOUR, ls=":", lw=1)
    ax.set_yticks(y, [label(r["name"], 36) for r in rows])
    level = 100 * results["interval"]["level"]
    ax.set_xlabel(f"estimate of {label(results['target']['name'])}")
    ax.set_title(f"Estimators with {level:g}% intervals (coloured: as reported; grey, below: Wald)")
    ax.grid(axis="x", color="#e5e5e5")
    return fig


def weight_bars(results: dict) -> Figure:
    """Weights of both libraries: target-aimed against prediction-loss stacking."""
    stack = _by_kind(results, "prediction-loss")
    sides = ("propensity", "outcome")
    heights = [len(results["weights"][s]) for s in sides]
    fig = Figure(figsize=(8, 1.4 + 0.45 * max(heights)))
    axes = fig.subplots(1, 2, sharex=True)
    for ax, side in zip(axes, sides):
        names = list(results["weights"][side])
        y = np.arange(len(names))[::-1]
        chosen = [_num(v) for v in results["weights"][side].values()]
        bar = 0.38 if stack is not None else 0.6
        ax.barh(
            y + (bar / 2 if stack else 0),
            chosen,
            height=bar,
            color=MAIN_COLOUR,
            label="target-aimed",
        )
        if stack is not None:
            stacked = [_num(v) for v in stack["weights"][side].values()]
            ax.barh(
                y - bar / 2,
                stacked,
                height=bar,
                color=STACK_COLOUR,
                label="prediction-loss stacking",
            )
        for yi, w in zip(y, chosen):
            ax.text(
                min(w, 1.0) + 0.02,
                yi + (bar / 2 if stack else 0),
                f"{w:.2f}",
                va="center",
                fontsize=8,
            )
        ax.set_yticks(y, [label(n, 22) for n in names])
        ax.set_xlim(0, 1.15)
        ax.set_xlabel("weight")
        ax.set_title(f"{side} learners")
    axes[0].legend(loc="lower right", frameon=False)
    return fig


def pair_heatmap(results: dict) -> Figure:
    """The pair table as a heat map centred on the headline estimate, annotated with value
    and standard error."""
    table = results["pair_table"]
    Psi, se = _array(table["values"]), _array(table["standard_errors"])
    K1, K2 = Psi.shape
    centre = _num(results["estimate"])
    spread = np.nanmax(np.abs(Psi - centre)) if np.isfinite(Psi).any() else 1.0
    spread = spread if spread > 0 else 1.0
    fig = Figure(figsize=(min(2.8 + 1.25 * K2, 13), 1.6 + 0.62 * K1))
    ax = fig.add_subplot()
    image = ax.imshow(Psi, cmap="RdBu_r", vmin=centre - spread, vmax=centre + spread, aspect="auto")
    for k in range(K1):
        for j in range(K2):
            dark = abs(Psi[k, j] - centre) > 0.6 * spread
            ax.text(
                j,
                k,
                f"{Psi[k, j]:.3g}\n({se[k, j]:.2g})",
                ha="center",
                va="center",
                fontsize=8.5,
                color="white" if dark else "black",
            )
    ax.set_xticks(range(K2), [label(c, 18) for c in table["columns"]], rotation=20, ha="right")
    ax.set_yticks(range(K1), [label(r, 22) for r in table["rows"]])
    ax.set_xlabel("outcome learner")
    ax.set_ylabel("propensity learner")
    ax.set_title("Estimate for every learner pair (standard error)")
    for spine in ax.spines.values():
        spine.set_visible(False)
    fig.colorbar(image, ax=ax, label="estimate (centred on the target-aimed estimate)")
    return fig


def sensitivity_profiles(results: dict) -> Figure:
    """For each learner of one side, its pair-table values across the other side's learners
    (dots) and their range (line); last row: the values at the chosen weights."""
    table = results["pair_table"]
    Psi = _array(table["values"])
    at = results["sensitivities"]["at_chosen_weights"]
    directions = results["sensitivities"]["direction_learners"]
    panels = [
        (
            "Swap the outcome learner",
            table["rows"],
            Psi,
            table["columns"],
            [_num(v) for v in at["by_outcome_learner"].values()],
            directions["outcome"],
            "outcome learner",
        ),
        (
            "Swap the propensity learner",
            table["columns"],
            Psi.T,
            table["rows"],
            [_num(v) for v in at["by_propensity_learner"].values()],
            directions["propensity"],
            "propensity learner",
        ),
    ]
    rows = max(len(p[1]) for p in panels) + 1
    fig = Figure(figsize=(9, 2.0 + 0.45 * rows + 0.2 * max(Psi.shape)))
    axes = fig.subplots(1, 2, gridspec_kw={"wspace": 0.55})
    colours = matplotlib.colormaps["tab10"]
    for ax, (title, names, values, others, chosen, direction, other_kind) in zip(axes, panels):
        values = np.vstack([values, chosen])
        labels = [label(n, 20) for n in names] + ["chosen weights"]
        mask = np.isin(others, direction)
        mask = mask if mask.any() else np.ones(len(others), dtype=bool)
        y = np.arange(len(labels))[::-1]
        for yi, row in zip(y, values):
            used = row[mask]
            ax.plot(
                [np.nanmin(used), np.nanmax(used)],
                [yi, yi],
                color="#9a9a9a",
                lw=3,
                solid_capstyle="round",
                zorder=1,
            )
            ax.text(
                np.nanmax(used),
                yi + 0.28,
                f"range {np.nanmax(used) - np.nanmin(used):.3g}",
                fontsize=7.5,
                ha="right",
                color="#444444",
            )
        for j, other in enumerate(others):
            ax.scatter(
                values[:, j],
                y,
                s=30,
                color=colours(j % 10),
                zorder=2,
                marker="o" if mask[j] else "x",
                label=label(other, 20),
            )
        ax.set_yticks(y, labels)
        ax.get_yticklabels()[-1].set_fontweight("bold")
        ax.set_ylim(y.min() - 0.6, y.max() + 0.7)
        ax.set_xlabel("estimate")
        ax.set_title(title)
        ax.legend(
            title=other_kind,
            loc="upper center",
            bbox_to_anchor=(0.5, -0.18),
            ncol=min(3, len(others)),
            frameon=False,
            fontsize=7.5,
            title_fontsize=8,
        )
    return fig


def _ternary_panel(ax, fig, V, names, mask, chosen, stacked, title) -> None:
    weights, values = ternary_surface(V, mask)
    x, y = ternary_xy(weights)
    contour = ax.tricontourf(Triangulation(x, y), values, levels=14, cmap="viridis")
    fig.colorbar(contour, ax=ax, shrink=0.6, label="sensitivity (range)")
    corners_x, corners_y = ternary_xy(np.eye(3))
    ax.plot(np.append(corners_x, corners_x[0]), np.append(corners_y, corners_y[0]), "k-", lw=0.8)
    offsets = [(-0.04, -0.08, "left"), (0.04, -0.08, "right"), (0.0, 0.035, "center")]
    for (cx, cy), name, (dx, dy, ha) in zip(zip(corners_x, corners_y), names, offsets):
        ax.text(cx + dx, cy + dy, label(name, 20), ha=ha, fontsize=8.5)
    cx, cy = ternary_xy(chosen)
    ax.plot(cx, cy, "*", color="white", mec="black", ms=13, label="target-aimed weights")
    if stacked is not None:
        sx, sy = ternary_xy(stacked)
        ax.plot(
            sx, sy, "o", color=STACK_COLOUR, mec="black", ms=7, label="prediction-loss stacking"
        )
    ax.set_xlim(-0.12, 1.12)
    ax.set_ylim(-0.14, 0.98)
    ax.set_aspect("equal")
    ax.axis("off")
    ax.set_title(title, pad=14)
    ax.legend(loc="upper center", bbox_to_anchor=(0.5, -0.02), frameon=False, fontsize=7.5, ncol=2)


def _edge_panel(ax, V, names, mask, chosen, stacked, title) -> None:
    t, slices = edge_slices(V, mask)
    colours = matplotlib.colormaps["tab10"]
    for i, ((k, l), values) in enumerate(slices.items()):
        ax.plot(
            t,
            values,
            color=colours(i % 10),
            lw=1.4,
            label=f"{label(names[k], 14)} \u2192 {label(names[l], 14)}",
        )
    if V.shape[0] == 2:
        # With two learners the single edge is the whole simplex, so the weights lie on it.
        marks = [(chosen, "*", "white", 160, "target-aimed weights")]
        if stacked is not None:
            marks.append((stacked, "o", STACK_COLOUR, 50, "prediction-loss stacking"))
        for w, marker, colour, size, text in marks:
            ax.scatter(
                w[1],
                value_range(w[None] @ V, mask)[0],
                marker=marker,
                s=size,
                color=colour,
                edgecolors="black",
                zorder=3,
                label=text,
            )
    ax.set_xlabel("share of the second learner (0: first learner only)")
    ax.set_ylabel("sensitivity (range)")
    ax.set_ylim(bottom=0)
    ax.set_title(title)
    if len(slices) <= 15:
        ax.legend(frameon=False, fontsize=7, loc="upper center", bbox_to_anchor=(0.5, -0.2), ncol=2)


def landscape(results: dict) -> Figure:
    """Sensitivity over each side's simplex from the pair table (linear, riesz blend): a ternary
    map for a side with three learners, else the sensitivity along every edge."""
    fig = Figure(figsize=(10, 5.2))
    axes = fig.subplots(1, 2, gridspec_kw={"wspace": 0.3})
    titles = {
        "propensity": "Propensity weights: range across outcome learners",
        "outcome": "Outcome weights: range across propensity learners",
    }
    for ax, side in zip(axes, ("propensity", "outcome")):
        V, names, mask, chosen, stacked = side_inputs(results, side)
        kind = landscape_kind(len(names))
        if kind == "ternary":
            _ternary_panel(ax, fig, V, names, mask, chosen, stacked, titles[side])
        elif kind == "edges":
            _edge_panel(ax, V, names, mask, chosen, stacked, titles[side])
        else:
            ax.axis("off")
            ax.text(0.5, 0.5, f"one {side} learner: nothing to weigh", ha="center")
            ax.set_title(titles[side])
    return fig


def bootstrap_histograms(results: dict) -> Figure | None:
    """Replicate estimates of the target-aimed and prediction-loss stacking estimators, with
    the point estimate and the reported interval."""
    boot = results["bootstrap"]
    if boot is None:
        return None
    rows = [
        r
        for r in (_by_kind(results, "target-aimed"), _by_kind(results, "prediction-loss"))
        if r is not None and r["name"] in boot["estimates"]
    ]
    if not rows:
        return None
    fig = Figure(figsize=(4.4 * len(rows), 3.4))
    axes = np.atleast_1d(fig.subplots(1, len(rows), sharex=True, squeeze=False)[0])
    for ax, row in zip(axes, rows):
        reps = np.array([_num(v) for v in boot["estimates"][row["name"]]])
        reps = reps[np.isfinite(reps)]
        colour = MAIN_COLOUR if row["kind"] == "target-aimed" else STACK_COLOUR
        # Replicates equal up to round-off (a constant outcome) leave no room for 30 bins.
        spread = reps.size and np.ptp(reps) > 1e-9 * np.abs(reps).max()
        ax.hist(reps, bins=30 if spread else 1, color=colour, alpha=0.75)
        ax.axvspan(
            _num(row["low"]),
            _num(row["high"]),
            color=colour,
            alpha=0.12,
            label=f"{boot['method']} interval",
        )
        ax.axvline(_num(row["estimate"]), color="black", lw=1.2, label="estimate")
        ax.set_title(f"{label(row['name'], 36)}\n{len(reps)} replicates")
        ax.set_xlabel("replicate estimate")
        ax.yaxis.set_major_locator(MaxNLocator(integer=True))
        ax.legend(loc="upper left", fontsize=7.5)
    axes[0].set_ylabel("replicates")
    return fig


def overlap(results: dict) -> Figure | None:
    """Blended propensity by arm (stored histogram counts), treated above and controls below,
    with the clipping bounds."""
    diag = results["diagnostics"]
    hist = diag["overlap_histogram"]
    if hist is None:
        return None
    edges = np.array(hist["edges"], dtype=float)
    fig = Figure(figsize=(8, 3.6))
    ax = fig.add_subplot()
    sizes = diag["arm_sizes"] or {}
    for arm, sign, colour in (("treated", 1, MAIN_COLOUR), ("control", -1, STACK_COLOUR)):
        counts = np.array(hist["counts"].get(arm, []), dtype=float)
        if counts.size:
            ax.stairs(
                sign * counts,
                edges,
                fill=True,
                color=colour,
                alpha=0.8,
                label=f"{arm} (n = {sizes.get(arm, int(counts.sum()))})",
            )
    clip = diag["clip"]
    for bound in (clip, 1 - clip):
        ax.axvline(bound, color="black", ls="--", lw=1)
    ax.text(clip, 1.0, f" clip {clip:g}", transform=ax.get_xaxis_transform(), va="top", fontsize=8)
    ax.text(
        1 - clip,
        1.0,
        f"clip {1 - clip:g} ",
        transform=ax.get_xaxis_transform(),
        va="top",
        ha="right",
        fontsize=8,
    )
    ax.axhline(0, color="black", lw=0.6)
    ticks = ax.get_yticks()
    ax.set_yticks(ticks, [f"{abs(t):g}" for t in ticks])
    ax.set_xlim(0, 1)
    ax.set_xlabel("blended propensity P(treated | covariates)")
    ax.set_ylabel("rows (controls below the line)")
    ax.set_title("Propensity overlap by arm")
    ax.legend(frameon=False, loc="lower right")
    return fig


def selection_stability(results: dict) -> Figure | None:
    """Share of bootstrap replicates in which each learner received weight (above 1%)."""
    boot = results["bootstrap"]
    if boot is None:
        return None
    freq = boot["selection_frequency"]
    sides = [s for s in ("propensity", "outcome") if freq.get(s)]
    if not sides:
        return None
    fig = Figure(figsize=(9, 1.4 + 0.45 * max(len(freq[s]) for s in sides)))
    axes = fig.subplots(1, len(sides), squeeze=False, gridspec_kw={"wspace": 0.45})[0]
    for ax, side in zip(axes, sides):
        names = list(freq[side])
        y = np.arange(len(names))[::-1]
        share = [_num(freq[side][n]["share_weighted"]) for n in names]
        mean = [_num(freq[side][n]["mean_weight"]) for n in names]
        ax.barh(y, share, color=MAIN_COLOUR, height=0.6)
        for yi, s, m in zip(y, share, mean):
            ax.text(
                min(s, 1.0) + 0.02, yi, f"{s:.0%}, mean weight {m:.2f}", va="center", fontsize=7.5
            )
        ax.set_yticks(y, [label(n, 22) for n in names])
        ax.set_xlim(0, 1.55)
        ax.set_xticks([0, 0.25, 0.5, 0.75, 1.0], ["0", "25%", "50%", "75%", "100%"])
        ax.set_xlabel("share of replicates with weight > 1%")
        ax.set_title(f"{side} learners")
    return fig


FIGURES = {
    "estimators": estimator_forest,
    "weights": weight_bars,
    "pair_table": pair_heatmap,
    "sensitivity": sensitivity_profiles,
    "landscape": landscape,
    "bootstrap": bootstrap_histograms,
    "overlap": overlap,
    "stability": selection_stability,
}


def render_figures(results: dict) -> dict:
    """PNG bytes of every figure that applies to these results: ``{name: bytes}``."""
    out = {}
    with figure_style():
        for name, build in FIGURES.items():
            fig = build(results)
            if fig is not None:
                out[name] = render_png(fig)
    return out
