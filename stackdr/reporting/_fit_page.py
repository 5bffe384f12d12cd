"""A self-contained HTML report built only from a results dict (see :mod:`stackdr.serialise`).

Figures are embedded as base64 PNG data URIs and also written to ``figures/``; no network, no
scripts, no external style sheets. Every piece of user text (column and learner names, titles,
notes) is HTML-escaped. The same results dict always gives the same bytes, so a report rebuilt
from ``results.json`` equals the original.
"""

from __future__ import annotations

import base64
import html
import json
import pathlib

from stackdr.io import atomic_write, plain, validate_results
from stackdr.reporting._figures import FIGURES, landscape_kind, render_figures

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
CSS = """
body { font-family: system-ui, -apple-system, "Segoe UI", Helvetica, Arial, sans-serif;
       max-width: 60rem; margin: 2rem auto; padding: 0 1rem; color: #222; line-height: 1.45; }
h1 { font-size: 1.6rem; } h2 { font-size: 1.25rem; border-bottom: 1px solid #ddd;
     padding-bottom: .2rem; margin-top: 2.2rem; }
p.explain { color: #444; }
table { border-collapse: collapse; margin: .6rem 0 1rem; font-size: .9rem; }
th, td { border: 1px solid #ddd; padding: .25rem .55rem; text-align: left; vertical-align: top; }
td.num { text-align: right; font-variant-numeric: tabular-nums; }
th { background: #f4f4f4; }
figure { margin: 1rem 0; } figure img { max-width: 100%; height: auto; }
figcaption { font-size: .85rem; color: #555; }
.headline { font-size: 1.3rem; background: #eef4fa; padding: .7rem 1rem; border-radius: 4px; }
.note { background: #fff6e5; padding: .5rem .8rem; border-left: 3px solid #e0a030; }
nav ol { columns: 2; font-size: .9rem; }
"""


def _e(text) -> str:
    return html.escape(str(text), quote=True)


def _fmt(value, digits: int = 4) -> str:
    if value is None:
        return "n/a"
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return str(value)
    return f"{value:.{digits}g}"


def _cell(value) -> str:
    if isinstance(value, (int, float)) and not isinstance(value, bool) or value is None:
        return f'<td class="num">{_e(_fmt(value))}</td>'
    return f"<td>{_e(value)}</td>"


def _table(headers, rows) -> str:
    head = "".join(f"<th>{_e(h)}</th>" for h in headers)
    body = "".join("<tr>" + "".join(_cell(v) for v in row) + "</tr>\n" for row in rows)
    return f"<table>\n<tr>{head}</tr>\n{body}</table>\n"


def _p(text: str, cls: str = "explain") -> str:
    return f'<p class="{cls}">{_e(text)}</p>\n'


def _figure(name: str, png: bytes, caption: str) -> str:
    data = base64.b64encode(png).decode("ascii")
    return (
        f'<figure id="figure-{_e(name)}"><img src="data:image/png;base64,{data}" '
        f'alt="{_e(caption)}">\n<figcaption>{_e(caption)}</figcaption></figure>\n'
    )


def _json_text(value) -> str:
    return value if isinstance(value, str) else json.dumps(value, ensure_ascii=False)


def _by_kind(results: dict, kind: str) -> dict | None:
    return next((row for row in results["estimators"] if row["kind"] == kind), None)


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
    table = r["pair_table"]
    out = _p(
        f"What was estimated, from which data, and with which settings. The report was built from "
        f"a saved results file (schema {r['schema']}, stackdr {r['package_version']}) and can be "
        "rebuilt from it at any time."
    )
    out += _table(
        ["item", "value"],
        [
            ["target", f"{r['target']['name']}: {r['target']['description']}"],
            ["rows (n)", r["n"]],
            ["treatment column", data["treatment"]],
            ["outcome column", data["outcome"]],
            ["covariates", ", ".join(data["covariates"])],
            ["propensity learners", ", ".join(table["rows"])],
            ["outcome learners", ", ".join(table["columns"])],
            ["seed", r["seed"]],
        ],
    )
    out += "<h3>Settings</h3>\n" + _table(
        ["setting", "value"], [[k, _json_text(v)] for k, v in r["settings"].items()]
    )
    out += "<h3>Learners: out-of-fold prediction loss</h3>\n"
    out += _p(
        "Each learner's loss on rows it was not trained on (lower is better) and its weight in "
        "prediction-loss stacking."
    )
    out += _table(
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
        out += "<h3>Learners that failed</h3>\n" + _table(
            ["side", "learner", "reason"],
            [[x["side"], x["learner"], x["reason"]] for x in diag["failed_learners"]],
        )
    if diag["notes"]:
        out += "<h3>Notes from data validation</h3>\n<ul>\n"
        out += "".join(f"<li>{_e(note)}</li>\n" for note in diag["notes"])
        out += "</ul>\n"
    out += "<h3>Timings (seconds)</h3>\n" + _table(
        ["stage", "seconds"], [[k, v] for k, v in r["timings"].items()]
    )
    return out


def _headline(r: dict) -> str:
    iv = r["interval"]
    sens = r["sensitivities"]
    main = r["estimators"][0]
    out = _p(
        "The target-aimed estimate: learner weights chosen so that the estimate moves as little "
        "as possible when either learner library is swapped, then the doubly robust estimate at "
        "those weights."
    )
    out += (
        f'<p class="headline">{_e(r["target"]["name"])} = <strong>{_e(_fmt(r["estimate"]))}'
        f"</strong> (SE {_e(_fmt(r['se'], 3))}); {100 * iv['level']:g}% interval "
        f"{_e(_fmt(iv['low']))} to "
        f"{_e(_fmt(iv['high']))}</p>\n"
    )
    out += _p(f"Interval: {interval_description(r)}.")
    if iv["method"] != "wald":
        out += _p(
            f"For comparison, the Wald interval is {_fmt(main['wald_low'])} to "
            f"{_fmt(main['wald_high'])} and the bootstrap standard error is "
            f"{_fmt(main['bootstrap_se'], 3)}."
        )
    out += _p(
        "Sensitivities at the chosen weights: outcome direction "
        f"{_fmt(sens['outcome_direction'], 3)}, weight direction "
        f"{_fmt(sens['weight_direction'], 3)}; pseudo-risk {_fmt(r['pseudo_risk'], 3)}."
    )
    return out


def _estimators(r: dict, figs: dict) -> str:
    out = _p(
        "Every estimator computed on the same folds and predictions. Coloured bars are the "
        "reported intervals (bootstrap when run); the grey bars below them are Wald intervals, "
        "which ignore the choice of weights. Pseudo-risk is the criterion the target-aimed "
        "weights minimise (lower means less sensitive to swapping learners)."
    )
    out += _figure("estimators", figs["estimators"], "Estimators with their intervals")
    out += _table(
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
    out = _p(
        "How much each learner contributes to the blended propensity and outcome models, for "
        "the target-aimed weights and for prediction-loss stacking (weights chosen for "
        "prediction accuracy alone). Weights on each side are non-negative and sum to one."
    )
    out += _figure("weights", figs["weights"], "Weights of the propensity and outcome learners")
    if tb["enabled"]:
        out += _p(
            f"Tie-break: among weights whose sensitivity is within {_fmt(tb['scale'], 3)} "
            "standard errors of the smallest, the ones closest to the prediction-loss stacking "
            f"weights are taken. It {'moved' if tb['moved'] else 'did not move'} the weights."
        )
        out += _table(
            ["step", "side", "tolerance", "bound", "moved"],
            [
                [s["step"], s["side"], s["tolerance"], s["bound"], "yes" if s["moved"] else "no"]
                for s in tb["steps"]
            ],
        )
    else:
        out += _p("Tie-break: off (the weights are the pure minimiser of the pseudo-risk).")
    out += "<h3>Solver records</h3>\n" + _table(
        ["step", "method", "status", "objective", "seconds"],
        [
            [s["step"], s["method"], s["status"], s["objective"], s["seconds"]]
            for s in r["solver_records"]
        ],
    )
    return out


def _pairs(r: dict, figs: dict) -> str:
    table = r["pair_table"]
    out = _p(
        "The doubly robust estimate for every single pair of one propensity learner (rows) and "
        "one outcome learner (columns), with its standard error in brackets. Colours are centred "
        "on the target-aimed estimate: red above it, blue below. A row that changes little "
        "across columns means that propensity learner makes the estimate insensitive to the "
        "outcome model, and vice versa."
    )
    out += _figure("pair_table", figs["pair_table"], "Pair table as a heat map")
    rows = [
        [name] + [f"{_fmt(v)} ({_fmt(s, 2)})" for v, s in zip(vals, ses)]
        for name, vals, ses in zip(table["rows"], table["values"], table["standard_errors"])
    ]
    return out + _table(["propensity \\ outcome"] + table["columns"], rows)


def _ranges(values: list, names: list, keep: list) -> tuple:
    used = [v for v, n in zip(values, names) if n in keep and v is not None]
    if not used:
        return None, None, None
    return min(used), max(used), max(used) - min(used)


def _sensitivity(r: dict, figs: dict) -> str:
    table = r["pair_table"]
    sens = r["sensitivities"]
    dirs = sens["direction_learners"]
    out = _p(
        "For each propensity learner, the spread of its row of the pair table across outcome "
        "learners (how much the estimate moves when only the outcome learner is swapped), and "
        "for each outcome learner the spread of its column across propensity learners. The "
        "last line of each panel is the same spread at the chosen weights, which the "
        "target-aimed search keeps small. Crosses mark learners left out of the ranges (when "
        "only credible learners define the perturbations)."
    )
    out += _figure("sensitivity", figs["sensitivity"], "Sensitivity profiles")
    cols, rows_ = table["columns"], table["rows"]
    body = []
    for name, vals in zip(rows_, table["values"]):
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
        column = [row[j] for row in table["values"]]
        body.append(["outcome", name, *_ranges(column, rows_, dirs["propensity"])])
    body.append(
        [
            "outcome",
            "chosen weights",
            *_ranges(list(at["by_propensity_learner"].values()), rows_, dirs["propensity"]),
        ]
    )
    return out + _table(["side", "learner", "lowest", "highest", "range"], body)


def _landscape(r: dict, figs: dict) -> str:
    table = r["pair_table"]
    kinds = {
        "propensity": landscape_kind(len(table["rows"])),
        "outcome": landscape_kind(len(table["columns"])),
    }
    words = {
        "ternary": "a ternary map over all weights of its three learners",
        "edges": "edge slices: the sensitivity along the straight path between each pair of "
        "learners (the edges of the weight simplex)",
        "single": "nothing to show (a single learner)",
    }
    out = _p(
        "How the sensitivity changes as the weights move. Left: the outcome-direction "
        "sensitivity (range of the estimate across outcome learners) as a function of the "
        "propensity weights; right: the weight-direction sensitivity as a function of the "
        "outcome weights. The mixed pseudo-risk is the sum of their squares. Both are computed "
        "from the pair table with the linear (riesz) blend, in which the estimate is exactly "
        "linear in each side's weights."
    )
    out += _p(
        f"Propensity side ({len(table['rows'])} learners): {words[kinds['propensity']]}. "
        f"Outcome side ({len(table['columns'])} learners): {words[kinds['outcome']]}."
    )
    blend = r["settings"].get("blend")
    if blend not in (None, "riesz"):
        out += _p(
            f"This fit used the {blend} blend, so the map is the linear approximation of its "
            "search, not the exact surface that was minimised.",
            "note",
        )
    return out + _figure("landscape", figs["landscape"], "Pseudo-risk landscape")


def _bootstrap(r: dict, figs: dict) -> str:
    boot = r["bootstrap"]
    if boot is None:
        return _p(
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
    out = _p(
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
        out += _figure("bootstrap", figs["bootstrap"], "Bootstrap distributions")
    out += _table(
        ["estimator", "bootstrap SE", "low", "high"],
        [
            [name, boot["standard_errors"].get(name), iv["low"], iv["high"]]
            for name, iv in boot["intervals"].items()
        ],
    )
    out += _p(
        f"The tie-break moved the weights in {_fmt(100 * (boot['tie_break_share'] or 0), 3)}% "
        "of replicates. Time per stage (seconds): "
        + ", ".join(f"{k} {_fmt(v, 3)}" for k, v in boot["seconds"].items())
        + "."
    )
    return out


def _overlap(r: dict, figs: dict) -> str:
    diag = r["diagnostics"]
    out = _p(
        "The blended propensity (probability of treatment given the covariates, at the chosen "
        "weights, on the probability scale) among treated rows and controls. Little overlap, or "
        "many rows near the clipping bounds (dashed), means some rows get very large weights "
        "and the estimate leans on few rows. The effective sample size (Kish) of the weight-side "
        "values tells how many equally weighted rows they are worth."
    )
    if "overlap" not in figs:
        return out + _p("The treatment is not binary, so there are no arms to compare.", "note")
    out += _figure("overlap", figs["overlap"], "Propensity overlap by arm")
    arms = list(diag["arm_sizes"] or {})
    out += _table(
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
    out += _p(
        f"Out-of-fold propensities clipped to [{_fmt(diag['clip'])}, "
        f"{_fmt(1 - diag['clip'])}], per learner:"
    )
    out += _table(
        ["propensity learner", "clipped low", "clipped high"],
        [[name, c["low"], c["high"]] for name, c in diag["clipping"].items()],
    )
    return out


def _stability(r: dict, figs: dict) -> str:
    if "stability" not in figs:
        return _p("No bootstrap was run, so selection stability is not available.", "note")
    return _p(
        "The share of bootstrap replicates in which each learner received weight above 1%, "
        "with its mean weight. Learners chosen in nearly every replicate are a stable part of "
        "the blend; low shares mean the choice is driven by noise."
    ) + _figure("stability", figs["stability"], "Selection stability across replicates")


def _cautions(r: dict) -> str:
    out = _p("Read the estimate with these limits in mind.")
    return out + "<ul>\n" + "".join(f"<li>{_e(c)}</li>\n" for c in r["cautions"]) + "</ul>\n"


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
    nav = "".join(f'<li><a href="#{key}">{_e(heading)}</a></li>' for key, heading in SECTIONS)
    sections = "".join(
        f'<section id="{key}">\n<h2>{i}. {_e(heading)}</h2>\n{bodies[key]}</section>\n'
        for i, (key, heading) in enumerate(SECTIONS, start=1)
    )
    return (
        '<!DOCTYPE html>\n<html lang="en">\n<head>\n<meta charset="utf-8">\n'
        '<meta name="viewport" content="width=device-width, initial-scale=1">\n'
        f"<title>{_e(title)}</title>\n<style>{CSS}</style>\n</head>\n<body>\n"
        f"<h1>{_e(title)}</h1>\n<nav><ol>{nav}</ol></nav>\n{sections}</body>\n</html>\n"
    )


def write_report(results: dict, out_dir, *, title: str | None = None) -> pathlib.Path:
    """Write ``out_dir/report.html`` and every figure as ``out_dir/figures/<name>.png``.

    Built only from the results dict, so a report rebuilt from the saved ``results.json`` is
    byte-identical to the original. Existing report files in ``out_dir`` are replaced; figure
    files of ours that no longer apply (e.g. bootstrap figures) are removed.

    Parameters
    ----------
    results : dict
        From :func:`stackdr.serialise.result_to_dict` or
        :func:`stackdr.serialise.read_results_json`; validated here.
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
