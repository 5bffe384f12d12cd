"""The fast replicate search of the reweighting bootstrap against slow, direct evaluation.

The bootstrap's non-riesz paths evaluate phi through :class:`WeightedPhi` (per-row work done once,
lattice values batched across replicates by :func:`lattice_phi`), and the polish of
:func:`grid_refine` solves its model LPs through highspy. These tests rerun the same searches with
the generic :func:`phi` on the weighted rows and with the model LP solved by
``scipy.optimize.linprog`` (the reference library), and require the same answers.
"""

import numpy as np
import pytest
from scipy.optimize import linprog

from stackdr.core import WeightedPhi, lattice_phi, pair_table, phi
from stackdr.inference._reweighting import (
    _fixed_tolerances,
    _replicate_lattice,
    _weighted_phi,
    draw_row_weights,
    replicate_generators,
)
from stackdr.search import SearchSettings, _polish, lattice_resolution, run_search, simplex_lattice


def _row_weights(n: int, count: int) -> np.ndarray:
    gens = replicate_generators(11, count)
    return np.column_stack([draw_row_weights(g, n, "multinomial") for g in gens])


@pytest.mark.parametrize("blend", ["logit", "probability"])
def test_weighted_and_lattice_phi_match_generic_phi(small_fit, blend):
    inp = small_fit[1].analysis.base_inputs[0]
    W = _row_weights(inp.n, 3)
    points = simplex_lattice(3, 20)
    batched = lattice_phi(inp, blend, W, points, batch=50)
    off_lattice = np.random.default_rng(0).dirichlet(np.ones(3), 7)
    for col in range(W.shape[1]):
        w = W[:, col]
        ref = phi(inp, points, blend, w)
        scale = np.abs(ref).max()
        np.testing.assert_allclose(batched[col], ref, rtol=0, atol=1e-12 * scale)
        direct = WeightedPhi(inp, blend, w)
        np.testing.assert_allclose(direct(points), ref, rtol=0, atol=1e-12 * scale)
        # With the lattice attached, lattice rows come from the table and the rest are computed.
        memo = WeightedPhi(inp, blend, w, (20, points, batched[col]))
        mixed = np.vstack([points[::5], off_lattice])
        np.testing.assert_allclose(
            memo(mixed), phi(inp, mixed, blend, w), rtol=0, atol=1e-12 * scale
        )


def _linprog_model(original):
    """The polish's model LP through scipy.optimize.linprog (HiGHS behind scipy's wrapper), the
    path used before highspy; the range LP keeps the original."""

    def solve(kind, cost, A_ub, b_ub, A_eq, b_eq, bounds):
        if kind != "model":
            return original(kind, cost, A_ub, b_ub, A_eq, b_eq, bounds)
        res = linprog(cost, A_ub=A_ub, b_ub=b_ub, A_eq=A_eq, b_eq=b_eq, bounds=bounds)
        return res.status == 0, res.x, res.message, int(res.nit)

    return solve


@pytest.mark.parametrize(
    "blend, criterion", [("logit", "mixed"), ("probability", "minimax"), ("riesz", "minimax")]
)
def test_replicate_search_matches_slow_reference(small_fit, monkeypatch, blend, criterion):
    result = small_fit[1]
    an = result.analysis
    # The search over the library's learners (the slow reference has no stacked column).
    inp = an.base_inputs[0]
    K1, K2 = an.base_learners, an.Psi.shape[1]
    masks = (None if an.masks[0] is None else an.masks[0][:K1], an.masks[1])
    settings = SearchSettings(criterion=criterion, blend=blend)
    taus = _fixed_tolerances(result)
    # Unit weights (the full sample) and three multinomial replicates.
    W = np.column_stack([np.ones(inp.n), _row_weights(inp.n, 3)])
    lattice = _replicate_lattice([inp], settings, W, K1, K2)
    if blend != "riesz":
        assert lattice[0] == lattice_resolution([K1] if criterion == "mixed" else [K1, K2])

    def search(Psi, phi_fn):
        return run_search(
            Psi,
            settings,
            phi=phi_fn,
            anchors=(an.stack_alpha, an.stack_beta),
            tolerance=taus,
            masks=masks,
        )

    fast, slow = [], []
    for col in range(W.shape[1]):
        w = W[:, col]
        Psi = pair_table(inp, w)
        fast_phi = None if blend == "riesz" else _weighted_phi([inp], blend, w, lattice, col)
        fast.append(search(Psi, fast_phi))
    monkeypatch.setattr(_polish, "highs_lp", _linprog_model(_polish.highs_lp))
    for col in range(W.shape[1]):
        w = W[:, col]

        def slow_phi(A, w=w):
            return phi(inp, A, blend, w)

        slow.append(search(pair_table(inp, w), None if blend == "riesz" else slow_phi))
    # The minimax polish is a local search on a nonconvex objective: a different (equally
    # optimal) LP vertex on its way can end it a few 1e-8 away, as seen in one replicate here.
    spread = float(np.ptp(an.Psi))
    for a, b in zip(fast, slow):
        np.testing.assert_allclose(a.alpha, b.alpha, atol=1e-6)
        np.testing.assert_allclose(a.beta, b.beta, atol=1e-6)
        assert a.estimate == pytest.approx(b.estimate, abs=1e-7 * spread)
        for key, record in a.records.items():
            assert record.objective == pytest.approx(b.records[key].objective, abs=1e-7 * spread)
