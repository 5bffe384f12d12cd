"""Monte Carlo study commands: ``stackdr simulate`` and ``stackdr study``.

``simulate`` runs (or resumes) a study of the main estimator on registered designs and stores
every replicate in a SQLite study file; ``study`` summarises a study file as tables, a CSV file
and an HTML page. Registered into the ``stackdr`` parser by :func:`register`.
"""

from __future__ import annotations

import argparse
import textwrap
import warnings
from pathlib import Path
from typing import Any

import numpy as np

from stackdr.cli._common import (
    add_cluster_options,
    add_setting_flag,
    cluster_from_args,
    common_options,
)
from stackdr.errors import InputError
from stackdr.estimation import DEFAULT_DIGITS, LINE_WIDTH

# Config-file settings a study cannot take: the design fixes data, columns and target, and where
# files go is the study file's business.
_NOT_FOR_STUDIES = ("data", "treatment", "outcome", "covariates", "target", "out", "overwrite")


def register(subparsers) -> None:
    """Add the ``simulate`` and ``study`` commands to the ``stackdr`` parser."""
    common = [common_options()]
    sim = subparsers.add_parser(
        "simulate",
        parents=common,
        help="run a Monte Carlo study of the estimator on simulated designs",
        description="Simulate data sets from registered designs with known truth, fit the "
        "estimator on each, and store every estimator's result per replicate in a SQLite study "
        "file. A killed run keeps its finished replicates; --resume continues it. "
        "`stackdr simulate --list` lists the designs.",
    )
    sim.add_argument("--list", action="store_true", help="list the designs and exit")
    sim.add_argument(
        "--design",
        action="extend",
        nargs="+",
        metavar="NAME",
        help="design name(s); repeat or list several",
    )
    sim.add_argument(
        "--n", action="extend", nargs="+", type=int, metavar="N", help="sample size(s)"
    )
    sim.add_argument("--reps", type=int, metavar="R", help="replicates per design and n")
    sim.add_argument("--out", metavar="STUDY.sqlite", help="study file")
    sim.add_argument(
        "--config",
        metavar="FILE.toml",
        help="TOML file with learner libraries and estimator settings",
    )
    sim.add_argument(
        "--library",
        choices=("default", "parametric"),
        help="built-in learner libraries (default: the estimator's defaults)",
    )
    add_setting_flag(sim, "bootstrap")
    add_setting_flag(sim, "tie_break_scale")
    sim.add_argument("--seed", type=int, metavar="S", help="study seed (default 0)")
    sim.add_argument(
        "--jobs",
        type=int,
        default=1,
        metavar="J",
        help="replicates run in parallel on local processes (default 1; -1 all cores)",
    )
    sim.add_argument(
        "--resume", action="store_true", help="continue the study in an existing study file"
    )
    sim.add_argument(
        "--allow-code-change",
        action="store_true",
        help="resume even though the stackdr code differs from the code that started the "
        "study (each replicate records its code; summaries warn about the mix)",
    )
    add_cluster_options(sim, "replicates")
    sim.add_argument("--no-progress", action="store_true", help="hide the progress bar")
    sim.set_defaults(run=run_simulate)

    stu = subparsers.add_parser(
        "study",
        parents=common,
        help="summarise a study file",
        description="Per design, n and estimator: replicates, bias, SD, RMSE, median absolute "
        "error, interval coverage and mean width, each with its Monte Carlo SE.",
    )
    stu.add_argument("study", metavar="STUDY.sqlite", help="study file written by simulate")
    stu.add_argument("--csv", metavar="FILE", help="write the summary table as CSV")
    stu.add_argument("--html", metavar="FILE", help="write an HTML page with figures")
    stu.add_argument(
        "--tables",
        metavar="DIR",
        help="write the summary as DIR/summary.tex (LaTeX, booktabs) and DIR/summary.md",
    )
    stu.add_argument(
        "--digits",
        type=int,
        default=DEFAULT_DIGITS,
        metavar="D",
        help=f"significant digits in tables (default {DEFAULT_DIGITS})",
    )
    stu.set_defaults(run=run_study_summary)


def _design_listing() -> list[dict[str, Any]]:
    from stackdr.studies import get_design, list_designs

    rows = []
    for name in list_designs():
        design = get_design(name)
        # The truth is a property of the design; a small draw reads it off.
        truth = design.simulate(100, np.random.default_rng(0)).truth
        rows.append(
            {
                "design": name,
                "target": design.target,
                "truth": f"{truth:g}",
                "source": design.source,
            }
        )
    return rows


def _study_options(args: argparse.Namespace) -> tuple[Any, dict[str, Any], int]:
    """(library, estimator settings, seed) from --config, --library and the flags."""
    from stackdr.io import ESTIMATOR_SETTINGS, load_config, resolve_settings
    from stackdr.studies import STUDY_SETTINGS, build_libraries, check_settings

    config = load_config(args.config) if args.config else None
    given = {"bootstrap": args.bootstrap, "tie_break_scale": args.tie_break_scale}
    values, origins = resolve_settings({**given, "seed": args.seed}, config)
    misplaced = sorted(set(values) & set(_NOT_FOR_STUDIES))
    if misplaced:
        raise InputError(
            f"{origins[misplaced[0]]}: setting {misplaced[0]!r} does not apply to a simulation "
            "study (the design fixes the data, columns and target)"
        )
    settings = {
        ESTIMATOR_SETTINGS[key]: value
        for key, value in values.items()
        if ESTIMATOR_SETTINGS.get(key) in STUDY_SETTINGS
    }
    declared = config.describe() if config is not None else {}
    declared = {side: specs for side, specs in declared.items() if specs}
    if declared and args.library:
        raise InputError(
            f"--library {args.library} and the libraries declared in {config.label} conflict; "
            "give one of them"
        )
    library = declared or args.library or "default"
    build_libraries(library)
    return library, check_settings(settings), int(values.get("seed", 0))


def run_simulate(args: argparse.Namespace) -> int:
    """Handler of ``stackdr simulate``."""

    if args.list:
        for row in _design_listing():
            print(f"{row['design']} (target {row['target']}, truth {row['truth']})")
            print(
                textwrap.fill(
                    row["source"], LINE_WIDTH, initial_indent="    ", subsequent_indent="    "
                )
            )
        return 0
    missing = [
        flag
        for flag, value in (
            ("--design", args.design),
            ("--n", args.n),
            ("--reps", args.reps),
            ("--out", args.out),
        )
        if value is None
    ]
    if missing:
        raise InputError(f"simulate needs {', '.join(missing)} (or --list)")
    from stackdr.studies import StudyExistsError, make_replicate, run_study

    library, settings, seed = _study_options(args)
    backend, cluster = cluster_from_args(args)
    try:
        run = run_study(
            args.out,
            args.design,
            args.n,
            args.reps,
            make_replicate(library, **settings),
            seed=seed,
            jobs=args.jobs,
            resume=args.resume,
            backend=backend,
            cluster=cluster,
            settings={"library": library, "estimator": settings},
            progress=not args.no_progress,
            allow_code_change=args.allow_code_change,
        )
    except StudyExistsError as exc:
        raise InputError(f"{exc}: add --resume to continue it") from None
    print(
        f"{run.completed} replicates run, {run.skipped} already stored "
        f"({run.requested} requested) in {run.seconds:.1f} s; study file {run.path}"
    )
    return 0


def run_study_summary(args: argparse.Namespace) -> int:
    """Handler of ``stackdr study``."""
    from stackdr.reporting import (
        few_replicates_note,
        html_report,
        latex,
        markdown,
        ordered,
        study_tables,
        summary_text,
    )
    from stackdr.studies import read_study_record, summarise_study

    path = Path(args.study)
    if not path.is_file():
        raise InputError(f"no study file at {str(path)!r}")
    summary = ordered(summarise_study(path))
    few = few_replicates_note(summary)
    if few:
        warnings.warn(few, stacklevel=1)
    print(summary_text(summary, args.digits))
    written = {}
    if args.csv:
        summary.to_csv(args.csv, index=False)
        written["csv"] = args.csv
    if args.html:
        Path(args.html).write_text(html_report(path, summary), encoding="utf-8")
        written["html"] = args.html
    if args.tables:
        record = read_study_record(path)
        settings = record.get("settings", {}).get("estimator", {})
        tables = study_tables(summary, float(settings.get("level", 0.95)), args.digits)
        folder = Path(args.tables)
        folder.mkdir(parents=True, exist_ok=True)
        for suffix, render in (("tex", latex), ("md", markdown)):
            target = folder / f"summary.{suffix}"
            target.write_text("\n".join(render(t) for t in tables), encoding="utf-8")
            written[f"table ({suffix})"] = target
    if written:
        print("\nWritten:")
        for what, where in written.items():
            print(f"  {what:<12} {where}")
    return 0
