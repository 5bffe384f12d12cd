"""Screen: the intercept-only outcome learner in the default outcome library (issue 10, eighth
round).

Why: the mixed criterion ranks propensity weights by how much the DR estimate moves across the
outcome learners. When every outcome learner shares one bias their pair estimates agree for
almost any propensity side, and at n = 200 the criterion prefers a biased propensity learner
(``results/default_choice_small_n_mechanism.md``). The intercept-only learner adds the
direction "no outcome adjustment": its pair estimate is the inverse-weighting estimate, so the
range then also asks the inverse weights to agree with the DR estimates, i.e. to balance the
fitted outcome regressions. The parametric study library already holds it.

Per replicate of a grid cell (data and estimator seeds ``replicate_seeds(seed, design, n, rep)``
as in ``study_default_grid.py``), one cross-fit with the default libraries plus the constant
outcome learner (bootstrap 0); the analysis is then rerun on the same cross-fit without the
constant learner's column, which is exactly the default fit (every other learner's fits and the
folds are the same). Rows per replicate: headline, searched weights before the test and PLS of
both. Rows: ``results/screen_constant_direction_seed{seed}.csv``; ``--table`` prints the paired
table recorded in ``results/default_choice_constant_direction.md``.

Seed 2127's rows were run in the ninth round at the candidate package (default outcome library
with the constant learner; the harness then took the four-learner library for the "without"
rows), which is the same computation; a replicate of seed 2087 reproduced the stored rows exactly.

Usage: python benchmarks/default_choice/screen_constant_direction.py SEED SCALE
       python benchmarks/default_choice/screen_constant_direction.py --table SEED
"""

import dataclasses
import sys
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
from joblib import Parallel, delayed

from stackdr import BlendEstimator
from stackdr.estimation._learners import (
    default_outcome_library,
    default_propensity_library,
    make_learner,
)
from stackdr.search import MAIN, PLS, UNTESTED
from stackdr.studies import get_design, replicate_seeds

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from outcome_side_table import paired_cell  # noqa: E402
from study_default_grid import CELLS as GRID_CELLS  # noqa: E402

OUT = Path(__file__).resolve().parents[1] / "results"
ROWS = {"main": MAIN, "untested": UNTESTED, "pls": PLS}
# The grid's default-library cells (design, n, replicates).
CELLS = next(cells for label, _, _, cells in GRID_CELLS if label == "default")


def without_last_outcome(cf):
    """The cross-fit without its last outcome learner (the constant)."""
    k = len(cf.outcome_names) - 1
    fold_outcome = None
    if cf.fold_outcome is not None:
        fold_outcome = {h: v[..., :k] for h, v in cf.fold_outcome.items()}
    return dataclasses.replace(
        cf,
        outcome={h: v[..., :k] for h, v in cf.outcome.items()},
        observed=cf.observed[..., :k],
        outcome_names=list(cf.outcome_names[:k]),
        fold_outcome=fold_outcome,
    )


def one(design: str, n: int, rep: int, seed: int) -> dict:
    seeds = replicate_seeds(seed, design, n, rep)
    data = get_design(design).simulate(n, np.random.default_rng(seeds.data))
    olib = {**default_outcome_library(), "constant": make_learner("constant-regressor")}
    out = {"design": design, "n": n, "rep": rep, "truth": data.truth}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        common = dict(seed=int(seeds.estimator), bootstrap=0, n_jobs=1)
        res = BlendEstimator(data.target, None, olib, **common).fit(
            data.frame, data.treatment, data.outcome, data.covariates
        )
        base = BlendEstimator(
            data.target, default_propensity_library(), default_outcome_library(), **common
        ).analyse(res.data, res.target, without_last_outcome(res.crossfit), bootstrap=False)
    for tag, r in (("c", res), ("0", base)):
        by = {e.name: e.estimate for e in r.estimators}
        for key, name in ROWS.items():
            out[f"{key}_{tag}"] = by[name]
    return out


def table(df: pd.DataFrame) -> str:
    comps = [
        ("main_0", "pls_0", "default vs PLS"),
        ("main_c", "pls_c", "with constant: default vs PLS"),
        ("main_c", "pls_0", "with constant: default vs PLS without"),
        ("untested_c", "pls_c", "with constant: search before the test vs PLS"),
        ("main_c", "main_0", "default with vs without constant"),
        ("pls_c", "pls_0", "PLS with vs without constant"),
    ]
    lines = ["| cell | pairs | " + " | ".join(c[2] for c in comps) + " |"]
    lines.append("|---" * (len(comps) + 2) + "|")
    for (design, n), g in df.groupby(["design", "n"], sort=False):
        t = g.truth
        cells = [paired_cell((g[a] - t) ** 2, (g[b] - t) ** 2) for a, b, _ in comps]
        lines.append(f"| {design} n = {n} | {len(g)} | " + " | ".join(cells) + " |")
    return "\n".join(lines)


if __name__ == "__main__":
    if sys.argv[1] == "--table":
        print(table(pd.read_csv(OUT / f"screen_constant_direction_seed{sys.argv[2]}.csv")))
        sys.exit(0)
    seed, scale = int(sys.argv[1]), float(sys.argv[2])
    jobs = [(d, n, r) for d, n, reps in CELLS for r in range(max(2, int(round(reps * scale))))]
    rows = Parallel(n_jobs=2, verbose=0)(delayed(one)(d, n, r, seed) for d, n, r in jobs)
    df = pd.DataFrame(rows)
    df.to_csv(OUT / f"screen_constant_direction_seed{seed}.csv", index=False)
    print(table(df))
