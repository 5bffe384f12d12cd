"""Result records of the main estimator: tables a statistician can read.

``BlendResult.summary()`` returns a :class:`ResultSummary`, a table with text, HTML and DataFrame
forms (``print(result.summary())`` shows the aligned text; notebooks render the HTML). The repr
of a result is one line.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import UTC, datetime

import numpy as np
import pandas as pd
from scipy.stats import norm

from stackdr.estimation._diagnostics import (
    Diagnostics,
    fit_diagnostics,
    sampling_sentence,
    sampling_summary,
)
from stackdr.estimation._numbers import DEFAULT_DIGITS, number_text
from stackdr.estimation._settings import SETTINGS
from stackdr.estimation._summary import (
    ResultSummary,
    interval_sentence,
    units_sentence,
    wrapped,
)

CAUTION = (
    "A causal reading needs consistency, no unmeasured confounding and positivity; the tool "
    "cannot check the first two. The estimate supports, and does not replace, subject-matter, "
    "clinical or policy review; local regulations and licensed practice come first."
)


def utc_now() -> str:
    """The current UTC time as ISO 8601 to the second, e.g. ``2026-01-31T12:00:00Z``."""
    return datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


#: What each blend averages, in words, for tables and reports.
BLEND_MEANINGS = {
    "riesz": "a weighted average of the inverse-propensity weights, so the estimate is linear "
    "in the weights",
    "probability": "a weighted average of the propensities",
    "logit": "a weighted average of the log-odds of the propensities",
}
#: Weights closer than this (largest absolute difference) count as the same weights.
SAME_WEIGHTS = 1e-6
#: The headline's words when the tie-break lands on the prediction-loss stacking weights.
NOT_SEPARATED = (
    "The data do not separate the target-aimed weights from the prediction-loss weights at "
    "this noise level: within the tie-break tolerance the target-aimed weights are the "
    "prediction-loss stacking weights."
)


DEFAULT_WEIGHTING = (
    "Default weighting (riesz blend with the prediction-loss stacked propensity column, "
    "tie-break c = 0.25, outcome learners weighted by least-squares stacking, contrast test at "
    "z = 1.5 with variance guard 1.05), chosen by paired Monte Carlo studies (README, 'Which "
    "default'): the target-aimed propensity weights replace prediction-loss stacking's when "
    "they move the estimate by more than 1.5 paired SEs or their SE is at most 1.05 x "
    "stacking's. Where every learner is good, or all share one bias, the headline is then "
    "usually prediction-loss stacking's or close to it; the gain over it is largest with flexible "
    "libraries and large samples, where the target-aimed weights remove a bias the data can "
    "detect (Kang-Schafer ATE with the default libraries: RMSE about 0.8 x stacking's at "
    "n = 1000, 0.95 x at n = 200). Where every learner was good it was never significantly "
    "worse, but up to 3% worse in RMSE within Monte Carlo error; the table's stacking row is "
    "there to compare."
)

#: The settings whose defaults make up the weighting that sentence describes; the note appears
#: when a fit used all of them (values read from the settings table, not repeated here).
WEIGHTING_SETTINGS = (
    "blend",
    "stacked_propensity",
    "tie_break_scale",
    "outcome_side",
    "contrast_z",
    "contrast_guard",
)


def blend_note(main, other) -> str:
    """Why a row (``other``, an :class:`EstimatorRow`) with another blend than the headline
    row (``main``) differs from it."""
    text = (
        f"{other.name[:1].upper()}{other.name[1:]} uses the {other.blend} blend "
        f"({BLEND_MEANINGS.get(other.blend, '')}); the target-aimed rows use the {main.blend} "
        f"blend ({BLEND_MEANINGS.get(main.blend, '')})."
    )
    gap = max(np.abs(other.alpha - main.alpha).max(), np.abs(other.beta - main.beta).max())
    if gap <= SAME_WEIGHTS:
        text += (
            f" Its weights equal the target-aimed ones: under the {main.blend} blend they give "
            f"the target-aimed estimate ({number_text(main.estimate)}), so the two rows differ "
            "only by blend."
        )
    return text + " Each row's pseudo-risk is computed for its own weights and blend."


@dataclass
class EstimatorRow:
    """One estimator of the comparison table (Wald interval until a bootstrap replaces it)."""

    name: str
    kind: str
    estimate: float
    se: float
    alpha: np.ndarray
    beta: np.ndarray
    pseudo_risk: float
    level: float
    low: float = float("nan")
    high: float = float("nan")
    interval_method: str = "wald"
    bootstrap_se: float = float("nan")
    blend: str = "riesz"

    def __post_init__(self) -> None:
        if np.isnan(self.low):
            z = norm.ppf(0.5 + self.level / 2)
            self.low, self.high = self.estimate - z * self.se, self.estimate + z * self.se

    @property
    def wald_interval(self) -> tuple[float, float]:
        z = norm.ppf(0.5 + self.level / 2)
        return self.estimate - z * self.se, self.estimate + z * self.se

    @property
    def se_method(self) -> str:
        """Where :attr:`interval_se` comes from: "bootstrap" or "wald"."""
        return "wald" if self.interval_method == "wald" else "bootstrap"

    @property
    def interval_se(self) -> float:
        """The SE of the method the interval comes from: the bootstrap SE beside a bootstrap
        interval, the influence-function (Wald) SE beside a Wald interval."""
        return self.se if self.se_method == "wald" else self.bootstrap_se


@dataclass(repr=False)
class BlendResult:
    """Everything a fit produced.

    Attributes
    ----------
    estimate, se : float
        Target-aimed estimate and its influence-function standard error (Wald, ignores the
        selection of weights; see ``interval`` for the bootstrap interval when computed and
        ``interval_se`` for the SE that matches it).
    alpha, beta : pandas.Series
        Chosen weights of the propensity and outcome libraries, indexed by learner name. With
        the ``stacked_propensity`` setting (riesz blend) the propensity side has one more entry,
        ``"prediction-loss stack"``: the weight on the prediction-loss stacked propensity.
    estimators : list of EstimatorRow
        The comparison table rows (target-aimed first).
    search : stackdr.search.WeightSearch
        Sensitivities, pseudo-risk and solver records at the chosen weights.
    crossfit, analysis, data, target : the ingredients (out-of-fold predictions, pair tables,
        losses, validated data).
    bootstrap : inference.BootstrapResult or None
    fold_check : FoldCheck or None
    contrast : ContrastTest or None
        The contrast test between the searched weights and prediction-loss stacking (setting
        ``contrast_z``): its difference, paired SE and which nuisances the headline uses.
        Whether the cross-fitting folds agree (Cochran's Q at the target-aimed nuisances), and
        the between-fold variance added to the bootstrap with ``between_fold_variance``.
    created_utc : str
        When the result was made (UTC, ISO 8601 to the second), for provenance.

    See Also
    --------
    summary : the comparison table as a :class:`ResultSummary` (text, HTML, DataFrame).
    diagnostics : overlap and clipping at the chosen weights (:class:`Diagnostics`).
    """

    target: object
    data: object
    crossfit: object
    analysis: object
    search: object
    estimate: float
    se: float
    level: float
    alpha: pd.Series
    beta: pd.Series
    estimators: list
    settings: dict
    timings: dict = field(default_factory=dict)
    bootstrap: object = None
    fold_check: object = None
    contrast: object = None
    created_utc: str = field(default_factory=utc_now)

    # ------------------------------------------------------------------ tables
    @property
    def interval(self) -> tuple[float, float]:
        """Interval of the target-aimed estimate (bootstrap when computed, else Wald)."""
        return self.estimators[0].low, self.estimators[0].high

    @property
    def interval_method(self) -> str:
        return self.estimators[0].interval_method

    @property
    def interval_se(self) -> float:
        """SE of the method the headline interval comes from (bootstrap SE with a bootstrap
        interval, the influence-function SE ``se`` with a Wald interval)."""
        return self.estimators[0].interval_se

    @property
    def at_prediction_loss_weights(self) -> bool:
        """Whether the tie-break landed on (within 1e-6 of) the prediction-loss stacking
        weights on both sides: the data do not separate the two weightings."""
        if not self.settings.get("tie_break", False):
            return False
        an = self.analysis
        # With the stacked propensity column, prediction-loss stacking's propensity is that
        # column's vertex (the same nuisance as its weights on the probability scale).
        gap = max(
            np.abs(np.asarray(self.search.alpha) - an.search_anchor(an.stack_alpha)).max(),
            np.abs(np.asarray(self.search.beta) - an.stack_beta).max(),
        )
        return bool(gap <= SAME_WEIGHTS)

    @property
    def notes(self) -> list:
        """Sentences a reader of the comparison needs: whether the data separate the
        target-aimed from the prediction-loss weights, what the studies say of the default
        weighting (when it is in use), and why rows with another blend differ from the
        headline."""
        notes = [NOT_SEPARATED] if self.at_prediction_loss_weights else []
        used = self.settings
        if self.contrast is not None and self.contrast.sentence():
            notes.append(self.contrast.sentence(number_text))
        if all(used.get(name) == SETTINGS[name].default for name in WEIGHTING_SETTINGS):
            notes.append(DEFAULT_WEIGHTING)
        main = self.estimators[0]
        notes += [blend_note(main, row) for row in self.estimators[1:] if row.blend != main.blend]
        return notes

    @property
    def wald_interval(self) -> tuple[float, float]:
        return self.estimators[0].wald_interval

    @property
    def propensity_names(self) -> list:
        """The propensity columns of the weight search: the learners, then the stacked
        propensity ``"prediction-loss stack"`` when the search has it."""
        return list(self.analysis.propensity_names)

    @property
    def pair_table(self) -> pd.DataFrame:
        """Psi: the DR estimate for every (propensity learner, outcome learner) pair, the
        stacked propensity included as a row when the search has it."""
        return self._learner_frame(self.analysis.Psi)

    @property
    def pair_standard_errors(self) -> pd.DataFrame:
        return self._learner_frame(self.analysis.pair_se)

    def _learner_frame(self, values) -> pd.DataFrame:
        return pd.DataFrame(
            values,
            index=pd.Index(self.propensity_names, name="propensity learner"),
            columns=pd.Index(self.crossfit.outcome_names, name="outcome learner"),
        )

    @property
    def pseudo_risk(self) -> float:
        return self.search.risk

    @property
    def sensitivities(self) -> dict:
        return {"outcome_direction": self.search.s_out, "weight_direction": self.search.s_ps}

    @property
    def losses(self) -> pd.DataFrame:
        """Out-of-fold prediction loss per learner (log-loss or squared error)."""
        cf = self.crossfit
        prop_metric = "log-loss" if cf.propensity_kind == "classifier" else "squared error"
        rows = [
            ("propensity", name, float(v), prop_metric, float(w))
            for name, v, w in zip(
                cf.propensity_names, self.analysis.losses["propensity"], self.analysis.stack_alpha
            )
        ] + [
            ("outcome", name, float(v), "squared error", float(w))
            for name, v, w in zip(
                cf.outcome_names, self.analysis.losses["outcome"], self.analysis.stack_beta
            )
        ]
        return pd.DataFrame(rows, columns=["side", "learner", "loss", "metric", "stacking weight"])

    @property
    def clip_counts(self) -> pd.DataFrame:
        counts = self.crossfit.clip_counts.sum(axis=0)
        return pd.DataFrame(
            counts,
            index=pd.Index(self.crossfit.propensity_names, name="propensity learner"),
            columns=["clipped low", "clipped high"],
        )

    @property
    def solver_records(self) -> dict:
        return dict(self.search.records)

    @property
    def tie_break_active(self) -> bool:
        """Whether the tie-break moved either side's weights away from the pure minimiser."""
        return any(
            bool(rec.details.get("moved", False))
            for key, rec in self.search.records.items()
            if "tie_break" in key
        )

    def comparison(self, include_pairs: bool = False) -> pd.DataFrame:
        """One row per estimator: blend, estimate, SE (``se``: of the method the interval comes
        from, named in ``se_method``; ``wald_se`` and ``bootstrap_se`` both kept), interval,
        pseudo-risk (for the row's own weights and blend), weights."""
        rows = []
        for r in self.estimators:
            rows.append(
                {
                    "estimator": r.name,
                    "kind": r.kind,
                    "blend": r.blend,
                    "estimate": r.estimate,
                    "se": r.interval_se,
                    "se_method": r.se_method,
                    "low": r.low,
                    "high": r.high,
                    "interval": r.interval_method,
                    "wald_se": r.se,
                    "bootstrap_se": r.bootstrap_se,
                    "pseudo_risk": r.pseudo_risk,
                    "propensity_weights": _weights_text(self.propensity_names, r.alpha),
                    "outcome_weights": _weights_text(self.crossfit.outcome_names, r.beta),
                }
            )
        if include_pairs:
            Psi, se = self.analysis.Psi, self.analysis.pair_se
            z = norm.ppf(0.5 + self.level / 2)
            for k, pk in enumerate(self.propensity_names):
                for j, oj in enumerate(self.crossfit.outcome_names):
                    rows.append(
                        {
                            "estimator": f"pair {pk} | {oj}",
                            "kind": "single pair",
                            "blend": self.settings["blend"],
                            "estimate": Psi[k, j],
                            "se": se[k, j],
                            "se_method": "wald",
                            "low": Psi[k, j] - z * se[k, j],
                            "high": Psi[k, j] + z * se[k, j],
                            "interval": "wald",
                            "wald_se": se[k, j],
                            "bootstrap_se": np.nan,
                            "pseudo_risk": np.nan,
                            "propensity_weights": pk,
                            "outcome_weights": oj,
                        }
                    )
        return pd.DataFrame(rows)

    @property
    def sampling(self) -> dict:
        """Sampling weights and clusters of the fit (:func:`sampling_summary`): column names,
        Kish effective sample size, number and sizes of clusters; None entries when absent."""
        return sampling_summary(self.data, self.crossfit.weighted_fits)

    @property
    def diagnostics(self) -> Diagnostics:
        """Overlap and clipping at the chosen propensity weights: blended propensity, effective
        sample size per arm, overlap histogram and clipping counts (computed on access)."""
        cf = self.crossfit
        return fit_diagnostics(
            clip=cf.clip,
            clip_counts=cf.clip_counts.sum(axis=0),
            learner_names=cf.propensity_names,
            binary=cf.propensity_kind == "classifier",
            propensity=self.analysis.inputs[0].pi,
            inputs=self.analysis.inputs[0],
            treatment=self.data.A,
            alpha=self.alpha.to_numpy(),
            blend=self.settings["blend"],
        )

    def summary(
        self, digits: int = DEFAULT_DIGITS, outcome_label: str | None = None
    ) -> ResultSummary:
        """The comparison table with the fit's settings, chosen weights, sensitivities, the
        notes the rows need and the standing caution; ``print(result.summary())`` shows it as
        aligned text.

        Parameters
        ----------
        digits : int
            Significant digits of the largest value of each numeric column.
        outcome_label : str, optional
            The outcome with its unit in parentheses, e.g. ``"change in systolic pressure
            (mmHg)"``; the unit is named in the summary.

        Returns
        -------
        ResultSummary
        """
        boot = self.bootstrap
        design = sampling_sentence(self.sampling, self.data.n)
        return ResultSummary(
            title=f"stackdr: {self.target.description}"
            + (f", outcome: {outcome_label}" if outcome_label else ""),
            details=(
                f"n = {self.data.n}, folds = {self.settings['folds']}, blend = "
                f"{self.settings['blend']}, criterion = {self.settings['criterion']}, "
                f"tie-break = {'on' if self.settings['tie_break'] else 'off'}"
            )
            + (f"\n{wrapped(design)}" if design else ""),
            table=self.comparison(),
            level=self.level,
            weights={"propensity": self.alpha.copy(), "outcome": self.beta.copy()},
            sensitivities=(
                "Sensitivities at the chosen weights: outcome direction "
                f"{number_text(self.search.s_out, digits)}, weight direction "
                f"{number_text(self.search.s_ps, digits)}; tie-break moved weights: "
                f"{'yes' if self.tie_break_active else 'no'}"
            ),
            caution=CAUTION,
            notes=tuple(self.notes),
            intervals=interval_sentence(
                self.level,
                self.interval_method,
                None if boot is None else boot.replicates,
                None if boot is None else boot.kind,
                any(row.se_method == "wald" for row in self.estimators),
            ),
            units=units_sentence(self.target.name, outcome_label),
            fold_check="" if self.fold_check is None else self.fold_check.sentence(),
            digits=digits,
        )

    def __str__(self) -> str:
        return self.summary().as_text()

    def __repr__(self) -> str:
        low, high = self.interval
        cf = self.crossfit
        return (
            f"BlendResult({self.target.name}: estimate {self.estimate:.4g}, "
            f"{self.estimators[0].se_method} SE {self.interval_se:.3g}, "
            f"{100 * self.level:g}% {self.interval_method} interval [{low:.4g}, {high:.4g}], "
            f"n = {self.data.n}, learners {len(cf.propensity_names)} propensity + "
            f"{len(cf.outcome_names)} outcome)"
        )

    def _repr_html_(self) -> str:
        return self.summary().as_html()

    def attach_bootstrap(self, boot) -> None:
        """Replace the Wald intervals by the bootstrap's, estimator by estimator."""
        self.bootstrap = boot
        for row in self.estimators:
            if row.name in boot.intervals:
                row.low, row.high = boot.intervals[row.name]
                row.interval_method = boot.method
                row.bootstrap_se = boot.standard_errors[row.name]


def _weights_text(names, weights) -> str:
    return ", ".join(f"{n} {w:.2f}" for n, w in zip(names, weights) if w > 5e-3)
