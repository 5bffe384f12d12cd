"""Inference: the reweighting bootstrap (reruns the weight search on reweighted pair tables) and
the refit bootstrap (refits every learner)."""

from stackdr.inference._reweighting import (
    BootstrapResult,
    draw_row_weights,
    refit_bootstrap,
    replicate_generators,
    reweighting_bootstrap,
)

__all__ = [
    "BootstrapResult",
    "draw_row_weights",
    "refit_bootstrap",
    "replicate_generators",
    "reweighting_bootstrap",
]
