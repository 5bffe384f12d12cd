"""Screen: noise-aware propensity selection for small samples (issue 10, tenth round).

Why: at n = 200 the range of the pair estimates across the outcome learners is within the noise
(``results/default_choice_small_n_mechanism.md``): a propensity learner whose pair estimates are
stable but biased wins, and the forest vertex, 0.80 x PLS alone, is ranked first in 22% of data
sets. Three ways to let the noise into the selection, each a published idea:

- ``debiased``: the squared gap g_jj'(alpha)^2 between two outcome learners has expectation
  (population gap)^2 + Var(g_jj'); the paired influence-function variance v_jj'(alpha) is a
  quadratic form in alpha, so max_jj' (g^2 - v) estimates the largest squared population gap
  (unbiased-risk-estimate style). Then the package's tie-break and contrast test.
- ``soft...``: exponential weights over the propensity vertices (the library's learners and the
  stacked column), exp(-(R_k - min R) / scale) with R_k the squared range at vertex k
  (model averaging, as the smoothed pair-average row); scale as the package row (``soft``), the
  median squared pair SE (``soft-se``), or a multiple of it (``soft:f``; ``soft:1000`` is about
  the equal-weight average). Then the contrast test and guard against PLS.
- ``bag``: bootstrap smoothing (Efron 2014, J. Amer. Statist. Assoc. 109:991-1007): the
  tie-broken range search averaged over M = 100 Gaussian draws of the pair table from its IF
  covariance (tolerance held at the full-sample value), then the test; ``bagtest`` runs the
  test and guard inside each draw and averages the outcomes (no outer test);
  ``bag-noguard`` and ``bag-noguard-z2`` drop the variance guard of the outer test (z = 1.5, 2);
  ``bag-kept`` lets the current rule decide whether to leave PLS and uses the smoothed weights
  when it does.
- ``se-mask:f``: a perturbation set that depends on the pair SEs, here on the search side: only
  propensity learners whose estimate (at the least-squares outcome weights) has an IF SE at most
  f x PLS's take part; then the current rule.

Per replicate of a grid cell (seeds ``replicate_seeds(seed, design, n, rep)`` as in
``study_default_grid.py``; the default fit, bootstrap 0) ``run`` stores the pair table over the
search's propensity columns (the library's learners, then the stacked column), the
least-squares outcome weights, the IF covariance of all pair estimates and the package's
headline, untested and PLS estimates (a pickle, not kept). ``csv`` applies the rules offline on
a simplex lattice (the vertices plus resolution 10) with the package's settings emulated
(tie-break tolerance c = 0.25 x SE of the gap attaining the range at the optimum, the lattice
point nearest the stacked column; contrast test z = 1.5 with variance guard 1.05 at the
least-squares outcome weights). ``range`` is the current rule under that emulation; the table
compares each rule with it and with PLS on the same fits (the package's own rows are shown too:
the emulation is close, not exact). ``table`` prints the paired Markdown table of
``results/default_choice_noise_aware.md``.

Usage: python benchmarks/default_choice/screen_noise_aware.py run SEED LIB DESIGN N REPS PKL
       python benchmarks/default_choice/screen_noise_aware.py csv CSV PKL...
       python benchmarks/default_choice/screen_noise_aware.py table CSV
       python benchmarks/default_choice/screen_noise_aware.py signal PKL...

``signal`` measures how much one data set's pair table says about which propensity vertex is
better (``results/default_choice_criterion_signal.md``).
"""

import itertools
import pickle
import sys
from pathlib import Path

import numpy as np
import pandas as pd
from joblib import Parallel, delayed

from stackdr.core import pair_influence
from stackdr.search import MAIN, PLS, UNTESTED

sys.path.insert(0, str(Path(__file__).resolve().parent))
from vertex_oracle import default_fit  # noqa: E402


def one(design, n, lib, rep, seed):
    data, res = default_fit(design, n, lib, rep, seed)
    an = res.analysis
    inp = an.inputs[0]
    K1, K2 = an.Psi.shape
    G = np.stack([pair_influence(inp, k) for k in range(K1)], axis=1).reshape(inp.n, K1 * K2)
    by = {e.name: e.estimate for e in res.estimators}
    return dict(
        truth=data.truth,
        Psi=an.Psi.copy(),
        beta=np.asarray(an.stack_beta, float),
        cov=G.T @ G / inp.n**2,
        names=list(an.propensity_names),
        main=by[MAIN],
        pls=by[PLS],
        untested=by[UNTESTED],
    )


def lattice(K: int, res: int) -> np.ndarray:
    """Points of the simplex in K dimensions with coordinates in multiples of 1 / res."""
    pts = [c for c in itertools.product(range(res + 1), repeat=K - 1) if sum(c) <= res]
    return np.array([[*c, res - sum(c)] for c in pts], float) / res


# Outer contrast test (z, variance guard) per rule; the package's 1.5 and 1.05 otherwise.
TESTS = {"bag-noguard": (1.5, 0.0), "bag-noguard-z2": (2.0, 0.0)}


def evaluate(o, A, rule, c=0.25):
    """One rule on lattice A for one stored replicate: (untested, headline) estimates."""
    Psi, beta, cov = o["Psi"], o["beta"], o["cov"]
    K1, K2 = Psi.shape
    if rule.startswith("se-mask"):
        # only propensity learners whose estimate at the outcome weights has an IF SE at most
        # f x PLS's take part in the search
        f = float(rule.split(":")[1])
        W = np.kron(np.eye(K1), beta)  # K1, K1 * K2
        se = np.sqrt(np.einsum("ka,ab,kb->k", W, cov, W))
        A = A[(A[:, se > f * se[-1]] == 0).all(1)]
    gaps, var = gaps_and_variances(o, A)
    if rule == "debiased":
        crit = np.sqrt(np.maximum((gaps**2 - var).max(1), 0.0))
    else:
        crit = np.abs(gaps).max(1)
    anchor = np.eye(K1)[-1]
    dist = ((A - anchor) ** 2).sum(1)
    i0 = crit.argmin()
    # tie-break tolerance: c x SE of the gap attaining the criterion at its optimum
    tol = c * np.sqrt(var[i0, np.abs(gaps[i0]).argmax()])
    alpha = _tie_broken(A, crit, tol, dist)
    if rule.startswith("soft"):
        # pair-average style weights over the vertices (the first K1 lattice rows)
        r2 = crit[:K1] ** 2
        pse = np.sqrt(np.diag(cov))  # the pair SEs
        if rule == "soft":
            scale = max(r2.min(), 0.01 * np.median(pse**2))
        elif rule == "soft-se":
            scale = np.median(pse**2)
        else:
            scale = float(rule.split(":")[1]) * np.median(pse**2)
        w = np.exp(-(r2 - r2.min()) / scale)
        alpha = w / w.sum()
    elif rule.startswith("bag"):
        # bootstrap smoothing: the tie-broken range search averaged over M = 100 Gaussian draws
        # of the pair table from its IF covariance, tolerance held fixed; seeded by the table
        rng = np.random.default_rng(int(abs(Psi).sum() * 1e6) % 2**32)
        L = np.linalg.cholesky(cov + 1e-12 * np.eye(cov.shape[0]) * np.trace(cov))
        pairs = list(itertools.combinations(range(K2), 2))
        draws = []
        for _ in range(100):
            Pb = Psi + (L @ rng.standard_normal(cov.shape[0])).reshape(K1, K2)
            Db = np.stack([Pb[:, j] - Pb[:, l] for j, l in pairs], 1)
            a_b = _tie_broken(A, np.abs(A @ Db).max(1), tol, dist)
            if rule == "bagtest" and not _kept(o, a_b, (a_b - anchor) @ Pb @ beta):
                # the contrast test and variance guard inside each draw (SEs at full sample)
                a_b = anchor
            draws.append(a_b)
        smoothed = sum(draws) / len(draws)
        est, pls = smoothed @ Psi @ beta, Psi[-1] @ beta
        if rule == "bagtest":
            return est, est
        if rule == "bag-kept":
            # the current rule (alpha: the tie-broken range search) decides whether to leave
            # PLS (it does not when it returns PLS itself); the smoothed weights when it does
            d = alpha @ Psi @ beta - pls
            return est, est if d != 0 and _kept(o, alpha, d) else pls
        alpha = smoothed
    est, pls = alpha @ Psi @ beta, Psi[-1] @ beta
    z, guard = TESTS.get(rule, (1.5, 1.05))
    return est, est if _kept(o, alpha, est - pls, z, guard) else pls


def gaps_and_variances(o, A) -> tuple[np.ndarray, np.ndarray]:
    """For every row of A (propensity weights): the gap between each pair of outcome learners'
    estimates and its paired IF variance, both (len(A), number of pairs)."""
    Psi, cov = o["Psi"], o["cov"]
    K1, K2 = Psi.shape
    C = cov.reshape(K1, K2, K1, K2)
    pairs = list(itertools.combinations(range(K2), 2))
    vals = A @ Psi  # m, K2
    gaps = np.stack([vals[:, j] - vals[:, l] for j, l in pairs], 1)  # m, P
    var = np.stack(
        [
            np.einsum(
                "mk,kl,ml->m",
                A,
                C[:, j, :, j] + C[:, l, :, l] - C[:, j, :, l] - C[:, l, :, j],
                A,
            )
            for j, l in pairs
        ],
        1,
    )
    return gaps, var


def _tie_broken(A, crit, tol, dist) -> np.ndarray:
    """The lattice point nearest the anchor among those within tol of the smallest criterion."""
    ok = crit <= crit.min() + tol
    return A[np.flatnonzero(ok)[dist[ok].argmin()]]


def _kept(o, alpha, d, z=1.5, guard=1.05) -> bool:
    """The contrast test with its variance guard at the least-squares outcome weights: keep
    weights alpha (difference d from PLS) when their IF SE is at most guard x PLS's or
    |d| > z x the paired IF SE of the difference."""
    beta, cov = o["beta"], o["cov"]
    wa = np.kron(alpha, beta)  # the blend's IF is kron(alpha, beta) applied to the pair IFs
    wp = np.kron(np.eye(len(alpha))[-1], beta)
    se_s, se_p = np.sqrt(wa @ cov @ wa), np.sqrt(wp @ cov @ wp)
    se_d = np.sqrt(max((wa - wp) @ cov @ (wa - wp), 0.0))
    return bool(se_s <= guard * se_p or abs(d) > z * se_d)


RULES = [
    "range",
    "debiased",
    "soft",
    "soft-se",
    "soft:0.3",
    "soft:3",
    "soft:1000",
    "bag",
    "bagtest",
    "bag-noguard",
    "bag-noguard-z2",
    "bag-kept",
    "se-mask:1.5",
    "se-mask:2",
]


def rows_frame(path) -> pd.DataFrame:
    """Per-replicate estimates of every rule (untested and headline) for one stored cell."""
    out = pickle.load(open(path, "rb"))
    A = lattice(out[0]["Psi"].shape[0], 10)
    A = np.vstack([np.eye(A.shape[1]), A])
    cols = {
        "cell": Path(path).stem.rsplit("_", 1)[0],
        "rep": np.arange(len(out)),
        "truth": [o["truth"] for o in out],
        "pls": [o["pls"] for o in out],
        "package_main": [o["main"] for o in out],
        "package_untested": [o["untested"] for o in out],
    }
    for rule in RULES:
        ev = np.array([evaluate(o, A, rule) for o in out])
        cols[f"{rule}_untested"], cols[f"{rule}_headline"] = ev[:, 0], ev[:, 1]
    return pd.DataFrame(cols)


def _ratio(e, g) -> str:
    return f"{np.sqrt(((e - g.truth) ** 2).mean() / ((g.pls - g.truth) ** 2).mean()):.3f}"


def _diff(e, ref, t) -> str:
    d = (e - t) ** 2 - (ref - t) ** 2
    return f"{d.mean():+.3g} ({d.std(ddof=1) / np.sqrt(len(d)):.2g})"


def table(df: pd.DataFrame) -> str:
    """Markdown table: per cell and rule, RMSE ratio to PLS and the paired squared-error
    difference (MC SE) against PLS and against the emulated current rule's headline."""
    lines = [
        "| cell | reps | rule | untested / PLS | headline / PLS | headline minus PLS | "
        "headline minus current rule |",
        "|---|---|---|---|---|---|---|",
    ]
    for cell, g in df.groupby("cell", sort=False):
        for rule in ["package", *RULES]:
            if rule == "package":
                u, h = g.package_untested, g.package_main
            else:
                u, h = g[f"{rule}_untested"], g[f"{rule}_headline"]
            lines.append(
                f"| {cell} | {len(g)} | {rule} | {_ratio(u, g)} | {_ratio(h, g)} "
                f"| {_diff(h, g.pls, g.truth)} | {_diff(h, g.range_headline, g.truth)} |"
            )
    return "\n".join(lines)


def signal(path) -> str:
    """How much a criterion computed from one data set's pair table can say about which
    propensity vertex is better, for one stored cell (each vertex at the least-squares outcome
    weights). Per vertex: RMSE over PLS, the mean pair-table error per outcome learner over the
    replicates, the squared range of that mean row (what the range criterion sees without
    sampling noise), and the mean over replicates of the squared range and of the debiased
    criterion max (gap^2 - IF variance). Then the paired contrast of each criterion, and of the
    debiased one with each gap's Monte Carlo variance in place of its IF variance (an oracle),
    between the library learner with the smallest RMSE and the stacked column (PLS): mean, SD
    over replicates, their ratio, and the share of data sets where the criterion ranks that
    learner ahead of PLS. A share near 0.5 means one data set's table says nothing about it."""
    out = pickle.load(open(path, "rb"))
    names = out[0]["names"]
    K1 = len(names)
    truth = np.array([o["truth"] for o in out])
    errors = np.array([o["Psi"] for o in out]) - truth[:, None, None]  # reps, K1, K2
    at_ls = np.array([o["Psi"] @ o["beta"] for o in out]) - truth[:, None]  # reps, K1
    rmse = np.sqrt((at_ls**2).mean(0))
    gaps, var = map(np.array, zip(*(gaps_and_variances(o, np.eye(K1)) for o in out)))
    raw, deb = (gaps**2).max(2), (gaps**2 - var).max(2)
    # the same with each gap's variance over the replicates in place of its IF variance: the
    # best debiasing any estimate of the noise could give (an oracle, not an estimator)
    oracle = (gaps**2 - gaps.var(0, ddof=1)).max(2)
    mean_rows = errors.mean(0)
    lines = [
        f"{Path(path).stem}: {len(out)} replicates",
        "",
        "| vertex | RMSE / PLS | mean error per outcome learner | squared range of the mean "
        "row | mean squared range | mean debiased criterion |",
        "|---|---|---|---|---|---|",
    ]
    for k, name in enumerate(names):
        cells = " ".join(f"{x:+.2f}" for x in mean_rows[k])
        lines.append(
            f"| {name} | {rmse[k] / rmse[-1]:.3f} | {cells} | {np.ptp(mean_rows[k]) ** 2:.2f} "
            f"| {raw[:, k].mean():.2f} | {deb[:, k].mean():.2f} |"
        )
    best = int(rmse[:-1].argmin())
    lines += [
        "",
        f"library learner best in hindsight: {names[best]} ({rmse[best] / rmse[-1]:.3f} x PLS); "
        "criterion at it minus at the stacked column (negative favours it):",
        "",
        "| criterion | mean | SD | mean / SD | share ranking it ahead of PLS |",
        "|---|---|---|---|---|",
    ]
    criteria = (("squared range", raw), ("debiased", deb), ("oracle-debiased", oracle))
    for label, crit in criteria:
        d = crit[:, best] - crit[:, -1]
        lines.append(
            f"| {label} | {d.mean():+.2f} | {d.std(ddof=1):.2f} | "
            f"{d.mean() / d.std(ddof=1):+.2f} | {(d < 0).mean():.2f} |"
        )
    return "\n".join(lines)


if __name__ == "__main__":
    if sys.argv[1] == "signal":
        print("\n\n".join(signal(p) for p in sys.argv[2:]))
        sys.exit(0)
    if sys.argv[1] == "table":
        print(table(pd.read_csv(sys.argv[2])))
        sys.exit(0)
    if sys.argv[1] == "csv":
        pd.concat([rows_frame(p) for p in sys.argv[3:]]).to_csv(sys.argv[2], index=False)
        sys.exit(0)
    _, _, seed, lib, design, n, reps, path = sys.argv
    out = Parallel(n_jobs=2)(
        delayed(one)(design, int(n), lib, r, int(seed)) for r in range(int(reps))
    )
    pickle.dump(out, open(path, "wb"))
    print(table(rows_frame(path)))
