"""Table of the intercept-only outcome learner as a default candidate (issue 10, ninth round).

The candidate (the default libraries with the constant learner added to the outcome side) was
run as the package default on the fresh study seed 2127
(``results/default_grid_constant_seed2127/``, fingerprint 0.1.0+82fde806be1b) and then rejected
(``results/default_choice_constant_direction.md``).
Per grid cell: the candidate minus PLS on seed 2127 and on seed 2087 (default-library cells from
the constant-direction screen at full replicates, whose "with" rows are the candidate on the
grid's data sets; parametric cells from the seed-2087 grid, whose libraries already held the
constant learner); then the candidate against the default without the constant learner on the
same cross-fits (seeds 2127 and 2087, and the two screening seeds at half replicates).

Usage: python benchmarks/default_choice/constant_direction_table.py
"""

import sys
from pathlib import Path

import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parent))
from outcome_side_table import paired_cell  # noqa: E402
from screen_repeats import paired  # noqa: E402

RESULTS = Path(__file__).resolve().parents[1] / "results"
GRIDS = {
    2127: RESULTS / "default_grid_constant_seed2127" / "study_default_grid_seed2127.csv",
    2087: RESULTS / "default_grid_guard_seed2087" / "study_default_grid_seed2087.csv",
}
SCREENS = {s: RESULTS / f"screen_constant_direction_seed{s}.csv" for s in (2127, 2087, 2007, 2027)}


def grid_cell(row) -> str:
    return f"{row['sq. error diff (MC SE)']}, {row['ratio']:.3f} [{row['pairs']}]"


def main() -> str:
    grids = {s: pd.read_csv(p) for s, p in GRIDS.items()}
    screens = {s: pd.read_csv(p) for s, p in SCREENS.items()}
    head = [
        "cell",
        "seed 2127 (fresh): candidate - PLS, ratio [pairs]",
        "seed 2087",
        "with vs without constant, same fits: 2127 / 2087 / 2007 / 2027 (ratio; MC SE t)",
    ]
    lines = ["| " + " | ".join(head) + " |", "|---" * len(head) + "|"]
    for _, row in grids[2127].iterrows():
        label = f"{row.library}, {row.design}, n = {row.n}"
        cells = [grid_cell(row)]
        if row.library == "parametric":
            old = grids[2087]
            match = old[
                (old.library == row.library) & (old.design == row.design) & (old.n == row.n)
            ]
            cells += [grid_cell(match.iloc[0]), "library already holds it"]
        else:
            sub = {s: f[(f.design == row.design) & (f.n == row.n)] for s, f in screens.items()}
            ratio, diff = paired(sub[2087], "main_c", "pls_c")
            cells.append(f"{diff}, {ratio:.3f} [{len(sub[2087])}]")
            cells.append(
                " / ".join(
                    paired_cell((g.main_c - g.truth) ** 2, (g.main_0 - g.truth) ** 2)
                    for g in sub.values()
                )
            )
        lines.append(f"| {label} | " + " | ".join(cells) + " |")
    return "\n".join(lines)


if __name__ == "__main__":
    print(main())
