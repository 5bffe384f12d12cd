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

RESULTS = Path(__file__).resolve().parents[1] / "results"
GRIDS = {
    2127: RESULTS / "default_grid_constant_seed2127" / "study_default_grid_seed2127.csv",
    2087: RESULTS / "default_grid_guard_seed2087" / "study_default_grid_seed2087.csv",
}
SCREENS = {s: RESULTS / f"screen_constant_direction_seed{s}.csv" for s in (2127, 2087, 2007, 2027)}


def grid_cell(row) -> str:
    return f"{row['sq. error diff (MC SE)']}, {row['ratio']:.3f} [{row['pairs']}]"


def screen_cell(g: pd.DataFrame, a: str, b: str, with_diff: bool) -> str:
    e1, e0 = (g[a] - g.truth) ** 2, (g[b] - g.truth) ** 2
    if not with_diff:
        return paired_cell(e1, e0)
    d = e1 - e0
    se = d.std(ddof=1) / len(d) ** 0.5
    star = "*" if abs(d.mean()) > 2 * se else ""
    return f"{d.mean():+.3g} ({se:.2g}){star}, {(e1.mean() / e0.mean()) ** 0.5:.3f} [{len(d)}]"


def main() -> str:
    grids = {s: pd.read_csv(p) for s, p in GRIDS.items()}
    screens = {s: pd.read_csv(p) for s, p in SCREENS.items() if p.exists()}
    head = [
        "cell",
        "seed 2127 (fresh): candidate - PLS, ratio [pairs]",
        "seed 2087",
        "with vs without constant, same fits: 2127 / 2087 / 2007 / 2027 (ratio; MC SE t)",
    ]
    lines = ["| " + " | ".join(head) + " |", "|---" * len(head) + "|"]
    for _, row in grids[2127].iterrows():
        key = (row.design, row.n)
        label = f"{row.library}, {row.design}, n = {row.n}"
        cells = [grid_cell(row)]
        sub = {s: f[(f.design == key[0]) & (f.n == key[1])] for s, f in screens.items()}
        if row.library == "parametric" or 2087 not in sub:
            old = grids[2087]
            match = old[(old.library == row.library) & (old.design == key[0]) & (old.n == key[1])]
            cells.append(grid_cell(match.iloc[0]))
        else:
            cells.append(screen_cell(sub[2087], "main_c", "pls_c", with_diff=True))
        if row.library == "parametric":
            cells.append("library already holds it")
        else:
            parts = [
                screen_cell(sub[s], "main_c", "main_0", with_diff=False) if s in sub else "-"
                for s in (2127, 2087, 2007, 2027)
            ]
            cells.append(" / ".join(parts))
        lines.append(f"| {label} | " + " | ".join(cells) + " |")
    return "\n".join(lines)


if __name__ == "__main__":
    print(main())
