"""The registry of named designs: :func:`list_designs`, :func:`get_design` and
:func:`register_design` (for user-supplied designs). It starts with the built-in designs."""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from stackdr.errors import InputError
from stackdr.studies._design_clustered import CLUSTERED_DESIGNS
from stackdr.studies._design_library import BUILT_IN
from stackdr.studies._design_library_added import ADDED_DESIGNS
from stackdr.studies._designs import Design, DesignData, check_target

_REGISTRY: dict[str, Design] = {
    design.name: design for design in (*BUILT_IN, *ADDED_DESIGNS, *CLUSTERED_DESIGNS)
}


def list_designs() -> list[str]:
    """Names of all registered designs, sorted.

    Returns
    -------
    list of str
    """
    return sorted(_REGISTRY)


def get_design(name: str) -> Design:
    """Look up a registered design by name.

    Parameters
    ----------
    name : str
        Registry name, e.g. ``"kang-schafer"``.

    Returns
    -------
    Design

    Raises
    ------
    stackdr.errors.InputError
        (a ValueError) if the name is unknown; the message lists the valid names.
    """
    try:
        return _REGISTRY[name]
    except (KeyError, TypeError):
        raise InputError(
            f"unknown design {name!r}; valid designs: {', '.join(list_designs())}"
        ) from None


def register_design(
    name: str,
    function: Callable[[int, np.random.Generator], object],
    target: str,
    description: str,
    source: str = "user-supplied",
    *,
    treatment: str | None = None,
    outcome: str | None = None,
    covariates: list[str] | None = None,
    replace: bool = False,
) -> Design:
    """Add a user-supplied design to the registry.

    Parameters
    ----------
    name : str
        Registry name.
    function : callable
        ``function(n, rng)`` returning either a :class:`DesignData` or a tuple
        ``(frame, truth)``. For the tuple form, ``treatment`` and ``outcome`` must be given here;
        the true nuisances are then unknown (None).
    target : str
        One of ``"mean1"``, ``"mean0"``, ``"ate"``, ``"att"``, ``"cov"``.
    description : str
        One-line description.
    source : str, default "user-supplied"
        Reference for the design.
    treatment, outcome : str, optional
        Column names for the tuple form.
    covariates : list of str, optional
        Covariate columns for the tuple form; default every column except treatment and outcome.
    replace : bool, default False
        Allow replacing a design already registered under ``name``.

    Returns
    -------
    Design
        The registered design.
    """
    if not isinstance(name, str) or not name:
        raise InputError(f"design name must be a non-empty string, got {name!r}")
    if name in _REGISTRY and not replace:
        raise InputError(f"design {name!r} is already registered; pass replace=True to replace it")
    if not callable(function):
        raise TypeError(f"function for design {name!r} must be callable, got {function!r}")
    check_target(target)
    role_names = (treatment, outcome, None if covariates is None else list(covariates))

    def generate(n: int, rng: np.random.Generator) -> DesignData:
        return _as_design_data(function(n, rng), name, target, role_names)

    design = Design(name, target, description, source, generate)
    _REGISTRY[name] = design
    return design


def _as_design_data(
    result: object,
    name: str,
    target: str,
    role_names: tuple[str | None, str | None, list[str] | None],
) -> DesignData:
    if isinstance(result, DesignData):
        return result
    if not (isinstance(result, tuple) and len(result) == 2):
        raise TypeError(
            f"design {name!r} must return a DesignData or a tuple (frame, truth), "
            f"got {type(result).__name__}"
        )
    treatment, outcome, covariates = role_names
    if treatment is None or outcome is None:
        raise InputError(
            f"design {name!r} returns (frame, truth); register it with treatment= and outcome="
        )
    frame, truth = result
    if covariates is None:
        covariates = [c for c in frame.columns if c not in (treatment, outcome)]
    return DesignData(
        frame=frame,
        treatment=treatment,
        outcome=outcome,
        covariates=covariates,
        target=target,
        truth=truth,
        name=name,
    )
