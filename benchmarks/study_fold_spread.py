"""Honest bootstrap SEs with unstable learners: reweighting bootstrap, fold-spread corrections and
the refit bootstrap on paired replicates.

Each replicate of a cell simulates one data set (the seeds of the study runner,
``replicate_seeds(study seed, design, n, rep)``, so the data sets are those of the grid study),
fits the estimator once at its defaults with the parametric libraries (bootstrap off) and then,
on that one fit (same data, same folds, same out-of-fold predictions):

- the reweighting bootstrap (B = 200, multinomial);
- the between-fold spread at the final blended nuisances (``stackdr.inference.fold_spread``):
  fold estimates, Cochran's Q, the DerSimonian-Laird tau^2, and the heavy-tail diagnostics
  (Kish effective sample size per arm, share of the IF variance in the top 1% of rows);
- the refit bootstrap (every learner refitted; ``--refits``: B = 30 in the unstable cell and 8 in
  the control cells by default; the confirmation seed ran 10 and 5 to fit the CPU budget); its
  first 5 replicates also serve the few-refit calibration candidate.

Candidates computed from these ingredients (SE and interval; intervals widened about the
estimate by the ratio of corrected to reweighting SE, so the percentile shape is kept):

- ``reweighting``: the plain reweighting bootstrap;
- ``dl/K``: sqrt(SE_rw^2 + tau^2 / K);
- ``dl(K-1)^2/K``: sqrt(SE_rw^2 + tau^2 (K - 1)^2 / K) (the first-order scaling when every
  fold's model deviation is the mean of its training rows' influence, so fold models share
  (K - 2) / (K - 1) of their training rows);
- ``dl/K if p<0.05``, ``dl(K-1)^2/K if p<0.05``: the same only when Cochran's Q rejects
  homogeneity at 5%;
- ``refit-5 calib.``: SE_rw x max(1, SD of 5 refit replicates / SE_rw);
- ``paired refit-m``: SE_rw x max(1, c), c^2 = sum_b (refit_b - estimate)^2 /
  sum_b (reweighted_b - estimate)^2 over the first m replicates of both bootstraps, which draw
  the same rows (``stackdr.inference.paired_refit_ratio``; the package's ``calibration_refits``);
  ``two-sided`` uses c itself;
- ``refit``: the refit bootstrap (SE = SD of its replicates; interval estimate +- z SE, since so
  few replicates give poor percentile ends).

Cells: ``kang-schafer-ate-transformed`` (every propensity learner unstable: unpenalised logistic
regression on the transformed covariates), and two control cells where a consistent learner is in
the library: ``lunceford-davidian`` and ``kang-schafer-ate`` (correct covariates); n = 1000.
Per-replicate rows go to ``results/fold_spread_seed{seed}.csv`` (resumable: finished replicates
are kept); the summary to ``results/study_fold_spread_seed{seed}.md`` and ``.csv``.

Usage::

    python benchmarks/study_fold_spread.py --seed 2007 [--reps 100] [--report]
"""

from __future__ import annotations

import argparse
import json
import sys
import time
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
from scipy.stats import norm

from stackdr import BlendEstimator
from stackdr.core import row_contributions
from stackdr.inference import (
    InferenceSettings,
    fold_spread,
    paired_refit_ratio,
    reweighting_bootstrap,
    top_row_share,
)
from stackdr.reporting import markdown_table
from stackdr.studies import build_libraries, get_design, replicate_seeds

RESULTS = Path(__file__).resolve().parent / "results"
N = 1000
BOOTSTRAP = 200
UNSTABLE = "kang-schafer-ate-transformed"
CELLS = [UNSTABLE, "lunceford-davidian", "kang-schafer-ate"]
CALIBRATION_REFITS = 5
# Reweighting replicates stored per replicate: the first ones use the same row draws as the refit
# replicates (same generators), so the two bootstraps can be compared draw by draw.
PAIRED = 30
Z = norm.ppf(0.975)
# The rule chosen on study seed 2007 (``calibration_refits=5`` in the package) between the two
# bootstraps it is measured against.
HEADLINE = ("reweighting", "paired refit-5", "refit")


def one_replicate(design: str, rep: int, seed: int, refits: int) -> dict:
    seeds = replicate_seeds(seed, design, N, rep)
    data = get_design(design).simulate(N, np.random.default_rng(seeds.data))
    propensity, outcome = build_libraries("parametric")
    row: dict = {"design": design, "rep": rep, "truth": data.truth}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        started = time.perf_counter()
        estimator = BlendEstimator(
            data.target,
            propensity,
            outcome,
            seed=int(seeds.estimator),
            n_jobs=1,
            bootstrap=refits,
            bootstrap_kind="refit",
        )
        result = estimator.fit(data.frame, data.treatment, data.outcome, data.covariates)
        row["refit_seconds"] = result.timings["bootstrap"]
        row["fit_seconds"] = time.perf_counter() - started - row["refit_seconds"]
        main = result.estimators[0].name
        row["refit_estimates"] = json.dumps(result.bootstrap.estimates[main].tolist())
        started = time.perf_counter()
        boot = reweighting_bootstrap(
            InferenceSettings(BOOTSTRAP, seed=int(seeds.estimator)), result
        )
        row["rw_seconds"] = time.perf_counter() - started
    started = time.perf_counter()
    an = result.analysis
    inp = an.inputs[0]
    H = row_contributions(inp, result.alpha.to_numpy(), result.beta.to_numpy(), an.settings.blend)
    spread = fold_spread(H, inp.d, result.crossfit.fold_labels[0])
    influence = (H - result.estimate * inp.d) / inp.d.mean()
    row["spread_seconds"] = time.perf_counter() - started
    diag = result.diagnostics
    ess = diag.effective_sample_size or {}
    sizes = diag.arm_sizes or {}
    row.update(
        estimate=result.estimate,
        se_if=result.se,
        se_rw=boot.standard_errors[main],
        rw_estimates=json.dumps(boot.estimates[main].to_numpy()[:PAIRED].tolist()),
        low_rw=boot.intervals[main][0],
        high_rw=boot.intervals[main][1],
        q=spread.q,
        dispersion=spread.dispersion,
        p_value=spread.p_value,
        tau2=spread.between_variance,
        folds=spread.folds,
        fold_estimates=json.dumps(spread.estimates.tolist()),
        top1_share=top_row_share(influence),
        ess_fraction=min(ess[a] / sizes[a] for a in ess if ess[a] and sizes.get(a)),
    )
    return row


def run(seed: int, reps: int, refits: tuple[int, int]) -> None:
    path = RESULTS / f"fold_spread_seed{seed}.csv"
    done = pd.read_csv(path) if path.exists() else pd.DataFrame(columns=["design", "rep"])
    have = set(zip(done["design"], done["rep"]))
    for design in CELLS:
        started = time.perf_counter()
        for rep in range(reps):
            if (design, rep) in have:
                continue
            row = one_replicate(design, rep, seed, refits[design != UNSTABLE])
            pd.DataFrame([row]).to_csv(path, mode="a", header=not path.exists(), index=False)
        print(
            f"[{time.strftime('%H:%M:%S')}] seed {seed} {design}: "
            f"{time.perf_counter() - started:.0f} s",
            flush=True,
        )


def add_paired(seed: int) -> None:
    """Fill in the stored reweighting replicates of rows written before they were stored: the
    fit and its reweighting bootstrap are deterministic, so they are recomputed (and checked
    against the stored bootstrap SE)."""
    path = RESULTS / f"fold_spread_seed{seed}.csv"
    frame = pd.read_csv(path)
    if "rw_estimates" not in frame:
        frame["rw_estimates"] = None
    frame["rw_estimates"] = frame["rw_estimates"].astype(object)
    for i in np.flatnonzero(frame["rw_estimates"].isna().to_numpy()):
        design, rep = frame.at[i, "design"], int(frame.at[i, "rep"])
        seeds = replicate_seeds(seed, design, N, rep)
        data = get_design(design).simulate(N, np.random.default_rng(seeds.data))
        propensity, outcome = build_libraries("parametric")
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            estimator = BlendEstimator(
                data.target, propensity, outcome, seed=int(seeds.estimator), bootstrap=0
            )
            result = estimator.fit(data.frame, data.treatment, data.outcome, data.covariates)
            boot = reweighting_bootstrap(
                InferenceSettings(BOOTSTRAP, seed=int(seeds.estimator)), result
            )
        main = result.estimators[0].name
        if not np.isclose(boot.standard_errors[main], frame.at[i, "se_rw"], rtol=1e-9):
            raise RuntimeError(f"{design} rep {rep}: recomputed bootstrap differs")
        frame.at[i, "rw_estimates"] = json.dumps(boot.estimates[main].to_numpy()[:PAIRED].tolist())
    frame.to_csv(path, index=False)


def candidates(frame: pd.DataFrame) -> dict:
    """SE of every candidate per replicate (a column each)."""
    K = frame["folds"].to_numpy()
    tau2 = frame["tau2"].to_numpy()
    rw = frame["se_rw"].to_numpy()
    rejects = frame["p_value"].to_numpy() < 0.05
    refit = [np.asarray(json.loads(v)) for v in frame["refit_estimates"]]
    calib = np.array([np.std(r[:CALIBRATION_REFITS], ddof=1) for r in refit])
    reweighted = [np.asarray(json.loads(v)) for v in frame["rw_estimates"]]
    est = frame["estimate"].to_numpy()
    paired = {
        m: np.array([paired_refit_ratio(a[:m], b, e) for a, b, e in zip(refit, reweighted, est)])
        for m in (5, 10)
        if min(len(r) for r in refit) >= m
    }
    return {
        "reweighting": rw,
        "dl/K": np.sqrt(rw**2 + tau2 / K),
        "dl(K-1)^2/K": np.sqrt(rw**2 + tau2 * (K - 1) ** 2 / K),
        "dl/K if p<0.05": np.sqrt(rw**2 + rejects * tau2 / K),
        "dl(K-1)^2/K if p<0.05": np.sqrt(rw**2 + rejects * tau2 * (K - 1) ** 2 / K),
        f"refit-{CALIBRATION_REFITS} calib.": rw * np.maximum(1.0, calib / rw),
        **{f"paired refit-{m}": rw * np.maximum(1.0, c) for m, c in paired.items()},
        **{f"paired refit-{m}, two-sided": rw * c for m, c in paired.items()},
        "refit": np.array([np.nanstd(r, ddof=1) for r in refit]),
    }


def _cost(name: str, cell: pd.DataFrame) -> float:
    """Seconds per fit of a candidate's inference with B = 200 (refit: per-replicate refit time
    x 200)."""
    rw = float(cell["rw_seconds"].mean())
    per_refit = float(
        (cell["refit_seconds"] / cell["refit_estimates"].map(lambda v: len(json.loads(v)))).mean()
    )
    if name.startswith("dl"):
        return rw + float(cell["spread_seconds"].mean())
    if name.startswith("refit-"):
        return rw + CALIBRATION_REFITS * per_refit
    if name.startswith("paired refit-"):
        return rw + int(name.split("-")[1].split(",")[0]) * per_refit
    return per_refit * BOOTSTRAP if name == "refit" else rw


def summarise(frame: pd.DataFrame) -> pd.DataFrame:
    """Median SE / MC SD (MC SE), coverage (MC SE), share corrected and cost per candidate."""
    rows = []
    for design, cell in frame.groupby("design", sort=False):
        cell = cell.sort_values("rep")
        m = len(cell)
        est, truth = cell["estimate"].to_numpy(), cell["truth"].to_numpy()
        sd = float(np.std(est, ddof=1))
        # The spread of a heavy-tailed estimate also robustly: IQR / 1.349 (the SD under
        # normality; common practice).
        robust = float(np.subtract(*np.quantile(est, [0.75, 0.25]))) / 1.349
        # MC SE of a ratio to the SD of the estimates: the SD's relative MC SE 1 / sqrt(2 (m - 1))
        # (normal approximation, common practice), the median SE's own noise being smaller.
        rel = 1 / np.sqrt(2 * (m - 1))
        for name, se in candidates(cell).items():
            f = se / cell["se_rw"].to_numpy()
            if name == "refit":
                low, high = est - Z * se, est + Z * se
            else:
                low = est - f * (est - cell["low_rw"].to_numpy())
                high = est + f * (cell["high_rw"].to_numpy() - est)
            cover = float(np.mean((low <= truth) & (truth <= high)))
            ratio = float(np.median(se)) / sd
            rows.append(
                {
                    "design": design,
                    "reps": m,
                    "candidate": name,
                    "median SE / MC SD": f"{ratio:.3f} ({ratio * rel:.3f})",
                    "mean SE / MC SD": round(float(np.mean(se)) / sd, 3),
                    "median SE / (IQR / 1.349)": round(float(np.median(se)) / robust, 3),
                    "coverage": f"{cover:.3f} ({np.sqrt(cover * (1 - cover) / m):.3f})",
                    "share corrected": round(float(np.mean(f > 1 + 1e-12)), 2)
                    if name != "refit"
                    else "",
                    "seconds per fit": round(_cost(name, cell), 3),
                }
            )
    return pd.DataFrame(rows)


def diagnostics(frame: pd.DataFrame) -> pd.DataFrame:
    """Distribution of the instability diagnostics per cell (median and 10%-90% range)."""
    rows = []
    for design, cell in frame.groupby("design", sort=False):
        row = {
            "design": design,
            "reps": len(cell),
            "MC SD": round(float(cell["estimate"].std()), 3),
        }
        row["bias"] = round(float((cell["estimate"] - cell["truth"]).mean()), 3)
        for col in ("dispersion", "top1_share", "ess_fraction"):
            q10, q50, q90 = np.quantile(cell[col], [0.1, 0.5, 0.9])
            row[col] = f"{q50:.3g} [{q10:.3g}, {q90:.3g}]"
        row["share p < 0.05"] = round(float((cell["p_value"] < 0.05).mean()), 2)
        rows.append(row)
    return pd.DataFrame(rows)


def report(seed: int) -> None:
    path = RESULTS / f"fold_spread_seed{seed}.csv"
    frame = pd.read_csv(path)
    table, diag = summarise(frame), diagnostics(frame)
    table.to_csv(RESULTS / f"study_fold_spread_seed{seed}.csv", index=False)
    chosen = table[table["candidate"].isin(HEADLINE)]
    text = [
        f"# Bootstrap SE with unstable learners, study seed {seed}",
        "",
        f"Written by benchmarks/study_fold_spread.py. n = {N}, parametric libraries, defaults "
        f"otherwise (K = 5 folds); reweighting bootstrap B = {BOOTSTRAP}; refit bootstrap B = "
        + ", ".join(
            f"{len(json.loads(cell['refit_estimates'].iloc[0]))} ({design})"
            for design, cell in frame.groupby("design", sort=False)
        )
        + ". Every candidate works on the same fit of each replicate (paired). Ratio = median "
        "SE over replicates / Monte Carlo SD of the estimate (MC SE from the SD's relative "
        "error), also against the robust spread IQR / 1.349 (heavy tails inflate the SD); "
        "coverage of the 95% interval (MC SE). Cost: seconds per fit of the candidate's "
        "inference at B = 200 (refit: measured seconds per refit replicate x 200). The refit "
        "interval is estimate +- z SE from its few replicates, whose noise alone lowers its "
        "coverage. The rule (``paired refit-5``, the package's ``calibration_refits=5``) was "
        "chosen on study seed 2007 before seed 2027 was run.",
        "",
        "## The plain reweighting bootstrap, the chosen calibration and the refit bootstrap",
        "",
        markdown_table(chosen.astype(str)),
        "",
        "## Every candidate",
        "",
        markdown_table(table.astype(str)),
        "",
        "## Instability diagnostics (median [10%, 90%] over replicates)",
        "",
        "dispersion = Cochran's Q / (K - 1) over the folds; top1_share = share of sum IF^2 in "
        "the top 1% of rows; ess_fraction = smallest Kish effective sample size of the inverse "
        "weights over the arms / arm size.",
        "",
        markdown_table(diag.astype(str)),
        "",
    ]
    (RESULTS / f"study_fold_spread_seed{seed}.md").write_text("\n".join(text))
    print(table.to_string(index=False))
    print(diag.to_string(index=False))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seed", type=int, default=2007)
    parser.add_argument("--reps", type=int, default=100)
    parser.add_argument(
        "--refits",
        type=int,
        nargs=2,
        default=(30, 8),
        metavar=("UNSTABLE", "CONTROL"),
        help="refit bootstrap replicates in the unstable cell and in the control cells",
    )
    parser.add_argument("--report", action="store_true", help="only summarise stored rows")
    parser.add_argument(
        "--add-paired", action="store_true", help="only fill in stored reweighting replicates"
    )
    args = parser.parse_args()
    RESULTS.mkdir(exist_ok=True)
    if args.add_paired:
        add_paired(args.seed)
    elif not args.report:
        run(args.seed, args.reps, tuple(args.refits))
        add_paired(args.seed)
    report(args.seed)


if __name__ == "__main__":
    sys.exit(main())
