"""Tests for the pseudo-risks (DESIGN.md section 4).

References: the mixed-minimax and minimax pair criteria of Cui & Tchetgen Tchetgen,
"Selective machine learning of doubly robust functionals" (arXiv:1911.02029), as restated in
DESIGN.md section 4; they are recomputed here by explicit loops over learner swaps.
"""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from stackdr.core import (
    minimax_risk,
    mixed_risk,
    outcome_sensitivity,
    pairwise_gaps,
    riesz_blend,
    swap_deviations,
    value_range,
    weight_sensitivity,
)
from stackdr.errors import InputError
from tests.helpers import simplex_points, tables


def test_worked_example_by_hand():
    # Worked by hand: Psi = [[1, 2], [3, 5]], alpha = (1/2, 1/2), beta = (1, 0).
    Psi = np.array([[1.0, 2.0], [3.0, 5.0]])
    phi, chi, psi = riesz_blend(Psi, [0.5, 0.5], [1.0, 0.0])
    np.testing.assert_allclose(phi, [2.0, 3.5])
    np.testing.assert_allclose(chi, [1.0, 3.0])
    assert psi == pytest.approx(2.0)
    assert outcome_sensitivity(phi) == pytest.approx(1.5)
    assert weight_sensitivity(chi) == pytest.approx(2.0)
    assert mixed_risk(phi, chi) == pytest.approx(1.5**2 + 2.0**2)
    # Swaps move the estimate 2 -> 3.5 (outcome side) and 2 -> 1 or 3 (weight side).
    assert minimax_risk(phi, chi, psi) == pytest.approx(1.5**2)


def test_vertex_risks_match_pair_criteria_by_loops(rng):
    # Cui & Tchetgen Tchetgen (arXiv:1911.02029) pair criteria, recomputed by explicit loops.
    Psi = rng.normal(size=(4, 3))
    K1, K2 = Psi.shape
    for k in range(K1):
        for j in range(K2):
            alpha, beta = np.eye(K1)[k], np.eye(K2)[j]
            phi, chi, psi = riesz_blend(Psi, alpha, beta)
            out_moves = [Psi[k, jj] - Psi[k, j] for jj in range(K2)]
            ps_moves = [Psi[kk, j] - Psi[k, j] for kk in range(K1)]
            mixed = (max(Psi[k]) - min(Psi[k])) ** 2 + (max(Psi[:, j]) - min(Psi[:, j])) ** 2
            assert psi == pytest.approx(Psi[k, j])
            assert mixed_risk(phi, chi) == pytest.approx(mixed)
            assert minimax_risk(phi, chi, psi) == pytest.approx(
                max(max(m**2 for m in out_moves), max(m**2 for m in ps_moves))
            )


def test_masks_restrict_the_direction_learners():
    phi = np.array([0.0, 10.0, 1.0])
    chi = np.array([5.0, 2.0])
    out_mask = np.array([True, False, True])
    assert value_range(phi, out_mask) == pytest.approx(1.0)
    assert mixed_risk(phi, chi, outcome_mask=out_mask) == pytest.approx(1.0 + 9.0)
    assert minimax_risk(phi, chi, 1.0, outcome_mask=out_mask) == pytest.approx(16.0)
    assert minimax_risk(phi, chi, 1.0, out_mask, np.array([False, True])) == pytest.approx(1.0)


def test_batch_dimensions_broadcast(rng):
    Psi = rng.normal(size=(3, 4))
    A = rng.dirichlet(np.ones(3), size=(5, 2))
    B = rng.dirichlet(np.ones(4), size=(2,))
    phi, chi, psi = riesz_blend(Psi, A, B)
    assert phi.shape == (5, 2, 4) and chi.shape == (2, 3) and psi.shape == (5, 2)
    np.testing.assert_allclose(psi[3, 1], A[3, 1] @ Psi @ B[1])
    assert mixed_risk(phi, chi).shape == (5, 2)
    assert minimax_risk(phi, chi, psi).shape == (5, 2)
    np.testing.assert_allclose(
        minimax_risk(phi, chi, psi)[4, 0],
        minimax_risk(phi[4, 0], chi[0], psi[4, 0]),
    )


def test_bad_masks_and_shapes_raise():
    with pytest.raises(InputError, match="boolean"):
        value_range([1.0, 2.0], [1, 0])
    with pytest.raises(InputError, match="shape"):
        value_range([1.0, 2.0], [True])
    with pytest.raises(InputError, match="no learners"):
        value_range([1.0, 2.0], [False, False])
    with pytest.raises(InputError, match="alpha"):
        riesz_blend(np.zeros((2, 3)), [1.0, 0.0, 0.0], [1.0, 0.0, 0.0])


@settings(max_examples=60, deadline=None)
@given(data=st.data(), Psi=tables())
def test_risk_properties(data, Psi):
    K1, K2 = Psi.shape
    alpha = data.draw(simplex_points(K1))
    beta = data.draw(simplex_points(K2))
    phi, chi, psi = riesz_blend(Psi, alpha, beta)
    s_out, s_ps = outcome_sensitivity(phi), weight_sensitivity(chi)
    root_mm = np.sqrt(minimax_risk(phi, chi, psi))
    tol = 1e-9 * (1 + np.abs(Psi).max())
    # Non-negative; psi is a convex combination of phi (over beta) and of chi (over alpha), so
    # every single swap moves it by at most the range and the largest move is at least half of it.
    assert s_out >= 0 and s_ps >= 0
    assert root_mm <= max(s_out, s_ps) + tol
    assert root_mm >= max(s_out, s_ps) / 2 - tol
    assert np.max(pairwise_gaps(phi)) == pytest.approx(s_out, abs=tol)
    assert np.max(swap_deviations(phi, chi, psi)) == pytest.approx(root_mm, abs=tol)
    # Translation invariance: adding a constant to every pair leaves the risks unchanged.
    shifted = riesz_blend(Psi + 7.0, alpha, beta)
    assert mixed_risk(*shifted[:2]) == pytest.approx(mixed_risk(phi, chi), abs=1e-6)
    # Relabelling learners relabels phi and chi and leaves the risks unchanged.
    p1 = data.draw(st.permutations(range(K1)))
    p2 = data.draw(st.permutations(range(K2)))
    phi_p, chi_p, psi_p = riesz_blend(Psi[np.ix_(p1, p2)], alpha[p1], beta[p2])
    np.testing.assert_allclose(phi_p, phi[p2], atol=tol)
    np.testing.assert_allclose(chi_p, chi[p1], atol=tol)
    assert minimax_risk(phi_p, chi_p, psi_p) == pytest.approx(minimax_risk(phi, chi, psi), abs=1e-6)
