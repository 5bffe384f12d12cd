"""Result records of the main estimator: tables a statistician can read.

``BlendResult.summary()`` returns a :class:`ResultSummary`, a table with text, HTML and DataFrame
forms (``print(result.summary())`` shows the aligned text; notebooks render the HTML). The repr
of a result is one line.
"""

from __future__ import annotations

import html
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy.stats import norm

from stackdr.estimation._diagnostics import Diagnostics, fit_diagnostics

CAUTION = (
    "A causal reading needs consistency, no unmeasured confounding and positivity; the tool "
    "cannot check the first two. The estimate supports, and does not replace, subject-matter, "
    "clinical or policy review; local regulations and licensed practice come first."
)


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

    def __post_init__(self) -> None:
        if np.isnan(self.low):
            z = norm.ppf(0.5 + self.level / 2)
            self.low, self.high = self.estimate - z * self.se, self.estimate + z * self.se

    @property
    def wald_interval(self) -> tuple[float, float]:
        z = norm.ppf(0.5 + self.level / 2)
        return self.estimate - z * self.se, self.estimate + z * self.se


@dataclass(repr=False)
class BlendResult:
    """Everything a fit produced.

    Attributes
    ----------
    estimate, se : float
        Target-aimed estimate and its influence-function standard error (Wald, ignores the
        selection of weights; see ``interval`` for the bootstrap interval when computed).
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

    # ------------------------------------------------------------------ tables
    @property
    def interval(self) -> tuple[float, float]:
        """Interval of the target-aimed estimate (bootstrap when computed, else Wald)."""
        return self.estimators[0].low, self.estimators[0].high

    @property
    def interval_method(self) -> str:
        return self.estimators[0].interval_method

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
        """One row per estimator: estimate, SE, interval, pseudo-risk, weights."""
        rows = []
        for r in self.estimators:
            rows.append(
                {
                    "estimator": r.name,
                    "kind": r.kind,
                    "estimate": r.estimate,
                    "se": r.se,
                    "low": r.low,
                    "high": r.high,
                    "interval": r.interval_method,
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
                            "estimate": Psi[k, j],
                            "se": se[k, j],
                            "low": Psi[k, j] - z * se[k, j],
                            "high": Psi[k, j] + z * se[k, j],
                            "interval": "wald",
                            "pseudo_risk": np.nan,
                            "propensity_weights": pk,
                            "outcome_weights": oj,
                        }
                    )
        return pd.DataFrame(rows)

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

    def summary(self) -> ResultSummary:
        """The comparison table with the fit's settings, chosen weights, sensitivities and the
        standing caution; ``print(result.summary())`` shows it as aligned text.

        Returns
        -------
        ResultSummary
        """
        return ResultSummary(
            title=f"stackdr: {self.target.description}",
            details=(
                f"n = {self.data.n}, folds = {self.settings['folds']}, blend = "
                f"{self.settings['blend']}, criterion = {self.settings['criterion']}, "
                f"tie-break = {'on' if self.settings['tie_break'] else 'off'}"
            ),
            table=self.comparison(),
            level=self.level,
            weights={"propensity": self.alpha.copy(), "outcome": self.beta.copy()},
            sensitivities=(
                f"Sensitivities at the chosen weights: outcome direction {self.search.s_out:.3g}, "
                f"weight direction {self.search.s_ps:.3g}; tie-break moved weights: "
                f"{'yes' if self.tie_break_active else 'no'}"
            ),
        )

    def __str__(self) -> str:
        return self.summary().as_text()

    def __repr__(self) -> str:
        low, high = self.interval
        cf = self.crossfit
        return (
            f"BlendResult({self.target.name}: estimate {self.estimate:.4g}, SE {self.se:.3g}, "
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


@dataclass(frozen=True, eq=False)
class ResultSummary:
    """A fit's summary: the comparison table with its context, as text, HTML or a DataFrame.

    ``str(summary)`` (and so ``print``) gives the aligned text; notebooks show the HTML.

    Attributes
    ----------
    title : str
        What was estimated.
    details : str
        Rows and the main settings, one line.
    table : pandas.DataFrame
        One row per estimator (:meth:`BlendResult.comparison`).
    level : float
        Confidence level of the intervals.
    weights : dict of str to pandas.Series
        Target-aimed weights of the ``"propensity"`` and ``"outcome"`` libraries.
    sensitivities : str
        Sensitivities at the chosen weights and whether the tie-break moved them, one line.
    caution : str
        The standing caution on a causal reading.
    """

    title: str
    details: str
    table: pd.DataFrame
    level: float
    weights: dict
    sensitivities: str
    caution: str = CAUTION

    def as_frame(self) -> pd.DataFrame:
        """The comparison table (a copy).

        Returns
        -------
        pandas.DataFrame
        """
        return self.table.copy()

    def as_text(self) -> str:
        """The summary as aligned plain text.

        Returns
        -------
        str
        """
        pct = f"{100 * self.level:g}%"
        lines = [
            self.title,
            self.details,
            "",
            f"{'estimator':<30}{'estimate':>12}{'SE':>10}{pct + ' low':>12}{pct + ' high':>12}"
            f"{'interval':>12}{'pseudo-risk':>13}",
        ]
        for _, r in self.table.iterrows():
            lines.append(
                f"{r['estimator']:<30}{r['estimate']:>12.4g}{r['se']:>10.3g}{r['low']:>12.4g}"
                f"{r['high']:>12.4g}{r['interval']:>12}{r['pseudo_risk']:>13.3g}"
            )
        lines += ["", "Weights (target-aimed):"]
        for side, series in self.weights.items():
            lines.append(f"  {side:<11}" + "  ".join(f"{k} {v:.3f}" for k, v in series.items()))
        lines += [self.sensitivities, "", "Caution: " + self.caution]
        return "\n".join(lines)

    def as_html(self) -> str:
        """The summary as an HTML fragment (all text escaped; no scripts or styles).

        Returns
        -------
        str
        """
        pct = f"{100 * self.level:g}%"
        shown = pd.DataFrame(
            {
                "estimator": self.table["estimator"],
                "estimate": [f"{v:.4g}" for v in self.table["estimate"]],
                "SE": [f"{v:.3g}" for v in self.table["se"]],
                f"{pct} low": [f"{v:.4g}" for v in self.table["low"]],
                f"{pct} high": [f"{v:.4g}" for v in self.table["high"]],
                "interval": self.table["interval"],
                "pseudo-risk": [f"{v:.3g}" for v in self.table["pseudo_risk"]],
            }
        )
        weights = "; ".join(
            f"{side}: " + ", ".join(f"{k} {v:.3f}" for k, v in series.items())
            for side, series in self.weights.items()
        )
        e = html.escape
        return (
            f"<div><p><strong>{e(self.title)}</strong><br>{e(self.details)}</p>"
            f"{shown.to_html(index=False, escape=True)}"
            f"<p>Weights (target-aimed): {e(weights)}</p><p>{e(self.sensitivities)}</p>"
            f"<p>Caution: {e(self.caution)}</p></div>"
        )

    def __str__(self) -> str:
        return self.as_text()

    def __repr__(self) -> str:
        return self.as_text()

    def _repr_html_(self) -> str:
        return self.as_html()
