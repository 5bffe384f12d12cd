"""Where the default's headline leaves PLS, and what that costs, per grid cell (issue 10).

Reads the per-replicate rows of a ``study_default_grid.py`` run (the study files
``grid_default_*_seed<S>.sqlite`` in the run's folder; gitignored, so rerun the grid to
regenerate them) and splits the paired squared-error difference of the default minus PLS over
three kinds of data set: headline kept the searched weights because their IF SE is at most 1.05 x
PLS's (the variance guard), kept them because the contrast test rejected (guard not met), and
returned PLS's estimate. A contribution is the sum of that kind's differences divided by all
pairs, so the three add up to the cell's mean difference. The SE ratio is the searched row's IF
SE over PLS's, averaged within the kind.

Usage: python benchmarks/default_choice/kept_decomposition.py FOLDER > FOLDER/where_the_headline_moves.md
"""

import sys
from pathlib import Path

import numpy as np

from stackdr.search import MAIN, PLS, UNTESTED
from stackdr.studies import read_results

GUARD = 1.05


def decompose(path: Path) -> str:
    df = read_results(path)
    wide = df.pivot_table(index="rep", columns="estimator", values=["estimate", "se"])
    truth = df.groupby("rep").truth.first()
    main, pls = wide["estimate"][MAIN], wide["estimate"][PLS]
    ratio = wide["se"][UNTESTED] / wide["se"][PLS]
    diff = (main - truth) ** 2 - (pls - truth) ** 2
    kept = main != pls
    guard = ratio <= GUARD
    cell = path.stem.removeprefix("grid_default_")
    head = f"| {cell} | {len(diff)} | {diff.mean():+.3g} ({diff.std(ddof=1) / np.sqrt(len(diff)):.2g}) |"
    parts = []
    for mask in (kept & guard, kept & ~guard):
        parts.append(
            f" {mask.mean():.2f}; {diff[mask].sum() / len(diff):+.3g}; "
            f"{ratio[mask].mean() if mask.any() else float('nan'):.2f} |"
        )
    return head + "".join(parts)


if __name__ == "__main__":
    folder = Path(sys.argv[1])
    print(f"# Where the headline leaves PLS ({folder.name})\n")
    print(
        "Written by `benchmarks/default_choice/kept_decomposition.py` from the study files of "
        "the default-library cells. Columns: cell, pairs, default minus PLS paired squared-error "
        "difference (MC SE); then for the data sets kept by the guard and those kept by the "
        "test alone: share of data sets; contribution to the mean difference; mean ratio of "
        "the searched row's IF SE to PLS's. Data sets where the headline is PLS contribute 0.\n"
    )
    print(
        "| cell | pairs | default - PLS | kept by guard: share; contribution; SE ratio | kept by test alone: share; contribution; SE ratio |"
    )
    print("|---|---|---|---|---|")
    for path in sorted(folder.glob("grid_default_*.sqlite")):
        print(decompose(path))
