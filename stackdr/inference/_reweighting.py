"""Selection-aware inference (DESIGN section 7).

The reweighting bootstrap draws row weights, recomputes every pair table, the prediction losses
and the prediction-loss stacking weights from the *same* out-of-fold predictions, reruns the
whole weight search (criterion, solver, tie-break) and recomputes each estimate. The replicate
pair tables are one matrix product per chunk of replicates: ``W' F`` where F (n x M) holds the
per-row terms whose weighted sums are every quantity the search needs, and W (n x chunk) the row
weights. Peak extra memory is about ``8 n (M + chunk)`` bytes; the chunk is sized so that the
weight block stays under ``memory_budget`` bytes, so no n x B matrix is ever formed.

Approximations, stated: the log-loss stacking weights of a replicate are one projected Newton step
from the full-sample weights, and the prediction-loss stacking estimate (a probability-scale
propensity blend, not bilinear in the pair table) is expanded to first order in the propensity
weights around the full-sample weights; both errors are second order in the replicate's weight
change. With the stacked propensity column (setting ``stacked_propensity``), that column's row of a
replicate's pair table is the same expansion at outcome weights e_j (the stacked propensity of the
replicate is the blend at the replicate's stacking weights; recomputing it exactly would need work
over all n rows per replicate). The tie-break tolerance, the contrast test's threshold z x SE and
the credible-direction masks are held at their full-sample values; the contrast test itself
(search estimate against the stacking estimate, both on the replicate's pair table) reruns in
every replicate. Non-riesz blends need phi(alpha) from the weighted rows in every
replicate; this is exact, not approximated: phi at the lattice the search scans is computed for the
whole chunk at once (row weights enter phi linearly, so it is one matrix product per repeat and
component, :func:`~stackdr.pairtable.lattice_phi`), and every other call goes through
:class:`~stackdr.pairtable.WeightedPhi`, which keeps the blend base (e.g. logit pi) and the weighted
row terms of the replicate's nonzero rows. The search itself (lattice, starts, pattern search,
polish, tie-break) is the full-sample one, unchanged, in every replicate.

Sampling weights multiply the bootstrap row weights (they are in the per-row terms), and with
clusters one weight is drawn per cluster and shared by its rows.

The refit bootstrap resamples rows (or whole clusters) and reruns everything, learner fits
included: expensive,
fully honest about the learners too.
"""

from __future__ import annotations

import time
import warnings
from dataclasses import dataclass

import numpy as np
from joblib import Parallel, delayed

from stackdr.core import (
    WeightedPhi,
    lattice_phi,
    logloss_moment_features,
    logloss_stack_from_moments,
    nnls_stack_from_moments,
    pair_rows,
)
from stackdr.errors import InputError
from stackdr.inference._common import (
    REWEIGHTING_KINDS,
    BootstrapResult,
    InferenceSettings,
    draw_row_weights,
    replicate_generators,
    summarise_replicates,
)
from stackdr.search import (
    WeightContext,
    active_comparisons,
    lattice_resolution,
    run_search,
    simplex_lattice,
)

# ----------------------------------------------------------------------------- features


@dataclass(frozen=True)
class _Layout:
    K1: int
    K2: int
    classifier: bool

    def slices(self) -> dict:
        K1, K2 = self.K1, self.K2
        sizes = [
            ("pairs", K1 * K2),
            ("d", 1),
            ("gram", K2 * K2),
            ("cross", K2),
            ("out_loss", K2),
            ("prop_loss", K1),
            ("grad", K1),
            ("hess", K1 * K1),
            ("pls_b", K2),
            ("pls_ab", K1 * K2),
            ("pls_1", 1),
            ("pls_a", K1),
        ]
        out, start = {}, 0
        for name, size in sizes:
            out[name] = slice(start, start + size)
            start += size
        out["width"] = start
        return out


def replicate_features(inp, cf, prepared, repeat: int, stack_alpha: np.ndarray) -> np.ndarray:
    """Per-row terms (n x M) whose row-weighted sums give a replicate's pair table numerators,
    denominator, NNLS moments, prediction losses, log-loss Newton moments, and the expansion
    terms of the prediction-loss stacking estimate (see :func:`_pls_terms`)."""
    K1, K2 = inp.shape
    n = inp.n
    layout = _Layout(K1, K2, cf.propensity_kind == "classifier")
    sl = layout.slices()
    F = np.zeros((n, sl["width"]))
    for k in range(K1):
        F[:, sl["pairs"].start + k * K2 : sl["pairs"].start + (k + 1) * K2] = pair_rows(inp, k)
    F[:, sl["d"]] = inp.d[:, None]
    rows = cf.observed_mask
    obs = np.where(rows[:, None], np.nan_to_num(cf.observed[repeat]), 0.0)
    y = np.where(rows, prepared.Y, 0.0)
    F[:, sl["gram"]] = (obs[:, :, None] * obs[:, None, :]).reshape(n, -1)
    F[:, sl["cross"]] = obs * y[:, None]
    F[:, sl["out_loss"]] = np.where(rows[:, None], (obs - y[:, None]) ** 2, 0.0)
    probs = cf.propensity[repeat]
    A = prepared.A
    if layout.classifier:
        q = np.clip(probs, 1e-6, 1 - 1e-6)
        F[:, sl["prop_loss"]] = -(A[:, None] * np.log(q) + (1 - A[:, None]) * np.log(1 - q))
        grad, hess = logloss_moment_features(probs, A, stack_alpha)
        F[:, sl["grad"]] = grad
        F[:, sl["hess"]] = hess.reshape(n, -1)
    else:
        F[:, sl["prop_loss"]] = (probs - A[:, None]) ** 2
        F[:, sl["grad"]] = probs * A[:, None]
        F[:, sl["hess"]] = (probs[:, :, None] * probs[:, None, :]).reshape(n, -1)
    for name, values in _pls_terms(inp, stack_alpha).items():
        F[:, sl[name]] = values.reshape(n, -1)
    if inp.sample_weight is not None:
        # Every replicate sum is then sum_i w_i s_i F_i: bootstrap weights times sampling weights.
        F *= inp.sample_weight[:, None]
    return F


def _pls_terms(inp, alpha0: np.ndarray, step: float = 1e-6) -> dict:
    """Row terms of the prediction-loss stacking estimate, whose propensity side is the
    probability-scale blend pi @ alpha, expanded to first order in alpha around the full-sample
    weights alpha0: p_c(alpha) = p0_c + G_c (alpha - alpha0) with G_c = g_c'(pi @ alpha0) pi.
    The estimate is bilinear in (1, alpha - alpha0) and beta, so a replicate needs only weighted
    sums; the error is second order in the replicate's weight change (O(1/n)), far below the
    sampling SD. g_c' is a central difference, so user-defined transforms work too."""
    base = np.clip(inp.pi @ alpha0, 1e-12, 1 - 1e-12)
    n, K2 = inp.B[0].shape
    K1 = inp.pi.shape[1]
    terms = {
        "pls_b": np.zeros((n, K2)),
        "pls_ab": np.zeros((n, K1, K2)),
        "pls_1": inp.h4.copy(),
        "pls_a": np.zeros((n, K1)),
    }
    for g, B, h1, h2, h3 in zip(inp.transforms, inp.B, inp.h1, inp.h2, inp.h3):
        p0 = np.asarray(g(base), dtype=float)
        slope = (np.asarray(g(base + step)) - np.asarray(g(base - step))) / (2 * step)
        G = slope[:, None] * inp.pi
        terms["pls_b"] += (p0 * h1 + h2)[:, None] * B
        terms["pls_ab"] += (h1[:, None] * G)[:, :, None] * B[:, None, :]
        terms["pls_1"] += p0 * h3
        terms["pls_a"] += h3[:, None] * G
    return terms


def _pls_estimates(s: np.ndarray, sl: dict, K1: int, K2: int, alphas, betas, alpha0):
    """Replicate prediction-loss stacking estimates from weighted sums ``s`` (chunk x M), at
    propensity weights ``alphas`` and outcome weights ``betas`` (one row per replicate)."""
    da = alphas - alpha0
    ab = s[:, sl["pls_ab"]].reshape(-1, K1, K2)
    num = (
        np.einsum("ck,ckj,cj->c", da, ab, betas)
        + np.einsum("cj,cj->c", s[:, sl["pls_b"]], betas)
        + s[:, sl["pls_1"]][:, 0]
        + np.einsum("ck,ck->c", s[:, sl["pls_a"]], da)
    )
    return num / s[:, sl["d"]][:, 0]


def _stacked_rows(s: np.ndarray, sl: dict, K1: int, K2: int, alphas, alpha0) -> np.ndarray:
    """The stacked propensity's row of each replicate's pair table (chunk x K2).

    Entry j is the DR estimate at the replicate's stacked propensity ``pi @ alphas[c]`` and
    outcome learner j: the prediction-loss stacking estimate at outcome weights e_j, by the same
    first-order expansion in the stacking weights around the full-sample weights ``alpha0``
    (:func:`_pls_terms`). The error is second order in the replicate's change of stacking
    weights; at ``alphas = alpha0`` the row is exact.
    """
    rows = np.empty((alphas.shape[0], K2))
    for j, vertex in enumerate(np.eye(K2)):
        betas = np.broadcast_to(vertex, (alphas.shape[0], K2))
        rows[:, j] = _pls_estimates(s, sl, K1, K2, alphas, betas, alpha0)
    return rows


# ----------------------------------------------------------------------------- one chunk


def _chunk(an, features, inputs, cf_meta, generators, indices, kind, taus, contrast_tol=None):
    """Run replicates ``indices``: row weights (one per cluster with clusters), batched
    moments, searches, estimates. Sampling weights are in the features and the inputs."""
    settings, masks = an.settings, an.masks
    K1, K2 = an.base_learners, an.Psi.shape[1]
    layout = _Layout(K1, K2, cf_meta["classifier"])
    sl = layout.slices()
    n = inputs[0].n
    # One contiguous row per replicate (chunk x n; W' in the module notes): filling the columns
    # of an n x chunk array strides through memory and cost more than the moments and the
    # search together at n = 1e5.
    rows = np.empty((len(indices), n))
    for col, b in enumerate(indices):
        rows[col] = draw_row_weights(generators[b], n, kind, inputs[0].cluster_codes)
    t0 = time.perf_counter()
    sums = [rows @ F for F in features]  # one matrix product per repeat
    tables = np.stack([(s[:, sl["pairs"]] / s[:, sl["d"]]).reshape(-1, K1, K2) for s in sums])
    s0 = np.sum(sums, axis=0) if len(sums) > 1 else sums[0]
    gram = s0[:, sl["gram"]].reshape(-1, K2, K2)
    beta_s = nnls_stack_from_moments(gram, s0[:, sl["cross"]])
    if cf_meta["classifier"]:
        alpha_s = logloss_stack_from_moments(
            s0[:, sl["grad"]], s0[:, sl["hess"]].reshape(-1, K1, K1), an.stack_alpha
        )
    else:
        alpha_s = nnls_stack_from_moments(s0[:, sl["hess"]].reshape(-1, K1, K1), s0[:, sl["grad"]])
    if an.stacked:
        stacked = [_stacked_rows(sm, sl, K1, K2, alpha_s, an.stack_alpha) for sm in sums]
        tables = np.concatenate([tables, np.stack(stacked)[:, :, None, :]], axis=2)
    Psi_b = np.median(tables, axis=0)
    moments_s = time.perf_counter() - t0

    comparisons = active_comparisons(settings)
    out = {c.name: np.empty(len(indices)) for c in comparisons}
    alphas = np.empty((len(indices), an.Psi.shape[0]))
    betas = np.empty((len(indices), K2))
    moved = np.zeros(len(indices), dtype=bool)
    pair_se = an.pair_se[:K1]
    t1 = time.perf_counter()
    lattice = _replicate_lattice(inputs, settings, rows.T, K1, K2)
    for col in range(len(indices)):
        Psi = Psi_b[col]
        phi_fn = None
        if settings.blend != "riesz":
            phi_fn = _weighted_phi(inputs, settings.blend, rows[col], lattice, col)
        search = run_search(
            Psi,
            settings,
            phi=phi_fn,
            anchors=(an.search_anchor(alpha_s[col]), beta_s[col]),
            tolerance=taus,
            masks=masks,
        )
        moved[col] = any(
            bool(r.details.get("moved", False))
            for k, r in search.records.items()
            if "tie_break" in k
        )
        ctx = WeightContext(
            Psi,
            search,
            alpha_s[col],
            beta_s[col],
            s0[col, sl["prop_loss"]],
            s0[col, sl["out_loss"]],
            masks,
            settings,
            pair_se,
            an.stacked,
            _replicate_value(Psi, phi_fn),
            contrast_tol,
        )
        # The headline's weights (after the contrast test, when it is on) are the recorded ones.
        alphas[col], betas[col] = ctx.contrast[:2]
        for comparison in comparisons:
            if comparison.replicate != "weights":
                continue
            a, b = comparison.weights(ctx)
            if comparison.row_blend(settings) == "riesz":
                table = ctx.base_Psi if comparison.learners == "base" else Psi
                out[comparison.name][col] = a @ table @ b
            else:
                # A nonlinear search blend never has the stacked column.
                out[comparison.name][col] = phi_fn(np.asarray(a)[None])[0] @ b
    search_s = time.perf_counter() - t1
    linearised = np.median(
        np.stack([_pls_estimates(sm, sl, K1, K2, alpha_s, beta_s, an.stack_alpha) for sm in sums]),
        axis=0,
    )
    for comparison in comparisons:
        if comparison.replicate == "linearised":
            out[comparison.name] = linearised
    return (
        indices,
        out,
        alphas,
        betas,
        moved,
        {
            "moments": moments_s,
            "search": search_s,
        },
    )


def _replicate_value(Psi, phi_fn):
    """The estimate at weights (alpha, beta) over the replicate's search columns: bilinear in
    the pair table for the riesz blend, phi(alpha) beta otherwise."""
    if phi_fn is None:
        return lambda alpha, beta: float(alpha @ Psi @ beta)
    return lambda alpha, beta: float(phi_fn(np.asarray(alpha)[None])[0] @ beta)


def _replicate_lattice(inputs, settings, W, K1: int, K2: int):
    """For a nonlinear blend: the alpha lattice the replicate searches will scan (resolution,
    points) and, per repeat, phi there for every replicate of the chunk (c, m, K2), from one
    matrix product per component (:func:`lattice_phi`). None for the riesz blend."""
    if settings.blend == "riesz":
        return None
    dims = [K1] if settings.criterion == "mixed" else [K1, K2]
    r = lattice_resolution(dims, settings.resolution)
    points = simplex_lattice(K1, r)
    return r, points, [lattice_phi(inp, settings.blend, W, points) for inp in inputs]


def _weighted_phi(inputs, blend, w, lattice, col: int):
    """phi of replicate ``col`` (median over repeats), with the per-row work done once and the
    lattice values looked up."""
    r, points, values = lattice
    evaluators = [WeightedPhi(inp, blend, w, (r, points, v[col])) for inp, v in zip(inputs, values)]
    if len(evaluators) == 1:
        return evaluators[0]

    def phi_fn(alphas):
        return np.median(np.stack([ev(alphas) for ev in evaluators]), axis=0)

    return phi_fn


# ----------------------------------------------------------------------------- driver


def reweighting_bootstrap(
    settings: InferenceSettings,
    result,
    *,
    memory_budget: float = 256e6,
) -> BootstrapResult:
    """Reweighting bootstrap of every comparison estimator, rerunning the weight search.

    Parameters
    ----------
    settings : InferenceSettings
        Replicates, row-weight kind ("multinomial" counts or "bayesian" exponential weights),
        interval method, seed, workers over chunks, progress and chunk size. Results do not
        depend on the chunk size or the number of workers.
    result : BlendResult
        The full-sample fit whose out-of-fold predictions are reused.
    memory_budget : float
        Bytes of the n x chunk weight block when the chunk size is chosen automatically.
    """
    B, kind = settings.check_replicates(), settings.kind
    if kind not in REWEIGHTING_KINDS:
        raise InputError(
            f"reweighting bootstrap kind must be multinomial or bayesian, got {kind!r}"
        )
    an = result.analysis
    cf = result.crossfit
    prepared = result.data
    t0 = time.perf_counter()
    features = [
        replicate_features(inp, cf, prepared, r, an.stack_alpha)
        for r, inp in enumerate(an.base_inputs)
    ]
    feature_s = time.perf_counter() - t0
    n = prepared.n
    chunk_size = settings.chunk_size
    if chunk_size is None:
        chunk_size = int(max(1, min(B, 256, memory_budget // (8 * n))))
    taus = _fixed_tolerances(result) if an.settings.tie_break else None
    contrast = getattr(result, "contrast", None)
    contrast_tol = None if contrast is None else contrast.tolerance
    names = [row.name for row in result.estimators]
    meta = {"classifier": cf.propensity_kind == "classifier"}
    gens = replicate_generators(settings.seed, B)
    chunks = [list(range(s, min(B, s + chunk_size))) for s in range(0, B, chunk_size)]
    run = Parallel(n_jobs=settings.n_jobs, return_as="generator")(
        delayed(_chunk)(an, features, an.inputs, meta, gens, idx, kind, taus, contrast_tol)
        for idx in chunks
    )
    if settings.progress:
        from tqdm.auto import tqdm

        run = tqdm(run, total=len(chunks), desc="bootstrap", unit="chunk")
    est = {name: np.empty(B) for name in names}
    alphas = np.empty((B, an.Psi.shape[0]))
    betas = np.empty((B, an.Psi.shape[1]))
    moved = np.zeros(B, dtype=bool)
    stage = {"features": feature_s, "moments": 0.0, "search": 0.0}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        for idx, out, a, b, mv, secs in run:
            for name in names:
                est[name][idx] = out[name]
            alphas[idx], betas[idx], moved[idx] = a, b, mv
            for key, value in secs.items():
                stage[key] += value
    stage["total"] = time.perf_counter() - t0
    return summarise_replicates(
        result, est, alphas, betas, moved, kind, settings.interval, chunk_size, stage
    )


def _fixed_tolerances(result) -> dict:
    recs = result.search.records
    out = {}
    for side, key in (("propensity", "alpha_tie_break"), ("outcome", "beta_tie_break")):
        rec = recs.get(key) or recs.get("joint_tie_break")
        out[side] = float(rec.details.get("tolerance", 0.0)) if rec is not None else 0.0
    return out
