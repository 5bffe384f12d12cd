"""The weight search: convex weights over each library from a pair table (range LP, lattice
search with polish, tie-breaks towards the prediction-loss weights) and the discrete pair
selectors."""

from stackdr.search._comparisons import (
    BEST,
    COMPARISONS,
    ESTIMATOR_ORDER,
    MAIN,
    MINIMAX_PAIR,
    MIXED_PAIR,
    ORACLE,
    PLS,
    PURE,
    SMOOTHED,
    STACKED_PROPENSITY,
    UNTESTED,
    Comparison,
    WeightContext,
    active_comparisons,
    comparison_weights,
    contrast_applies,
)
from stackdr.search._lattice import lattice_resolution, lattice_size, simplex_lattice
from stackdr.search._polish import grid_refine
from stackdr.search._range_lp import minimise_range_cvxpy, minimise_range_lp
from stackdr.search._records import SolveResult, WeightSearch
from stackdr.search._selection import (
    CRITERIA,
    OUTCOME_SIDES,
    SearchSettings,
    discrete_pairs,
    pseudo_risk,
    pure_weights,
    run_search,
    smoothed_pair_weights,
)
from stackdr.search._tie_break import tie_break_general, tie_break_range
from stackdr.search._weights import search_weights

__all__ = [
    "BEST",
    "COMPARISONS",
    "CRITERIA",
    "ESTIMATOR_ORDER",
    "OUTCOME_SIDES",
    "MAIN",
    "MINIMAX_PAIR",
    "MIXED_PAIR",
    "ORACLE",
    "PLS",
    "PURE",
    "SMOOTHED",
    "STACKED_PROPENSITY",
    "UNTESTED",
    "Comparison",
    "WeightContext",
    "active_comparisons",
    "comparison_weights",
    "contrast_applies",
    "SearchSettings",
    "SolveResult",
    "WeightSearch",
    "discrete_pairs",
    "grid_refine",
    "lattice_resolution",
    "lattice_size",
    "minimise_range_cvxpy",
    "minimise_range_lp",
    "pseudo_risk",
    "pure_weights",
    "run_search",
    "search_weights",
    "simplex_lattice",
    "smoothed_pair_weights",
    "tie_break_general",
    "tie_break_range",
]
