"""A self-contained HTML report built only from a results dict (see :mod:`stackdr.io`).

Page shell, style, escaping, tables and inline images come from :mod:`._html`: figures are
embedded as base64 PNG data URIs (and also written to ``figures/``); no network, no scripts, no
external style sheets; every piece of user text (column and learner names, titles, notes) is
HTML-escaped. The same results dict always gives the same bytes, so a report rebuilt
from ``results.json`` equals the original.
"""

from __future__ import annotations

import json
import pathlib

from stackdr.io import atomic_write, plain, validate_results
from stackdr.reporting._figures import FIGURES, landscape_kind, render_figures
from stackdr.reporting._html import escape, figure, number_text, page, paragraph, table
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


def _json_text(value) -> str:
    return value if isinstance(value, str) else json.dumps(value, ensure_ascii=False)


def _figure(figures: dict, name: str, caption: str) -> str:
    return figure(figures[name], caption, ident=f"figure-{name}")


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


def _job(r: dict) -> str:
    data, diag = r["data"], r["diagnostics"]
    pairs = r["pair_table"]
    out = paragraph(
        f"What was estimated, from which data, and with which settings. The report was built from "
        f"a saved results file (schema {r['schema']}, stackdr {r['package_version']}) and can be "
        "rebuilt from it at any time."
    )
    out += table(
        ["item", "value"],
        [
            ["target", f"{r['target']['name']}: {r['target']['description']}"],
            ["rows (n)", r["n"]],
            ["treatment column", data["treatment"]],
            ["outcome column", data["outcome"]],
            ["covariates", ", ".join(data["covariates"])],
            ["propensity learners", ", ".join(pairs["rows"])],
            ["outcome learners", ", ".join(pairs["columns"])],
            ["seed", r["seed"]],
        ],
    )
    out += "<h3>Settings</h3>\n" + table(
        ["setting", "value"], [[k, _json_text(v)] for k, v in r["settings"].items()]
    )
    out += "<h3>Learners: out-of-fold prediction loss</h3>\n"
    out += paragraph(
        "Each learner's loss on rows it was not trained on (lower is better) and its weight in "
        "prediction-loss stacking."
    )
    out += table(
        ["side", "learner", "loss", "metric", "stacking weight", "fit seconds"],
        [
            [
                x["side"],
                x["learner"],
                x["loss"],
                x["metric"],
                x["stacking_weight"],
                x["fit_seconds"],
            ]
            for x in diag["learners"]
        ],
    )
    if diag["failed_learners"]:
        out += "<h3>Learners that failed</h3>\n" + table(
            ["side", "learner", "reason"],
            [[x["side"], x["learner"], x["reason"]] for x in diag["failed_learners"]],
        )
    if diag["notes"]:
        out += "<h3>Notes from data validation</h3>\n<ul>\n"
        out += "".join(f"<li>{escape(note)}</li>\n" for note in diag["notes"])
        out += "</ul>\n"
    out += "<h3>Timings (seconds)</h3>\n" + table(
        ["stage", "seconds"], [[k, v] for k, v in r["timings"].items()]
    )
    return out


def _headline(r: dict) -> str:
    iv = r["interval"]
    sens = r["sensitivities"]
    main = r["estimators"][0]
    out = paragraph(
        "The target-aimed estimate: learner weights chosen so that the estimate moves as little "
        "as possible when either learner library is swapped, then the doubly robust estimate at "
        "those weights."
    )
    estimate = escape(number_text(r["estimate"]))
    out += (
        f'<p class="headline">{escape(r["target"]["name"])} = <strong>{estimate}'
        f"</strong> (SE {escape(number_text(r['se'], 3))}); {100 * iv['level']:g}% interval "
        f"{escape(number_text(iv['low']))} to "
        f"{escape(number_text(iv['high']))}</p>\n"
    )
    out += paragraph(f"Interval: {interval_description(r)}.")
    if iv["method"] != "wald":
        out += paragraph(
            f"For comparison, the Wald interval is {number_text(main['wald_low'])} to "
            f"{number_text(main['wald_high'])} and the bootstrap standard error is "
            f"{number_text(main['bootstrap_se'], 3)}."
        )
    out += paragraph(
        "Sensitivities at the chosen weights: outcome direction "
        f"{number_text(sens['outcome_direction'], 3)}, weight direction "
        f"{number_text(sens['weight_direction'], 3)}; pseudo-risk "
        f"{number_text(r['pseudo_risk'], 3)}."
    )
    return out


def _estimators(r: dict, figs: dict) -> str:
    out = paragraph(
        "Every estimator computed on the same folds and predictions. Coloured bars are the "
        "reported intervals (bootstrap when run); the grey bars below them are Wald intervals, "
        "which ignore the choice of weights. Pseudo-risk is the criterion the target-aimed "
        "weights minimise (lower means less sensitive to swapping learners)."
    )
    out += _figure(figs, "estimators", "Estimators with their intervals")
    if any(x["name"] == SMOOTHED for x in r["estimators"]):
        out += paragraph(
            f"The {SMOOTHED} weighs every single pair by exp(-R / scale), R its mixed-minimax "
            "pseudo-risk and the scale the smallest R (at least a hundredth of the median squared "
            "pair standard error). The pair weights are the products of the propensity and "
            "outcome weights shown for it, so it equals the riesz blend at those weights."
        )
    out += table(
        [
            "estimator",
            "kind",
            "estimate",
            "SE",
            "low",
            "high",
            "interval",
            "Wald low",
            "Wald high",
            "pseudo-risk",
        ],
        [
            [
                x["name"],
                x["kind"],
                x["estimate"],
                x["se"],
                x["low"],
                x["high"],
                x["interval_method"],
                x["wald_low"],
                x["wald_high"],
                x["pseudo_risk"],
            ]
            for x in r["estimators"]
        ],
    )
    return out


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
            f"Tie-break: among weights whose sensitivity is within {number_text(tb['scale'], 3)} "
            "standard errors of the smallest, the ones closest to the prediction-loss stacking "
            f"weights are taken. It {'moved' if tb['moved'] else 'did not move'} the weights."
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
    rows = [
        [name] + [f"{number_text(v)} ({number_text(s, 2)})" for v, s in zip(vals, ses)]
        for name, vals, ses in zip(pairs["rows"], pairs["values"], pairs["standard_errors"])
    ]
    return out + table(["propensity \\ outcome"] + pairs["columns"], rows)


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
            "(--bootstrap-kind refit) includes it."
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
        f"Out-of-fold propensities clipped to [{number_text(diag['clip'])}, "
        f"{number_text(1 - diag['clip'])}], per learner:"
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
    """The report as an HTML string (figures: ``{name: png bytes}`` from render_figures)."""
    r = results
    title = title if title is not None else f"stackdr report: {r['target']['description']}"
    bodies = {
        "job": _job(r),
        "headline": _headline(r),
        "estimators": _estimators(r, figures),
        "weights": _weights(r, figures),
        "pairs": _pairs(r, figures),
        "sensitivity": _sensitivity(r, figures),
        "landscape": _landscape(r, figures),
        "bootstrap": _bootstrap(r, figures),
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


def write_report(results: dict, out_dir, *, title: str | None = None) -> pathlib.Path:
    """Write ``out_dir/report.html`` and every figure as ``out_dir/figures/<name>.png``.

    Built only from the results dict, so a report rebuilt from the saved ``results.json`` is
    byte-identical to the original. Existing report files in ``out_dir`` are replaced; figure
    files of ours that no longer apply (e.g. bootstrap figures) are removed.

    Parameters
    ----------
    results : dict
        From :func:`stackdr.io.result_to_dict` or :func:`stackdr.io.read_results_json`;
        validated here.
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
        path = folder / f"{name}.png"
        if name in figures:
            atomic_write(path, figures[name], overwrite=True)
        else:
            path.unlink(missing_ok=True)
    page = report_html(results, figures, title=title)
    return atomic_write(out_dir / "report.html", page.encode("utf-8"), overwrite=True)
