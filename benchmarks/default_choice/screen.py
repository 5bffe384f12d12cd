"""Paired screening study of candidate default weightings on cached cross-fits (issue 10).

For each cell (design, n, library) and replicate r the data and estimator seed come from
``replicate_seeds(2007, design, n, r)`` (study seed 2007 = the screening set; the confirmation
seed is not used here). The data are simulated exactly as ``stackdr.study._run_replicate`` does
(``design.simulate(n, np.random.default_rng(seeds.data))``), data are prepared as
``BlendEstimator.fit`` does, and the libraries are cross-fitted ONCE with the replicate's
estimator seed. The cross-fit is pickled to ``cache/<cell>/<r>.pkl``; every candidate weighting
is then computed on that same cross-fit (``analyse(..., bootstrap=False)`` for the estimator's
own settings, harness code for the others), so all comparisons are paired.

Candidates (names used in the CSV and the summary):

- ``riesz_c0.5``: today's default (blend="riesz", tie_break_scale=0.5).
- ``prob_c0.25``, ``prob_c0.5``, ``prob_c1``: blend="probability" with c = 0.25, 0.5, 1.
- ``logit_c0.5``: blend="logit", c = 0.5.
- ``prob_notb``: blend="probability", tie_break=False.
- ``smooth_*``: the smoothed (model-averaging) pair selector, see :func:`smoothed_selector`.
- ``capped_d*``: riesz search with a second-moment cap on the blended inverse weights, see
  :func:`capped_riesz`.

Each candidate records every row of its comparison table (target-aimed, pure minimiser,
prediction-loss stacking, best pair, discrete pair selectors) plus the oracle pair, with truth.

Usage::

    OMP_NUM_THREADS=1 ... PYTHONPATH=<checkout of c82f2bd>:benchmarks/default_choice \
        python screen.py --cell <name> --reps 300 [--minutes 20]
    ... screen.py --summary
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import json  # noqa: E402
import pickle  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402
import warnings  # noqa: E402
from pathlib import Path  # noqa: E402

import cvxpy as cp  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402

from stackdr.data import prepare_data  # noqa: E402
from stackdr.designs import get_design  # noqa: E402
from stackdr.estimator import (  # noqa: E402
    MAIN,
    PLS,
    PURE,
    BlendEstimator,
    noise_floor_function,
)
from stackdr.pairtable import blend_estimate, blended_weight_side  # noqa: E402
from stackdr.risks import value_range  # noqa: E402
from stackdr.selection import SearchSettings, discrete_pairs  # noqa: E402
from stackdr.simulation import build_libraries, oracle_row  # noqa: E402
from stackdr.study import replicate_seeds  # noqa: E402
from stackdr.targets import get_target  # noqa: E402

ROOT = Path(__file__).resolve().parent
CACHE = ROOT / "cache"
RESULTS = ROOT / "results"
STUDY_SEED = 2007
FOLDS = 5
SCREEN_SEED = 2007  # the screening set: cache/ and results/ (unchanged layout)


def configure(seed: int) -> None:
    """Point the harness at study seed ``seed``. The screening seed 2007 keeps ``cache/`` and
    ``results/``; any other seed uses ``cache<seed>/`` and ``results<seed>/`` so the screening
    evidence is never mixed with (or overwritten by) a confirmation run."""
    global STUDY_SEED, CACHE, RESULTS
    STUDY_SEED = int(seed)
    if STUDY_SEED == SCREEN_SEED:
        CACHE, RESULTS = ROOT / "cache", ROOT / "results"
    else:
        CACHE, RESULTS = ROOT / f"cache{STUDY_SEED}", ROOT / f"results{STUDY_SEED}"

# cell name -> (design name or "new:<name>", n, library)
CELLS = {
    "ksate_n200_param": ("kang-schafer-ate-transformed", 200, "parametric"),
    "ksate_n1000_param": ("kang-schafer-ate-transformed", 1000, "parametric"),
    "ksmean_n200_param": ("kang-schafer-transformed", 200, "parametric"),
    "ksmean_n1000_param": ("kang-schafer-transformed", 1000, "parametric"),
    "ksate_n200_default": ("kang-schafer-ate-transformed", 200, "default"),
    "ksate_n1000_default": ("kang-schafer-ate-transformed", 1000, "default"),
    "ld_n1000_default": ("lunceford-davidian", 1000, "default"),
    "sparse_n1000_default": ("sparse", 1000, "default"),
    "smooth_n500_default": ("new:smooth-consistent", 500, "default"),
    "overlap_n1000_default": ("new:poor-overlap", 1000, "default"),
    "nsw_n1000_default": ("new:nsw-semi-synthetic", 1000, "default"),
}

ESTIMATOR_CANDIDATES = {
    "riesz_c0.5": dict(blend="riesz", tie_break_scale=0.5),
    "prob_c0.25": dict(blend="probability", tie_break_scale=0.25),
    "prob_c0.5": dict(blend="probability", tie_break_scale=0.5),
    "prob_c1": dict(blend="probability", tie_break_scale=1.0),
    "logit_c0.5": dict(blend="logit", tie_break_scale=0.5),
    "prob_notb": dict(blend="probability", tie_break=False),
}
SMOOTH_RULES = ("pairse", "plsse", "minrisk")
CAP_DELTAS = (0.25, 1.0)
CAP_SCALE = 0.5


# ---------------------------------------------------------------------------------------------
# Data and cross-fit


def simulate(design_name: str, n: int, seed: int):
    """Data exactly as stackdr.study._run_replicate draws them."""
    if design_name.startswith("new:"):
        import new_designs

        design = new_designs.get(design_name[4:])
    else:
        design = get_design(design_name)
    return design.simulate(n, np.random.default_rng(seed))


def make_estimator(data, library: str, seed: int, **settings) -> BlendEstimator:
    plib, olib = build_libraries(library)
    return BlendEstimator(data.target, plib, olib, seed=int(seed), n_jobs=1, bootstrap=0, **settings)


def fit_replicate(cell: str, rep: int):
    """Simulate, prepare and cross-fit one replicate (or load it from the cache)."""
    design_name, n, library = CELLS[cell]
    seed_name = design_name[4:] if design_name.startswith("new:") else design_name
    seeds = replicate_seeds(STUDY_SEED, seed_name, n, rep)
    data = simulate(design_name, n, seeds.data)
    path = CACHE / cell / f"{rep}.pkl"
    est = make_estimator(data, library, seeds.estimator)
    target = get_target(data.target)
    if path.exists():
        with open(path, "rb") as fh:
            prepared, target_name, cf = pickle.load(fh)
        target = get_target(target_name)
        return data, est, prepared, target, cf, 0.0, seeds
    t0 = time.perf_counter()
    prepared = prepare_data(
        data.frame, data.treatment, data.outcome, data.covariates, target=target, folds=FOLDS
    )
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cf = est.cross_fit(prepared, target, n_jobs=1)
    seconds = time.perf_counter() - t0
    path.parent.mkdir(parents=True, exist_ok=True)
    with open(path, "wb") as fh:
        # The Target holds local functions (not picklable); its name rebuilds it exactly.
        pickle.dump((prepared, data.target, cf), fh)
    return data, est, prepared, target, cf, seconds, seeds


# ---------------------------------------------------------------------------------------------
# Harness-only candidates


def observed_arm_weights(inp, alpha, blend: str) -> np.ndarray:
    """Inverse weight of each row for its own arm under the blend: sum_c |h1_c| p_c(alpha).

    For the ATE (h1 = -1{A=1} for the treated component, +1{A=0} for the control one) this is
    the blended 1/pi on treated rows and 1/(1-pi) on controls; for a counterfactual mean it is
    A / pi. Components never share a row for these targets."""
    p = blended_weight_side(inp, np.asarray(alpha, dtype=float)[None], blend)
    return sum(np.abs(h1) * pc[:, 0] for h1, pc in zip(inp.h1, p))


def smoothed_selector(an, rule: str, pls_var: float) -> tuple[float, np.ndarray]:
    """Smoothed (model-averaging) selector over single pairs.

    Pair weights ``w_kj = exp(-tau R_mix(k, j) / scale) / sum(...)`` over the K1 x K2 pair table,
    estimate ``sum_kj w_kj Psi[k, j]``, with ``R_mix(k, j) = range_j' Psi[k, j']^2 +
    range_k' Psi[k', j]^2`` (the mixed-minimax pair criterion at the vertex (k, j), as in
    selection.discrete_pairs). tau = 1 in every rule; the rules set ``scale``:

    - ``pairse``: scale = median over pairs of the squared influence-function SE of the pair
      estimate (the sampling variance of one pair estimate);
    - ``plsse``: scale = squared influence-function SE of the prediction-loss stacking estimate
      (``pls_var``);
    - ``minrisk``: scale = max(min_kj R_mix(k, j), 0.01 x median squared pair SE): the weights
      are relative to the best pair's own pseudo-risk (the best pair gets exp(-1) relative
      weight 1, a pair with twice its risk exp(-2)); the floor avoids division by zero when a
      pair has zero risk.

    Because R_mix(k, j) = a_k + b_j the weights factorise, w_kj = u_k v_j, so the estimate is the
    riesz blend alpha' Psi beta at alpha = u, beta = v; returned as (scale, W).
    """
    Psi = an.Psi
    K1, K2 = Psi.shape
    row_range = value_range(Psi)  # S_out at vertex e_k: range over j of Psi[k, :]
    col_range = value_range(Psi.T)  # S_ps at vertex e_j: range over k of Psi[:, j]
    R = row_range[:, None] ** 2 + col_range[None, :] ** 2
    med_var = float(np.median(an.pair_se**2))
    if rule == "pairse":
        scale = med_var
    elif rule == "plsse":
        scale = float(pls_var)
    elif rule == "minrisk":
        scale = max(float(R.min()), 0.01 * med_var)
    else:
        raise ValueError(rule)
    z = -(R - R.min()) / scale
    W = np.exp(z)
    W /= W.sum()
    return scale, W


def _range_constraints(Psi):
    """Linear constraints phi_j(alpha) - phi_l(alpha) <= t for all j != l (riesz: phi = alpha Psi)."""
    K2 = Psi.shape[1]
    D = np.array(
        [Psi[:, j] - Psi[:, l] for j in range(K2) for l in range(K2) if j != l]
    )  # (K2(K2-1), K1)
    return D


def _solve(problem: cp.Problem) -> None:
    for solver in ("CLARABEL", "SCS"):
        try:
            problem.solve(solver=solver)
            if problem.status in ("optimal", "optimal_inaccurate"):
                return
        except cp.error.SolverError:
            continue


def capped_riesz(an, delta: float, scale: float = CAP_SCALE):
    """Riesz search with a cap on the second moment of the blended inverse weights.

    Mechanism addressed (issue 10): the riesz blend averages 1/pi linearly, so any weight on a
    propensity learner with extreme inverse weights carries those extremes into the estimate.
    The target-aimed search may buy a small perturbation range with such weights. Here the
    propensity weights alpha are restricted to

        M(alpha) = mean_i ( sum_c |h1_c(O_i)| p_c(alpha)(X_i) )^2  <=  (1 + delta) M0,

    M0 = the same second moment under the probability-scale blend at the prediction-loss
    stacking weights (the inverse weights PLS itself uses). M is a convex quadratic in alpha
    (the observed-arm inverse weight is linear in alpha under the riesz blend), so the search
    stays convex: (i) pure minimiser: min t s.t. range_j (alpha' Psi)_j <= t, alpha in the
    simplex, M(alpha) <= cap (an SOCP, cvxpy); (ii) tie-break as the estimator's: tau = c x SE
    of the pair contrast attaining the range at the pure minimiser (the estimator's own noise
    floor function, riesz blend, c = ``scale``), then the alpha closest (Euclidean) to the PLS
    weights with range <= t* + tau and M(alpha) <= cap. If no alpha meets the cap (every
    riesz blend has heavier inverse weights than PLS's probability blend times 1 + delta), the
    cap is raised to (1 + delta) x min_alpha M(alpha). The outcome side is unchanged (the
    mixed pseudo-risk separates; beta comes from the riesz default's search, which does not
    depend on the blend). Returns (alpha_pure, alpha_tb, cap_binding, cap_raised).
    """
    inp = an.inputs[0]
    Psi = an.Psi
    K1 = Psi.shape[0]
    n = inp.n
    G = np.vstack([np.abs(h1)[:, None] * P for h1, P in zip(inp.h1, inp.P)])  # (c n, K1)
    # rows where h1 = 0 contribute nothing; keep the rest
    G = G[np.any(G != 0, axis=1)] / np.sqrt(n)
    w_pls = observed_arm_weights(inp, an.stack_alpha, "probability")
    M0 = float(np.mean(w_pls**2))
    cap = (1 + delta) * M0
    a = cp.Variable(K1, nonneg=True)
    minM = cp.Problem(cp.Minimize(cp.sum_squares(G @ a)), [cp.sum(a) == 1])
    _solve(minM)
    raised = False
    if minM.value is not None and minM.value > cap:
        cap = (1 + delta) * float(minM.value)
        raised = True
    D = _range_constraints(Psi)
    t = cp.Variable()
    # Scale the range to order one for the solver.
    s = max(float(np.ptp(Psi)), 1e-12)
    cons = [cp.sum(a) == 1, cp.sum_squares(G @ a) <= cap, (D / s) @ a <= t]
    pure = cp.Problem(cp.Minimize(t), cons)
    _solve(pure)
    alpha_pure = np.clip(np.asarray(a.value, dtype=float), 0, None)
    alpha_pure /= alpha_pure.sum()
    t_star = float(value_range(alpha_pure @ Psi))
    settings = SearchSettings(blend="riesz", tie_break=True, tie_break_scale=scale)
    tau = noise_floor_function(an, settings)("propensity", alpha_pure)
    b = cp.Variable(K1, nonneg=True)
    cons2 = [
        cp.sum(b) == 1,
        cp.sum_squares(G @ b) <= cap * (1 + 1e-7),
        (D / s) @ b <= (t_star + tau) / s + 1e-9,
    ]
    tb = cp.Problem(cp.Minimize(cp.sum_squares(b - an.stack_alpha)), cons2)
    _solve(tb)
    if b.value is None:
        alpha_tb = alpha_pure
    else:
        alpha_tb = np.clip(np.asarray(b.value, dtype=float), 0, None)
        alpha_tb /= alpha_tb.sum()
    binding = float(np.sum((G @ alpha_pure) ** 2)) >= cap * (1 - 1e-4)
    return alpha_pure, alpha_tb, bool(binding), raised


# ---------------------------------------------------------------------------------------------
# One replicate


# Candidates computed by screen_extra.py on the same cross-fit (selectable with --candidates).
VERTEX_CANDIDATES = {"plsvertex_c0.25": 0.25, "plsvertex_c0.5": 0.5, "plsvertex_c1": 1.0}
ALL_CANDIDATES = (
    list(ESTIMATOR_CANDIDATES)
    + [f"smooth_{r}" for r in SMOOTH_RULES]
    + [f"capped_d{d:g}" for d in CAP_DELTAS]
    + list(VERTEX_CANDIDATES)
    + ["oracle"]
)


def run_replicate(cell: str, rep: int, candidates=None) -> list[dict]:
    """All rows of one replicate. ``candidates``: names to compute (None = the screening set of
    screen.py, i.e. everything except the screen_extra PLS-column variants). ``riesz_c0.5`` is
    always computed: its table holds the PLS row every comparison is paired against."""
    if candidates is None:
        candidates = [c for c in ALL_CANDIDATES if c not in VERTEX_CANDIDATES]
    candidates = set(candidates) | {"riesz_c0.5"}
    data, est0, prepared, target, cf, fit_seconds, seeds = fit_replicate(cell, rep)
    design_name, n, library = CELLS[cell]
    truth = float(data.truth)
    rows: list[dict] = []

    def add(candidate, name, estimate, se, alpha=None, seconds=np.nan, extra=None):
        rows.append(
            {
                "cell": cell,
                "rep": rep,
                "candidate": candidate,
                "estimator": name,
                "estimate": float(estimate),
                "se": float(se),
                "truth": truth,
                "alpha": json.dumps([round(float(x), 5) for x in alpha])
                if alpha is not None
                else "",
                "fit_seconds": fit_seconds,
                "analyse_seconds": seconds,
                "extra": json.dumps(extra) if extra else "",
            }
        )

    results = {}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for cand, settings in ESTIMATOR_CANDIDATES.items():
            if cand not in candidates:
                continue
            est = make_estimator(data, library, seeds.estimator, **settings)
            t0 = time.perf_counter()
            res = est.analyse(prepared, target, cf, bootstrap=False)
            sec = time.perf_counter() - t0
            results[cand] = res
            inp = res.analysis.inputs[0]
            for row in res.estimators:
                extra = None
                if row.name in (MAIN, PURE, PLS):
                    blend = "probability" if row.name == PLS else settings["blend"]
                    w = observed_arm_weights(inp, row.alpha, blend)
                    extra = {"w_sd": float(np.std(w)), "w_max": float(np.max(w))}
                add(cand, row.name, row.estimate, row.se, row.alpha, sec, extra)

    base = results["riesz_c0.5"]
    an = base.analysis
    inp = an.inputs[0]
    pls_row = next(r for r in base.estimators if r.name == PLS)
    # Smoothed selector
    for rule in SMOOTH_RULES:
        if f"smooth_{rule}" not in candidates:
            continue
        t0 = time.perf_counter()
        scale, W = smoothed_selector(an, rule, pls_row.se**2)
        u, v = W.sum(axis=1), W.sum(axis=0)
        fit = blend_estimate(inp, u, v, "riesz")
        est_sm = float(np.sum(W * an.Psi))
        assert abs(est_sm - fit.estimate) < 1e-6 * max(1.0, abs(est_sm))
        sec = time.perf_counter() - t0
        add(
            f"smooth_{rule}",
            MAIN,
            est_sm,
            fit.se,
            u,
            sec,
            {"scale": scale, "w_max_pair": float(W.max())},
        )
    # Capped riesz
    main_row = next(r for r in base.estimators if r.name == MAIN)
    pure_row = next(r for r in base.estimators if r.name == PURE)
    for delta in CAP_DELTAS:
        if f"capped_d{delta:g}" not in candidates:
            continue
        t0 = time.perf_counter()
        alpha_pure, alpha_tb, binding, raised = capped_riesz(an, delta)
        sec = time.perf_counter() - t0
        for name, alpha, beta in (
            (MAIN, alpha_tb, main_row.beta),
            (PURE, alpha_pure, pure_row.beta),
        ):
            fit = blend_estimate(inp, alpha, beta, "riesz")
            w = observed_arm_weights(inp, alpha, "riesz")
            add(
                f"capped_d{delta:g}",
                name,
                fit.estimate,
                fit.se,
                alpha,
                sec,
                {
                    "w_sd": float(np.std(w)),
                    "w_max": float(np.max(w)),
                    "binding": binding,
                    "raised": raised,
                },
            )
    scales = tuple(VERTEX_CANDIDATES[c] for c in VERTEX_CANDIDATES if c in candidates)
    if scales:
        import screen_extra  # same functions as the screening pass (screen_extra.vertex_rows)

        rows += screen_extra.vertex_rows(cell, rep, an, truth, scales)
    oracle = oracle_row(data, target, prepared.A, prepared.Y, est0.clip) if "oracle" in candidates else None
    if oracle is not None:
        add("oracle", "oracle pair", oracle["estimate"], oracle["se"])
    return rows


# ---------------------------------------------------------------------------------------------
# Cell loop and summaries


def csv_path(cell: str) -> Path:
    return RESULTS / f"{cell}.csv"


def done_reps(cell: str) -> set[int]:
    path = csv_path(cell)
    if not path.exists():
        return set()
    return set(pd.read_csv(path, usecols=["rep"])["rep"].unique())


def run_cell(cell: str, reps: int, minutes: float | None, candidates=None) -> None:
    RESULTS.mkdir(parents=True, exist_ok=True)
    done = done_reps(cell)
    start = time.perf_counter()
    ran = 0
    for rep in range(reps):
        if rep in done:
            continue
        if minutes is not None and time.perf_counter() - start > 60 * minutes:
            print(f"{cell}: time budget spent after {ran} new replicates", flush=True)
            break
        t0 = time.perf_counter()
        rows = run_replicate(cell, rep, candidates)
        frame = pd.DataFrame(rows)
        path = csv_path(cell)
        frame.to_csv(path, mode="a", header=not path.exists(), index=False)
        ran += 1
        if ran <= 2 or ran % 25 == 0:
            fit = frame["fit_seconds"].iloc[0]
            ana = frame.drop_duplicates("candidate").set_index("candidate")["analyse_seconds"]
            print(
                f"[{time.strftime('%H:%M:%S')}] {cell} rep {rep}: total "
                f"{time.perf_counter() - t0:.1f}s fit {fit:.1f}s analyse "
                + " ".join(f"{k}={v:.2f}" for k, v in ana.items() if np.isfinite(v)),
                flush=True,
            )
    print(f"{cell}: {len(done_reps(cell))} replicates stored", flush=True)


# Rows shown in the summary: (candidate, estimator, label)
SHOWN = [
    ("riesz_c0.5", PLS, "PLS (prediction-loss stacking)"),
    ("riesz_c0.5", MAIN, "1 riesz c=0.5 (today's default)"),
    ("riesz_c0.5", PURE, "  riesz, pure minimiser"),
    ("prob_c0.25", MAIN, "2 probability c=0.25"),
    ("prob_c0.5", MAIN, "2 probability c=0.5"),
    ("prob_c1", MAIN, "2 probability c=1"),
    ("logit_c0.5", MAIN, "3 logit c=0.5"),
    ("prob_notb", MAIN, "4 probability, no tie-break"),
    ("smooth_pairse", MAIN, "5a smoothed, scale=median pair SE^2"),
    ("smooth_plsse", MAIN, "5b smoothed, scale=PLS SE^2"),
    ("smooth_minrisk", MAIN, "5c smoothed, scale=min pair risk"),
    ("capped_d0.25", MAIN, "6 capped riesz delta=0.25 c=0.5"),
    ("capped_d0.25", PURE, "  capped delta=0.25, pure"),
    ("capped_d1", MAIN, "6 capped riesz delta=1 c=0.5"),
    ("capped_d1", PURE, "  capped delta=1, pure"),
    ("capped_d0", MAIN, "6 capped riesz delta=0 c=0.5"),
    ("capped_d0", PURE, "  capped delta=0, pure"),
    ("fnanchor_c0.5", MAIN, "6' riesz, function-space tie-break c=0.5"),
    ("fnanchor_c1", MAIN, "6' riesz, function-space tie-break c=1"),
    ("plsvertex_c0.5", MAIN, "6'' riesz + PLS propensity column, c=0.5"),
    ("plsvertex_c0.5", PURE, "  PLS column, pure minimiser"),
    ("plsvertex_c0.25", MAIN, "6'' riesz + PLS propensity column, c=0.25"),
    ("plsvertex_c1", MAIN, "6'' riesz + PLS propensity column, c=1"),
    ("riesz_c0.5", "best-predicting pair", "  best-predicting pair"),
    ("riesz_c0.5", "mixed-minimax pair", "  mixed-minimax pair"),
    ("oracle", "oracle pair", "  oracle pair (true nuisances)"),
]


def cell_summary(cell: str) -> tuple[pd.DataFrame, dict]:
    df = pd.read_csv(csv_path(cell))
    for suffix in ("_extra", "_extra2"):  # screen_extra.py: more candidates, same cross-fits
        extra = RESULTS / f"{cell}{suffix}.csv"
        if extra.exists():
            df = pd.concat([df, pd.read_csv(extra)], ignore_index=True)
    df["err"] = df["estimate"] - df["truth"]
    pls_rows = df[(df.candidate == "riesz_c0.5") & (df.estimator == PLS)].set_index("rep")
    pls = pls_rows["err"]
    pls_alpha = pls_rows["alpha"].map(lambda a: np.array(json.loads(a)))
    reps = len(pls)
    out = []
    for cand, name, label in SHOWN:
        rows_ = df[(df.candidate == cand) & (df.estimator == name)].set_index("rep")
        sub = rows_["err"]
        if sub.empty:
            continue
        w_sd = rows_["extra"].map(
            lambda e: json.loads(e).get("w_sd", np.nan) if isinstance(e, str) and e else np.nan
        )
        def same_as_pls(r, a):
            if cand.startswith("smooth") or not (isinstance(a, str) and a):
                return np.nan
            a = np.array(json.loads(a))
            if a.size == pls_alpha[r].size + 1:  # plsvertex: last column is the PLS propensity
                return float(a[-1] > 1 - 2e-4)
            return float(np.max(np.abs(a - pls_alpha[r])) < 2e-4)

        at_pls = [
            same_as_pls(r, a) if r in pls_alpha.index else np.nan
            for r, a in rows_["alpha"].items()
        ]
        both = pd.concat([sub.rename("a"), pls.rename("b")], axis=1).dropna()
        d = both["a"] ** 2 - both["b"] ** 2
        mc = d.std(ddof=1) / np.sqrt(len(d))
        rmse = float(np.sqrt(np.mean(sub**2)))
        rmse_pls = float(np.sqrt(np.mean(both["b"] ** 2)))
        flag = "*" if abs(d.mean()) > 2 * mc else ""
        out.append(
            {
                "setting": label,
                "bias": f"{sub.mean():.3f}",
                "SD": f"{sub.std(ddof=1):.3f}",
                "RMSE": f"{rmse:.3f}",
                "ratio to PLS": f"{rmse / rmse_pls:.3f}",
                "paired sq-err diff (MC SE)": f"{d.mean():+.3g} ({mc:.2g}){flag}"
                if name != PLS or cand != "riesz_c0.5"
                else "",
                "mean SD of inverse weights": f"{w_sd.mean():.2f}" if w_sd.notna().any() else "",
                "alpha = PLS alpha": f"{np.nanmean(at_pls):.2f}"
                if name in (MAIN, PURE) and not np.all(np.isnan(at_pls))
                else "",
            }
        )
    first = df[df.candidate == "riesz_c0.5"].drop_duplicates("rep")
    timing = {
        "reps": reps,
        "fit_s": float(first["fit_seconds"][first["fit_seconds"] > 0].mean())
        if (first["fit_seconds"] > 0).any()
        else float("nan"),
        "analyse_s": {
            c: float(g.drop_duplicates("rep")["analyse_seconds"].mean())
            for c, g in df.groupby("candidate")
            if c != "oracle"
        },
    }
    return pd.DataFrame(out), timing


def markdown(frame: pd.DataFrame) -> str:
    cols = list(frame.columns)
    lines = ["| " + " | ".join(cols) + " |", "|" + "---|" * len(cols)]
    for _, r in frame.iterrows():
        lines.append("| " + " | ".join(str(r[c]) for c in cols) + " |")
    return "\n".join(lines)


CANDIDATE_NOTES = [
    "## Candidate rules",
    "",
    "- 5 (smoothed selector): pair weights w_kj = exp(-tau R_mix(k,j)/scale), normalised, "
    "tau = 1, estimate sum w_kj Psi[k,j]. 5a scale = median over pairs of the squared pair "
    "SE; 5b scale = squared SE of the PLS estimate; 5c scale = max(min_kj R_mix, 0.01 x median "
    "squared pair SE). See screen.smoothed_selector.",
    "- 6 (capped riesz): riesz search with M(alpha) = mean of the squared observed-arm inverse "
    "weight <= (1 + delta) x the same for PLS's probability blend; tie-break c = 0.5 towards "
    "the PLS weights inside the cap (screen.capped_riesz).",
    "- 6' (function-space tie-break): riesz pure minimiser, then among alpha within c x SE, the "
    "one whose riesz inverse weights are closest (mean square over rows) to PLS's "
    "(screen_extra.function_anchor_riesz).",
    "- 6'' (PLS propensity column): the PLS propensity sum_k a_k pi_k is added as one more "
    "propensity learner; riesz search and tie-break unchanged except that the propensity-side "
    "anchor is that column's vertex (screen_extra.pls_vertex_riesz).",
    "",
]


SHORT = {
    "ksate_n200_param": "P-ATE 200",
    "ksate_n1000_param": "P-ATE 1000",
    "ksmean_n200_param": "P-mean 200",
    "ksmean_n1000_param": "P-mean 1000",
    "ksate_n200_default": "D-ATE 200",
    "ksate_n1000_default": "D-ATE 1000",
    "ld_n1000_default": "LD 1000",
    "sparse_n1000_default": "sparse 1000",
    "smooth_n500_default": "smooth 500",
    "overlap_n1000_default": "overlap 1000",
    "nsw_n1000_default": "NSW 1000",
}


def overview_lines() -> list[str]:
    """One row per candidate (target-aimed row), one column per cell: RMSE ratio to PLS and
    the paired squared-error difference with its MC SE (* beyond 2 SE)."""
    cells = [c for c in CELLS if csv_path(c).exists()]
    tables = {c: cell_summary(c) for c in cells}
    labels = [lab for cand, name, lab in SHOWN if name == MAIN]
    groups = [cells[:6], cells[6:]]
    out = ["## Overview: ratio to PLS RMSE; paired sq-err diff (MC SE)", ""]
    for group in groups:
        if not group:
            continue
        header = ["setting"] + [f"{SHORT[c]} (R={tables[c][1]['reps']})" for c in group]
        rows = []
        for lab in labels:
            row = [lab]
            for c in group:
                t = tables[c][0].set_index("setting")
                if lab in t.index:
                    r = t.loc[lab]
                    row.append(f"{r['ratio to PLS']}; {r['paired sq-err diff (MC SE)']}")
                else:
                    row.append("")
            rows.append(row)
        out += ["| " + " | ".join(header) + " |", "|" + "---|" * len(header)]
        out += ["| " + " | ".join(r) + " |" for r in rows]
        out.append("")
    return out


def reproduction_lines() -> list[str]:
    """Do the screening data sets equal the recorded study's? PLS and target-aimed RMSE over
    replicates 0..199 against benchmarks/results/study_kang_schafer_paired.csv."""
    path = ROOT / "tree" / "benchmarks" / "results" / "study_kang_schafer_paired.csv"
    if not path.exists():
        return []
    rec = pd.read_csv(path)
    rec = rec[rec["estimator_a"] == MAIN]
    out = []
    for cell, (design, n, library) in CELLS.items():
        if not csv_path(cell).exists() or library not in ("parametric", "default"):
            continue
        row = rec[(rec.setting == library) & (rec.design == design) & (rec.n == n)]
        if row.empty:
            continue
        df = pd.read_csv(csv_path(cell))
        df = df[(df.candidate == "riesz_c0.5") & (df.rep < int(row.pairs.iloc[0]))]
        if df.rep.nunique() < int(row.pairs.iloc[0]):
            continue
        err = df.estimate - df.truth
        mine_pls = float(np.sqrt(np.mean(err[df.estimator == PLS] ** 2)))
        mine_main = float(np.sqrt(np.mean(err[df.estimator == MAIN] ** 2)))
        out.append(
            f"- {cell}: PLS RMSE {mine_pls:.6f} vs recorded {row.rmse_b.iloc[0]:.6f}; "
            f"default RMSE {mine_main:.6f} vs recorded {row.rmse_a.iloc[0]:.6f} "
            f"(replicates 0-{int(row.pairs.iloc[0]) - 1})"
        )
    if not out:
        return []
    return ["## Same data as the recorded study?", "", *out, ""]


def write_summary() -> None:
    lines = [
        "# Screening study (issue 10): candidate default weightings",
        "",
        f"Written {time.strftime('%Y-%m-%d %H:%M')} by benchmarks/default_choice/screen.py at stackdr commit "
        "c82f2bd (worktree <checkout of c82f2bd>). Study seed 2007 (screening set); bootstrap off; "
        "every candidate on the same cross-fit per replicate (paired). `paired sq-err diff` is "
        "mean over replicates of (candidate error^2 - PLS error^2), MC SE = SD of the paired "
        "differences / sqrt(R); * = beyond 2 MC SE (negative favours the candidate). "
        "`mean SD of inverse weights`: SD over rows of the observed-arm blended inverse weight "
        "(1/pi for treated, 1/(1-pi) for controls, A/pi for the mean) under the row's blend, "
        "averaged over replicates. `alpha = PLS alpha`: share of replicates whose propensity "
        "weights equal the prediction-loss weights (the tie-break reached PLS).",
        "",
    ]
    lines += overview_lines() + reproduction_lines() + CANDIDATE_NOTES
    for cell in CELLS:
        if not csv_path(cell).exists():
            continue
        table, timing = cell_summary(cell)
        design, n, library = CELLS[cell]
        ana = ", ".join(f"{k} {v:.2f}" for k, v in timing["analyse_s"].items())
        lines += [
            f"## {cell}: {design}, n = {n}, {library} library, R = {timing['reps']}",
            "",
            f"Seconds per replicate: cross-fit {timing['fit_s']:.1f}; analyse/candidate: {ana}.",
            "",
            markdown(table),
            "",
        ]
    (ROOT / "screen_summary.md").write_text("\n".join(lines))


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--cell", choices=list(CELLS))
    parser.add_argument("--reps", type=int, default=1)
    parser.add_argument("--minutes", type=float)
    parser.add_argument("--summary", action="store_true")
    parser.add_argument(
        "--seed",
        type=int,
        default=SCREEN_SEED,
        help="study seed (2007 = screening set in cache/, results/; others in cache<seed>/, "
        "results<seed>/)",
    )
    parser.add_argument(
        "--candidates",
        help="comma-separated candidate names to compute (default: the screening set); "
        f"known: {', '.join(ALL_CANDIDATES)}",
    )
    args = parser.parse_args()
    configure(args.seed)
    candidates = None
    if args.candidates:
        candidates = [c.strip() for c in args.candidates.split(",") if c.strip()]
        unknown = sorted(set(candidates) - set(ALL_CANDIDATES))
        if unknown:
            parser.error(f"unknown candidates: {unknown}")
    if args.cell:
        run_cell(args.cell, args.reps, args.minutes, candidates)
    if STUDY_SEED == SCREEN_SEED:
        write_summary()  # screen_summary.md describes the screening seed only
    else:
        import confirm

        confirm.write_confirm_summary()


if __name__ == "__main__":
    sys.exit(main())
