"""Targets in the bilinear doubly robust class (DESIGN section 1).

A target is described by its components. Component c pairs an *outcome head* (which regression
the outcome learners provide: ``"mu1"`` = E[Y | A=1, X], ``"mu0"`` = E[Y | A=0, X], ``"m"`` =
E[Y | X]) with a *weight transform* of the propensity pi(X) = E[A | X] (for example 1/pi), and
with row functions h1, h2, h3 of (A, Y).  The per-row contribution is

    H(O; b, p) = sum_c [ b_c p_c h1_c + b_c h2_c + p_c h3_c ] + h4,

and the estimate is sum_i H_i / sum_i d_i with a row denominator d (1 for most targets, A for
the effect on the treated).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

from stackdr.errors import InputError

RowFunction = Callable[[np.ndarray, np.ndarray], np.ndarray]
OUTCOME_HEADS = ("mu1", "mu0", "m")


@dataclass(frozen=True)
class Component:
    """One term of the bilinear class.

    Parameters
    ----------
    outcome_head : {"mu1", "mu0", "m"}
        Which outcome regression plays the role of b_c.
    weight_transform : callable
        Maps the (clipped) propensity pi to the weight-side value p_c, vectorised.
    h1, h2, h3 : callable
        Row functions of (A, Y) returning arrays of length n.
    """

    outcome_head: str
    weight_transform: Callable[[np.ndarray], np.ndarray]
    h1: RowFunction
    h2: RowFunction
    h3: RowFunction

    def __post_init__(self) -> None:
        if self.outcome_head not in OUTCOME_HEADS:
            raise InputError(
                f"outcome head {self.outcome_head!r} is not one of {', '.join(OUTCOME_HEADS)}"
            )


def _zeros(A: np.ndarray, Y: np.ndarray) -> np.ndarray:
    return np.zeros_like(A, dtype=float)


def _ones(A: np.ndarray, Y: np.ndarray) -> np.ndarray:
    return np.ones_like(A, dtype=float)


@dataclass(frozen=True)
class Target:
    """A doubly robust target parameter in the bilinear class.

    Parameters
    ----------
    name : str
        Short name used in tables and files.
    description : str
        Plain-English meaning.
    components : tuple of Component
    h4 : callable, optional
        Row function added to H (default zero).
    denominator : callable, optional
        Row function d; the estimate is sum H / sum d (default one).
    binary_treatment : bool
        Whether the treatment must be coded 0/1 (propensity learners are classifiers then).
    outcome_arm : int or None
        For a counterfactual mean of one arm, rows of the other arm need no outcome (a mean of an
        outcome missing at random); None when every row needs an outcome.
    """

    name: str
    description: str
    components: tuple[Component, ...]
    h4: RowFunction = _zeros
    denominator: RowFunction = _ones
    binary_treatment: bool = True
    outcome_arm: int | None = None
    notes: dict = field(default_factory=dict)

    @property
    def outcome_heads(self) -> tuple[str, ...]:
        """Outcome heads the target needs, in first-use order."""
        return tuple(dict.fromkeys(c.outcome_head for c in self.components))

    def outcome_needed(self, A: np.ndarray) -> np.ndarray:
        """Boolean mask of rows whose outcome enters the estimate."""
        if self.outcome_arm is None:
            return np.ones(A.shape[0], dtype=bool)
        return A == self.outcome_arm

    def row_functions(self, A: np.ndarray, Y: np.ndarray) -> dict:
        """Evaluate every row function: lists h1, h2, h3 (one array per component), h4 and d."""
        out = {"h1": [], "h2": [], "h3": []}
        for comp in self.components:
            out["h1"].append(np.asarray(comp.h1(A, Y), dtype=float))
            out["h2"].append(np.asarray(comp.h2(A, Y), dtype=float))
            out["h3"].append(np.asarray(comp.h3(A, Y), dtype=float))
        out["h4"] = np.asarray(self.h4(A, Y), dtype=float)
        out["d"] = np.asarray(self.denominator(A, Y), dtype=float)
        n = A.shape[0]
        for key, arrays in out.items():
            for arr in arrays if isinstance(arrays, list) else [arrays]:
                if arr.shape != (n,):
                    raise InputError(
                        f"target {self.name!r}: row function {key} returned shape {arr.shape}, "
                        f"expected ({n},)"
                    )
        return out


def _inverse(pi: np.ndarray) -> np.ndarray:
    return 1.0 / pi


def _inverse_complement(pi: np.ndarray) -> np.ndarray:
    return 1.0 / (1.0 - pi)


def _odds(pi: np.ndarray) -> np.ndarray:
    return pi / (1.0 - pi)


def _identity(pi: np.ndarray) -> np.ndarray:
    return pi


def _arm_component(arm: int, sign: float) -> Component:
    """Component for sign * E[Y(arm)]: b = mu_arm, p = 1/P(A=arm | X)."""

    def h1(A, Y):
        return -sign * (A == arm).astype(float)

    def h2(A, Y):
        return sign * np.ones_like(A, dtype=float)

    def h3(A, Y):
        return sign * np.where(A == arm, Y, 0.0)

    return Component(
        outcome_head=f"mu{arm}",
        weight_transform=_inverse if arm == 1 else _inverse_complement,
        h1=h1,
        h2=h2,
        h3=h3,
    )


def counterfactual_mean(arm: int) -> Target:
    """E[Y(arm)]; with A the observed-outcome indicator and arm = 1, the mean of an outcome
    missing at random."""
    if arm not in (0, 1):
        raise InputError(f"arm must be 0 or 1, got {arm!r}")
    return Target(
        name=f"mean{arm}",
        description=f"counterfactual mean E[Y({arm})]",
        components=(_arm_component(arm, 1.0),),
        outcome_arm=arm,
    )


def average_treatment_effect() -> Target:
    """ATE E[Y(1)] - E[Y(0)]."""
    return Target(
        name="ate",
        description="average treatment effect E[Y(1) - Y(0)]",
        components=(_arm_component(1, 1.0), _arm_component(0, -1.0)),
    )


def effect_on_treated() -> Target:
    """ATT E[Y(1) - Y(0) | A = 1]: b = mu0, p = pi/(1-pi), divided by mean(A)."""
    return Target(
        name="att",
        description="average treatment effect on the treated E[Y(1) - Y(0) | A = 1]",
        components=(
            Component(
                outcome_head="mu0",
                weight_transform=_odds,
                h1=lambda A, Y: 1.0 - A,
                h2=lambda A, Y: -A.astype(float),
                h3=lambda A, Y: -(1.0 - A) * Y,
            ),
        ),
        h4=lambda A, Y: A * Y,
        denominator=lambda A, Y: A.astype(float),
    )


def conditional_covariance() -> Target:
    """Expected conditional covariance E[Cov(A, Y | X)]; A may be continuous."""
    return Target(
        name="cov",
        description="expected conditional covariance E[Cov(A, Y | X)]",
        components=(
            Component(
                outcome_head="m",
                weight_transform=_identity,
                h1=_ones,
                h2=lambda A, Y: -A.astype(float),
                h3=lambda A, Y: -Y,
            ),
        ),
        h4=lambda A, Y: A * Y,
        binary_treatment=False,
    )


_BUILT_IN = {
    "mean1": lambda: counterfactual_mean(1),
    "mean0": lambda: counterfactual_mean(0),
    "ate": average_treatment_effect,
    "att": effect_on_treated,
    "cov": conditional_covariance,
}
TARGET_NAMES = tuple(_BUILT_IN)


def get_target(target: str | Target) -> Target:
    """Return a built-in target by name, or pass a Target through.

    Examples
    --------
    >>> att = get_target("att")
    >>> att.name, att.outcome_heads
    ('att', ('mu0',))
    >>> att.description
    'average treatment effect on the treated E[Y(1) - Y(0) | A = 1]'
    >>> get_target(att) is att
    True
    >>> get_target("atx")
    Traceback (most recent call last):
    ...
    stackdr.errors.InputError: unknown target 'atx'; choose one of mean1, mean0, ate, att, cov
    """
    if isinstance(target, Target):
        return target
    if isinstance(target, str) and target in _BUILT_IN:
        return _BUILT_IN[target]()
    raise InputError(f"unknown target {target!r}; choose one of {', '.join(TARGET_NAMES)}")
