"""Pieces of the analysis after cross-fitting: repeated-split combination, phi over repeats,
prediction-loss stacking (weighted when the data carry sampling weights), the search tables over
the search's propensity columns and the noise floor of the tie-break."""

from __future__ import annotations

import numpy as np

from stackdr.core import (
    contrast_standard_error,
    log_losses,
    logloss_stack,
    nnls_stack,
    phi,
    squared_error_losses,
)
from stackdr.estimation._crossfit import CrossFitResult
from stackdr.estimation._data import PreparedData
from stackdr.search import SearchSettings


def combine_repeats(estimates, ses) -> tuple[float, float]:
    """Median over repeated splits, with the spread-adjusted SE of Chernozhukov et al. (2018)."""
    est = np.asarray(estimates, dtype=float)
    ses = np.asarray(ses, dtype=float)
    med = float(np.median(est))
    return med, float(np.median(np.sqrt(ses**2 + (est - med) ** 2)))


def phi_function(inputs: list, blend: str):
    def phi_fn(alphas: np.ndarray) -> np.ndarray:
        return np.median(np.stack([phi(inp, alphas, blend) for inp in inputs]), axis=0)

    return phi_fn


def prediction_losses_and_stacking(prepared: PreparedData, cf: CrossFitResult):
    """Per-learner out-of-fold losses and prediction-loss stacking weights (super learner,
    van der Laan, Polley & Hubbard 2007), pooled over repeated splits."""
    rows = cf.observed_mask
    R = cf.repeats
    obs = cf.observed[:, rows, :].reshape(-1, len(cf.outcome_names))
    y = np.tile(prepared.Y[rows], R)
    w = prepared.weights
    w_out = None if w is None else np.tile(w[rows], R)
    out_loss = squared_error_losses(obs, y, w_out)
    beta = nnls_stack(obs, y, w_out).weights
    probs = cf.propensity.reshape(-1, len(cf.propensity_names))
    a = np.tile(prepared.A, R)
    w_all = None if w is None else np.tile(w, R)
    if cf.propensity_kind == "classifier":
        prop_loss = log_losses(probs, a, w_all)
        alpha = logloss_stack(probs, a, w_all).weights
    else:
        prop_loss = squared_error_losses(probs, a, w_all)
        alpha = nnls_stack(probs, a, w_all).weights
    return {"propensity": prop_loss, "outcome": out_loss}, alpha, beta


def search_table(table, base_inputs: list, inputs: list, stacked: bool) -> np.ndarray:
    """A per-pair table (``table(inputs)``, K x K2) over the search's propensity columns, median
    over repeated splits. The learners' rows are computed from their own inputs, so they are the
    same numbers whether or not the stacked propensity's row is appended."""
    values = [table(inp) for inp in base_inputs]
    if stacked:
        values = [np.vstack([v, table(inp)[-1:]]) for v, inp in zip(values, inputs)]
    return np.median(np.stack(values), axis=0)


def stacked_propensity_loss(
    prepared: PreparedData, cf: CrossFitResult, stack_alpha: np.ndarray
) -> float:
    """Out-of-fold loss of the prediction-loss stacked propensity, pooled over repeated
    splits like the learners' losses."""
    probs = cf.propensity.reshape(-1, len(cf.propensity_names)) @ stack_alpha
    a = np.tile(prepared.A, cf.repeats)
    w = None if prepared.weights is None else np.tile(prepared.weights, cf.repeats)
    losses = log_losses if cf.propensity_kind == "classifier" else squared_error_losses
    return float(losses(probs[:, None], a, w)[0])


# Values within this fraction of the pair table's spread count as tied for the largest or the
# smallest: about the accuracy of the LP optimum, so round-off never decides which contrast sets
# the noise floor.
_TIE_FRACTION = 1e-9


def noise_floor_function(an, settings: SearchSettings):
    """tau(side, weights) = c x SE of the pair contrast that attains the sensitivity range at
    those weights (first repetition's rows). When several learners tie for the largest or the
    smallest value (a zero range ties them all), the largest SE among the tied contrasts is
    used, so the result depends neither on learner order nor on round-off."""
    inp = an.inputs[0]
    K1, K2 = an.Psi.shape
    blend = settings.blend
    phi_fn = phi_function(an.inputs, blend)
    tie = _TIE_FRACTION * float(np.ptp(an.Psi))

    def extreme_pairs(values, mask):
        idx = np.arange(values.size) if mask is None else np.flatnonzero(mask)
        sub = values[idx]
        top, bottom = idx[sub >= sub.max() - tie], idx[sub <= sub.min() + tie]
        return {tuple(sorted((h, l))) for h in top for l in bottom if h != l}

    def tolerance(side: str, weights: np.ndarray) -> float:
        weights = np.asarray(weights, dtype=float)
        if side == "propensity":
            pairs = extreme_pairs(phi_fn(weights[None])[0], an.masks[1])
            ends = [((weights, np.eye(K2)[h]), (weights, np.eye(K2)[lo])) for h, lo in pairs]
        else:
            pairs = extreme_pairs(an.Psi @ weights, an.masks[0])
            ends = [((np.eye(K1)[h], weights), (np.eye(K1)[lo], weights)) for h, lo in pairs]
        if not ends:
            return 0.0
        return settings.tie_break_scale * max(
            contrast_standard_error(inp, first, second, blend) for first, second in ends
        )

    return tolerance
