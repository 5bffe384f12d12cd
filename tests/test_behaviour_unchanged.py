"""Full-sample and bootstrap results match, to 1e-9 relative (bit for bit with the recording
machine's BLAS kernels), numbers recorded before the package was reorganised into subpackages
(recorded at commit c82f2bd, file ``tests/data/results_before_restructure.json``; floats stored
as ``float.hex``).

The numbers were recorded with one native thread; BLAS with several threads changes the
summation order of the bootstrap's matrix products (last-digit differences). The estimator's
own thread budget (one native thread per fit unless ``threads`` is set) gives exactly that
limit. The settings that later releases may change (blend, tie-break scale, the stacked
propensity column, the contrast test and the gated refit calibration added later) are pinned
here to their values at that commit, so this test keeps guarding the moved code paths.
Comparison rows added since (the smoothed pair average) are left out of the comparison; adding a
row must not change the others.
"""

from __future__ import annotations

import json
import warnings
from pathlib import Path

import numpy as np
import pytest

from stackdr import BlendEstimator
from stackdr.studies import get_design, simulate_demo, simulate_replicate

RECORDED = json.loads(
    (Path(__file__).parent / "data" / "results_before_restructure.json").read_text()
)
PINNED = {
    "blend": "riesz",
    "tie_break_scale": 0.5,
    "stacked_propensity": False,
    "contrast_z": 0,
    "calibration_refits": 0,
    "outcome_side": "search",
}
ADDED_ROWS = {"smoothed pair average"}
NSW_COVARIATES = ["age", "educ", "black", "hisp", "marr", "nodegree", "re74", "re75"]

pytestmark = pytest.mark.slow


def _rows(result) -> list[dict]:
    assert {r.name for r in result.estimators} >= ADDED_ROWS
    return [
        {
            "name": r.name,
            "estimate": float(r.estimate).hex(),
            "se": float(r.se).hex(),
            "low": float(r.low).hex(),
            "high": float(r.high).hex(),
            "bootstrap_se": float(r.bootstrap_se).hex(),
            "alpha": [float(a).hex() for a in r.alpha],
            "beta": [float(b).hex() for b in r.beta],
            "pseudo_risk": float(r.pseudo_risk).hex(),
        }
        for r in result.estimators
        if r.name not in ADDED_ROWS
    ]


# Since issue 13 a row whose blend differs from the search's (prediction-loss stacking, which
# blends on the probability scale) reports the criterion for its own blend; the recorded values
# used the search's blend. Estimates, SEs, intervals and weights must still match bit for bit.
OWN_BLEND_ROWS = {"prediction-loss stacking"}


def _comparable(rows: list) -> list:
    return [
        {k: v for k, v in row.items() if not (k == "pseudo_risk" and row["name"] in OWN_BLEND_ROWS)}
        for row in rows
    ]


# OpenBLAS picks its kernels by CPU (AVX-512 or AVX2), which moves the last digits of the
# learners' predictions; the weight search's solvers carry that to about 1e-12 relative. A
# changed code path moves these numbers by far more, so the comparison allows 1e-9 relative
# (bit for bit on a machine with the recording's kernels, e.g. OPENBLAS_CORETYPE=Haswell).
RTOL = 1e-9


def _as_float(value):
    if isinstance(value, float):
        return value
    if isinstance(value, str):
        try:
            return float.fromhex(value)
        except ValueError:
            return None
    return None


def _same(got, recorded, where: str = "") -> None:
    """Recursive comparison: floats (hex-encoded or not) within RTOL of the recorded value
    (absolutely for values below 1e-3: weights that are zero up to solver tolerance), everything
    else exactly."""
    if isinstance(recorded, dict):
        assert isinstance(got, dict) and set(got) == set(recorded), where
        for key in recorded:
            _same(got[key], recorded[key], f"{where}.{key}")
    elif isinstance(recorded, list):
        assert isinstance(got, list) and len(got) == len(recorded), where
        for i, (g, r) in enumerate(zip(got, recorded)):
            _same(g, r, f"{where}[{i}]")
    elif (r := _as_float(recorded)) is not None and (g := _as_float(got)) is not None:
        assert (np.isnan(g) and np.isnan(r)) or abs(g - r) <= RTOL * max(abs(r), 1e-3), (
            f"{where}: {g!r} != {r!r}"
        )
    else:
        assert got == recorded, where


@pytest.mark.parametrize("bootstrap", [0, 100])
def test_demo_unchanged(bootstrap):
    frame, _ = simulate_demo()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = BlendEstimator("ate", bootstrap=bootstrap, seed=0, **PINNED).fit(
            frame, "programme", "sbp_change"
        )
    _same(_comparable(_rows(result)), _comparable(RECORDED[f"demo_b{bootstrap}"]))


@pytest.mark.parametrize("target", ["ate", "att"])
def test_nsw_unchanged(target):
    # NSW experimental sample (Dehejia & Wahba 1999) as shipped by the PyPI package causaldata.
    from causaldata import nsw_mixtape

    frame = nsw_mixtape.load_pandas().data[["treat", "re78", *NSW_COVARIATES]].astype(float)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = BlendEstimator(target, folds=3, bootstrap=50, seed=1, **PINNED).fit(
            frame, "treat", "re78", NSW_COVARIATES
        )
    _same(_comparable(_rows(result)), _comparable(RECORDED[f"nsw_{target}"]))


@pytest.mark.parametrize("library", ["parametric", "default"])
def test_kang_schafer_replicate_unchanged(library):
    data = get_design("kang-schafer-ate-transformed").simulate(1000, np.random.default_rng(11))
    rows = simulate_replicate(data, 5, library=library, settings={"bootstrap": 50, **PINNED})
    got = [
        {
            k: (float(v).hex() if isinstance(v, float) else v)
            for k, v in row.items()
            if k != "estimator_seconds"
        }
        for row in rows
        if row["name"] not in ADDED_ROWS
    ]
    got = json.loads(json.dumps(got, sort_keys=True, default=str))
    _same(_comparable(got), _comparable(RECORDED[f"ks_{library}"]))
