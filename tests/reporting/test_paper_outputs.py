"""Issue 13, "output a methods paper can take": the demo report carries SVG and PDF beside
every PNG, LaTeX and Markdown tables, provenance (data file hash, UTC time, versions) and no
external resource; every comparison row's pseudo-risk is the criterion of its own weights and
blend; `stackdr report` rebuilds every file byte for byte."""

from __future__ import annotations

import hashlib
import json
import re
import warnings
from html.parser import HTMLParser

import numpy as np
import pandas as pd
import pytest

from stackdr import BlendEstimator
from stackdr.cli import main
from stackdr.core import phi
from stackdr.io import RECORDED_PACKAGES, read_results_json

N, REPLICATES = 300, 20
# One demo run, its rebuild and a refit: about a minute on 2 cores.
pytestmark = pytest.mark.slow


class Resources(HTMLParser):
    """Every tag name and every src/href value of a page."""

    def __init__(self):
        super().__init__()
        self.tags, self.links = [], []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        self.links += [value for name, value in attrs if name in ("src", "href") and value]


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    out = tmp_path_factory.mktemp("paper") / "demo"
    args = ["demo", "--out", str(out), "--n", str(N), "--bootstrap", str(REPLICATES)]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert main([*args, "--jobs", "1", "--no-progress"]) == 0
    return out


def test_every_figure_in_three_formats(demo):
    pngs = sorted((demo / "figures").glob("*.png"))
    assert {p.stem for p in pngs} >= {"estimators", "bootstrap", "landscape", "stability"}
    for png in pngs:
        svg, pdf = png.with_suffix(".svg").read_bytes(), png.with_suffix(".pdf").read_bytes()
        assert b"<svg" in svg[:1000] and pdf.startswith(b"%PDF")
        assert png.read_bytes().startswith(b"\x89PNG")


def test_tables_for_the_paper(demo):
    results = read_results_json(demo / "results.json")
    for name in ("comparison", "pair_table"):
        tex = (demo / "tables" / f"{name}.tex").read_text(encoding="utf-8")
        md = (demo / "tables" / f"{name}.md").read_text(encoding="utf-8")
        assert all(cmd in tex for cmd in (r"\toprule", r"\midrule", r"\bottomrule", r"\caption"))
        assert f"n = {N}" in tex and "5 cross-fitting folds" in md
        assert "mmHg" in md  # the unit of the demo's outcome label
    comparison = (demo / "tables" / "comparison.md").read_text(encoding="utf-8")
    assert f"from {REPLICATES} multinomial replicates" in comparison and "95%" in comparison
    rows = [line for line in comparison.splitlines() if line.startswith("| ")][1:]
    assert len(rows) == len(results["estimators"])


def test_provenance(demo):
    prov = read_results_json(demo / "results.json")["provenance"]
    data = demo / "demo_data.csv"
    assert prov["input"]["sha256"] == hashlib.sha256(data.read_bytes()).hexdigest()
    assert prov["input"]["path"] == "demo_data.csv"  # relative to the output folder
    assert (prov["input"]["rows"], prov["input"]["columns"]) == pd.read_csv(data).shape
    assert re.fullmatch(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\dZ", prov["created_utc"])
    assert set(prov["versions"]) == {"stackdr", "python", *RECORDED_PACKAGES}
    assert prov["command_line"].startswith("stackdr demo --out ")
    page = (demo / "report.html").read_text(encoding="utf-8")
    assert prov["input"]["sha256"] in page and prov["created_utc"] in page


def test_report_loads_nothing_from_elsewhere(demo):
    parser = Resources()
    parser.feed((demo / "report.html").read_text(encoding="utf-8"))
    assert not {"script", "link", "iframe", "object", "embed"} & set(parser.tags)
    for link in parser.links:
        # Inline images, anchors on the page, and the figure files beside it.
        assert link.startswith(("data:image/png;base64,", "#", "figures/")), link
        assert not re.match(r"^[a-z]+://|^//", link)


def test_report_rebuilds_byte_identically(demo, tmp_path):
    assert main(["report", str(demo / "results.json"), "--out", str(tmp_path)]) == 0
    for folder, pattern in (("", "report.html"), ("figures", "*"), ("tables", "*")):
        for original in sorted((demo / folder).glob(pattern)):
            rebuilt = tmp_path / folder / original.name
            assert rebuilt.read_bytes() == original.read_bytes(), original.name


def test_each_row_pseudo_risk_is_its_own_criterion(demo):
    frame = pd.read_csv(demo / "demo_data.csv")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = BlendEstimator("ate", bootstrap=0, seed=2026).fit(frame, "programme", "sbp_change")
    saved = {row["name"]: row for row in read_results_json(demo / "results.json")["estimators"]}
    inputs, Psi = result.analysis.inputs, result.analysis.Psi
    blends = set()
    for row in result.estimators:
        # The mixed criterion (DESIGN section 2): squared range of phi(alpha) over outcome
        # learners plus squared range of Psi beta over propensity learners [construction].
        phi_alpha = np.median([phi(inp, row.alpha[None], row.blend)[0] for inp in inputs], axis=0)
        expected = np.ptp(phi_alpha) ** 2 + np.ptp(Psi @ row.beta) ** 2
        assert row.pseudo_risk == pytest.approx(expected, rel=1e-10, abs=1e-14)
        assert saved[row.name]["pseudo_risk"] == pytest.approx(expected, rel=1e-10, abs=1e-14)
        assert saved[row.name]["blend"] == row.blend
        blends.add(row.blend)
    assert blends == {"riesz", "probability"}  # prediction-loss stacking keeps its own blend
    pls = next(r for r in result.estimators if r.kind == "prediction-loss")
    riesz_phi = phi(inputs[0], pls.alpha[None], "riesz")[0]
    riesz_risk = np.ptp(riesz_phi) ** 2 + np.ptp(Psi @ pls.beta) ** 2
    assert pls.pseudo_risk != pytest.approx(riesz_risk, rel=1e-6)


def test_headline_se_matches_its_interval(demo):
    results = read_results_json(demo / "results.json")
    main_row = results["estimators"][0]
    assert results["interval"]["se_method"] == "bootstrap" == main_row["se_method"]
    estimates = np.array(results["bootstrap"]["estimates"][main_row["name"]], dtype=float)
    # The bootstrap SE: the sample standard deviation of the replicate estimates, widened by the
    # refit calibration's added variance when the fold-model jackknife switched it on (the
    # stored replicates are the reweighting ones; the check block says what was added).
    check = results["diagnostics"]["fold_check"]
    spread = np.std(estimates, ddof=1)
    added = check["added_variance"].get(main_row["name"], 0.0) if check["corrected"] else 0.0
    if added:
        assert check["uncorrected_se"][main_row["name"]] == pytest.approx(spread, rel=1e-9)
    assert results["se"] == pytest.approx(np.sqrt(spread**2 + added), rel=1e-9)
    assert results["wald_se"] == pytest.approx(main_row["wald_se"])
    assert json.dumps(results["notes"])  # plain sentences
