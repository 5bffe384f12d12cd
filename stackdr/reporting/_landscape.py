"""The pseudo-risk landscape: the sensitivity over each side's weight simplex from the pair
table (linear, riesz blend), as a ternary map for a side with three learners and as edge slices
otherwise, with the chosen and the prediction-loss weights and the tie-break bound marked."""

from __future__ import annotations

from itertools import combinations

import matplotlib
import numpy as np
from matplotlib.figure import Figure
from matplotlib.tri import Triangulation

from stackdr.core import value_range
from stackdr.reporting._style import (
    COLUMN_WIDTH,
    EDGE_POINTS,
    SMALL,
    STACK_COLOUR,
    STYLE,
    TERNARY_RESOLUTION,
    _array,
    _by_kind,
    _num,
    unit_text,
    wrap,
)
from stackdr.search import simplex_lattice


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


def _tie_break_bound(results: dict, side: str):
    """The tie-break bound (smallest sensitivity + tolerance) on a side, or None."""
    for step in results["tie_break"]["steps"]:
        if step["side"] in (side, "both") and step["bound"] is not None:
            return _num(step["bound"])
    return None


def _ternary_panel(ax, fig, V, names, mask, chosen, stacked, bound, unit) -> None:
    weights, values = ternary_surface(V, mask)
    x, y = ternary_xy(weights)
    grid = Triangulation(x, y)
    contour = ax.tricontourf(grid, values, levels=12, cmap="viridis")
    fig.colorbar(contour, ax=ax, shrink=0.8, label=f"sensitivity ({unit})")
    if bound is not None and values.min() < bound < values.max():
        ax.tricontour(grid, values, levels=[bound], colors="white", linewidths=1.2, linestyles="--")
    corners_x, corners_y = ternary_xy(np.eye(3))
    ax.plot(np.append(corners_x, corners_x[0]), np.append(corners_y, corners_y[0]), "k-", lw=0.8)
    offsets = [
        (0.0, -0.05, "center", "top"),
        (0.0, -0.05, "center", "top"),
        (0.0, 0.03, "center", "bottom"),
    ]
    for cx, cy, name, (dx, dy, ha, va) in zip(corners_x, corners_y, names, offsets):
        ax.text(cx + dx, cy + dy, wrap(name, 14), ha=ha, va=va, fontsize=SMALL)
    cx, cy = ternary_xy(chosen)
    ax.plot(cx, cy, "*", color="white", mec="black", ms=10, label="target-aimed weights")
    if stacked is not None:
        sx, sy = ternary_xy(stacked)
        ax.plot(
            sx, sy, "o", color=STACK_COLOUR, mec="black", ms=5, label="prediction-loss stacking"
        )
    if bound is not None:
        ax.plot([], [], color="black", ls="--", lw=1.2, label="tie-break bound")
    ax.set_xlim(-0.1, 1.1)
    ax.set_ylim(-0.2, 0.98)
    ax.set_aspect("equal")
    ax.axis("off")


def _edge_panel(ax, V, names, mask, chosen, stacked, bound, unit) -> None:
    t, slices = edge_slices(V, mask)
    colours = matplotlib.colormaps["tab10"]
    for i, ((k, l), values) in enumerate(slices.items()):
        ax.plot(
            t,
            values,
            color=colours(i % 10),
            lw=1.2,
            label=f"{wrap(names[k], 40)} \u2192 {wrap(names[l], 40)}",
        )
    if bound is not None:
        # A line collection, not a line: the lines of the axes stay the edge slices.
        ax.hlines(bound, 0, 1, colors="black", linestyles="--", lw=1, label="tie-break bound")
    marks = [(chosen, "*", "white", 80, "target-aimed weights")]
    if stacked is not None:
        marks.append((stacked, "o", STACK_COLOUR, 25, "prediction-loss stacking"))
    for w, marker, colour, size, text in marks:
        level = value_range(w[None] @ V, mask)[0]
        # With two learners the single edge is the whole simplex, so the weights lie on it;
        # with more, the weights are inside the simplex and only their sensitivity is marked.
        where = w[1] if V.shape[0] == 2 else 1.02
        ax.scatter(
            where,
            level,
            marker=marker,
            s=size,
            color=colour,
            edgecolors="black",
            zorder=3,
            label=text,
            clip_on=False,
        )
    ax.set_xlabel("share of the second learner (0: first only)")
    ax.set_ylabel(f"sensitivity ({unit})")
    ax.set_ylim(bottom=0)


def landscape(results: dict) -> Figure:
    """Sensitivity over each side's simplex from the pair table (linear, riesz blend): a ternary
    map for a side with three learners, else the sensitivity along every edge; the chosen and
    the prediction-loss weights and the tie-break bound are marked."""
    sides = ("propensity", "outcome")
    kinds = [landscape_kind(len(results["weights"][s])) for s in sides]
    heights = [3.0 if k == "ternary" else 2.4 if k == "edges" else 0.6 for k in kinds]
    fig = Figure(figsize=(COLUMN_WIDTH, sum(heights) + 1.4), layout="constrained")
    subfigs = fig.subfigures(2, 1, height_ratios=heights)
    axes = [sub.add_subplot() for sub in subfigs]
    titles = {
        "propensity": "Propensity weights: range across outcome learners",
        "outcome": "Outcome weights: range across propensity learners",
    }
    for sub, ax, side, kind in zip(subfigs, axes, sides, kinds):
        V, names, mask, chosen, stacked = side_inputs(results, side)
        bound = _tie_break_bound(results, side)
        sub.suptitle(wrap(titles[side], 60), fontsize=STYLE["axes.titlesize"], x=0.02, ha="left")
        if kind == "ternary":
            _ternary_panel(ax, sub, V, names, mask, chosen, stacked, bound, unit_text(results))
        elif kind == "edges":
            _edge_panel(ax, V, names, mask, chosen, stacked, bound, unit_text(results))
        else:
            ax.axis("off")
            ax.text(0.5, 0.5, f"one {side} learner: nothing to weigh", ha="center")
            continue
        sub.legend(
            *ax.get_legend_handles_labels(),
            loc="outside lower center",
            ncol=2,
            frameon=False,
            fontsize=SMALL,
        )
    return fig
