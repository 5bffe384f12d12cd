"""Inference: the reweighting bootstrap (reruns the weight search on reweighted pair tables) and
the refit bootstrap (refits every learner). Both take an :class:`InferenceSettings` record and a
full-sample result, never the estimator object."""

from stackdr.inference._common import (
    REWEIGHTING_KINDS,
    BootstrapResult,
    InferenceSettings,
    draw_row_weights,
    replicate_generators,
    resample_rows,
    summarise_replicates,
)
from stackdr.inference._fold_spread import (
    FoldSpread,
    fold_spread,
    paired_refit_ratio,
    refit_excess,
    top_row_share,
    widen_intervals,
)
from stackdr.inference._refit import refit_bootstrap
from stackdr.inference._reweighting import replicate_features, reweighting_bootstrap

__all__ = [
    "REWEIGHTING_KINDS",
    "BootstrapResult",
    "FoldSpread",
    "InferenceSettings",
    "draw_row_weights",
    "fold_spread",
    "paired_refit_ratio",
    "refit_excess",
    "refit_bootstrap",
    "replicate_features",
    "replicate_generators",
    "resample_rows",
    "reweighting_bootstrap",
    "summarise_replicates",
    "top_row_share",
    "widen_intervals",
]
