"""The one HTML helper of the reports: page shell, style sheet, escaping, tables, paragraphs and
inline images, shared by the fit page and the study page.

Pages built here are self-contained: one inline style sheet, images as base64 data URIs, no
scripts, no links to other files or sites, and a content security policy that tells the browser
to load nothing else. Every piece of text passes through :func:`escape`, so user text (column and
learner names, titles, notes) is shown, never interpreted.
"""

from __future__ import annotations

import base64
import html
from collections.abc import Collection, Iterable, Mapping, Sequence

from stackdr.estimation import DEFAULT_DIGITS, column_text

CSS = """
body { font-family: system-ui, -apple-system, "Segoe UI", Helvetica, Arial, sans-serif;
       max-width: 60rem; margin: 2rem auto; padding: 0 1rem; color: #222; line-height: 1.45; }
h1 { font-size: 1.6rem; } h2 { font-size: 1.25rem; border-bottom: 1px solid #ddd;
     padding-bottom: .2rem; margin-top: 2.2rem; }
p.explain { color: #444; }
table { border-collapse: collapse; margin: .6rem 0 1rem; font-size: .9rem; }
th, td { border: 1px solid #ddd; padding: .25rem .55rem; text-align: left; vertical-align: top; }
td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
th { background: #f4f4f4; }
figure { margin: 1rem 0; } figure img { max-width: 100%; height: auto; }
figure a img { cursor: zoom-in; }
figcaption { font-size: .85rem; color: #555; }
pre { background: #f6f6f6; padding: .6rem; font-size: .8rem; overflow-x: auto; }
.wide { overflow-x: auto; max-width: 100%; }
.headline { font-size: 1.3rem; background: #eef4fa; padding: .7rem 1rem; border-radius: 4px; }
.note { background: #fff6e5; padding: .5rem .8rem; border-left: 3px solid #e0a030; }
nav ol { columns: 2; font-size: .9rem; }
code { overflow-wrap: anywhere; }
@media (max-width: 40rem) {
  body { margin: 1rem auto; padding: 0 .6rem; }
  nav ol { columns: 1; }
  .headline { font-size: 1.1rem; }
  table { font-size: .8rem; }
}
"""
# Inline styles and data-URI images only: a browser honouring this loads nothing else and runs
# no script, even if escaping were ever missed somewhere.
CONTENT_POLICY = "default-src 'none'; img-src data:; style-src 'unsafe-inline'"


def escape(text) -> str:
    """``str(text)`` with ``& < > " '`` replaced by character references.

    Parameters
    ----------
    text : object

    Returns
    -------
    str
    """
    return html.escape(str(text), quote=True)


def _is_number(value) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool) or value is None


def _column_cells(values: list, digits: int) -> list:
    """Display text of one column: its numbers in one format (whole numbers as they are),
    other values as text."""
    numbers = [v for v in values if _is_number(v) and v is not None]
    if all(isinstance(v, int) for v in numbers):
        shown = iter(str(v) for v in numbers)
    else:
        shown = iter(column_text(numbers, digits))
    return [("n/a" if v is None else next(shown)) if _is_number(v) else str(v) for v in values]


def table(
    headers: Sequence,
    rows: Iterable[Sequence],
    *,
    align_right: Collection = (),
    digits: int = DEFAULT_DIGITS,
) -> str:
    """An HTML table inside a box that scrolls sideways on narrow screens: numbers (and None,
    shown as ``n/a``) right-aligned, each column's numbers in one format (the largest with
    ``digits`` significant digits), other cells as escaped text.

    Parameters
    ----------
    headers : sequence
        Column headers.
    rows : iterable of sequences
        Cell values, one sequence per row.
    align_right : collection, optional
        Headers of columns whose text cells are right-aligned too (numbers already shown as
        text, such as ``value (Monte Carlo SE)``).
    digits : int
        Significant digits of each numeric column's largest value.

    Returns
    -------
    str
    """
    rows = [list(row) for row in rows]
    columns = [_column_cells([row[i] for row in rows], digits) for i in range(len(headers))]
    head = "".join(f"<th>{escape(h)}</th>" for h in headers)
    body = ""
    for r, row in enumerate(rows):
        cells = "".join(
            f'<td class="num">{escape(columns[i][r])}</td>'
            if _is_number(row[i]) or headers[i] in align_right
            else f"<td>{escape(columns[i][r])}</td>"
            for i in range(len(headers))
        )
        body += f"<tr>{cells}</tr>\n"
    return f'<div class="wide"><table>\n<tr>{head}</tr>\n{body}</table></div>\n'


def paragraph(text: str, cls: str = "explain") -> str:
    """An escaped paragraph of class ``cls`` (``explain`` for plain text, ``note`` for a
    highlighted remark).

    Parameters
    ----------
    text : str
    cls : str

    Returns
    -------
    str
    """
    return f'<p class="{cls}">{escape(text)}</p>\n'


def figure(
    png: bytes, caption: str, *, ident: str | None = None, files: Mapping | None = None
) -> str:
    """A PNG image embedded as a base64 data URI, with its caption (also the alt text).

    Parameters
    ----------
    png : bytes
    caption : str
    ident : str, optional
        ``id`` attribute of the figure.
    files : mapping of str to str, optional
        Format name -> relative path of the same figure written beside the page (``{"PNG":
        "figures/a.png", "SVG": ...}``): the image opens the first at full size and the
        caption links them all.

    Returns
    -------
    str
    """
    data = base64.b64encode(png).decode("ascii")
    anchor = "" if ident is None else f' id="{escape(ident)}"'
    image = f'<img src="data:image/png;base64,{data}" alt="{escape(caption)}">'
    links = ""
    if files:
        image = f'<a href="{escape(next(iter(files.values())))}">{image}</a>'
        links = "" if caption.endswith((".", "?", "!")) else "."
        links += " Full size: " + ", ".join(
            f'<a href="{escape(path)}">{escape(kind)}</a>' for kind, path in files.items()
        )
    return f"<figure{anchor}>{image}\n<figcaption>{escape(caption)}{links}</figcaption></figure>\n"


def page(title: str, body: str, *, heading: str | None = None) -> str:
    """A complete, self-contained HTML document.

    Parameters
    ----------
    title : str
        Text of ``<title>`` (escaped).
    body : str
        HTML of the page body, already escaped where it holds text.
    heading : str, optional
        Text of the ``<h1>`` heading (escaped; default: the title).

    Returns
    -------
    str
    """
    heading = title if heading is None else heading
    return (
        '<!DOCTYPE html>\n<html lang="en">\n<head>\n<meta charset="utf-8">\n'
        f'<meta http-equiv="Content-Security-Policy" content="{CONTENT_POLICY}">\n'
        '<meta name="viewport" content="width=device-width, initial-scale=1">\n'
        f"<title>{escape(title)}</title>\n<style>{CSS}</style>\n</head>\n<body>\n"
        f"<h1>{escape(heading)}</h1>\n{body}</body>\n</html>\n"
    )
