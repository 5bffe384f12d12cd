"""Per-solve latency of the weight solvers on random pair tables, K = 2, 5, 10, 20.

Rows: the HiGHS range LP (one side of the mixed-minimax search), the same LP through highspy
directly (overhead comparison only, not used by the package), the cvxpy reference, grid plus
refinement on the same range objective, the tie-break QP (anchor infeasible; Clarabel called
directly, after one warm-up call), one full riesz search with tie-break (what each bootstrap
replicate runs) and the joint minimax grid search. Targets: LP median < 5 ms at K <= 10;
grid+refine < 200 ms at K = 5 (judged on wall-clock medians; CPU-time medians are printed beside
them).

Usage: .venv/bin/python benchmarks/bench_solvers.py [--quick]
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from common import print_table, write_json  # noqa: E402

from stackdr.search import (  # noqa: E402
    grid_refine,
    minimise_range_cvxpy,
    minimise_range_lp,
    search_weights,
    tie_break_range,
)

SIZES = (2, 5, 10, 20)


def random_tables(K: int, reps: int, rng) -> list[np.ndarray]:
    # DR estimates near 210 with learner-specific biases on both sides plus pair noise.
    return [
        210.0
        + rng.normal(0, 2, size=(K, 1))
        + rng.normal(0, 2, size=(1, K))
        + rng.normal(0, 0.5, size=(K, K))
        for _ in range(reps)
    ]


def highspy_range_lp(V: np.ndarray) -> float:
    """The range LP passed to HiGHS through highspy, for overhead comparison."""
    import highspy

    K, J = V.shape
    h = highspy.Highs()
    h.setOptionValue("output_flag", False)
    inf = highspy.kHighsInf
    lp = highspy.HighsLp()
    lp.num_col_, lp.num_row_ = K + 2, 2 * J + 1
    lp.col_cost_ = np.r_[np.zeros(K), 1.0, -1.0]
    lp.col_lower_ = np.r_[np.zeros(K), -inf, -inf]
    lp.col_upper_ = np.full(K + 2, inf)
    dense = np.zeros((2 * J + 1, K + 2))
    dense[:J, :K], dense[:J, K] = V.T, -1.0
    dense[J : 2 * J, :K], dense[J : 2 * J, K + 1] = -V.T, 1.0
    dense[-1, :K] = 1.0
    lp.row_lower_ = np.r_[np.full(2 * J, -inf), 1.0]
    lp.row_upper_ = np.r_[np.zeros(2 * J), 1.0]
    cols = [np.flatnonzero(dense[:, c]) for c in range(K + 2)]
    lp.a_matrix_.format_ = highspy.MatrixFormat.kColwise
    lp.a_matrix_.start_ = np.cumsum([0] + [len(c) for c in cols])
    lp.a_matrix_.index_ = np.concatenate(cols)
    lp.a_matrix_.value_ = np.concatenate([dense[c, i] for i, c in enumerate(cols)])
    h.passModel(lp)
    h.run()
    return h.getInfo().objective_function_value


def timed(fn, tables):
    """Wall-clock and process CPU milliseconds per call (CPU time is the steadier figure when
    other jobs share the machine)."""
    times, outputs = [], []
    for table in tables:
        wall, cpu = time.perf_counter(), time.process_time()
        outputs.append(fn(table))
        times.append((time.perf_counter() - wall, time.process_time() - cpu))
    return np.array(times) * 1e3, outputs


def tie_break_case(table, rng):
    pure = minimise_range_lp(table)
    anchor = rng.dirichlet(np.ones(table.shape[0]))
    tolerance = 0.5 * (np.ptp(anchor @ table) - pure.objective)
    return pure, tolerance, anchor


def bench_size(K: int, scale: float, rng) -> list[dict]:
    reps = {
        "lp_highspy_direct": 200,
        "cvxpy": 40,
        "grid_refine": 30 if K <= 10 else 10,
        "tie_break_qp": 100,
        "search_riesz_tie_break": 100,
        "search_minimax_grid": 10 if K <= 5 else 3,
    }
    tables = random_tables(K, 200, rng)

    def subset(name):
        return tables[: max(2, int(reps[name] * scale))]

    def range_grid(V):
        return grid_refine(lambda W: np.ptp(W @ V, axis=1), [K], lower_bound=0.0)

    lp_times, lp_out = timed(minimise_range_lp, tables)
    optimum = np.array([res.objective for res in lp_out])
    cases = {"lp": (lp_times, None)}
    times, objs = timed(highspy_range_lp, subset("lp_highspy_direct"))
    cases["lp_highspy_direct"] = (times, np.array(objs))
    times, out = timed(minimise_range_cvxpy, subset("cvxpy"))
    cases["cvxpy"] = (times, np.array([r.objective for r in out]))
    times, out = timed(range_grid, subset("grid_refine"))
    cases["grid_refine"] = (times, np.array([r.objective for r in out]))

    tie_tables = subset("tie_break_qp")
    prepared = iter([tie_break_case(V, rng) for V in tie_tables])
    tie_break_range(tie_tables[0], *tie_break_case(tie_tables[0], rng))  # warm-up
    times, _ = timed(lambda V: tie_break_range(V, *next(prepared)), tie_tables)
    cases["tie_break_qp"] = (times, None)

    anchors = (np.full(K, 1.0 / K), np.full(K, 1.0 / K))
    tolerance = {"propensity": 0.5, "outcome": 0.5}
    times, _ = timed(
        lambda V: search_weights(V, tolerance=tolerance, anchors=anchors),
        subset("search_riesz_tie_break"),
    )
    cases["search_riesz_tie_break"] = (times, None)
    if K <= 10:
        times, _ = timed(
            lambda V: search_weights(V, criterion="minimax"), subset("search_minimax_grid")
        )
        cases["search_minimax_grid"] = (times, None)

    rows = []
    for name, (times, objs) in cases.items():
        diff = None if objs is None else float(np.max(np.abs(objs - optimum[: len(objs)])))
        rows.append(
            {
                "solver": name,
                "K": K,
                "reps": len(times),
                "median_ms": float(np.median(times[:, 0])),
                "p90_ms": float(np.percentile(times[:, 0], 90)),
                "cpu_median_ms": float(np.median(times[:, 1])),
                "max_abs_diff_vs_lp": "-" if diff is None else diff,
            }
        )
    return rows


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--quick", action="store_true", help="fewer repetitions")
    args = parser.parse_args()
    scale = 0.25 if args.quick else 1.0
    rng = np.random.default_rng(20261202)
    rows = [row for K in SIZES for row in bench_size(K, scale, rng)]
    print_table(rows, "Weight solvers: per-solve latency on random K x K pair tables")
    lookup = {(r["solver"], r["K"]): r for r in rows}
    targets = {
        "lp_median_below_5ms_at_K_le_10": all(
            lookup[("lp", K)]["median_ms"] < 5.0 for K in SIZES if K <= 10
        ),
        "grid_refine_median_below_200ms_at_K_5": lookup[("grid_refine", 5)]["median_ms"] < 200.0,
    }
    print("\ntargets met:", targets)
    write_json("solvers", {"quick": args.quick, "rows": rows, "targets_met": targets})


if __name__ == "__main__":
    main()
