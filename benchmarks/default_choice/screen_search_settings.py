"""Screen: the search's own settings at n = 200 with flexible libraries (issue 10, eighth round).

One cross-fit per replicate (the default fit, bootstrap 0; data and estimator seeds
``replicate_seeds(seed, design, n, rep)`` as in ``study_default_grid.py``), then the analysis
rerun on the same cross-fit (``BlendEstimator.analyse``) with each setting: the default
(tie-break scale c = 0.25, mixed criterion), c = 0.1, and the minimax criterion. Rows per
replicate: headline, searched weights before the test, PLS; all paired with the default fit's
PLS. Rows: ``results/screen_search_settings_{design}_{n}_{libraries}_{seed}.csv``; the printed
table is in ``results/default_choice_threshold_rules.md``.

Usage: python benchmarks/default_choice/screen_search_settings.py DESIGN N LIBRARIES SEED REPS
"""

import sys
import time
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
from joblib import Parallel, delayed

from stackdr import BlendEstimator
from stackdr.search import MAIN, PLS, UNTESTED
from stackdr.studies import build_libraries, get_design, replicate_seeds

OUT = Path(__file__).resolve().parents[1] / "results"
SETTINGS = {"c0.25": {}, "c0.1": {"tie_break_scale": 0.1}, "minimax": {"criterion": "minimax"}}


def one(design: str, n: int, lib: str, rep: int, seed: int) -> dict:
    seeds = replicate_seeds(seed, design, n, rep)
    data = get_design(design).simulate(n, np.random.default_rng(seeds.data))
    plib, olib = build_libraries(lib)
    out = {"rep": rep, "truth": data.truth}
    common = dict(seed=int(seeds.estimator), bootstrap=0, n_jobs=1)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = BlendEstimator(data.target, plib, olib, **common).fit(
            data.frame, data.treatment, data.outcome, data.covariates
        )
        for key, kw in SETTINGS.items():
            r = res
            if kw:
                r = BlendEstimator(data.target, plib, olib, **common, **kw).analyse(
                    res.data, res.target, res.crossfit, bootstrap=False
                )
            by = {e.name: e.estimate for e in r.estimators}
            out[f"main_{key}"], out[f"untested_{key}"] = by[MAIN], by[UNTESTED]
            out[f"pls_{key}"] = by[PLS]
    return out


if __name__ == "__main__":
    design, n, lib = sys.argv[1], int(sys.argv[2]), sys.argv[3]
    seed, reps = int(sys.argv[4]), int(sys.argv[5])
    path = OUT / f"screen_search_settings_{design}_{n}_{lib}_{seed}.csv"
    started = time.time()
    if path.exists():
        df = pd.read_csv(path)
    else:
        df = pd.DataFrame(
            Parallel(n_jobs=2)(delayed(one)(design, n, lib, r, seed) for r in range(reps))
        )
        df.to_csv(path, index=False)
    print(f"{design} n = {n}, {lib} libraries, seed {seed}, {len(df)} replicates")
    print("| setting | row | RMSE / PLS | paired sq. error diff vs PLS (MC SE) |")
    print("|---|---|---|---|")
    t, e0 = df.truth, (df["pls_c0.25"] - df.truth) ** 2
    for key in SETTINGS:
        for row in ("main", "untested"):
            e1 = (df[f"{row}_{key}"] - t) ** 2
            d = e1 - e0
            print(
                f"| {key} | {row} | {np.sqrt(e1.mean() / e0.mean()):.3f} | "
                f"{d.mean():+.3g} ({d.std(ddof=1) / np.sqrt(len(d)):.2g}) |"
            )
