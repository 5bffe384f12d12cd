"""Why the search's gain shrinks at small n: each propensity vertex against PLS (issue 10).

Research harness (eighth round). Per replicate of a grid cell (data and estimator seeds
``replicate_seeds(seed, design, n, rep)`` as in ``study_default_grid.py``; the default fit,
bootstrap 0), the DR estimate at every propensity vertex of the search (riesz blend, each learner
and the stacked column) with the outcome side at the least-squares stacking weights, and the
criterion's view of each vertex: the range of its pair estimates across the outcome learners
(what the mixed criterion minimises). Prints each vertex's bias, SD and RMSE ratio to PLS, the
best fixed propensity weights in hindsight (over a random simplex grid; an optimistic bound on
what fixed weights could give, not an estimator), the default's ratios, and how often each
vertex has the smallest range. The output is recorded in
``results/default_choice_small_n_mechanism.md``.

Usage: python benchmarks/default_choice/vertex_oracle.py DESIGN N LIBRARIES SEED REPS
"""

import sys
import warnings

import numpy as np
from joblib import Parallel, delayed

from stackdr import BlendEstimator
from stackdr.search import MAIN, PLS, UNTESTED
from stackdr.studies import build_libraries, get_design, replicate_seeds


def default_fit(design, n, lib, rep, seed):
    """The grid replicate's data and its default fit (bootstrap 0)."""
    seeds = replicate_seeds(seed, design, n, rep)
    data = get_design(design).simulate(n, np.random.default_rng(seeds.data))
    plib, olib = build_libraries(lib)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = BlendEstimator(
            data.target, plib, olib, seed=int(seeds.estimator), bootstrap=0, n_jobs=1
        ).fit(data.frame, data.treatment, data.outcome, data.covariates)
    return data, res


def one(design, n, lib, rep, seed):
    data, res = default_fit(design, n, lib, rep, seed)
    an = res.analysis
    by = {e.name: e.estimate for e in res.estimators}
    return dict(
        truth=data.truth,
        rows=an.Psi @ an.stack_beta,
        srange=an.Psi.max(1) - an.Psi.min(1),
        se=an.pair_se @ an.stack_beta if an.pair_se.ndim == 2 else an.pair_se,
        names=list(an.propensity_names),
        main=by[MAIN],
        pls=by[PLS],
        untested=by[UNTESTED],
    )


def main() -> None:
    design, n, lib, seed, reps = (
        sys.argv[1],
        int(sys.argv[2]),
        sys.argv[3],
        int(sys.argv[4]),
        int(sys.argv[5]),
    )
    out = Parallel(n_jobs=2)(delayed(one)(design, n, lib, r, seed) for r in range(reps))
    names = out[0]["names"]
    R = np.array([o["rows"] for o in out])
    t = np.array([o["truth"] for o in out])
    pls = np.array([o["pls"] for o in out])
    mse_p = ((pls - t) ** 2).mean()
    print(design, n, lib, "reps", reps, f"PLS RMSE {np.sqrt(mse_p):.3f}")
    for k, nm in enumerate(names):
        e = R[:, k] - t
        ratio = np.sqrt((e**2).mean() / mse_p)
        print(f"  vertex {nm:<22s} bias {e.mean():+.3f} sd {e.std():.3f} ratio {ratio:.3f}")
    # best fixed convex alpha (in hindsight) over a simplex grid
    K = len(names)
    rng = np.random.default_rng(0)
    cands = np.vstack(
        [np.eye(K), rng.dirichlet(np.ones(K), 20000), rng.dirichlet(0.3 * np.ones(K), 20000)]
    )
    mse = (((R @ cands.T) - t[:, None]) ** 2).mean(axis=0)
    i = mse.argmin()
    print(
        f"  best fixed alpha in hindsight: ratio {np.sqrt(mse[i] / mse_p):.3f}",
        dict(zip(names, cands[i].round(2))),
    )
    for key in ("main", "untested"):
        e = np.array([o[key] for o in out]) - t
        print(f"  {key} ratio {np.sqrt((e**2).mean() / mse_p):.3f}")
    S = np.array([o["srange"] for o in out])
    SE = np.array([o["se"] for o in out])
    print("  mean range across outcome learners per vertex:", dict(zip(names, S.mean(0).round(2))))
    print(
        "  share where vertex has the smallest range:",
        dict(zip(names, np.bincount(S.argmin(1), minlength=K) / len(S))),
    )
    print("  mean pair SE at LS outcome weights:", dict(zip(names, SE.mean(0).round(2))))


if __name__ == "__main__":
    main()
