"""Command line front end: ``stackdr demo``."""

from __future__ import annotations

import argparse
import sys

import pandas as pd

from .errors import StackdrError


def _demo(args: argparse.Namespace) -> int:
    from .crossfit import cross_fit
    from .data import prepare_data
    from .demo import DESCRIPTION, simulate_demo
    from .learners import default_outcome_library, default_propensity_library
    from .pairtable import pair_inputs, pair_table
    from .targets import get_target

    frame, truth = simulate_demo(args.n, args.seed)
    print(DESCRIPTION)
    target = get_target("ate")
    data = prepare_data(frame, "programme", "sbp_change", target=target)
    cf = cross_fit(
        data,
        target,
        default_propensity_library(),
        default_outcome_library(),
        seed=args.seed,
        n_jobs=args.jobs,
        progress=True,
    )
    table = pd.DataFrame(
        pair_table(pair_inputs(target, cf, data.A, data.Y)),
        index=pd.Index(cf.propensity_names, name="propensity learner"),
        columns=pd.Index(cf.outcome_names, name="outcome learner"),
    )
    print("\nPair table: AIPW estimate of the average effect for every learner pair")
    print(table.round(3).to_string())
    print(f"\nTrue average effect (known because the data are simulated): {truth:.3f}")
    return 0


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="stackdr",
        description="Target-aimed stacking of nuisance learners for doubly robust estimates.",
    )
    sub = parser.add_subparsers(dest="command", required=True)
    demo = sub.add_parser("demo", help="run the built-in simulated demo")
    demo.add_argument("--n", type=int, default=2000, help="rows to simulate (default 2000)")
    demo.add_argument("--seed", type=int, default=2026, help="random seed")
    demo.add_argument("--jobs", type=int, default=2, help="parallel workers for learner fits")
    demo.set_defaults(run=_demo)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return args.run(args)
    except StackdrError as exc:
        print(f"stackdr: error: {exc}", file=sys.stderr)
        return 2


if __name__ == "__main__":
    sys.exit(main())
