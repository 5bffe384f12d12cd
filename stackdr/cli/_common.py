"""Pieces every command shares: the parser class, ``--debug``, the cluster options, and the flags
generated from the settings table (so their types, choices and "(default ...)" help come from the
one declaration in :mod:`stackdr.estimation`)."""

from __future__ import annotations

import argparse

from stackdr.errors import InputError
from stackdr.estimation import CONFIG_SETTINGS

#: Settings that the command line shows on when not given, although the Python API's default
#: is off: progress bars help at a terminal, not in a notebook or a study.
CLI_DEFAULTS = {"progress": True}
#: Settings ``stackdr estimate`` needs, on the command line or under [settings] in --config.
CLI_REQUIRED = ("data", "treatment", "outcome", "target", "out")


class Parser(argparse.ArgumentParser):
    """argparse with one-line error messages (exit code 2 as usual)."""

    def error(self, message: str):
        self.exit(2, f"{self.prog}: error: {message} (see {self.prog} --help)\n")


def common_options() -> argparse.ArgumentParser:
    """Parent parser with the options every command accepts (``--debug``)."""
    parent = Parser(add_help=False)
    parent.add_argument(
        "--debug",
        action="store_true",
        default=argparse.SUPPRESS,
        help="show the full traceback when something fails",
    )
    return parent


def add_setting_flag(parser: argparse.ArgumentParser, key: str, **overrides) -> None:
    """Add the flag of one setting of the table (``--tie-break-scale C``, ``--no-tie-break``).

    The value stays None when the flag is not given, so configuration files and the
    estimator's defaults apply (:func:`stackdr.io.resolve_settings`). ``overrides`` replace
    argparse keywords (e.g. a command-specific ``help``).
    """
    setting = CONFIG_SETTINGS[key]
    default = CLI_DEFAULTS.get(setting.name, setting.default)
    kwargs: dict = {"dest": key, "help": setting.help}
    flag = setting.flag
    if setting.kind == "switch":
        if default:
            flag = "--no-" + key.replace("_", "-")
            kwargs.update(action="store_const", const=False, help=f"do not {setting.help}")
        else:
            kwargs.update(action="store_const", const=True)
    else:
        if setting.kind == "whole":
            kwargs["type"] = int
        elif setting.kind == "number":
            kwargs["type"] = float
        elif setting.kind == "names":
            kwargs["nargs"] = "+"
        if setting.choices is not None:
            kwargs["choices"] = setting.choices
        if setting.metavar is not None:
            kwargs["metavar"] = setting.metavar
        if key in CLI_REQUIRED:
            kwargs["help"] += " (required, here or in --config)"
        elif default is not None:
            kwargs["help"] += f" (default {setting.default_text()})"
    kwargs.update(overrides)
    parser.add_argument(flag, **kwargs)


def add_cluster_options(parser: argparse.ArgumentParser, what: str) -> None:
    """--scheduler / --local-cluster: run ``what`` on a dask.distributed cluster."""
    where = parser.add_mutually_exclusive_group()
    where.add_argument(
        "--scheduler", metavar="ADDRESS", help=f"run {what} on this dask.distributed scheduler"
    )
    where.add_argument(
        "--local-cluster",
        type=int,
        metavar="N",
        help=f"run {what} on a local dask.distributed cluster of N workers",
    )


def cluster_from_args(args: argparse.Namespace) -> tuple[str | None, str | int | None]:
    """(backend, cluster) for BlendEstimator / run_study from the cluster options."""
    if args.scheduler is not None:
        return "dask", args.scheduler
    if args.local_cluster is not None:
        if args.local_cluster < 1:
            raise InputError(f"--local-cluster needs at least 1 worker, got {args.local_cluster}")
        return "dask", args.local_cluster
    return None, None
