"""Exports for other estimators: blended nuisances per row, and fitted blended models.

:func:`blended_nuisances` gives, per row, the cross-fitted nuisances at the chosen weights (what
the target-aimed estimate used), so an IPW, TMLE or any other doubly robust estimator can be
computed from them. :class:`BlendedClassifier` and :class:`BlendedRegressor` are
scikit-learn-compatible convex blends of fitted learners; :func:`blended_models` refits the
libraries on all rows and returns the blends at a result's chosen weights, for prediction on new
data.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy.special import expit, logit
from sklearn.base import BaseEstimator, ClassifierMixin, RegressorMixin, clone
from sklearn.utils.validation import check_is_fitted

from stackdr.core import blended_weight_side, row_contributions
from stackdr.errors import InputError
from stackdr.estimation import (
    accepts_sample_weight,
    default_outcome_library,
    default_propensity_library,
    sample_weight_arguments,
)
from stackdr.search import STACKED_PROPENSITY

# Propensity scales a blended classifier can average on, and the function of pi each averages.
SCALES = {
    "probability": lambda pi: pi,
    "logit": logit,
    "inverse": lambda pi: 1.0 / pi,
    "inverse-complement": lambda pi: 1.0 / (1.0 - pi),
    "odds": lambda pi: pi / (1.0 - pi),
}
_BACK = {
    "probability": lambda v: v,
    "logit": expit,
    "inverse": lambda v: 1.0 / v,
    "inverse-complement": lambda v: 1.0 - 1.0 / v,
    "odds": lambda v: v / (1.0 + v),
}


def _component_labels(target) -> list[str]:
    heads = [c.outcome_head for c in target.components]
    if len(set(heads)) == len(heads):
        return heads
    return [str(c) for c in range(len(heads))]


def blended_nuisances(result, repeat: int | None = None) -> pd.DataFrame:
    """Per-row cross-fitted nuisances at the result's chosen (target-aimed) weights.

    Parameters
    ----------
    result : BlendResult
    repeat : int, optional
        Which fold assignment to export when the fit used repeated splitting; by default every
        repetition, stacked (column ``repeat``).

    Returns
    -------
    DataFrame
        One row per data row (and repetition), columns:

        - ``row``, ``repeat``, ``fold``: position in the data, fold assignment, held-out fold.
        - ``treatment``, ``outcome``: the validated values (outcome NaN where the target does
          not use it, e.g. control rows for ``mean1``); a 0/1 treatment as whole numbers.
        - ``propensity``: the blended out-of-fold propensity E[A | X]. For the
          ``probability`` and ``logit`` blends it is exactly the blended propensity used; for
          the ``riesz`` blend, which averages the weight-side values rather than propensities,
          it is the probability-scale average with the same weights (shown for overlap checks;
          the estimate used the ``weight_*`` columns). A weight on the stacked propensity
          (``"prediction-loss stack"``) counts its probabilities. Which one is said once, in
          ``table.attrs["propensity_scale"]`` (and in ``run`` of ``results.json``).
        - ``mu1``, ``mu0`` or ``m``: outcome regressions at the outcome weights, one column per
          outcome head the target uses.
        - ``weight_<head>``: the weight-side value p_c of each component (for example 1/pi for
          ``mu1`` and 1/(1-pi) for ``mu0`` in the ATE), exactly as the estimate used them.
        - ``contribution``: the row's doubly robust term H_i; the sum over rows divided by the
          sum of the target's row denominators (n for most targets, the number of treated rows
          for ``att``) reproduces that repetition's estimate.

    Examples
    --------
    >>> table = blended_nuisances(result)  # doctest: +SKIP
    >>> table.to_csv("nuisances.csv", index=False)  # doctest: +SKIP
    """
    cf, data, target = result.crossfit, result.data, result.target
    alpha = result.alpha.to_numpy(dtype=float)
    beta = result.beta.to_numpy(dtype=float)
    blend = result.settings["blend"]
    repeats = range(cf.repeats) if repeat is None else [repeat]
    if repeat is not None and not 0 <= repeat < cf.repeats:
        raise InputError(f"repeat must be between 0 and {cf.repeats - 1}, got {repeat!r}")
    labels = _component_labels(target)
    needed = target.outcome_needed(data.A)
    binary = bool(np.isin(data.A, (0.0, 1.0)).all())
    treatment = data.A.astype(int) if binary else data.A
    frames = []
    for r in repeats:
        inp = result.analysis.inputs[r]
        # The search's propensity columns: the learners' and, when stacked, the stacked one.
        pi = inp.pi
        if blend == "logit":
            propensity, scale = expit(logit(pi) @ alpha), "logit-scale average"
        elif blend == "probability":
            propensity, scale = pi @ alpha, "probability-scale average"
        else:
            propensity, scale = pi @ alpha, "probability-scale average (riesz weights)"
        if cf.propensity_kind != "classifier":
            scale = "linear average of E[A | X] regressions"
        columns = {
            "row": np.arange(data.n),
            "repeat": np.full(data.n, r),
            "fold": cf.fold_labels[r],
            "treatment": treatment,
            "outcome": np.where(needed, data.Y, np.nan),
            "propensity": propensity,
        }
        if data.weights is not None:
            columns["sampling_weight"] = data.weights
        if data.cluster_codes is not None:
            columns["cluster"] = data.cluster_codes
        for head in target.outcome_heads:
            columns[head] = cf.outcome[head][r] @ beta
        weight_side = blended_weight_side(inp, alpha[None, :], blend)
        for label, p in zip(labels, weight_side):
            columns[f"weight_{label}"] = p[:, 0]
        columns["contribution"] = row_contributions(inp, alpha, beta, blend)
        frames.append(pd.DataFrame(columns))
    table = pd.concat(frames, ignore_index=True)
    table.attrs["propensity_scale"] = scale
    # The user's column names behind the sampling_weight and cluster columns.
    table.attrs["weights_column"] = data.weights_name
    table.attrs["clusters_column"] = data.clusters_name
    return table


def _check_weights(estimators, weights, owner: str) -> dict[str, float]:
    if not isinstance(estimators, dict) or not estimators:
        raise InputError(f"{owner}: estimators must be a non-empty dict of name -> estimator")
    if not isinstance(weights, dict):
        raise InputError(f"{owner}: weights must be a dict of name -> weight")
    unknown = [k for k in weights if k not in estimators]
    if unknown:
        raise InputError(f"{owner}: weight given for unknown learner {unknown[0]!r}")
    values = {name: float(weights.get(name, 0.0)) for name in estimators}
    bad = [k for k, v in values.items() if not np.isfinite(v) or v < 0]
    if bad:
        raise InputError(f"{owner}: weight of {bad[0]!r} must be >= 0, got {weights[bad[0]]!r}")
    total = sum(values.values())
    if not np.isclose(total, 1.0, atol=1e-6):
        raise InputError(f"{owner}: weights must sum to 1, got {total:.6g}")
    return {k: v / total for k, v in values.items()}


def _fit_members(estimators: dict, weights: dict, X, y, fit_params: dict, sample_weight) -> dict:
    """Clone and fit the learners with positive weight (the others do not affect predictions);
    ``sample_weight`` goes to the members that take it (a Pipeline's last step), the others are
    fitted unweighted as in cross-fitting."""
    fitted = {}
    for name, w in weights.items():
        if w <= 0:
            continue
        est = clone(estimators[name])
        extra = sample_weight_arguments(est, sample_weight) if accepts_sample_weight(est) else {}
        fitted[name] = est.fit(X, y, **fit_params, **extra)
    return fitted


class BlendedRegressor(RegressorMixin, BaseEstimator):
    """A convex blend of regressors: prediction sum_k w_k f_k(X).

    Parameters
    ----------
    estimators : dict name -> regressor
        Unfitted scikit-learn regressors; cloned in :meth:`fit`, never mutated.
    weights : dict name -> float
        Non-negative weights summing to one; missing names get weight zero.

    Attributes
    ----------
    estimators_ : dict name -> fitted regressor (learners with positive weight only)
    weights_ : dict name -> float
    """

    def __init__(self, estimators=None, weights=None):
        self.estimators = estimators
        self.weights = weights

    def fit(self, X, y, sample_weight=None, **fit_params):
        """Fit every learner with positive weight on (X, y), with ``sample_weight`` where a
        learner takes it; returns self."""
        self.weights_ = _check_weights(self.estimators, self.weights, type(self).__name__)
        self.estimators_ = _fit_members(
            self.estimators, self.weights_, X, y, fit_params, sample_weight
        )
        self.n_features_in_ = np.asarray(X).shape[1]
        return self

    def predict(self, X) -> np.ndarray:
        """Blended prediction for each row of X."""
        check_is_fitted(self, "estimators_")
        return sum(
            self.weights_[name] * np.asarray(est.predict(X), dtype=float).reshape(-1)
            for name, est in self.estimators_.items()
        )


class BlendedClassifier(ClassifierMixin, BaseEstimator):
    """A convex blend of binary classifiers' P(A = 1 | X) on a chosen scale.

    Parameters
    ----------
    estimators : dict name -> classifier
        Unfitted scikit-learn classifiers with ``predict_proba``; cloned in :meth:`fit`.
    weights : dict name -> float
        Non-negative weights summing to one; missing names get weight zero.
    scale : {"probability", "logit", "inverse", "inverse-complement", "odds"}
        What is averaged: the probabilities pi_k, their logits, the inverse propensities
        1/pi_k (the propensity whose inverse is the weighted mean of inverses: matches the
        ``riesz`` blend of 1/pi), 1/(1 - pi_k) (the ``riesz`` blend of control-arm weights) or
        the odds pi_k/(1 - pi_k) (the ``riesz`` blend of the effect on the treated).
    clip : float
        Each learner's probability is clipped to [clip, 1 - clip] before blending, as in
        cross-fitting; 0 disables (then the logit and inverse scales may hit infinities).

    Attributes
    ----------
    estimators_ : dict name -> fitted classifier (learners with positive weight only)
    weights_ : dict name -> float
    classes_ : ndarray of the two class labels
    """

    def __init__(self, estimators=None, weights=None, scale="probability", clip=0.01):
        self.estimators = estimators
        self.weights = weights
        self.scale = scale
        self.clip = clip

    def fit(self, X, y, sample_weight=None, **fit_params):
        """Fit every learner with positive weight on (X, y), with ``sample_weight`` where a
        learner takes it; returns self."""
        owner = type(self).__name__
        if self.scale not in SCALES:
            raise InputError(
                f"{owner}: unknown scale {self.scale!r}; choose one of {', '.join(SCALES)}"
            )
        if not 0 <= self.clip < 0.5:
            raise InputError(f"{owner}: clip must be in [0, 0.5), got {self.clip!r}")
        classes = np.unique(np.asarray(y))
        if classes.size != 2:
            raise InputError(f"{owner}: needs exactly two classes, got {classes.tolist()}")
        self.weights_ = _check_weights(self.estimators, self.weights, owner)
        self.estimators_ = _fit_members(
            self.estimators, self.weights_, X, y, fit_params, sample_weight
        )
        self.classes_ = classes
        self.n_features_in_ = np.asarray(X).shape[1]
        return self

    def _member_probability(self, est, X) -> np.ndarray:
        proba = np.asarray(est.predict_proba(X))
        column = list(est.classes_).index(self.classes_[1])
        pi = proba[:, column]
        return np.clip(pi, self.clip, 1 - self.clip) if self.clip > 0 else pi

    def predict_proba(self, X) -> np.ndarray:
        """(n, 2) array: columns P(class_0 | X), P(class_1 | X) of the blend."""
        check_is_fitted(self, "estimators_")
        forward, back = SCALES[self.scale], _BACK[self.scale]
        with np.errstate(divide="ignore"):
            value = sum(
                self.weights_[name] * forward(self._member_probability(est, X))
                for name, est in self.estimators_.items()
            )
            pi = np.asarray(back(value), dtype=float)
        return np.column_stack([1.0 - pi, pi])

    def predict(self, X) -> np.ndarray:
        """The more probable class of each row under the blend."""
        return self.classes_[(self.predict_proba(X)[:, 1] >= 0.5).astype(int)]


def _riesz_scale(transform) -> str | None:
    """The propensity scale whose average equals the riesz blend of this weight transform."""
    grid = np.linspace(0.02, 0.98, 49)
    values = np.asarray(transform(grid), dtype=float)
    for scale in ("inverse", "inverse-complement", "odds", "probability"):
        if np.allclose(values, SCALES[scale](grid)):
            return scale
    return None


def _library(given, default_factory, names: list[str], side: str) -> dict:
    library = dict(given) if given is not None else default_factory()
    missing = [name for name in names if name not in library]
    if missing:
        raise InputError(
            f"the result used {side} learner {missing[0]!r}, which is not in the "
            f"{side} library given; pass the library the result was fitted with as "
            f"{side}_learners"
        )
    return {name: library[name] for name in names}


def blended_models(
    result,
    X=None,
    A=None,
    Y=None,
    *,
    propensity_learners: dict | None = None,
    outcome_learners: dict | None = None,
    sample_weight=None,
) -> dict:
    """Refit both libraries on all rows and return fitted blends at the chosen weights.

    Parameters
    ----------
    result : BlendResult
    X, A, Y : arrays, optional
        Covariates, treatment and outcome to fit on (default: the validated data of the result).
    propensity_learners, outcome_learners : dict name -> estimator, optional
        The libraries the result was fitted with (default: the default libraries, whose names
        must then match the result's learners).
    sample_weight : array, optional
        Sampling weights of the refits (default: the result's sampling weights when X is not
        given); passed to every learner that takes ``sample_weight``.

    Returns
    -------
    dict
        ``"propensity"``: a fitted BlendedClassifier (binary treatment) or BlendedRegressor
        (continuous treatment) at the propensity weights. A weight on the stacked propensity
        (``"prediction-loss stack"``) goes to a member that is itself a BlendedClassifier: the
        probability-scale blend of the refitted learners at the prediction-loss stacking weights.
        Under the ``riesz`` blend its scale matches the blended weight-side function (``inverse``
        for 1/pi, ``inverse-complement`` for 1/(1-pi), ``odds`` for pi/(1-pi)); when the target has
        components on different scales (the ATE) there is one model per outcome head,
        ``"propensity_mu1"`` and ``"propensity_mu0"``. Then one fitted BlendedRegressor per outcome
        head (``"mu1"``, ``"mu0"`` or ``"m"``); with pooled outcome models ``"outcome"``, fitted on
        [X, A].
    """
    cf, data, target = result.crossfit, result.data, result.target
    X = data.X if X is None else np.asarray(X, dtype=float)
    A = data.A if A is None else np.asarray(A, dtype=float).reshape(-1)
    Y = data.Y if Y is None else np.asarray(Y, dtype=float).reshape(-1)
    w = data.weights if sample_weight is None and X is data.X else sample_weight
    w = None if w is None else np.asarray(w, dtype=float).reshape(-1)
    if w is not None and w.shape[0] != X.shape[0]:
        raise InputError(f"sample_weight has {w.shape[0]} rows, X has {X.shape[0]}")
    if not (X.shape[0] == A.shape[0] == Y.shape[0]):
        raise InputError(
            f"X, A and Y must have the same number of rows, got {X.shape[0]}, {A.shape[0]}, "
            f"{Y.shape[0]}"
        )
    binary = cf.propensity_kind == "classifier"
    plib = _library(
        propensity_learners,
        default_propensity_library if binary else default_outcome_library,
        cf.propensity_names,
        "propensity",
    )
    olib = _library(outcome_learners, default_outcome_library, cf.outcome_names, "outcome")
    if result.analysis.stacked:
        stack = dict(zip(cf.propensity_names, result.analysis.stack_alpha))
        member = BlendedClassifier(plib, stack, "probability", float(cf.clip))
        plib = {**plib, STACKED_PROPENSITY: member}
    alpha = dict(zip(result.propensity_names, result.alpha.to_numpy(dtype=float)))
    beta = dict(zip(cf.outcome_names, result.beta.to_numpy(dtype=float)))
    models: dict = {}
    blend = result.settings["blend"]
    if not binary:
        models["propensity"] = BlendedRegressor(plib, alpha).fit(X, A, w)
    else:
        scales = {}
        for comp in target.components:
            scale = blend if blend != "riesz" else _riesz_scale(comp.weight_transform)
            if scale is None:
                raise InputError(
                    f"the riesz blend of target {target.name!r} averages a weight-side function "
                    "with no propensity form; use the weight_* columns of blended_nuisances"
                )
            scales[comp.outcome_head] = scale
        clip = float(cf.clip)
        if len(set(scales.values())) == 1:
            scale = next(iter(scales.values()))
            models["propensity"] = BlendedClassifier(plib, alpha, scale, clip).fit(X, A, w)
        else:
            for head, scale in scales.items():
                model = BlendedClassifier(plib, alpha, scale, clip)
                models[f"propensity_{head}"] = model.fit(X, A, w)
    needed = target.outcome_needed(A)
    if cf.outcome_mode == "pooled" and any(h in ("mu1", "mu0") for h in target.outcome_heads):
        rows = needed
        models["outcome"] = BlendedRegressor(olib, beta).fit(
            np.column_stack([X[rows], A[rows]]), Y[rows], None if w is None else w[rows]
        )
    for head in target.outcome_heads:
        if head == "m":
            rows = needed
        elif cf.outcome_mode == "pooled":
            continue
        else:
            rows = needed & (A == float(head[-1]))
        models[head] = BlendedRegressor(olib, beta).fit(
            X[rows], Y[rows], None if w is None else w[rows]
        )
    return models
