"""Figures of a saved result, drawn only from the results dict (see :mod:`stackdr.io`).

The figures draw; the maths they show comes from the core (:func:`stackdr.core.value_range`,
:func:`stackdr.search.simplex_lattice`) or is stored in the results. Every figure is a
:class:`matplotlib.figure.Figure` made without pyplot (no global state, no display needed) in
the column style of :mod:`._style`, and rendered to PNG, SVG and PDF, so the same results dict
always gives byte-identical files.
"""

from __future__ import annotations

import math

import matplotlib
import numpy as np
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.ticker import MaxNLocator

from stackdr.estimation import column_text
from stackdr.reporting._landscape import (
    edge_slices,
    landscape,
    landscape_kind,
    side_inputs,
    ternary_surface,
    ternary_xy,
)
from stackdr.reporting._style import (
    COLUMN_WIDTH,
    FORMATS,
    MAIN_COLOUR,
    OTHER_COLOUR,
    SMALL,
    STACK_COLOUR,
    STYLE,
    _array,
    _by_kind,
    _colour,
    _legend_below,
    _num,
    figure_style,
    label,
    render,
    unit_text,
    value_label,
    wrap,
)

__all__ = [
    "FIGURES",
    "edge_slices",
    "figure_style",
    "landscape",
    "landscape_kind",
    "render_figures",
    "side_inputs",
    "ternary_surface",
    "ternary_xy",
]


def estimator_forest(results: dict) -> Figure:
    """Forest-style plot: every estimator with its reported interval (and Wald interval)."""
    rows = results["estimators"]
    fig = Figure(figsize=(COLUMN_WIDTH, 1.5 + 0.32 * len(rows)), layout="constrained")
    ax = fig.add_subplot()
    y = np.arange(len(rows))[::-1]
    method = results["interval"]["method"]
    level = f"{100 * results['interval']['level']:g}%"
    for yi, row in zip(y, rows):
        colour = _colour(row["kind"])
        ax.plot(
            [_num(row["wald_low"]), _num(row["wald_high"])],
            [yi - 0.22] * 2,
            color="#b5b5b5",
            lw=1.4,
            solid_capstyle="butt",
        )
        ax.plot([_num(row["low"]), _num(row["high"])], [yi, yi], color=colour, lw=2.2)
        ax.plot([_num(row["estimate"])], [yi], "o", color=colour, ms=4.5)
    ax.axvline(_num(results["estimate"]), color=MAIN_COLOUR, ls=":", lw=1)
    ax.set_yticks(y, [wrap(r["name"], 18) for r in rows])
    ax.set_xlabel(value_label(results))
    ax.grid(axis="x", color="#e5e5e5", lw=0.5)
    handles = [
        Line2D(
            [],
            [],
            color=OTHER_COLOUR,
            lw=2.2,
            marker="o",
            ms=4.5,
            label=f"estimate, {level} {'Wald' if method == 'wald' else method} interval",
        ),
        Line2D([], [], color="#b5b5b5", lw=1.4, label=f"{level} Wald interval"),
        Line2D([], [], color=MAIN_COLOUR, ls=":", lw=1, label="target-aimed estimate"),
    ]
    _legend_below(fig, ax, (handles, [h.get_label() for h in handles]))
    return fig


def _barh_panel(ax, names, series, texts, title, xlabel) -> None:
    """Horizontal bars of one library: ``series`` is [(values, colour, label)]."""
    y = np.arange(len(names))[::-1]
    bar = 0.8 / len(series)
    for i, (values, colour, text) in enumerate(series):
        offset = (len(series) - 1) / 2 * bar - i * bar
        ax.barh(y + offset, values, height=bar, color=colour, label=text)
        if texts is not None and i == 0:
            for yi, v, t in zip(y, values, texts):
                inside = v > 0.62
                ax.text(
                    v - 0.02 if inside else v + 0.02,
                    yi + offset,
                    t,
                    va="center",
                    ha="right" if inside else "left",
                    fontsize=SMALL,
                    color="white" if inside else "black",
                )
    ax.set_yticks(y, [wrap(n, 16) for n in names])
    ax.set_xlim(0, 1)
    ax.set_xticks([0, 0.25, 0.5, 0.75, 1.0])
    ax.set_xlabel(xlabel)
    ax.set_title(title, loc="left")


def weight_bars(results: dict) -> Figure:
    """Weights of both libraries (panels stacked): target-aimed against prediction-loss
    stacking."""
    stack = _by_kind(results, "prediction-loss")
    sides = ("propensity", "outcome")
    heights = [len(results["weights"][s]) for s in sides]
    fig = Figure(
        figsize=(COLUMN_WIDTH, 1.3 + 0.34 * sum(heights) * (1.6 if stack else 1)),
        layout="constrained",
    )
    axes = fig.subplots(2, 1, height_ratios=heights)
    for ax, side in zip(axes, sides):
        chosen = [_num(v) for v in results["weights"][side].values()]
        series = [(chosen, MAIN_COLOUR, "target-aimed")]
        if stack is not None:
            stacked = [_num(v) for v in stack["weights"][side].values()]
            series.append((stacked, STACK_COLOUR, "prediction-loss stacking"))
        _barh_panel(
            ax,
            list(results["weights"][side]),
            series,
            [f"{w:.2f}" for w in chosen],
            f"{side} learners",
            "weight",
        )
    _legend_below(fig, axes[0], ncol=2)
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
    width = max(COLUMN_WIDTH, min(1.6 + 0.5 * K2, 7.0))
    fig = Figure(figsize=(width, 1.4 + 0.42 * K1), layout="constrained")
    ax = fig.add_subplot()
    image = ax.imshow(Psi, cmap="RdBu_r", vmin=centre - spread, vmax=centre + spread, aspect="auto")
    digits = results["presentation"]["digits"]
    values = np.array(column_text(Psi.ravel(), digits)).reshape(Psi.shape)
    ses = np.array(column_text(se.ravel(), digits)).reshape(se.shape)
    for k in range(K1):
        for j in range(K2):
            dark = abs(Psi[k, j] - centre) > 0.6 * spread
            ax.text(
                j,
                k,
                f"{values[k, j]}\n({ses[k, j]})",
                ha="center",
                va="center",
                fontsize=SMALL,
                color="white" if dark else "black",
            )
    ax.set_xticks(range(K2), [wrap(c, 12) for c in table["columns"]], rotation=35, ha="right")
    ax.set_yticks(range(K1), [wrap(r, 16) for r in table["rows"]])
    ax.set_xlabel("outcome learner")
    ax.set_ylabel("propensity learner")
    for spine in ax.spines.values():
        spine.set_visible(False)
    fig.colorbar(
        image,
        ax=ax,
        label=wrap(f"estimate ({unit_text(results)}); centre: target-aimed estimate", 34),
    )
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
            # by name, so a learner missing from the record shows as a gap, not a misalignment
            [_num(at["by_outcome_learner"].get(name)) for name in table["columns"]],
            directions["outcome"],
            "outcome learner",
        ),
        (
            "Swap the propensity learner",
            table["columns"],
            Psi.T,
            table["rows"],
            [_num(at["by_propensity_learner"].get(name)) for name in table["rows"]],
            directions["propensity"],
            "propensity learner",
        ),
    ]
    heights = [len(p[1]) + 1 + 0.5 * math.ceil(len(p[3]) / 2) for p in panels]
    fig = Figure(figsize=(COLUMN_WIDTH, 1.4 + 0.36 * sum(heights)), layout="constrained")
    subfigs = fig.subfigures(2, 1, height_ratios=heights)
    colours = matplotlib.colormaps["tab10"]
    for sub, (title, names, values, others, chosen, direction, other_kind) in zip(subfigs, panels):
        ax = sub.add_subplot()
        values = np.vstack([values, chosen])
        mask = np.isin(others, direction)
        mask = mask if mask.any() else np.ones(len(others), dtype=bool)
        y = np.arange(len(values))[::-1]
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
        for j, other in enumerate(others):
            ax.scatter(
                values[:, j],
                y,
                s=16,
                color=colours(j % 10),
                zorder=2,
                marker="o" if mask[j] else "x",
                label=wrap(other, 18),
            )
        ranges = column_text(
            [np.nanmax(r[mask]) - np.nanmin(r[mask]) for r in values],
            results["presentation"]["digits"],
        )
        ax.set_yticks(
            y, [f"{wrap(n, 16)}\nrange {r}" for n, r in zip([*names, "chosen weights"], ranges)]
        )
        ax.get_yticklabels()[-1].set_fontweight("bold")
        ax.set_ylim(y.min() - 0.6, y.max() + 0.6)
        ax.set_xlabel(value_label(results))
        ax.set_title(title, loc="left")
        sub.legend(
            *ax.get_legend_handles_labels(),
            title=other_kind,
            loc="outside lower center",
            ncol=2,
            frameon=False,
        )
    return fig


def bin_count(replicates: int) -> int:
    """Histogram bins for ``replicates`` values: the Rice rule 2 n^(1/3) (12 for 200)."""
    return max(1, math.ceil(2 * replicates ** (1 / 3)))


def bootstrap_histograms(results: dict) -> Figure | None:
    """Replicate estimates of every estimator (one panel each, shared axis), with the point
    estimate and the reported interval; bins from the replicate count."""
    boot = results["bootstrap"]
    if boot is None:
        return None
    rows = [r for r in results["estimators"] if r["name"] in boot["estimates"]]
    if not rows:
        return None
    reps = [np.array([_num(v) for v in boot["estimates"][r["name"]]]) for r in rows]
    reps = [v[np.isfinite(v)] for v in reps]
    pooled = np.concatenate(reps)
    # Replicates equal up to round-off (a constant outcome) leave no room for several bins.
    spread = pooled.size and np.ptp(pooled) > 1e-9 * np.abs(pooled).max()
    edges = np.histogram_bin_edges(pooled, bins=bin_count(boot["replicates"]) if spread else 1)
    fig = Figure(figsize=(COLUMN_WIDTH, 1.0 + 0.62 * len(rows)), layout="constrained")
    axes = fig.subplots(len(rows), 1, sharex=True, squeeze=False)[:, 0]
    level = f"{100 * boot['level']:g}%"
    for ax, row, values in zip(axes, rows, reps):
        colour = _colour(row["kind"])
        ax.hist(values, bins=edges, color=colour, alpha=0.8)
        ax.axvspan(
            _num(row["low"]),
            _num(row["high"]),
            color=colour,
            alpha=0.15,
            label=f"{level} {boot['method']} interval",
        )
        ax.axvline(_num(row["estimate"]), color="black", lw=1, label="estimate")
        ax.set_title(label(row["name"], 60), loc="left", fontsize=SMALL + 0.5, pad=2)
        ax.yaxis.set_major_locator(MaxNLocator(3, integer=True))
    axes[-1].set_xlabel(value_label(results, "replicate estimate"))
    fig.supylabel(f"replicates (of {boot['replicates']})", fontsize=STYLE["axes.labelsize"])
    _legend_below(fig, axes[0], ncol=2)
    return fig


def overlap(results: dict) -> Figure | None:
    """Blended propensity by arm (stored histogram counts), treated above and controls below,
    with the clipping bounds."""
    diag = results["diagnostics"]
    hist = diag["overlap_histogram"]
    if hist is None:
        return None
    edges = np.array(hist["edges"], dtype=float)
    fig = Figure(figsize=(COLUMN_WIDTH, 2.6), layout="constrained")
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
    ax.vlines(
        [clip, 1 - clip],
        0,
        1,
        transform=ax.get_xaxis_transform(),
        colors="black",
        linestyles="--",
        lw=0.8,
        label=f"clipping bounds {clip:g} and {1 - clip:g}",
    )
    ax.axhline(0, color="black", lw=0.6)
    ticks = ax.get_yticks()
    ax.set_yticks(ticks, [f"{abs(t):g}" for t in ticks])
    ax.set_xlim(0, 1)
    ax.set_xlabel("blended propensity P(treated | covariates)")
    ax.set_ylabel("rows (controls below 0)")
    _legend_below(fig, ax, ncol=2)
    return fig


def share_text(share: float) -> str:
    """A share as a percentage that never rounds a share below 1 up to 100% (or above 0 to 0%).

    Examples
    --------
    >>> share_text(0.995), share_text(1.0), share_text(0.42), share_text(0.004)
    ('99.5%', '100%', '42%', '0.4%')
    """
    pct = 100 * share
    if 99 < pct < 100 or 0 < pct < 1:
        return f"{min(pct, 99.9) if pct < 100 else pct:.1f}%"
    return f"{pct:.0f}%"


def selection_stability(results: dict) -> Figure | None:
    """Share of bootstrap replicates in which each learner received weight (above 1%)."""
    boot = results["bootstrap"]
    if boot is None:
        return None
    freq = boot["selection_frequency"]
    sides = [s for s in ("propensity", "outcome") if freq.get(s)]
    if not sides:
        return None
    heights = [len(freq[s]) for s in sides]
    fig = Figure(figsize=(COLUMN_WIDTH, 1.0 + 0.34 * sum(heights)), layout="constrained")
    axes = fig.subplots(len(sides), 1, squeeze=False, height_ratios=heights)[:, 0]
    for ax, side in zip(axes, sides):
        names = list(freq[side])
        share = [_num(freq[side][n]["share_weighted"]) for n in names]
        texts = [
            f"{share_text(s)}, mean weight {_num(freq[side][n]['mean_weight']):.2f}"
            for s, n in zip(share, names)
        ]
        _barh_panel(
            ax,
            names,
            [(share, MAIN_COLOUR, side)],
            texts,
            f"{side} learners",
            "share of replicates with weight > 1%",
        )
        ax.set_xticks([0, 0.25, 0.5, 0.75, 1.0], ["0", "25%", "50%", "75%", "100%"])
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
    """Every figure that applies to these results in every format:
    ``{name: {"png": bytes, "svg": bytes, "pdf": bytes}}``."""
    out = {}
    with figure_style():
        for name, build in FIGURES.items():
            fig = build(results)
            if fig is not None:
                out[name] = {fmt: render(fig, fmt) for fmt in FORMATS}
    return out
