"""The NSW job-training experiment (Dehejia & Wahba 1999 sample of LaLonde 1986).

Randomised data: 185 men offered a subsidised job, 260 controls, outcome 1978 earnings (US
dollars). Because treatment was randomised, the difference in mean earnings, 1794.34, is the
experimental benchmark; a doubly robust estimate that adjusts for the baseline covariates should
land near it. The data come from the PyPI package ``causaldata`` (``nsw_mixtape``).

    python examples/nsw_experimental.py            # 1000 bootstrap replicates
    python examples/nsw_experimental.py --small    # 3 folds, 50 replicates

Setting STACKDR_EXAMPLE_SMALL=1 has the same effect as --small.
"""

from __future__ import annotations

import argparse
import os
import sys

from stackdr import BlendEstimator

COVARIATES = ["age", "educ", "black", "hisp", "marr", "nodegree", "re74", "re75"]
# Dehejia & Wahba (1999), JASA 94:1053-1062: treated mean 6349.14, control mean 4554.80.
BENCHMARK = 1794.34


def load_nsw():
    """The 445-row experimental sample as a DataFrame."""
    try:
        from causaldata import nsw_mixtape
    except ImportError:
        sys.exit("this example needs the causaldata package: pip install causaldata")
    return nsw_mixtape.load_pandas().data[["treat", "re78", *COVARIATES]].astype(float)


def main(small: bool = False) -> None:
    frame = load_nsw()
    arms = frame.groupby("treat")["re78"].mean()
    difference = arms[1.0] - arms[0.0]
    print(
        f"NSW experimental sample: {len(frame)} rows ({int(frame.treat.sum())} treated). "
        f"Difference in mean 1978 earnings: {difference:.2f} (published benchmark "
        f"{BENCHMARK:.2f})\n"
    )
    for target in ("ate", "att"):
        estimator = BlendEstimator(
            target, folds=3 if small else 5, bootstrap=50 if small else 1000, n_jobs=1, seed=1
        )
        result = estimator.fit(frame, "treat", "re78", COVARIATES)
        table = result.comparison()[["estimator", "estimate", "se", "low", "high"]]
        table["benchmark"] = BENCHMARK
        table["difference"] = table["estimate"] - BENCHMARK
        print(f"{result.target.description}, {result.interval_method} intervals")
        print(table.round(2).to_string(index=False))
        print(
            "weights: propensity "
            + ", ".join(f"{k} {v:.2f}" for k, v in result.alpha.items())
            + "; outcome "
            + ", ".join(f"{k} {v:.2f}" for k, v in result.beta.items())
            + "\n"
        )


if __name__ == "__main__":
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--small", action="store_true", help="fewer bootstrap replicates")
    args = parser.parse_args()
    main(small=args.small or os.environ.get("STACKDR_EXAMPLE_SMALL") == "1")
