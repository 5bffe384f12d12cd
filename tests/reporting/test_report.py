"""HTML report: sections, embedded figures, escaping of user text, byte-identical rebuilds,
and the pseudo-risk landscape (ternary map for three learners, edge slices otherwise)."""

import base64
import html
import json
import subprocess
import sys
from html.parser import HTMLParser

import numpy as np
import pandas as pd
import pytest
from matplotlib.contour import ContourSet
from sklearn.dummy import DummyRegressor
from sklearn.linear_model import LinearRegression, Ridge

from stackdr import BlendEstimator, InputError
from stackdr.io import result_to_dict, write_results_json
from stackdr.reporting import SECTIONS, write_report
from stackdr.reporting._figures import (
    edge_slices,
    figure_style,
    landscape,
    landscape_kind,
    side_inputs,
    ternary_surface,
    ternary_xy,
)
from stackdr.reporting._html import CONTENT_POLICY, CSS
from tests.helpers import MATH, SCRIPT, SHELL, confounded_data, hostile_fit

# MATH has no HTML-special characters; it checks that figures escape mathtext instead.
HOSTILE = [SCRIPT, SHELL]
# Figures of every fit with a binary treatment; the bootstrap adds two more.
ALWAYS = {"estimators", "weights", "pair_table", "sensitivity", "landscape", "overlap"}


class PageParser(HTMLParser):
    """Collects headings, images and tag names; fails on malformed nesting of sections."""

    def __init__(self):
        super().__init__()
        self.tags, self.h2, self.images, self._in_h2 = [], [], [], False
        self.open_sections = 0

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        attrs = dict(attrs)
        if tag == "h2":
            self._in_h2 = True
            self.h2.append("")
        elif tag == "img":
            self.images.append(attrs)
        elif tag == "section":
            self.open_sections += 1

    def handle_endtag(self, tag):
        if tag == "h2":
            self._in_h2 = False
        elif tag == "section":
            self.open_sections -= 1

    def handle_data(self, data):
        if self._in_h2:
            self.h2[-1] += data


def parse(page: str) -> PageParser:
    parser = PageParser()
    parser.feed(page)
    parser.close()
    return parser


@pytest.fixture(scope="module")
def results():
    return result_to_dict(hostile_fit())


@pytest.fixture(scope="module")
def report_dir(results, tmp_path_factory):
    out = tmp_path_factory.mktemp("report")
    write_report(results, out, title=f"Study {SCRIPT} {SHELL}")
    return out


def test_report_has_every_section_and_one_image_per_figure(report_dir):
    page = (report_dir / "report.html").read_text(encoding="utf-8")
    parser = parse(page)
    assert parser.open_sections == 0
    assert [h.split(". ", 1)[1] for h in parser.h2] == [heading for _, heading in SECTIONS]
    pngs = sorted((report_dir / "figures").glob("*.png"))
    assert {p.stem for p in pngs} == ALWAYS | {"bootstrap", "stability"}
    assert len(parser.images) == len(pngs)
    embedded = {base64.b64decode(img["src"].split(",", 1)[1]) for img in parser.images}
    assert embedded == {p.read_bytes() for p in pngs}
    assert all(img["src"].startswith("data:image/png;base64,") for img in parser.images)
    # Self-contained: no scripts, links to style sheets or remote resources, and a content
    # policy telling the browser to load nothing else.
    assert not {"script", "link", "iframe"} & set(parser.tags)
    assert "http://" not in page and "https://" not in page
    assert f'content="{CONTENT_POLICY}"' in page and f"<style>{CSS}</style>" in page
    assert "bootstrap percentile interval from 50 multinomial" in page
    # The standing caution: the assumptions of a causal reading, and review stays with people.
    assert "consistency, no unmeasured confounding and positivity" in page
    assert "does not replace, subject-matter" in page


def test_user_text_appears_only_escaped(report_dir):
    page = (report_dir / "report.html").read_text(encoding="utf-8")
    for text in HOSTILE:
        assert text not in page
        assert html.escape(text) in page
    assert "<script" not in page.lower()
    # The figures were drawn with this name as a label: they escape "$" so that matplotlib does
    # not parse the undefined command as mathtext (which would raise).
    assert MATH in page
    assert f"<title>Study {html.escape(SCRIPT)} {html.escape(SHELL)}</title>" in page


@pytest.mark.slow
def test_rebuild_from_saved_json_is_byte_identical(results, report_dir, tmp_path):
    path = write_results_json(results, tmp_path / "results.json")
    again = tmp_path / "again"
    # A fresh interpreter, as a command-line rebuild would be.
    code = (
        "import sys; from stackdr.reporting import write_report; "
        "from stackdr.io import read_results_json; "
        "write_report(read_results_json(sys.argv[1]), sys.argv[2], title=sys.argv[3])"
    )
    title = f"Study {SCRIPT} {SHELL}"
    subprocess.run([sys.executable, "-c", code, str(path), str(again), title], check=True)
    assert (again / "report.html").read_bytes() == (report_dir / "report.html").read_bytes()
    original = sorted((report_dir / "figures").iterdir())
    rebuilt = sorted((again / "figures").iterdir())
    assert [p.name for p in rebuilt] == [p.name for p in original]
    for a, b in zip(original, rebuilt):
        assert a.read_bytes() == b.read_bytes(), a.name


def test_report_without_bootstrap(tmp_path):
    d = result_to_dict(hostile_fit(bootstrap=0, seed=5))
    assert d["bootstrap"] is None and d["interval"]["method"] == "wald"
    # A previous report with bootstrap figures in the same folder must not leave them behind.
    (tmp_path / "figures").mkdir()
    (tmp_path / "figures" / "bootstrap.png").write_bytes(b"old")
    write_report(d, tmp_path)
    page = (tmp_path / "report.html").read_text(encoding="utf-8")
    parser = parse(page)
    assert len(parser.h2) == len(SECTIONS)
    pngs = sorted((tmp_path / "figures").glob("*.png"))
    assert {p.stem for p in pngs} == ALWAYS
    assert len(parser.images) == len(pngs)
    assert "No bootstrap was run" in page
    assert "Wald interval" in page
    assert any("No bootstrap was run" in c for c in d["cautions"])


def test_report_rejects_invalid_results(results, tmp_path):
    broken = json.loads(json.dumps(results))
    del broken["pair_table"]
    with pytest.raises(InputError, match="pair_table"):
        write_report(broken, tmp_path)
    assert not (tmp_path / "report.html").exists()


def test_ternary_surface_and_edge_slices_against_direct_ranges():
    rng = np.random.default_rng(7)
    V = rng.normal(size=(3, 4))
    weights, values = ternary_surface(V, resolution=6)
    assert weights.shape == (28, 3)  # C(6 + 2, 2) lattice points
    np.testing.assert_allclose(weights.sum(axis=1), 1.0)
    for w, v in zip(weights, values):
        mixed = w @ V
        assert v == pytest.approx(mixed.max() - mixed.min())
    mask = np.array([True, False, True, True])
    _, masked = ternary_surface(V, mask, resolution=6)
    np.testing.assert_allclose(masked, np.ptp(weights @ V[:, mask], axis=1))
    # Vertices map to the corners of the triangle (barycentric coordinates, common practice).
    x, y = ternary_xy(np.eye(3))
    np.testing.assert_allclose(x, [0, 1, 0.5])
    np.testing.assert_allclose(y, [0, 0, np.sqrt(3) / 2])
    V5 = rng.normal(size=(5, 3))
    t, slices = edge_slices(V5, points=11)
    assert len(slices) == 10  # C(5, 2) edges
    mid = slices[(1, 3)][5]
    assert mid == pytest.approx(np.ptp((V5[1] + V5[3]) / 2))
    assert slices[(0, 4)][0] == pytest.approx(np.ptp(V5[0]))
    assert [landscape_kind(k) for k in (1, 2, 3, 4)] == ["single", "edges", "ternary", "edges"]


def test_landscape_ternary_for_three_learners_and_edges_for_two(results, report_dir):
    V, names, _, chosen, _ = side_inputs(results, "outcome")
    np.testing.assert_array_equal(V, np.array(results["pair_table"]["values"]).T)
    assert names == [SHELL, "mean"] and chosen.sum() == pytest.approx(1.0)
    # Three propensity columns: the same learners without the stacked propensity.
    unstacked = result_to_dict(hostile_fit(bootstrap=0, stacked_propensity=False))
    assert len(unstacked["pair_table"]["rows"]) == 3
    with figure_style():
        fig = landscape(unstacked)
    prop_ax, out_ax = fig.axes[:2]  # the ternary map's colour bar comes last
    assert any(isinstance(c, ContourSet) for c in prop_ax.collections)  # filled contours
    assert len(out_ax.get_lines()) == 1  # the single edge between the two outcome learners
    t, values = out_ax.get_lines()[0].get_data()
    Psi = np.array(unstacked["pair_table"]["values"])
    np.testing.assert_allclose(
        values, np.ptp(np.outer(1 - t, Psi[:, 0]) + np.outer(t, Psi[:, 1]), axis=1)
    )
    page = (report_dir / "report.html").read_text(encoding="utf-8")
    # The default search adds the stacked propensity: four columns, shown as edge slices.
    assert "Propensity side (4 learners): edge slices" in page
    assert "Outcome side (2 learners): edge slices" in page
    assert "linear (riesz) blend" in page


def test_continuous_treatment_and_ternary_outcome_side(tmp_path):
    rng = np.random.default_rng(11)
    X, _, Y, _ = confounded_data(rng, 300)
    frame = pd.DataFrame({"x1": X[:, 0], "x2": X[:, 1], "x3": X[:, 2], "y": Y})
    frame["dose"] = X[:, 0] + rng.normal(size=300)
    outcome = {"linear": LinearRegression(), "mean": DummyRegressor(), "ridge": Ridge(alpha=30.0)}
    propensity = {"linear": LinearRegression(), "mean": DummyRegressor()}
    fit = BlendEstimator("cov", propensity, outcome, folds=3, bootstrap=0).fit(frame, "dose", "y")
    d = result_to_dict(fit)
    diag = d["diagnostics"]
    assert diag["propensity_kind"] == "regressor"
    assert diag["overlap_histogram"] is None and diag["effective_sample_size"] is None
    write_report(d, tmp_path)
    page = (tmp_path / "report.html").read_text(encoding="utf-8")
    assert "The treatment is not binary" in page
    assert "Outcome side (3 learners): a ternary map" in page
    assert "Propensity side (2 learners): edge slices" in page
    assert not (tmp_path / "figures" / "overlap.png").exists()
    assert len(parse(page).images) == len(list((tmp_path / "figures").glob("*.png"))) == 5
    with figure_style():
        fig = landscape(d)
    assert any(isinstance(c, ContourSet) for c in fig.axes[1].collections)
    assert len(fig.axes[0].get_lines()) == 1
