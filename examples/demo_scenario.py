"""The built-in demo scenario through the Python API.

Simulated data with a known true average effect (-4.0 mmHg): fit both default libraries, print
the comparison table, the chosen weights of each library and the pair table.

    python examples/demo_scenario.py            # n = 2000, 1000 bootstrap replicates
    python examples/demo_scenario.py --small    # n = 400, 3 folds, 50 replicates

Setting STACKDR_EXAMPLE_SMALL=1 has the same effect as --small.
"""

from __future__ import annotations

import argparse
import os

from stackdr import BlendEstimator
from stackdr.studies import DESCRIPTION, simulate_demo


def main(small: bool = False) -> None:
    frame, truth = simulate_demo(n=400 if small else 2000)
    print(DESCRIPTION)
    estimator = BlendEstimator(
        "ate",
        folds=3 if small else 5,
        bootstrap=50 if small else 1000,
        n_jobs=1 if small else 2,
        seed=0,
    )
    result = estimator.fit(frame, treatment="programme", outcome="sbp_change")
    print(result.summary())
    print("\nPropensity weights:\n" + result.alpha.round(3).to_string())
    print("\nOutcome weights:\n" + result.beta.round(3).to_string())
    print("\nPair table (AIPW estimate for every propensity x outcome learner pair):")
    print(result.pair_table.round(3).to_string())
    low, high = result.interval
    print(
        f"\nTarget-aimed estimate {result.estimate:.3f} ({result.interval_method} interval "
        f"{low:.3f} to {high:.3f}); true value {truth:.3f} (known: the data are simulated)"
    )


if __name__ == "__main__":
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--small", action="store_true", help="small, fast run")
    args = parser.parse_args()
    main(small=args.small or os.environ.get("STACKDR_EXAMPLE_SMALL") == "1")
