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
from collections.abc import Collection, Iterable, Sequence

CSS = """
body { font-family: system-ui, -apple-system, "Segoe UI", Helvetica, Arial, sans-serif;
       max-width: 60rem; margin: 2rem auto; padding: 0 1rem; color: #222; line-height: 1.45; }
h1 { font-size: 1.6rem; } h2 { font-size: 1.25rem; border-bottom: 1px solid #ddd;
     padding-bottom: .2rem; margin-top: 2.2rem; }
p.explain { color: #444; }
table { border-collapse: collapse; margin: .6rem 0 1rem; font-size: .9rem; }
th, td { border: 1px solid #ddd; padding: .25rem .55rem; text-align: left; vertical-align: top; }
td.num { text-align: right; font-variant-numeric: tabular-nums; }
th { background: #f4f4f4; }
figure { margin: 1rem 0; } figure img { max-width: 100%; height: auto; }
figcaption { font-size: .85rem; color: #555; }
pre { background: #f6f6f6; padding: .6rem; font-size: .8rem; overflow-x: auto; }
.wide { overflow-x: auto; }
.headline { font-size: 1.3rem; background: #eef4fa; padding: .7rem 1rem; border-radius: 4px; }
.note { background: #fff6e5; padding: .5rem .8rem; border-left: 3px solid #e0a030; }
nav ol { columns: 2; font-size: .9rem; }
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


def number_text(value, digits: int = 4) -> str:
    """A number with ``digits`` significant digits; ``n/a`` for None; other values as text.

    Parameters
    ----------
    value : object
    digits : int

    Returns
    -------
    str

    Examples
    --------
    >>> number_text(3.14159), number_text(None), number_text("wald")
    ('3.142', 'n/a', 'wald')
    """
    if value is None:
        return "n/a"
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return str(value)
    return f"{value:.{digits}g}"


def _cell(value, right: bool) -> str:
    if isinstance(value, (int, float)) and not isinstance(value, bool) or value is None:
        return f'<td class="num">{escape(number_text(value))}</td>'
    if right:
        return f'<td class="num">{escape(value)}</td>'
    return f"<td>{escape(value)}</td>"


def table(headers: Sequence, rows: Iterable[Sequence], *, align_right: Collection = ()) -> str:
    """An HTML table: numbers (and None, shown as ``n/a``) right-aligned with four significant
    digits, other cells as escaped text.

    Parameters
    ----------
    headers : sequence
        Column headers.
    rows : iterable of sequences
        Cell values, one sequence per row.
    align_right : collection, optional
        Headers of columns whose text cells are right-aligned too (numbers already shown as
        text, such as ``value (Monte Carlo SE)``).

    Returns
    -------
    str
    """
    right = [h in align_right for h in headers]
    head = "".join(f"<th>{escape(h)}</th>" for h in headers)
    body = "".join(
        "<tr>" + "".join(_cell(v, r) for v, r in zip(row, right)) + "</tr>\n" for row in rows
    )
    return f"<table>\n<tr>{head}</tr>\n{body}</table>\n"


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


def figure(png: bytes, caption: str, *, ident: str | None = None) -> str:
    """A PNG image embedded as a base64 data URI, with its caption (also the alt text).

    Parameters
    ----------
    png : bytes
    caption : str
    ident : str, optional
        ``id`` attribute of the figure.

    Returns
    -------
    str
    """
    data = base64.b64encode(png).decode("ascii")
    anchor = "" if ident is None else f' id="{escape(ident)}"'
    return (
        f'<figure{anchor}><img src="data:image/png;base64,{data}" alt="{escape(caption)}">\n'
        f"<figcaption>{escape(caption)}</figcaption></figure>\n"
    )


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
