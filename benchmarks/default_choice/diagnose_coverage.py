"""Where does the over-coverage of the wider coverage study come from? (issue 10, sixth round)

Per replicate (sparse and smooth-consistent, default libraries, n = 1000, reweighting bootstrap
B = 200, every other setting at the package default including the jackknife gate; data seeds
``replicate_seeds(2004, ...)`` as in ``coverage_study.py --wider``): for every estimator row the
estimate, Wald SE, the reweighting bootstrap SE and interval before the gate's refit
calibration and after it, the refit ratio, and the fold-model jackknife share. Rows:
``results/coverage_diagnosis_wider.csv`` (ran at package code 4fde0c1, the default before the
variance guard). Usage: python benchmarks/default_choice/diagnose_coverage.py sparse,smooth-consistent 100
"""
import os, sys, warnings, time
for v in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(v, "1")
from pathlib import Path
import numpy as np, pandas as pd
from joblib import Parallel, delayed
from stackdr import BlendEstimator
from stackdr.studies import build_libraries, get_design, replicate_seeds

N = 1000
ROWS = ("target-aimed stacking", "target-aimed, no contrast test", "prediction-loss stacking")

def one(design, rep, seed):
    seeds = replicate_seeds(seed, design, N, rep)
    data = get_design(design).simulate(N, np.random.default_rng(seeds.data))
    plib, olib = build_libraries("default")
    t = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        est = BlendEstimator(data.target, plib, olib, seed=int(seeds.estimator), bootstrap=200, n_jobs=1)
        res = est.fit(data.frame, data.treatment, data.outcome, data.covariates)
    chk = res.fold_check
    out = {"design": design, "rep": rep, "truth": data.truth, "share": chk.fit_share,
           "corrected": chk.corrected, "seconds": time.perf_counter() - t}
    out["names"] = "|".join(r.name for r in res.estimators)
    for i, r in enumerate(res.estimators):
        se_rw = chk.uncorrected_se.get(r.name, r.bootstrap_se)
        w = r.bootstrap_se / se_rw if se_rw else 1.0
        out[f"n{i}"] = r.name
        out[f"est{i}"] = r.estimate
        out[f"wald{i}"] = r.se
        out[f"serw{i}"] = se_rw
        out[f"se{i}"] = r.bootstrap_se
        out[f"lowrw{i}"] = r.estimate - (r.estimate - r.low) / w
        out[f"highrw{i}"] = r.estimate + (r.high - r.estimate) / w
        out[f"low{i}"], out[f"high{i}"] = r.low, r.high
        out[f"ratio{i}"] = chk.refit_ratios.get(r.name, np.nan)
    return out

if __name__ == "__main__":
    designs = sys.argv[1].split(",")
    reps = int(sys.argv[2])
    path = Path(__file__).resolve().parents[1] / "results" / "coverage_diagnosis_wider.csv"
    todo = [(d, r) for r in range(reps) for d in designs]
    rows = []
    for i, row in enumerate(Parallel(n_jobs=2, return_as="generator")(delayed(one)(d, r, 2004) for d, r in todo)):
        rows.append(row)
        if i % 10 == 9:
            pd.DataFrame(rows).to_csv(path, index=False); print(i + 1, flush=True)
    pd.DataFrame(rows).to_csv(path, index=False)
