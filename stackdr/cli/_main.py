"""The ``stackdr`` command line: ``estimate``, ``report``, ``learners`` and ``demo``.

Each command group is a ``register(subparsers)`` function listed in :data:`COMMAND_GROUPS`; a
command stores its handler with ``set_defaults(run=handler)``. User mistakes exit with code 2 and
one line ``stackdr: error: ...`` on stderr; unexpected failures exit with code 1 and a hint to
rerun with ``--debug`` for the traceback.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import os
import shlex
import sys
import textwrap
import traceback
import warnings
from pathlib import Path

import pandas as pd

from stackdr._version import __version__
from stackdr.cli._common import (
    CLI_DEFAULTS,
    CLI_REQUIRED,
    Parser,
    add_cluster_options,
    add_setting_flag,
    cluster_from_args,
    common_options,
)
from stackdr.cli._read import CSV_SUFFIXES, PARQUET_SUFFIXES, read_table
from stackdr.cli._study import register as register_study
from stackdr.errors import InputError, StackdrError
from stackdr.estimation import CAUTION, CONFIG_SETTINGS, DEFAULT_DIGITS, LINE_WIDTH, wrapped
from stackdr.io import (
    SETTINGS,
    estimator_kwargs,
    input_record,
    load_config,
    provenance,
    relative_path,
    resolve_settings,
)

# ----------------------------------------------------------------------------- writing results


def _write_outputs(
    result, out_dir: Path, *, overwrite: bool, run: dict, provenance: dict, presentation: dict
) -> dict:
    """nuisances.csv and the report first, results.json last (atomically), so an interrupted
    run leaves no results.json behind and a rerun needs no --overwrite."""
    from stackdr.io import (
        atomic_write,
        blended_nuisances,
        plain,
        result_to_dict,
        write_results_json,
    )
    from stackdr.reporting import write_report

    table = blended_nuisances(result)
    run["nuisances_propensity_scale"] = table.attrs["propensity_scale"]
    results = result_to_dict(result, provenance=provenance, **presentation)
    results["run"] = run
    # The report is built from exactly what results.json will hold, so `stackdr report`
    # rebuilds it byte for byte.
    results = json.loads(json.dumps(plain(results, "results"), allow_nan=False))
    out_dir.mkdir(parents=True, exist_ok=True)
    nuisances = atomic_write(
        out_dir / "nuisances.csv", table.to_csv(index=False).encode("utf-8"), overwrite=True
    )
    report = write_report(results, out_dir)
    written = write_results_json(results, out_dir / "results.json", overwrite=overwrite)
    return {
        "results": written,
        "report": report,
        "figures": out_dir / "figures",
        "tables": out_dir / "tables",
        "nuisances": nuisances,
    }


def _print_written(paths: dict) -> None:
    print("Written:")
    for label, path in paths.items():
        print(f"  {label:<10} {path}")


def provenance_footer(results_provenance: dict, sampling: dict | None = None) -> str:
    """The printed provenance: data file and hash, sampling weights and clusters (when used),
    time, versions, within 100 characters."""
    prov = results_provenance
    source = prov["input"]
    versions = ", ".join(f"{k} {v}" for k, v in prov["versions"].items() if v is not None)
    lines = ["Provenance:"]
    if source is not None:
        lines.append(
            f"  data {source['path']} ({source['rows']} rows x {source['columns']} columns), "
            f"SHA-256 {source['sha256']}"
        )
    weights = (sampling or {}).get("weights")
    clusters = (sampling or {}).get("clusters")
    if weights is not None:
        lines.append(
            f"  sampling weights column {weights['column']!r}: total {weights['total']:.6g}, "
            f"range {weights['min']:.4g} to {weights['max']:.4g}, Kish effective sample size "
            f"{weights['kish_effective_sample_size']:.1f}"
        )
    if clusters is not None:
        lines.append(
            f"  clusters column {clusters['column']!r}: {clusters['count']} clusters of "
            f"{clusters['smallest']} to {clusters['largest']} rows"
        )
    lines.append(f"  created {prov['created_utc']} (UTC)")
    lines.append(
        textwrap.fill(versions, LINE_WIDTH, initial_indent="  versions: ", subsequent_indent="    ")
    )
    return "\n".join(line if len(line) <= LINE_WIDTH else wrapped(line, "    ") for line in lines)


def _presentation(values: dict) -> dict:
    return {
        "outcome_label": values.get("outcome_label"),
        "digits": values.get("digits", DEFAULT_DIGITS),
    }


# ----------------------------------------------------------------------------- commands


def _run_estimate(args: argparse.Namespace) -> int:
    from stackdr.core import get_target
    from stackdr.estimation import BlendEstimator

    config = load_config(args.config) if args.config else None
    given = {key: getattr(args, key, None) for key in SETTINGS}
    values, _ = resolve_settings(given, config)
    _check_swallowed_data(values)
    for key in CLI_REQUIRED:
        if key not in values:
            how = "the DATA argument" if key == "data" else "--" + key
            raise InputError(
                f"missing {how}: give it on the command line or as {key} = ... "
                "under [settings] in a --config file"
            )
    out_dir = Path(values["out"]).expanduser()
    overwrite = bool(values.get("overwrite", False))
    if out_dir.exists() and not out_dir.is_dir():
        raise InputError(f"output folder {str(out_dir)!r} is a file")
    # Checked before the fits, so a long run does not fail only when it comes to write.
    nearest = next(p for p in (out_dir.absolute(), *out_dir.absolute().parents) if p.exists())
    if not nearest.is_dir() or not os.access(nearest, os.W_OK | os.X_OK):
        raise InputError(f"output folder {str(out_dir)!r} cannot be written ({str(nearest)!r})")
    if (out_dir / "results.json").exists() and not overwrite:
        raise InputError(
            f"{out_dir / 'results.json'} already exists; pass --overwrite to replace it"
        )
    frame = read_table(values["data"])
    target = get_target(values["target"])
    treatment = values["treatment"]
    if config is not None and treatment in frame.columns:
        coded = pd.to_numeric(frame[treatment], errors="coerce").dropna()
        binary = target.binary_treatment or bool(coded.isin([0, 1]).all())
        config.check_kinds("classifier" if binary else "regressor")
    kwargs = {**CLI_DEFAULTS, **estimator_kwargs(values)}
    backend, cluster = cluster_from_args(args)
    if backend is not None:
        kwargs.update(backend=backend, cluster=cluster)
    kwargs["target"] = target
    estimator = BlendEstimator(
        propensity_learners=config.library("propensity") if config else None,
        outcome_learners=config.library("outcome") if config else None,
        **kwargs,
    )
    result = estimator.fit(
        frame,
        treatment,
        values["outcome"],
        values.get("covariates"),
        weights=values.get("weights"),
        clusters=values.get("clusters"),
    )
    run = {
        "command": "estimate",
        "data_file": relative_path(values["data"], out_dir),
        "config_file": relative_path(config.path, out_dir) if config and config.path else None,
        "learners": config.describe() if config else None,
    }
    prov = provenance(
        result.created_utc,
        command_line=args.command_line,
        input=input_record(values["data"], out_dir, *frame.shape),
    )
    presentation = _presentation(values)
    paths = _write_outputs(
        result, out_dir, overwrite=overwrite, run=run, provenance=prov, presentation=presentation
    )
    print(result.summary(**presentation))
    print()
    print(provenance_footer(prov, result.sampling))
    print()
    _print_written(paths)
    return 0


def _check_swallowed_data(values: dict) -> None:
    """``--covariates a b data.csv`` takes the file as a covariate; say so exactly."""
    covariates = values.get("covariates") or []
    if values.get("data") is None and covariates:
        last = covariates[-1]
        if Path(last).suffix.lower() in CSV_SUFFIXES + PARQUET_SUFFIXES or Path(last).is_file():
            raise InputError(
                f"--covariates took the data file {last!r} as a covariate name; put DATA before "
                f"--covariates (stackdr estimate {last} ... --covariates ...) or end the list "
                "with --"
            )


def _run_report(args: argparse.Namespace) -> int:
    from stackdr.io import read_results_json
    from stackdr.reporting import write_report

    source = Path(args.results)
    results = read_results_json(source)
    if args.outcome_label is not None:
        results["presentation"]["outcome_label"] = args.outcome_label
    if args.digits is not None:
        results["presentation"]["digits"] = args.digits
    out_dir = Path(args.out) if args.out else source.parent
    report = write_report(results, out_dir)
    _print_written({"report": report, "figures": out_dir / "figures", "tables": out_dir / "tables"})
    return 0


def learner_table() -> str:
    """The learner catalogue as text within 100 characters a line: name, kind, whether its fit
    uses sampling weights (``--weights``), parameters (defaults), then the description on
    indented lines."""
    from stackdr.estimation import CATALOGUE, accepts_sample_weight

    lines = []
    for name, entry in CATALOGUE.items():
        params = ", ".join(f"{k}={v!r}" for k, v in entry.defaults.items()) or "no parameters"
        weights = (
            "weighted" if accepts_sample_weight(entry.build(**entry.defaults)) else "unweighted"
        )
        lines.append(wrapped(f"{name} ({entry.kind}, {weights} fits): {params}", "    "))
        lines.append(
            textwrap.fill(
                entry.description, LINE_WIDTH, initial_indent="    ", subsequent_indent="    "
            )
        )
    return "\n".join(lines)


def _run_learners(args: argparse.Namespace) -> int:
    from stackdr.estimation import default_outcome_library, default_propensity_library

    print(learner_table())
    print()
    print("Without a config file the libraries are:")
    print("  propensity: " + ", ".join(default_propensity_library()))
    print("  outcome:    " + ", ".join(default_outcome_library()))
    print(
        wrapped(
            'In a config file: [propensity.NAME] or [outcome.NAME] with learner = "<name>" and '
            "any parameter above."
        )
    )
    return 0


def truth_table(result, truth: float) -> str:
    """Comparison table of a simulated run with the true value and each estimator's error."""
    pct = f"{100 * result.level:g}%"
    lines = [
        f"{'estimator':<30}{'estimate':>10}{pct + ' low':>10}{pct + ' high':>10}"
        f"{'true value':>12}{'error':>9}{'covers':>8}"
    ]
    for _, row in result.comparison().iterrows():
        covers = "yes" if row["low"] <= truth <= row["high"] else "no"
        lines.append(
            f"{row['estimator']:<30}{row['estimate']:>10.3f}{row['low']:>10.3f}"
            f"{row['high']:>10.3f}{truth:>12.3f}{row['estimate'] - truth:>+9.3f}{covers:>8}"
        )
    return "\n".join(lines)


def _run_demo(args: argparse.Namespace) -> int:
    from stackdr.estimation import BlendEstimator
    from stackdr.io import atomic_write
    from stackdr.studies import DESCRIPTION, simulate_demo

    frame, truth = simulate_demo(args.n, args.seed)
    print(wrapped(DESCRIPTION))
    print(f"The data are simulated ({len(frame)} rows), so the true effect is known.\n")
    estimator = BlendEstimator(
        "ate",
        bootstrap=args.bootstrap,
        n_jobs=args.jobs,
        seed=args.seed,
        progress=not args.no_progress,
    )
    result = estimator.fit(frame, "programme", "sbp_change")
    out_dir = Path(args.out)
    # The simulated data are written first, so the provenance can name and hash them.
    data_path = atomic_write(
        out_dir / "demo_data.csv", frame.to_csv(index=False).encode("utf-8"), overwrite=True
    )
    run = {"command": "demo", "simulated": True, "true_value": truth, "description": DESCRIPTION}
    prov = provenance(
        result.created_utc,
        command_line=args.command_line,
        input=input_record(data_path, out_dir, *frame.shape),
    )
    presentation = {"outcome_label": args.outcome_label, "digits": args.digits}
    paths = _write_outputs(
        result, out_dir, overwrite=True, run=run, provenance=prov, presentation=presentation
    )
    paths["data"] = data_path
    print(
        f"\nAverage effect of the programme on the 6-month change in systolic pressure (mmHg)\n"
        f"n = {result.data.n}, simulated data\n"
    )
    print(truth_table(result, truth))
    print("\nWeights (target-aimed):")
    for side, series in (("propensity", result.alpha), ("outcome", result.beta)):
        text = "  ".join(f"{k} {v:.3f}" for k, v in series.items())
        print(wrapped(f"  {side:<11}{text}", " " * 13))
    for note in result.notes:
        print(wrapped(note))
    check = result.fold_check
    if check is not None and (check.corrected or check.alert or check.skipped):
        # The interval was widened (or should have been): say so where the numbers are shown.
        print(wrapped(check.sentence()))
    print(f"Seconds: {result.timings.get('total', float('nan')):.1f}\n")
    print(wrapped(f"Caution: {CAUTION}"))
    print()
    print(provenance_footer(prov))
    print()
    _print_written(paths)
    return 0


# ----------------------------------------------------------------------------- parser


def register(subparsers) -> None:
    """Register the core commands: estimate, report, learners, demo."""
    common = [common_options()]
    est = subparsers.add_parser(
        "estimate",
        parents=common,
        help="estimate a target from a data file",
        description="Cross-fit both learner libraries, choose target-aimed weights, estimate "
        "with a bootstrap interval, and write results.json, report.html and nuisances.csv "
        "into the output folder. Flags override values from --config.",
    )
    est.add_argument(
        "data", nargs="?", default=None, metavar="DATA", help="CSV or Parquet file (by extension)"
    )
    est.add_argument(
        "--config", metavar="FILE.toml", help="TOML file declaring learner libraries and settings"
    )
    # The settings stackdr estimate needs may come from --config instead, so argparse cannot
    # enforce them; their own group in --help shows that they are required.
    required = est.add_argument_group("required (on the command line or in --config)")
    for key in CONFIG_SETTINGS:
        if key != "data":
            add_setting_flag(required if key in CLI_REQUIRED else est, key)
    add_cluster_options(est, "learner fits and the refit bootstrap")
    est.set_defaults(run=_run_estimate)

    rep = subparsers.add_parser(
        "report",
        parents=common,
        help="rebuild the HTML report from a results.json",
        description="Rebuild report.html and figures/ from a saved results.json.",
    )
    rep.add_argument("results", metavar="RESULTS", help="path to results.json")
    rep.add_argument(
        "--out", metavar="DIR", help="folder for the report (default: the folder of RESULTS)"
    )
    rep.add_argument(
        "--outcome-label",
        metavar="TEXT",
        help="outcome label with unit for axes and table headers (default: the one in RESULTS)",
    )
    rep.add_argument(
        "--digits",
        type=int,
        metavar="D",
        help="significant digits in tables (default: the number in RESULTS)",
    )
    rep.set_defaults(run=_run_report)

    lrn = subparsers.add_parser(
        "learners",
        parents=common,
        help="list the learner catalogue for config files",
        description="List the named learners a config file may use, with their parameters.",
    )
    lrn.set_defaults(run=_run_learners)

    demo = subparsers.add_parser(
        "demo",
        parents=common,
        help="run the full pipeline on simulated demo data",
        description="Simulate the built-in scenario (known true effect), estimate it with the "
        "default libraries, print the comparison with the truth and write a report folder.",
    )
    demo.add_argument(
        "--out",
        default="stackdr-demo",
        metavar="DIR",
        help="output folder (default stackdr-demo); its results.json, report.html, figures/, "
        "tables/, nuisances.csv and demo_data.csv are replaced, other files are left alone",
    )
    demo.add_argument(
        "--outcome-label",
        default="change in systolic pressure (mmHg)",
        metavar="TEXT",
        help="outcome label with unit for axes and table headers "
        "(default 'change in systolic pressure (mmHg)')",
    )
    demo.add_argument(
        "--digits",
        type=int,
        default=DEFAULT_DIGITS,
        metavar="D",
        help=f"significant digits in tables (default {DEFAULT_DIGITS})",
    )
    demo.add_argument(
        "--bootstrap",
        type=int,
        default=1000,
        metavar="B",
        help="bootstrap replicates (default 1000)",
    )
    demo.add_argument(
        "--jobs",
        type=int,
        default=2,
        metavar="J",
        help="parallel workers for learner fits (default 2)",
    )
    demo.add_argument("--n", type=int, default=2000, help="rows to simulate (default 2000)")
    demo.add_argument("--seed", type=int, default=2026, help="random seed (default 2026)")
    demo.add_argument("--no-progress", action="store_true", help="hide progress bars")
    demo.set_defaults(run=_run_demo)


# Command groups: each is a register(subparsers) function. A further group (for example the
# simulation commands) is added by importing its register function here and listing it below.
COMMAND_GROUPS = (register, register_study)


def build_parser() -> argparse.ArgumentParser:
    """The full ``stackdr`` parser with every command group registered."""
    parser = Parser(
        prog="stackdr",
        description="Target-aimed convex stacking of nuisance learners for doubly robust "
        "estimates.",
        parents=[common_options()],
    )
    parser.add_argument("--version", action="version", version=f"stackdr {__version__}")
    subparsers = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    for group in COMMAND_GROUPS:
        group(subparsers)
    return parser


def _one_line(exc: BaseException) -> str:
    return " ".join(str(exc).split()) or type(exc).__name__


@contextlib.contextmanager
def _short_warnings():
    """Show each warning as one ``stackdr: warning:`` line."""

    def show(message, category, filename, lineno, file=None, line=None):
        text = f"stackdr: warning: {_one_line(Warning(message))}"
        print(wrapped(text, "  "), file=sys.stderr)

    with warnings.catch_warnings():
        warnings.simplefilter("default")
        warnings.showwarning = show
        yield


# joblib's process pool starts a separate resource-tracker process that shares our stderr.
# When a run is interrupted, the pool removes its shared-memory folder itself and the tracker,
# exiting after us, may warn that the folder it meant to remove is already gone. That warning
# would land after the tool's one closing line; the filter is inherited by the child processes.
_CHILD_WARNING_FILTER = "ignore:resource_tracker:UserWarning"


def _quiet_child_processes() -> None:
    current = os.environ.get("PYTHONWARNINGS", "")
    if _CHILD_WARNING_FILTER not in current.split(","):
        os.environ["PYTHONWARNINGS"] = ",".join(filter(None, [current, _CHILD_WARNING_FILTER]))


def main(argv: list[str] | None = None) -> int:
    """Run the command line; returns the exit code (0 ok, 1 internal error, 2 user mistake)."""
    _quiet_child_processes()
    parser = build_parser()
    argv = sys.argv[1:] if argv is None else list(argv)
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:
        return exc.code if isinstance(exc.code, int) else 2
    args.command_line = shlex.join(["stackdr", *argv])
    debug = getattr(args, "debug", False)
    try:
        with _short_warnings():
            return args.run(args)
    except KeyboardInterrupt:
        print("stackdr: interrupted (files are written whole or not at all)", file=sys.stderr)
        return 130
    except (StackdrError, OSError) as exc:
        if debug:
            traceback.print_exc()
        print(f"stackdr: error: {_one_line(exc)}", file=sys.stderr)
        return 2
    except Exception as exc:  # noqa: BLE001 - anything else is our bug, reported briefly
        if debug:
            traceback.print_exc()
        print(
            f"stackdr: internal error: {type(exc).__name__}: {_one_line(exc)} "
            f"(rerun with --debug to see the traceback)",
            file=sys.stderr,
        )
        return 1
