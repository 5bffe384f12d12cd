"""Screen of noise-aware refit calibrations (issue 10, seventh round).

Per replicate, the default fit with a reweighting bootstrap (B = 200) and the refit calibration
forced on (``calibration_gate = 0``), keeping, for the headline, the untested search and PLS:
the estimate, the reweighting SE and percentile interval before calibration, the fold-model
jackknife share (the gate's statistic, so any gate can be applied afterwards) and the 5 paired
refit and reweighting replicates the calibration compares. Calibration rules are then applied
offline (``summarise``) on the same fits.

Cells: sparse and smooth-consistent (default libraries, n = 1000, screen seed 2011, not the
coverage study's 2004) and the unstable parametric cell kang-schafer-ate-transformed
(parametric libraries, n = 1000, seeds 2007 and 2027 of the calibration-gate study).

Usage: python benchmarks/default_choice/screen_calibration.py DESIGN LIBRARIES SEED REPS
"""
import os, sys, time, warnings
for v in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(v, "1")
from pathlib import Path
import numpy as np, pandas as pd
from joblib import Parallel, delayed
from stackdr import BlendEstimator
from stackdr.estimation import _fold_check
from stackdr.studies import build_libraries, get_design, replicate_seeds

N = 1000
M = 5
ROWS = ("target-aimed stacking", "target-aimed, no contrast test", "prediction-loss stacking")
OUT = Path(__file__).resolve().parents[1] / "results"
_CAPTURE = {}
_original = _fold_check.refit_replicates


def _capturing(estimator, target, settings, result):
    refits = _original(estimator, target, settings, result)
    _CAPTURE["refits"] = refits
    _CAPTURE["reweighting"] = result.bootstrap
    return refits


def one(design, libraries, rep, seed):
    _fold_check.refit_replicates = _capturing
    _CAPTURE.clear()
    seeds = replicate_seeds(seed, design, N, rep)
    data = get_design(design).simulate(N, np.random.default_rng(seeds.data))
    plib, olib = build_libraries(libraries)
    t = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        est = BlendEstimator(data.target, plib, olib, seed=int(seeds.estimator), bootstrap=200,
                             n_jobs=1, calibration_gate=0.0)
        res = est.fit(data.frame, data.treatment, data.outcome, data.covariates)
    chk = res.fold_check
    out = {"design": design, "libraries": libraries, "seed": seed, "rep": rep, "truth": data.truth,
           "share": chk.fit_share, "seconds": time.perf_counter() - t}
    refits, boot = _CAPTURE["refits"], _CAPTURE["reweighting"]
    for i, r in enumerate(res.estimators):
        if r.name not in ROWS:
            continue
        key = ROWS.index(r.name)
        se_rw = chk.uncorrected_se.get(r.name, r.bootstrap_se)
        w = r.bootstrap_se / se_rw if se_rw else 1.0
        out[f"est{key}"] = r.estimate
        out[f"wald{key}"] = r.se
        out[f"serw{key}"] = se_rw
        out[f"lowrw{key}"] = r.estimate - (r.estimate - r.low) / w
        out[f"highrw{key}"] = r.estimate + (r.high - r.estimate) / w
        rf = refits.estimates[r.name].to_numpy()
        rw = boot.estimates[r.name].to_numpy()[:M]
        for b in range(M):
            out[f"rf{key}_{b}"] = rf[b]
            out[f"rw{key}_{b}"] = rw[b]
    return out


if __name__ == "__main__":
    design, libraries, seed, reps = sys.argv[1], sys.argv[2], int(sys.argv[3]), int(sys.argv[4])
    path = OUT / f"screen_calibration_{design}_{seed}.csv"
    done = pd.read_csv(path) if path.exists() else pd.DataFrame()
    have = set(done["rep"]) if len(done) else set()
    todo = [r for r in range(reps) if r not in have]
    rows = done.to_dict("records")
    gen = Parallel(n_jobs=2, return_as="generator")(delayed(one)(design, libraries, r, seed) for r in todo)
    for i, row in enumerate(gen):
        rows.append(row)
        if i % 10 == 9:
            pd.DataFrame(rows).to_csv(path, index=False); print(design, i + 1, flush=True)
    pd.DataFrame(rows).to_csv(path, index=False)


def factors(df, key, rule, z=1.0, gate=0.05):
    """SE widening factor of row ``key`` per replicate under a calibration ``rule``."""
    est = df[f"est{key}"].to_numpy()[:, None]
    rf = df[[f"rf{key}_{b}" for b in range(M)]].to_numpy() - est
    rw = df[[f"rw{key}_{b}" for b in range(M)]].to_numpy() - est
    num, den = (rf**2).sum(1), (rw**2).sum(1)
    r2 = num / den
    # leave-one-pair-out jackknife SE of ratio^2
    loo = (num[:, None] - rf**2) / (den[:, None] - rw**2)
    jse = np.sqrt((M - 1) / M * ((loo - loo.mean(1, keepdims=True)) ** 2).sum(1))
    if rule == "max1":
        v = np.maximum(r2 - 1, 0)
    elif rule == "soft":
        v = np.maximum(r2 - 1 - z * jse, 0)
    elif rule == "hard":
        v = np.where(r2 - 1 > z * jse, r2 - 1, 0)
    elif rule == "shrink":  # positive-part shrinkage by the excess's t statistic
        excess = np.maximum(r2 - 1, 0)
        t2 = np.where(jse > 0, excess**2 / np.maximum(z * jse, 1e-300) ** 2, np.inf)
        v = excess * np.maximum(0, 1 - 1 / np.maximum(t2, 1e-300))
    elif rule == "none":
        v = np.zeros_like(r2)
    else:
        raise ValueError(rule)
    on = df["share"].to_numpy() > gate
    return np.sqrt(1 + np.where(on, v, 0)), on


def summarise(df, rules):
    from scipy.stats import norm
    out = []
    for key, name in enumerate(ROWS):
        est, truth = df[f"est{key}"].to_numpy(), df["truth"].to_numpy()
        sd = est.std(ddof=1)
        for label, (rule, z, gate) in rules.items():
            f, on = factors(df, key, rule, z, gate)
            se = df[f"serw{key}"].to_numpy() * f
            low = est - (est - df[f"lowrw{key}"].to_numpy()) * f
            high = est + (df[f"highrw{key}"].to_numpy() - est) * f
            cov = np.mean((low <= truth) & (truth <= high))
            out.append({"row": name, "rule": label, "reps": len(df),
                        "median SE / MC SD": np.median(se) / sd,
                        "mean SE / MC SD": np.mean(se) / sd,
                        "coverage": cov, "cov MC SE": np.sqrt(cov * (1 - cov) / len(df)),
                        "share widened": np.mean(f > 1)})
    return pd.DataFrame(out)
