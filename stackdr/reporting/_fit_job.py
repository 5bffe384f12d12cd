"""The "Job and settings" section of the fit report: what was estimated from which data,
with which learners and settings, and where the numbers came from (provenance)."""

from __future__ import annotations

import json

from stackdr.estimation import column_text
from stackdr.reporting._html import escape, paragraph, table


def json_text(value) -> str:
    return value if isinstance(value, str) else json.dumps(value, ensure_ascii=False)


def digits_of(r: dict) -> int:
    return r["presentation"]["digits"]


def provenance_section(r: dict) -> str:
    prov = r["provenance"]
    source = prov["input"]
    rows = [["created (UTC)", prov["created_utc"]]]
    if source is not None:
        rows += [
            ["data file", f"{source['file']} ({source['path']} from the report folder)"],
            ["SHA-256 of the data file", source["sha256"]],
            [
                "data file size",
                f"{source['rows']} rows \u00d7 {source['columns']} columns, "
                f"{source['bytes']} bytes",
            ],
        ]
    else:
        rows.append(["data", "passed in Python (no file)"])
    rows.append(["command line", prov["command_line"] or "none (a fit made in Python)"])
    rows.append(["platform", prov["platform"]])
    rows += [
        [f"version of {name}", version or "not installed"]
        for name, version in prov["versions"].items()
    ]
    return "<h3>Provenance</h3>\n" + table(["item", "value"], rows)


def _sampling_rows(data: dict) -> list:
    """Rows of the job table for the sampling weights and clusters, when the fit used them."""
    rows = []
    weights, clusters = data.get("weights"), data.get("clusters")
    if weights is not None:
        ess = weights["kish_effective_sample_size"]
        rows.append(
            [
                "sampling weights column",
                f"{weights['column']} (total {weights['total']:.6g}, range {weights['min']:.4g} "
                f"to {weights['max']:.4g}, Kish effective sample size {ess:.1f})",
            ]
        )
        if weights["unweighted_learners"]:
            rows.append(["learners fitted unweighted", ", ".join(weights["unweighted_learners"])])
    if clusters is not None:
        few = " (fewer than 30: cluster-robust SEs unreliable)" if clusters["few"] else ""
        rows.append(
            [
                "clusters column",
                f"{clusters['column']}: {clusters['count']} clusters of {clusters['smallest']} "
                f"to {clusters['largest']} rows{few}",
            ]
        )
    return rows


def job_section(r: dict) -> str:
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
            *_sampling_rows(data),
            ["propensity learners", ", ".join(pairs["rows"])],
            ["outcome learners", ", ".join(pairs["columns"])],
            ["seed", r["seed"]],
        ],
    )
    out += provenance_section(r)
    out += "<h3>Settings</h3>\n" + table(
        ["setting", "value"], [[k, json_text(v)] for k, v in r["settings"].items()]
    )
    out += "<h3>Learners: out-of-fold prediction loss</h3>\n"
    out += paragraph(
        "Each learner's loss on rows it was not trained on (lower is better) and its weight in "
        "prediction-loss stacking."
    )
    learners = diag["learners"]
    # Each side's losses in one format: a log-loss and a squared error share no scale.
    losses = {}
    for side in {x["side"] for x in learners}:
        rows = [i for i, x in enumerate(learners) if x["side"] == side]
        texts = column_text([learners[i]["loss"] for i in rows], digits_of(r))
        losses.update(zip(rows, texts))
    # Each learner's share of all fitting time (every fold, both arms): which learner the
    # wait is for, and what to change when a run is too slow.
    fit_total = sum(x["fit_seconds"] or 0.0 for x in learners)
    shares = [
        f"{100 * (x['fit_seconds'] or 0.0) / fit_total:.0f}%" if fit_total > 0 else ""
        for x in learners
    ]
    out += table(
        [
            "side",
            "learner",
            "loss",
            "metric",
            "stacking weight",
            "fit seconds",
            "share of fit time",
        ],
        [
            [
                x["side"],
                x["learner"],
                losses[i],
                x["metric"],
                x["stacking_weight"],
                x["fit_seconds"],
                shares[i],
            ]
            for i, x in enumerate(learners)
        ],
        align_right={"loss"},
        digits=digits_of(r),
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
