"""Simulation designs with known truth: what a design is and what it returns.

Each design draws a data set of ``n`` rows from a numpy ``Generator`` and returns it together with
the true value of the target parameter and the true nuisance functions evaluated at every row, so
that estimators, oracle estimators and diagnostics can all be checked against the truth. A
:class:`Design` is the named data-generating process; :class:`DesignData` is one draw with its
truth. The built-in designs are in ``_design_library.py``, the registry of named designs in
``_design_registry.py``.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from stackdr.errors import InputError

TARGETS = ("mean1", "mean0", "ate", "att", "cov")


@dataclass
class DesignData:
    """One simulated data set with its known truth.

    Attributes
    ----------
    frame : pandas.DataFrame
        The rows an analyst sees.
    treatment : str
        Column holding the treatment (or, for a mean of an outcome missing at random, the
        indicator that the outcome was observed).
    outcome : str
        Column holding the outcome. It may be NaN where the outcome is unobserved.
    covariates : list of str
        Columns the analyst adjusts for.
    target : str
        One of ``"mean1"``, ``"mean0"``, ``"ate"``, ``"att"``, ``"cov"``.
    truth : float
        The true value of the target parameter.
    true_propensity : numpy.ndarray or None
        ``P(A = 1 | X)`` per row, computed from the data-generating covariates (which may differ
        from the analyst's covariates). None when the design does not supply it.
    true_outcome : dict or None
        ``{0: E[Y | A=0, X], 1: E[Y | A=1, X]}`` per row, or None when not supplied.
    name : str
        Name of the design that produced the data.
    notes : str
        Free text (how the truth is known, caveats).
    clusters : str or None
        Column of the frame holding cluster labels, for designs whose rows are clustered (not
        a covariate); None for independent rows.
    """

    frame: pd.DataFrame
    treatment: str
    outcome: str
    covariates: list[str]
    target: str
    truth: float
    true_propensity: np.ndarray | None = None
    true_outcome: dict[int, np.ndarray] | None = None
    name: str = ""
    notes: str = ""
    clusters: str | None = None

    def __post_init__(self) -> None:
        if not isinstance(self.frame, pd.DataFrame):
            raise TypeError(f"frame must be a pandas DataFrame, got {type(self.frame).__name__}")
        self.covariates = list(self.covariates)
        roles = [("treatment", self.treatment), ("outcome", self.outcome)]
        if self.clusters is not None:
            roles.append(("clusters", self.clusters))
        for role, column in roles + [("covariate", c) for c in self.covariates]:
            if column not in self.frame.columns:
                raise InputError(
                    f"{role} column {column!r} is not in the frame "
                    f"(columns: {list(self.frame.columns)})"
                )
        check_target(self.target)
        self.truth = float(self.truth)
        n = len(self.frame)
        if self.true_propensity is not None:
            self.true_propensity = np.asarray(self.true_propensity, dtype=float)
            if self.true_propensity.shape != (n,):
                raise InputError(
                    f"true_propensity has shape {self.true_propensity.shape}, expected ({n},)"
                )
        if self.true_outcome is not None:
            if set(self.true_outcome) != {0, 1}:
                raise InputError(
                    f"true_outcome must have keys 0 and 1, got {sorted(self.true_outcome)}"
                )
            self.true_outcome = {
                a: np.asarray(v, dtype=float) for a, v in self.true_outcome.items()
            }
            for a, values in self.true_outcome.items():
                if values.shape != (n,):
                    raise InputError(f"true_outcome[{a}] has shape {values.shape}, expected ({n},)")


@dataclass(frozen=True)
class Design:
    """A named data-generating process.

    Attributes
    ----------
    name : str
        Registry name.
    target : str
        Target parameter the design's truth refers to.
    description : str
        One-line description.
    source : str
        Published reference, or ``"user-supplied"``/``"own construction"``.
    generator : callable
        ``generator(n, rng) -> DesignData``.
    """

    name: str
    target: str
    description: str
    source: str
    generator: Callable[[int, np.random.Generator], DesignData] = field(repr=False)

    def simulate(self, n: int, rng: np.random.Generator) -> DesignData:
        """Draw one data set.

        Parameters
        ----------
        n : int
            Number of rows (positive).
        rng : numpy.random.Generator
            Source of randomness; the same generator state gives the same data.

        Returns
        -------
        DesignData
        """
        if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 1:
            raise InputError(f"n must be a positive integer, got {n!r}")
        if not isinstance(rng, np.random.Generator):
            raise TypeError(
                f"rng must be a numpy.random.Generator (e.g. numpy.random.default_rng(seed)), "
                f"got {type(rng).__name__}"
            )
        data = self.generator(int(n), rng)
        if not isinstance(data, DesignData):
            raise TypeError(
                f"design {self.name!r} returned {type(data).__name__}, expected DesignData"
            )
        if len(data.frame) != n:
            raise InputError(f"design {self.name!r} returned {len(data.frame)} rows, asked for {n}")
        if data.target != self.target:
            raise InputError(
                f"design {self.name!r} is registered with target {self.target!r} "
                f"but returned data with target {data.target!r}"
            )
        return data


def check_target(target: str) -> None:
    if target not in TARGETS:
        raise InputError(f"unknown target {target!r}; valid targets: {', '.join(TARGETS)}")
