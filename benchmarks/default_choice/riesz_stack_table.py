"""Paired table of the Riesz-loss stacking screen (``screen_riesz_stack.py``), in the layout of
``outcome_side_table.py``: "pa0.25, z = 1.5" is the current default, "rs" the Riesz-stacked
propensity weights with least-squares outcome weights, "ra c" the riesz search anchored at the
Riesz-stacked weights; ", z" applies the contrast test against PLS.
Usage: python benchmarks/default_choice/riesz_stack_table.py <results>/default_choice_riesz_stack_seed2007.csv
"""

import sys

import outcome_side_table as t
from outcome_side_table import print_tables
import pandas as pd

t.RULES = [
    ("pa0.25", 1.5),
    ("pa0.25", None),
    ("rs", None),
    ("rs", 1.5),
    ("rs", 2),
    ("ra0.25", None),
    ("ra0.25", 1.5),
    ("ra0.5", None),
    ("ra0.5", 1.5),
]

if __name__ == "__main__":
    print_tables(t.table, sys.argv[1:])
