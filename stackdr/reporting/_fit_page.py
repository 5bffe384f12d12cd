"""A self-contained HTML report built only from a results dict (see :mod:`stackdr.io`).

Page shell, style, escaping, tables and inline images come from :mod:`._html`: figures are
embedded as base64 PNG data URIs (and also written to ``figures/`` as PNG, SVG and PDF, which
the page links for full size); no network, no scripts, no external style sheets; every piece of
user text (column and learner names, titles, notes) is HTML-escaped. The comparison and the
pair table are also written to ``tables/`` as LaTeX and Markdown. The same results dict always
gives the same bytes, so a report rebuilt from ``results.json`` equals the original.
"""

from __future__ import annotations

import pathlib

from stackdr.estimation import (
    BLEND_MEANINGS,
    column_text,
    number_text,
    sampling_sentence,
    units_sentence,
)
from stackdr.io import atomic_write, plain, validate_results
from stackdr.reporting._figures import FIGURES, landscape_kind, render_figures
from stackdr.reporting._fit_job import digits_of, job_section
from stackdr.reporting._html import escape, figure, page, paragraph, table
from stackdr.reporting._style import FORMATS
from stackdr.reporting._tables import fit_tables, latex, markdown
from stackdr.search import SMOOTHED, STACKED_PROPENSITY

SECTIONS = (
    ("job", "Job and settings"),
    ("headline", "Headline estimate and interval"),
    ("estimators", "Comparison of estimators"),
    ("weights", "Weights of both libraries"),
    ("pairs", "Pair table"),
    ("sensitivity", "Sensitivity profiles"),
    ("landscape", "Pseudo-risk landscape"),
    ("bootstrap", "Bootstrap distribution"),
    ("overlap", "Propensity overlap"),
    ("stability", "Selection stability"),
    ("cautions", "Cautions"),
)


def _figure(figures: dict, name: str, caption: str) -> str:
    files = {fmt.upper(): f"figures/{name}.{fmt}" for fmt in FORMATS}
    return figure(figures[name]["png"], caption, ident=f"figure-{name}", files=files)


def interval_description(results: dict) -> str:
    """Plain-English name of the headline interval."""
    iv, boot = results["interval"], results["bootstrap"]
    level = f"{100 * iv['level']:g}%"
    if iv["method"] == "wald" or boot is None:
        return (
            f"{level} Wald interval (estimate \u00b1 z \u00d7 influence-function standard error); "
            "it ignores that the weights were chosen from the same data"
        )
    return (
        f"{level} bootstrap {iv['method']} interval from {boot['replicates']} {boot['kind']} "
        "bootstrap replicates, each rerunning the whole weight search, so it accounts for the "
        "choice of weights"
    )


# ------------------------------------------------------------------------------ sections


def _se_words(method: str) -> str:
    return "bootstrap SE" if method == "bootstrap" else "influence-function (Wald) SE"


def _headline(r: dict) -> str:
    iv = r["interval"]
    sens = r["sensitivities"]
    main = r["estimators"][0]
    digits = digits_of(r)
    out = paragraph(
        "The target-aimed estimate: learner weights chosen so that the estimate moves as little "
        "as possible when either learner library is swapped, then the doubly robust estimate at "
        "those weights."
    )
    estimate, low, high = column_text([r["estimate"], iv["low"], iv["high"]], digits)
    outcome = r["presentation"]["outcome_label"]
    out += (
        f'<p class="headline">{escape(r["target"]["name"])} = <strong>{escape(estimate)}'
        f"</strong> ({escape(_se_words(iv['se_method']))} {escape(number_text(r['se'], digits))}"
        f"); {100 * iv['level']:g}% interval {escape(low)} to {escape(high)}"
        + (f"<br><small>outcome: {escape(outcome)}</small>" if outcome else "")
        + "</p>\n"
    )
    out += paragraph(f"Interval: {interval_description(r)}.")
    out += paragraph(units_sentence(r["target"]["name"], outcome))
    data = r["data"]
    design = sampling_sentence(
        {"weights": data.get("weights"), "clusters": data.get("clusters")}, r["n"]
    )
    if design:
        few = (data.get("clusters") or {}).get("few")
        out += paragraph(design, "note" if few else "explain")
    if iv["method"] != "wald":
        wald_low, wald_high = column_text([main["wald_low"], main["wald_high"]], digits)
        out += paragraph(
            f"For comparison, the Wald interval is {wald_low} to {wald_high}, with the "
            f"influence-function SE {number_text(r['wald_se'], digits)}; it ignores the choice "
            "of weights."
        )
    for note in r["notes"][:1] if r["tie_break"]["at_prediction_loss_weights"] else []:
        out += paragraph(note, "note")
    out += paragraph(
        "Sensitivities at the chosen weights: outcome direction "
        f"{number_text(sens['outcome_direction'], digits)}, weight direction "
        f"{number_text(sens['weight_direction'], digits)}; pseudo-risk "
        f"{number_text(r['pseudo_risk'], digits)}."
    )
    return out


def _estimators(r: dict, figs: dict) -> str:
    digits = digits_of(r)
    out = paragraph(
        "Every estimator computed on the same folds and predictions. Coloured bars are the "
        "reported intervals (bootstrap when run); the grey bars below them are Wald intervals, "
        "which ignore the choice of weights; the dotted line marks the target-aimed estimate. "
        "Each row's SE is the one of the method its interval comes from (SE from). Pseudo-risk "
        "is the criterion the target-aimed weights minimise (lower means less sensitive to "
        "swapping learners), computed for each row's own weights and blend."
    )
    out += _figure(figs, "estimators", "Estimators with their intervals")
    if any(x["name"] == SMOOTHED for x in r["estimators"]):
        out += paragraph(
            f"The {SMOOTHED} weighs every single pair by exp(-R / scale), R its mixed-minimax "
            "pseudo-risk and the scale the smallest R (at least a hundredth of the median squared "
            "pair standard error). The pair weights are the products of the propensity and "
            "outcome weights shown for it, so it equals the riesz blend at those weights."
        )
    rows = r["estimators"]
    n = len(rows)
    keys = ("estimate", "low", "high", "wald_low", "wald_high")
    ends = column_text([x[k] for k in keys for x in rows], digits)
    columns = [ends[i * n : (i + 1) * n] for i in range(len(keys))]
    ses = column_text([x["se"] for x in rows] + [x["wald_se"] for x in rows], digits)
    unit = units_sentence(r["target"]["name"], r["presentation"]["outcome_label"])
    headers = [
        "estimator",
        "kind",
        "blend",
        "estimate",
        "SE",
        "SE from",
        "low",
        "high",
        "interval",
        "Wald SE",
        "Wald low",
        "Wald high",
        "pseudo-risk",
    ]
    body = [
        [
            x["name"],
            x["kind"],
            x["blend"],
            columns[0][i],
            ses[i],
            "Wald" if x["se_method"] == "wald" else "bootstrap",
            columns[1][i],
            columns[2][i],
            x["interval_method"],
            ses[n + i],
            columns[3][i],
            columns[4][i],
            x["pseudo_risk"],
        ]
        for i, x in enumerate(rows)
    ]
    numeric = {"estimate", "SE", "low", "high", "Wald SE", "Wald low", "Wald high"}
    out += table(headers, body, align_right=numeric, digits=digits)
    out += paragraph(unit)
    blends = sorted({x["blend"] for x in rows})
    out += paragraph(
        "Blend: how a row combines its propensity learners: "
        + "; ".join(f"{b}, {BLEND_MEANINGS.get(b, b)}" for b in blends)
        + "."
    )
    for note in r["notes"]:
        out += paragraph(note, "note")
    out += paragraph(
        "The comparison and the pair table are also written as LaTeX (booktabs) and Markdown "
        "in tables/ beside this report (comparison.tex, comparison.md, pair_table.tex, "
        "pair_table.md), with units and a caption."
    )
    return out


def _tie_break_outcome(tb: dict) -> str:
    moved = [s["side"] for s in tb["steps"] if s["moved"]]
    if not moved:
        return "It did not move the weights (the pure minimiser was already the closest)."
    text = f"It moved the {' and '.join(moved)} weights"
    if tb["at_prediction_loss_weights"]:
        return text + (
            " all the way onto the prediction-loss stacking weights: the data do not separate "
            "the two weightings at this noise level."
        )
    return text + " part of the way towards the prediction-loss stacking weights."


def _weights(r: dict, figs: dict) -> str:
    tb = r["tie_break"]
    out = paragraph(
        "How much each learner contributes to the blended propensity and outcome models, for "
        "the target-aimed weights and for prediction-loss stacking (weights chosen for "
        "prediction accuracy alone). Weights on each side are non-negative and sum to one."
    )
    out += _figure(figs, "weights", "Weights of the propensity and outcome learners")
    if tb["enabled"]:
        out += paragraph(
            f"Tie-break: among weights whose sensitivity is within {tb['scale']:g} "
            "standard errors of the smallest, the ones closest to the prediction-loss stacking "
            f"weights are taken. {_tie_break_outcome(tb)}"
        )
        out += table(
            ["step", "side", "tolerance", "bound", "moved"],
            [
                [s["step"], s["side"], s["tolerance"], s["bound"], "yes" if s["moved"] else "no"]
                for s in tb["steps"]
            ],
        )
    else:
        out += paragraph("Tie-break: off (the weights are the pure minimiser of the pseudo-risk).")
    out += "<h3>Solver records</h3>\n" + table(
        ["step", "method", "status", "objective", "seconds"],
        [
            [s["step"], s["method"], s["status"], s["objective"], s["seconds"]]
            for s in r["solver_records"]
        ],
    )
    return out


def _pairs(r: dict, figs: dict) -> str:
    pairs = r["pair_table"]
    out = paragraph(
        "The doubly robust estimate for every single pair of one propensity learner (rows) and "
        "one outcome learner (columns), with its standard error in brackets. Colours are centred "
        "on the target-aimed estimate: red above it, blue below. A row that changes little "
        "across columns means that propensity learner makes the estimate insensitive to the "
        "outcome model, and vice versa."
    )
    if STACKED_PROPENSITY in pairs["rows"]:
        out += paragraph(
            f"The row {STACKED_PROPENSITY!r} is the prediction-loss stacked propensity (the "
            "propensity learners blended on the probability scale with their prediction-loss "
            "stacking weights), searched over as one more propensity learner; with all the weight "
            "there and the outcome weights of prediction-loss stacking, the estimate is that of "
            "prediction-loss stacking."
        )
    out += _figure(figs, "pair_table", "Pair table as a heat map")
    width = len(pairs["columns"])
    digits = digits_of(r)
    values = column_text([v for row in pairs["values"] for v in row], digits)
    ses = column_text([v for row in pairs["standard_errors"] for v in row], digits)
    rows = [
        [name] + [f"{values[k * width + j]} ({ses[k * width + j]})" for j in range(width)]
        for k, name in enumerate(pairs["rows"])
    ]
    return out + table(
        ["propensity \\ outcome"] + pairs["columns"], rows, align_right=pairs["columns"]
    )


def _ranges(values: list, names: list, keep: list) -> tuple:
    used = [v for v, n in zip(values, names) if n in keep and v is not None]
    if not used:
        return None, None, None
    return min(used), max(used), max(used) - min(used)


def _sensitivity(r: dict, figs: dict) -> str:
    pairs = r["pair_table"]
    sens = r["sensitivities"]
    dirs = sens["direction_learners"]
    out = paragraph(
        "For each propensity learner, the spread of its row of the pair table across outcome "
        "learners (how much the estimate moves when only the outcome learner is swapped), and "
        "for each outcome learner the spread of its column across propensity learners. The "
        "last line of each panel is the same spread at the chosen weights, which the "
        "target-aimed search keeps small. Crosses mark learners left out of the ranges (when "
        "only credible learners define the perturbations)."
    )
    out += _figure(figs, "sensitivity", "Sensitivity profiles")
    cols, rows_ = pairs["columns"], pairs["rows"]
    body = []
    for name, vals in zip(rows_, pairs["values"]):
        body.append(["propensity", name, *_ranges(vals, cols, dirs["outcome"])])
    at = sens["at_chosen_weights"]
    body.append(
        [
            "propensity",
            "chosen weights",
            *_ranges(list(at["by_outcome_learner"].values()), cols, dirs["outcome"]),
        ]
    )
    for j, name in enumerate(cols):
        column = [row[j] for row in pairs["values"]]
        body.append(["outcome", name, *_ranges(column, rows_, dirs["propensity"])])
    body.append(
        [
            "outcome",
            "chosen weights",
            *_ranges(list(at["by_propensity_learner"].values()), rows_, dirs["propensity"]),
        ]
    )
    return out + table(["side", "learner", "lowest", "highest", "range"], body)


def _landscape(r: dict, figs: dict) -> str:
    pairs = r["pair_table"]
    kinds = {
        "propensity": landscape_kind(len(pairs["rows"])),
        "outcome": landscape_kind(len(pairs["columns"])),
    }
    words = {
        "ternary": "a ternary map over all weights of its three learners",
        "edges": "edge slices: the sensitivity along the straight path between each pair of "
        "learners (the edges of the weight simplex)",
        "single": "nothing to show (a single learner)",
    }
    out = paragraph(
        "How the sensitivity changes as the weights move. Left: the outcome-direction "
        "sensitivity (range of the estimate across outcome learners) as a function of the "
        "propensity weights; right: the weight-direction sensitivity as a function of the "
        "outcome weights. The mixed pseudo-risk is the sum of their squares. Both are computed "
        "from the pair table with the linear (riesz) blend, in which the estimate is exactly "
        "linear in each side's weights."
    )
    out += paragraph(
        f"Propensity side ({len(pairs['rows'])} learners): {words[kinds['propensity']]}. "
        f"Outcome side ({len(pairs['columns'])} learners): {words[kinds['outcome']]}."
    )
    blend = r["settings"].get("blend")
    if blend not in (None, "riesz"):
        out += paragraph(
            f"This fit used the {blend} blend, so the map is the linear approximation of its "
            "search, not the exact surface that was minimised.",
            "note",
        )
    return out + _figure(figs, "landscape", "Pseudo-risk landscape")


def _bootstrap(r: dict, figs: dict) -> str:
    boot = r["bootstrap"]
    if boot is None:
        return paragraph(
            "No bootstrap was run, so the intervals in this report are Wald intervals that "
            "ignore the choice of weights. Run with bootstrap replicates for selection-aware "
            "intervals.",
            "note",
        )
    how = (
        "resamples the rows and refits every learner"
        if boot["kind"] == "refit"
        else "reweights the rows, reusing the out-of-fold predictions,"
    )
    out = paragraph(
        f"Estimates from {boot['replicates']} {boot['kind']} bootstrap replicates. Each "
        f"replicate {how} and reruns the whole weight search, so the spread includes the "
        "uncertainty of choosing the weights. The shaded band is the "
        f"{boot['method']} interval; the black line is the estimate."
        + (
            ""
            if boot["kind"] == "refit"
            else " The learner fits are held fixed, so the variability of refitting the "
            "learners is left out; with unstable learners (e.g. unpenalised models on many "
            "features) this can make the interval too narrow, and the refit bootstrap "
            "(--bootstrap-kind refit) includes it; --calibration-refits M widens the interval "
            "by M refit replicates run on the same row draws."
        )
    )
    if "bootstrap" in figs:
        out += _figure(figs, "bootstrap", "Bootstrap distributions")
    out += table(
        ["estimator", "bootstrap SE", "low", "high"],
        [
            [name, boot["standard_errors"].get(name), iv["low"], iv["high"]]
            for name, iv in boot["intervals"].items()
        ],
    )
    out += paragraph(
        "The tie-break moved the weights in "
        f"{number_text(100 * (boot['tie_break_share'] or 0), 3)}% of replicates. Time per stage "
        "(seconds): "
        + ", ".join(f"{k} {number_text(v, 3)}" for k, v in boot["seconds"].items())
        + "."
    )
    return out


def _fold_check(r: dict) -> str:
    """The between-fold check: do the cross-fitting folds agree at the target-aimed nuisances?"""
    check = r["diagnostics"].get("fold_check")
    if check is None:
        return ""
    out = paragraph(
        "Between-fold check. Each cross-fitting fold is predicted by learners fitted on the "
        "other folds, so the estimates on the folds' own rows differ by sampling noise and by "
        "how much the refitted learners differ. " + check["sentence"],
        "note" if check["alert"] else "explain",
    )
    return out + table(
        ["fold", "estimate", "influence-function SE"],
        [
            [k + 1, est, se]
            for k, (est, se) in enumerate(zip(check["estimates"], check["standard_errors"]))
        ],
    )


def _overlap(r: dict, figs: dict) -> str:
    diag = r["diagnostics"]
    out = paragraph(
        "The blended propensity (probability of treatment given the covariates, at the chosen "
        "weights, on the probability scale) among treated rows and controls. Little overlap, or "
        "many rows near the clipping bounds (dashed), means some rows get very large weights "
        "and the estimate leans on few rows. The effective sample size (Kish) of the weight-side "
        "values tells how many equally weighted rows they are worth."
    )
    if "overlap" not in figs:
        return out + paragraph(
            "The treatment is not binary, so there are no arms to compare.", "note"
        )
    out += _figure(figs, "overlap", "Propensity overlap by arm")
    arms = list(diag["arm_sizes"] or {})
    out += table(
        ["arm", "rows", "lowest propensity", "highest propensity", "effective sample size"],
        [
            [
                arm,
                diag["arm_sizes"][arm],
                (diag["propensity_range"].get(arm) or {}).get("min"),
                (diag["propensity_range"].get(arm) or {}).get("max"),
                diag["effective_sample_size"].get(arm),
            ]
            for arm in arms
        ],
    )
    out += paragraph(
        f"Out-of-fold propensities clipped to [{diag['clip']:g}, {1 - diag['clip']:g}], per "
        "learner:"
    )
    out += table(
        ["propensity learner", "clipped low", "clipped high"],
        [[name, c["low"], c["high"]] for name, c in diag["clipping"].items()],
    )
    return out


def _stability(r: dict, figs: dict) -> str:
    if "stability" not in figs:
        return paragraph("No bootstrap was run, so selection stability is not available.", "note")
    return paragraph(
        "The share of bootstrap replicates in which each learner received weight above 1%, "
        "with its mean weight. Learners chosen in nearly every replicate are a stable part of "
        "the blend; low shares mean the choice is driven by noise."
    ) + _figure(figs, "stability", "Selection stability across replicates")


def _cautions(r: dict) -> str:
    out = paragraph("Read the estimate with these limits in mind.")
    return out + "<ul>\n" + "".join(f"<li>{escape(c)}</li>\n" for c in r["cautions"]) + "</ul>\n"


def report_html(results: dict, figures: dict, *, title: str | None = None) -> str:
    """The report as an HTML string (figures: ``{name: {"png": bytes, ...}}`` from
    render_figures)."""
    r = results
    title = title if title is not None else f"stackdr report: {r['target']['description']}"
    bodies = {
        "job": job_section(r),
        "headline": _headline(r),
        "estimators": _estimators(r, figures),
        "weights": _weights(r, figures),
        "pairs": _pairs(r, figures),
        "sensitivity": _sensitivity(r, figures),
        "landscape": _landscape(r, figures),
        "bootstrap": _bootstrap(r, figures) + _fold_check(r),
        "overlap": _overlap(r, figures),
        "stability": _stability(r, figures),
        "cautions": _cautions(r),
    }
    nav = "".join(f'<li><a href="#{key}">{escape(heading)}</a></li>' for key, heading in SECTIONS)
    sections = "".join(
        f'<section id="{key}">\n<h2>{i}. {escape(heading)}</h2>\n{bodies[key]}</section>\n'
        for i, (key, heading) in enumerate(SECTIONS, start=1)
    )
    return page(title, f"<nav><ol>{nav}</ol></nav>\n{sections}")


#: Table files written beside the report, by format.
TABLE_FORMATS = {"tex": latex, "md": markdown}


def write_report(results: dict, out_dir, *, title: str | None = None) -> pathlib.Path:
    """Write ``out_dir/report.html``, every figure as ``out_dir/figures/<name>.png``, ``.svg``
    and ``.pdf``, and the comparison and pair tables as ``out_dir/tables/<name>.tex`` and
    ``.md``.

    Built only from the results dict, so a report rebuilt from the saved ``results.json`` is
    byte-identical to the original. Existing report files in ``out_dir`` are replaced; figure
    files of ours that no longer apply (e.g. bootstrap figures) are removed.

    Parameters
    ----------
    results : dict
        From :func:`stackdr.io.result_to_dict` or :func:`stackdr.io.read_results_json`;
        validated here. Its ``presentation`` block sets the outcome label and the digits.
    out_dir : str or path-like
        Folder to write into (created when missing).
    title : str, optional
        Page title (default: "stackdr report: " and the target's description).

    Returns
    -------
    pathlib.Path
        Path of ``report.html``.
    """
    results = plain(results, "results")
    validate_results(results)
    out_dir = pathlib.Path(out_dir)
    figures = render_figures(results)
    folder = out_dir / "figures"
    for name in FIGURES:
        for fmt in FORMATS:
            path = folder / f"{name}.{fmt}"
            if name in figures:
                atomic_write(path, figures[name][fmt], overwrite=True)
            else:
                path.unlink(missing_ok=True)
    for paper_table in fit_tables(results):
        for suffix, render in TABLE_FORMATS.items():
            path = out_dir / "tables" / f"{paper_table.name}.{suffix}"
            atomic_write(path, render(paper_table).encode("utf-8"), overwrite=True)
    page = report_html(results, figures, title=title)
    return atomic_write(out_dir / "report.html", page.encode("utf-8"), overwrite=True)
