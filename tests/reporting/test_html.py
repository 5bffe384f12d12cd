"""The shared HTML helper: escaping, tables, inline images, the page shell, and both report pages
(fit and study) built with it: one style sheet, self-contained, user text escaped."""

import base64
from html.parser import HTMLParser

import pytest

from stackdr.estimation import number_text
from stackdr.reporting import html_report
from stackdr.reporting._html import (
    CONTENT_POLICY,
    CSS,
    escape,
    figure,
    page,
    paragraph,
    table,
)
from stackdr.studies import run_study

MARKUP = "<b>x</b> & 'y'"
FILE_MARKUP = "<i>q & 'r'"  # without a slash, so it can name a file


class Tags(HTMLParser):
    def __init__(self):
        super().__init__()
        self.tags, self.attrs, self.text = [], [], ""

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        self.attrs.append(dict(attrs))

    def handle_data(self, data):
        self.text += data


def parsed(text: str) -> Tags:
    parser = Tags()
    parser.feed(text)
    parser.close()
    return parser


def test_escape_and_numbers():
    assert escape(MARKUP) == "&lt;b&gt;x&lt;/b&gt; &amp; &#x27;y&#x27;"
    assert escape(3) == "3"
    assert [number_text(v) for v in (1 / 3, 12345678, None, True, "wald")] == [
        "0.333",
        "1.23e+07",
        "n/a",
        "True",
        "wald",
    ]
    assert number_text(2 / 3, 2) == "0.67"


def test_table_aligns_numbers_and_escapes_text():
    html = table(
        ["name", MARKUP, "value (se)"],
        [[MARKUP, 0.5, "1.2 (0.3)"], ["b", None, "-"]],
        align_right={"value (se)"},
    )
    assert MARKUP not in html and escape(MARKUP) in html
    assert html.count('<td class="num">') == 4  # two numbers (None is n/a) and two right texts
    assert '<td class="num">0.500</td>' in html and '<td class="num">n/a</td>' in html
    assert f"<td>{escape(MARKUP)}</td>" in html
    assert parsed(html).tags.count("tr") == 3


def test_figure_and_paragraph():
    png = b"\x89PNG fake bytes"
    html = figure(png, MARKUP, ident="figure-a")
    img = parsed(html).attrs[1]
    assert img["src"] == "data:image/png;base64," + base64.b64encode(png).decode("ascii")
    assert img["alt"] == MARKUP  # the parser unescapes: the attribute held escaped text
    assert html.startswith('<figure id="figure-a">')
    assert paragraph(MARKUP, "note") == f'<p class="note">{escape(MARKUP)}</p>\n'


def test_page_shell_is_self_contained():
    html = page(MARKUP, "<p>body</p>\n", heading="Heading")
    tags = parsed(html)
    assert tags.tags[:2] == ["html", "head"]
    assert not {"script", "link", "iframe", "object", "embed"} & set(tags.tags)
    assert f"<title>{escape(MARKUP)}</title>" in html and "<h1>Heading</h1>" in html
    assert f"<style>{CSS}</style>" in html
    policy = next(a for a in tags.attrs if a.get("http-equiv") == "Content-Security-Policy")
    assert policy["content"] == CONTENT_POLICY and "default-src 'none'" in CONTENT_POLICY
    assert "http://" not in CSS and "https://" not in CSS and "url(" not in CSS


@pytest.fixture(scope="module")
def study_page(tmp_path_factory):
    path = tmp_path_factory.mktemp("study") / f"{FILE_MARKUP}.sqlite"

    def rows(data, seed):
        return [
            {"name": MARKUP, "estimate": data.truth + 0.1, "low": data.truth - 1.0, "high": 9.0},
            {"name": "plain", "estimate": data.truth - 0.2, "low": 0.0, "high": 1.0},
        ]

    run_study(path, "lunceford-davidian", 50, 3, rows, progress=False)
    return html_report(path)


def test_study_page_uses_the_shared_shell(study_page):
    tags = parsed(study_page)
    assert f"<style>{CSS}</style>" in study_page
    assert any(a.get("http-equiv") == "Content-Security-Policy" for a in tags.attrs)
    assert not {"script", "link", "iframe"} & set(tags.tags)
    assert "http://" not in study_page and "https://" not in study_page
    images = [a["src"] for a in tags.attrs if "src" in a]
    assert len(images) == 2 and all(s.startswith("data:image/png;base64,") for s in images)
    # User text (the estimator and the file name) is escaped in cells, headings and the title.
    for text in (MARKUP, FILE_MARKUP):
        assert text not in study_page and escape(text) in study_page
    assert f"<td>{escape(MARKUP)}</td>" in study_page
    assert f"<h1>Monte Carlo study {escape(FILE_MARKUP)}.sqlite</h1>" in study_page
    assert "Monte Carlo study" in tags.text
