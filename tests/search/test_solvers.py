"""Tests for the weight solvers (DESIGN.md section 5).

Outside references: the HiGHS LP is checked against the same program written in cvxpy (solved
by Clarabel), the tie-break QP against scipy's SLSQP on the same convex QP and against the QP
written in cvxpy (the readable reference for the package's direct Clarabel call), and the discrete
selectors against brute-force enumeration of all (k, j) pairs of the mixed-minimax and minimax
pair criteria of Cui & Tchetgen Tchetgen (arXiv:1911.02029), as stated in DESIGN.md section 4.
"""

import math
import warnings
from concurrent.futures import ThreadPoolExecutor
from types import SimpleNamespace

import clarabel
import cvxpy as cp
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays
from scipy.optimize import minimize

from stackdr.core import pairwise_gaps
from stackdr.errors import InputError
from stackdr.search import (
    _external_solvers,
    _range_lp,
    grid_refine,
    lattice_size,
    minimise_range_cvxpy,
    minimise_range_lp,
    search_weights,
    simplex_lattice,
    tie_break_general,
    tie_break_range,
)
from tests.helpers import simplex_points, tables

values = st.floats(-10, 10, allow_nan=False, allow_infinity=False)


def value_tables(max_k=8):
    return tables(max_k=max_k, elements=values)


def assert_on_simplex(w, dims=None):
    dims = [w.size] if dims is None else dims
    assert np.all(w >= -1e-12)
    for block in np.split(w, np.cumsum(dims)[:-1]):
        assert abs(block.sum() - 1.0) <= 1e-9


def range_objective(V):
    return lambda W: np.ptp(W @ V, axis=1)


def brute_force_pairs(Psi):
    """Mixed-minimax and minimax pair criteria for every (k, j), by loops."""
    K1, K2 = Psi.shape
    mixed = np.empty((K1, K2))
    minimax = np.empty((K1, K2))
    for k in range(K1):
        for j in range(K2):
            mixed[k, j] = np.ptp(Psi[k]) ** 2 + np.ptp(Psi[:, j]) ** 2
            out_moves = [(Psi[k, jj] - Psi[k, j]) ** 2 for jj in range(K2)]
            ps_moves = [(Psi[kk, j] - Psi[k, j]) ** 2 for kk in range(K1)]
            minimax[k, j] = max(max(out_moves), max(ps_moves))
    return mixed, minimax


# --- exact path -------------------------------------------------------------------------------


@settings(max_examples=30, deadline=None)
@given(V=value_tables())
def test_lp_cvxpy_and_grid_agree(V):
    # cvxpy/Clarabel is the outside reference for the HiGHS LP; grid_refine must reach both.
    lp = minimise_range_lp(V)
    ref = minimise_range_cvxpy(V)
    grid = grid_refine(range_objective(V), [V.shape[0]], lower_bound=0.0)
    for res in (lp, ref, grid):
        assert_on_simplex(res.weights)
        assert res.objective == pytest.approx(np.ptp(res.weights @ V), abs=1e-12)
    assert lp.status == "optimal" and ref.status in ("optimal", "inaccurate")
    assert abs(lp.objective - ref.objective) <= 1e-6
    assert abs(grid.objective - lp.objective) <= 1e-6
    # Nothing on the simplex beats the LP: vertices and a coarse lattice cannot.
    lattice = simplex_lattice(V.shape[0], 3)
    assert np.ptp(lattice @ V, axis=1).min() >= lp.objective - 1e-9 * max(1.0, np.ptp(V))


def test_lp_masks_and_degenerate_shapes(rng):
    V = rng.normal(size=(4, 5))
    mask = np.array([True, False, True, True, False])
    masked = minimise_range_lp(V, mask)
    assert masked.objective == pytest.approx(minimise_range_lp(V[:, mask]).objective, abs=1e-9)
    assert minimise_range_cvxpy(V, mask).objective == pytest.approx(masked.objective, abs=1e-6)
    single = minimise_range_lp(V[:1])  # K = 1: the only learner
    assert single.weights.tolist() == [1.0] and single.objective == pytest.approx(np.ptp(V[0]))
    column = minimise_range_lp(V[:, :1])  # J = 1: every weight has zero range
    assert column.objective == pytest.approx(0.0) and column.status == "optimal"
    assert_on_simplex(column.weights)
    # Range is translation-invariant and scales with the values (DR estimates near 210).
    big = minimise_range_lp(210.0 + 30.0 * V)
    assert big.objective == pytest.approx(30.0 * minimise_range_lp(V).objective, rel=1e-9)


def test_lp_failure_falls_back_to_best_vertex(monkeypatch, rng):
    V = rng.normal(size=(3, 4))

    def failing_lp(*args, **kwargs):
        return False, None, "numerical difficulties", 0

    monkeypatch.setattr(_range_lp, "highs_range_lp", failing_lp)
    with pytest.warns(RuntimeWarning, match="numerical difficulties"):
        res = minimise_range_lp(V)
    best = int(np.argmin(np.ptp(V, axis=1)))
    assert res.status == "fallback"
    assert res.weights.tolist() == np.eye(3)[best].tolist()
    assert res.objective == pytest.approx(np.ptp(V[best]))


def test_bad_inputs_raise():
    with pytest.raises(InputError, match=r"V\[1, 0\]"):
        minimise_range_lp([[0.0, 1.0], [np.nan, 2.0]])
    with pytest.raises(InputError, match="2-D"):
        minimise_range_lp([1.0, 2.0])
    with pytest.raises(InputError, match="no learners"):
        minimise_range_lp(np.eye(2), mask=[False, False])
    with pytest.raises(InputError, match="shape"):
        grid_refine(lambda W: np.zeros((len(W), 2)), [3])


# --- lattice and grid refinement --------------------------------------------------------------


@pytest.mark.parametrize("k, r", [(1, 5), (2, 1), (3, 4), (5, 6)])
def test_simplex_lattice_counts_and_points(k, r):
    lattice = simplex_lattice(k, r)
    assert len(lattice) == math.comb(r + k - 1, k - 1) == lattice_size([k], r)
    assert len(np.unique(lattice, axis=0)) == len(lattice)
    np.testing.assert_allclose(lattice.sum(axis=1), 1.0)
    np.testing.assert_allclose(lattice * r, np.round(lattice * r), atol=1e-12)
    if r == 1:
        np.testing.assert_array_equal(lattice, np.eye(k))


def test_lattice_cap_lowers_the_resolution(rng):
    V = rng.normal(size=(12, 3))
    res = grid_refine(range_objective(V), [12], refine=False, max_points=2000)
    r = res.details["resolution"]
    assert res.details["requested_resolution"] == 20
    assert lattice_size([12], r) <= 2000 < lattice_size([12], r + 1)
    assert res.details["lattice_size"] == lattice_size([12], r)


def test_vertex_only_grid_is_discrete_selection(rng):
    V = rng.normal(size=(5, 4))
    res = grid_refine(range_objective(V), [5], resolution=1, refine=False)
    assert res.status == "lattice" and res.details["lattice_size"] == 5
    assert res.weights.tolist() == np.eye(5)[np.argmin(np.ptp(V, axis=1))].tolist()


def test_grid_refine_is_deterministic_and_reaches_a_separable_product_optimum(rng):
    # Sum of two ranges over a product of simplices: optimum is the sum of the two LP optima.
    V1, V2 = rng.normal(size=(3, 4)), rng.normal(size=(4, 3))

    def objective(W):
        return np.ptp(W[:, :3] @ V1, axis=1) + np.ptp(W[:, 3:] @ V2, axis=1)

    first = grid_refine(objective, [3, 4], lower_bound=0.0)
    again = grid_refine(objective, [3, 4], lower_bound=0.0)
    np.testing.assert_array_equal(first.weights, again.weights)
    assert_on_simplex(first.weights, [3, 4])
    target = minimise_range_lp(V1).objective + minimise_range_lp(V2).objective
    assert first.objective == pytest.approx(target, abs=1e-6)
    assert first.details["polish_iterations"] and first.details["evaluations"] > 0


def test_grid_refine_copes_with_estimates_near_210(rng):
    # DR estimates near 210 that differ by about 1e-3: objective values carry cancellation
    # error near 210 * 2e-16, which tiny difference steps would turn into wrong slopes.
    V = 210.0 + 1e-3 * rng.normal(size=(6, 5))
    grid = grid_refine(range_objective(V), [6], lower_bound=0.0)
    assert grid.objective == pytest.approx(minimise_range_lp(V).objective, abs=1e-6 * np.ptp(V))


def test_grid_refine_smooth_objective_interior_minimum(rng):
    # Cross-entropy -sum c log w is minimised over the simplex at w = c (Gibbs' inequality).
    c = rng.dirichlet(np.ones(4))
    res = grid_refine(lambda W: -(np.log(np.maximum(W, 1e-300)) @ c), [4])
    np.testing.assert_allclose(res.weights, c, atol=1e-4)
    assert res.objective == pytest.approx(-(c @ np.log(c)), abs=1e-8)


# --- tie-break --------------------------------------------------------------------------------


def slsqp_projection(V, anchor, bound, start):
    """Reference: the tie-break QP by scipy SLSQP, one smooth constraint per learner pair."""
    cons = [
        {"type": "eq", "fun": lambda a: a.sum() - 1.0},
        {"type": "ineq", "fun": lambda a: bound - pairwise_gaps(a @ V)},
    ]
    return minimize(
        lambda a: np.sum((a - anchor) ** 2),
        start,
        jac=lambda a: 2 * (a - anchor),
        bounds=[(0, 1)] * V.shape[0],
        constraints=cons,
        method="SLSQP",
        options={"ftol": 1e-15, "maxiter": 500},
    )


@settings(max_examples=30, deadline=None)
@given(data=st.data(), V=value_tables(max_k=6), share=st.floats(0.0, 1.0))
def test_tie_break_range_properties(data, V, share):
    K = V.shape[0]
    anchor = data.draw(simplex_points(K))
    pure = minimise_range_lp(V)
    tolerance = share * (np.ptp(anchor @ V) - pure.objective)
    tie = tie_break_range(V, pure, max(tolerance, 0.0), anchor)
    assert_on_simplex(tie.weights)
    slack = 1e-9 * max(np.ptp(V), 1.0)  # documented feasibility slack of the tie-break
    assert np.ptp(tie.weights @ V) <= pure.objective + max(tolerance, 0.0) + slack
    distance = np.linalg.norm(tie.weights - anchor)
    assert distance <= np.linalg.norm(pure.weights - anchor) + 1e-9
    if tie.details["anchor_feasible"]:
        np.testing.assert_allclose(tie.weights, anchor)
    # Tolerance 0 returns a minimiser (the anchor's projection onto the optimal face).
    exact = tie_break_range(V, pure, 0.0, anchor)
    assert np.ptp(exact.weights @ V) <= pure.objective + slack


def tie_break_problem(rng, K, J, share):
    """Random V, anchor, pure minimiser and a tolerance covering ``share`` of the anchor's gap."""
    V = rng.normal(size=(K, J))
    anchor = rng.dirichlet(np.ones(K))
    pure = minimise_range_lp(V)
    return V, anchor, pure, share * (np.ptp(anchor @ V) - pure.objective)


def test_tie_break_matches_scipy_qp_and_reports(rng):
    for _ in range(5):
        V, anchor, pure, tolerance = tie_break_problem(rng, 5, 4, 0.4)
        tie = tie_break_range(V, pure, tolerance, anchor)
        ref = slsqp_projection(V, anchor, pure.objective + tolerance, pure.weights)
        assert ref.success, ref.message
        assert tie.details["distance_to_anchor"] == pytest.approx(
            np.linalg.norm(ref.x - anchor), abs=1e-6
        )
        assert tie.details["tolerance"] == tolerance and tie.details["moved"]
        assert not tie.details["anchor_feasible"]
    feasible = tie_break_range(V, pure, 1e6, anchor)
    assert feasible.details["anchor_feasible"]
    np.testing.assert_array_equal(feasible.weights, anchor)
    same = tie_break_range(V, pure, 0.0, pure.weights)
    assert not same.details["moved"]
    with pytest.raises(InputError, match="tolerance"):
        tie_break_range(V, pure, -1.0, anchor)
    with pytest.raises(InputError, match="anchor"):
        tie_break_range(V, pure, 0.1, np.ones(5))


def test_tie_break_general_agrees_with_the_qp(rng):
    for _ in range(5):
        V, anchor, pure, tolerance = tie_break_problem(rng, 4, 5, 0.3)
        qp = tie_break_range(V, pure, tolerance, anchor)
        for pieces in (lambda W, V=V: pairwise_gaps(W @ V), None):
            general = tie_break_general(
                range_objective(V),
                [4],
                pure.objective,
                tolerance,
                anchor,
                pure.weights,
                pieces=pieces,
            )
            assert_on_simplex(general.weights)
            slack = 1e-9 * max(np.ptp(anchor @ V), tolerance)  # documented feasibility slack
            assert np.ptp(general.weights @ V) <= pure.objective + tolerance + slack
            assert (
                general.details["distance_to_anchor"]
                <= np.linalg.norm(pure.weights - anchor) + 1e-12
            )
            if pieces is not None:
                np.testing.assert_allclose(general.weights, qp.weights, atol=1e-6)


def cvxpy_projection(V, anchor, bound):
    """Reference: the tie-break QP written in cvxpy on the standardised values (as the package
    poses it), solved by cvxpy's Clarabel interface with the package's tight settings."""
    spread = np.ptp(V) if np.ptp(V) > 0 else 1.0
    Vs = (V - 0.5 * (V.min() + V.max())) / spread
    a = cp.Variable(V.shape[0], nonneg=True)
    upper, lower = cp.Variable(), cp.Variable()
    values = a @ Vs
    problem = cp.Problem(
        cp.Minimize(cp.sum_squares(a - anchor)),
        [cp.sum(a) == 1, values <= upper, values >= lower, upper - lower <= bound / spread],
    )
    problem.solve(solver=cp.CLARABEL, **_external_solvers.CLARABEL_TIGHT)
    assert problem.status == cp.OPTIMAL, problem.status
    return a.value


def degenerate_table(rng, kind):
    """Random tables (estimates near 210, as in a pair table) with the named degeneracy."""
    K, J = {"plain": (6, 5), "wide": (3, 9), "two_learners": (2, 4)}.get(kind, (5, 5))
    V = 210.0 + rng.normal(0, 2, size=(K, 1)) + rng.normal(0, 1, size=(K, J))
    if kind == "duplicated_columns":
        V[:, 3:] = V[:, :2]
    elif kind == "duplicated_learners":
        V[1] = V[0]
    elif kind == "dominating_learner":
        V[2] = V[2].mean()  # flat row: range 0, the unique minimiser is that vertex
    return V


@pytest.mark.parametrize(
    "kind",
    [
        "plain",
        "wide",
        "two_learners",
        "duplicated_columns",
        "duplicated_learners",
        "dominating_learner",
    ],
)
def test_direct_clarabel_matches_the_cvxpy_formulation(rng, kind):
    # 6 kinds x 10 tables, each at a random share of the anchor's gap and at tolerance 0.
    for _ in range(10):
        V = degenerate_table(rng, kind)
        anchor = rng.dirichlet(np.ones(V.shape[0]))
        pure = minimise_range_lp(V)
        gap = np.ptp(anchor @ V) - pure.objective
        for tolerance in (rng.uniform(0.05, 0.9) * gap, 0.0):
            with warnings.catch_warnings():
                warnings.simplefilter("error")  # a fallback would warn
                tie = tie_break_range(V, pure, tolerance, anchor)
            assert tie.method == "tie_break_qp" and tie.status == "optimal"
            reference = cvxpy_projection(V, anchor, pure.objective + tolerance)
            np.testing.assert_allclose(tie.weights, reference, rtol=0, atol=1e-6)


def test_tie_break_is_thread_safe(rng):
    # One shape for all tables: a solver state shared per shape would be raced on.
    cases = []
    for _ in range(40):
        V = rng.normal(size=(6, 6))
        pure = minimise_range_lp(V)
        anchor = rng.dirichlet(np.ones(6))
        cases.append((V, pure, 0.5 * (np.ptp(anchor @ V) - pure.objective), anchor))
    serial = [tie_break_range(*case).weights for case in cases]
    with ThreadPoolExecutor(max_workers=4) as pool:
        concurrent = list(pool.map(lambda case: tie_break_range(*case).weights, cases))
    for one, other in zip(serial, concurrent):
        np.testing.assert_allclose(other, one, rtol=0, atol=1e-12)


def reporting_solver(statuses):
    """A stand-in for clarabel.DefaultSolver that solves for real but reports the given
    statuses in turn (an exception instance is raised instead)."""
    real, reports = clarabel.DefaultSolver, iter(statuses)

    def make(*args):
        report = next(reports)
        if isinstance(report, Exception):
            raise report
        solution = real(*args).solve()
        return SimpleNamespace(solve=lambda: SimpleNamespace(x=solution.x, status=report))

    return make


@pytest.mark.parametrize(
    "statuses, expected",
    [
        (["Solved"], "optimal"),
        (["AlmostSolved"], "inaccurate"),
        (["NumericalError", "Solved"], "optimal"),  # defaults rescue the tight settings
        ([RuntimeError("boom"), "AlmostSolved"], "inaccurate"),
        (["MaxIterations", "NumericalError"], "fallback"),
        (["InsufficientProgress", RuntimeError("boom")], "fallback"),
    ],
)
def test_tie_break_maps_clarabel_statuses(monkeypatch, rng, statuses, expected):
    V, anchor, pure, tolerance = tie_break_problem(rng, 5, 4, 0.4)
    exact = tie_break_range(V, pure, tolerance, anchor)
    monkeypatch.setattr(clarabel, "DefaultSolver", reporting_solver(statuses))
    if expected == "fallback":
        last = statuses[-1]
        with pytest.warns(RuntimeWarning, match=f"tie-break failed.*{last}"):
            tie = tie_break_range(V, pure, tolerance, anchor)
        # The fallback steps from the pure minimiser towards the anchor: feasible, no farther.
        assert np.ptp(tie.weights @ V) <= pure.objective + tolerance + 1e-9 * np.ptp(V)
        assert tie.details["distance_to_anchor"] <= np.linalg.norm(pure.weights - anchor) + 1e-12
    else:
        tie = tie_break_range(V, pure, tolerance, anchor)
        np.testing.assert_allclose(tie.weights, exact.weights, rtol=0, atol=1e-9)
    assert tie.status == expected and tie.method == "tie_break_qp"


# --- the weight search ------------------------------------------------------------------------


@settings(max_examples=25, deadline=None)
@given(Psi=value_tables(max_k=5))
def test_vertex_only_search_reproduces_pair_selection(Psi):
    mixed, minimax = brute_force_pairs(Psi)
    by_mixed = search_weights(Psi, criterion="mixed", resolution=1)
    by_minimax = search_weights(Psi, criterion="minimax", resolution=1)
    assert by_mixed.risk == pytest.approx(mixed.min(), abs=1e-9)
    assert by_minimax.risk == pytest.approx(minimax.min(), abs=1e-9)
    for found in (by_mixed, by_minimax):
        assert set(np.unique(found.alpha)) <= {0.0, 1.0}
        assert set(np.unique(found.beta)) <= {0.0, 1.0}
    k, j = int(np.argmax(by_minimax.alpha)), int(np.argmax(by_minimax.beta))
    assert minimax[k, j] == pytest.approx(minimax.min(), abs=1e-9)
    assert by_minimax.estimate == pytest.approx(Psi[k, j])


@settings(max_examples=15, deadline=None)
@given(Psi=value_tables(max_k=5))
def test_nonlinear_path_with_linear_phi_matches_the_lp_path(Psi):
    exact = search_weights(Psi)
    via_grid = search_weights(Psi, phi=lambda A: A @ Psi)
    assert via_grid.records["alpha"].method == "grid_refine"
    assert via_grid.s_out == pytest.approx(exact.s_out, abs=1e-6)
    assert via_grid.s_ps == pytest.approx(exact.s_ps, abs=1e-9)
    assert_on_simplex(via_grid.alpha)


def test_minimax_search_beats_every_pair(rng):
    Psi = rng.normal(size=(3, 4))
    _, minimax = brute_force_pairs(Psi)
    found = search_weights(Psi, criterion="minimax")
    assert_on_simplex(found.alpha) and assert_on_simplex(found.beta)
    assert found.risk <= minimax.min() + 1e-12
    assert found.records["joint"].method == "grid_refine"
    assert found.estimate == pytest.approx(found.alpha @ Psi @ found.beta)


# Quarter steps keep distinct values far apart relative to solver tolerances (values closer
# than about 1e-9 of their spread count as tied, and ties make the answer label-dependent).
quarters = st.integers(-40, 40).map(lambda v: v / 4)


@settings(max_examples=15, deadline=None)
@given(
    data=st.data(),
    Psi=st.tuples(st.integers(1, 5), st.integers(1, 5)).flatmap(
        lambda shape: arrays(float, shape, elements=quarters)
    ),
)
def test_relabelling_learners_permutes_weights(data, Psi):
    K1, K2 = Psi.shape
    p1 = np.array(data.draw(st.permutations(range(K1))))
    p2 = np.array(data.draw(st.permutations(range(K2))))
    anchors = (data.draw(simplex_points(K1)), data.draw(simplex_points(K2)))
    zero = {"propensity": 0.0, "outcome": 0.0}
    base = search_weights(Psi, tolerance=zero, anchors=anchors)
    relabelled = search_weights(
        Psi[np.ix_(p1, p2)], tolerance=zero, anchors=(anchors[0][p1], anchors[1][p2])
    )
    assert relabelled.risk == pytest.approx(base.risk, abs=1e-9)
    # With a strictly convex tie-break the answer is unique, so it must follow the labels.
    np.testing.assert_allclose(relabelled.alpha, base.alpha[p1], atol=1e-6)
    np.testing.assert_allclose(relabelled.beta, base.beta[p2], atol=1e-6)
    pure = search_weights(Psi[np.ix_(p1, p2)])
    assert pure.s_out == pytest.approx(search_weights(Psi).s_out, abs=1e-9)


def test_search_tie_break_options(rng):
    Psi = rng.normal(size=(5, 3))
    anchors = (rng.dirichlet(np.ones(5)), rng.dirichlet(np.ones(3)))
    pure = search_weights(Psi)
    calls = []

    def tolerance(side, weights):
        calls.append((side, weights.copy()))
        return 0.2

    tied = search_weights(Psi, tolerance=tolerance, anchors=anchors)
    assert [side for side, _ in calls] == ["propensity", "outcome"]
    np.testing.assert_allclose(calls[0][1], pure.alpha)
    np.testing.assert_allclose(calls[1][1], pure.beta)
    assert tied.s_out <= pure.s_out + 0.2 + 1e-9 and tied.s_ps <= pure.s_ps + 0.2 + 1e-9
    assert {"alpha_tie_break", "beta_tie_break"} <= set(tied.records)
    # Nonlinear path and minimax use the general tie-break; both keep the bound.
    nonlinear = search_weights(
        Psi, phi=lambda A: A @ Psi, tolerance={"propensity": 0.2, "outcome": 0.2}, anchors=anchors
    )
    assert nonlinear.records["alpha_tie_break"].method == "tie_break_slsqp"
    np.testing.assert_allclose(nonlinear.alpha, tied.alpha, atol=1e-6)
    mm = search_weights(Psi, criterion="minimax")
    mm_tied = search_weights(
        Psi, criterion="minimax", tolerance={"propensity": 0.05, "outcome": 0.2}, anchors=anchors
    )
    assert np.sqrt(mm_tied.risk) <= np.sqrt(mm.risk) + 0.2 + 1e-9
    assert mm_tied.records["joint_tie_break"].details["tolerance"] == 0.2
    # Vertices only: the tie-break picks among vertices too.
    discrete = search_weights(
        Psi, resolution=1, tolerance={"propensity": 0.2, "outcome": 0.2}, anchors=anchors
    )
    assert set(np.unique(np.concatenate([discrete.alpha, discrete.beta]))) <= {0.0, 1.0}


def test_search_masks_use_only_direction_learners(rng):
    Psi = rng.normal(size=(4, 3))
    Psi[:, 2] += 100.0  # a wild outcome learner, excluded from the perturbations
    out_mask = np.array([True, True, False])
    found = search_weights(Psi, masks=(None, out_mask))
    assert found.s_out == pytest.approx(minimise_range_lp(Psi[:, :2]).objective, abs=1e-9)
    assert found.s_out == pytest.approx(np.ptp((found.alpha @ Psi)[:2]), abs=1e-12)


def test_search_rejects_bad_settings(rng):
    Psi = rng.normal(size=(3, 2))
    with pytest.raises(InputError, match="criterion"):
        search_weights(Psi, criterion="oracle")
    with pytest.raises(InputError, match="anchors"):
        search_weights(Psi, tolerance={"propensity": 0.1, "outcome": 0.1})
    with pytest.raises(InputError, match="outcome"):
        search_weights(Psi, tolerance={"propensity": 0.1}, anchors=(np.ones(3) / 3, [0.5, 0.5]))
    with pytest.raises(InputError, match=r"phi\(e_k\)"):
        search_weights(Psi, phi=lambda A: A @ Psi + 1.0)
    with pytest.raises(InputError, match="propensity mask"):
        search_weights(Psi, masks=(np.array([True]), None))


def test_no_warnings_on_ordinary_problems(rng):
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        search_weights(rng.normal(size=(4, 4)), criterion="mixed")
