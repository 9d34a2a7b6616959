"""The self-contained HTML page: figures embedded as ``data:`` URIs, inline CSS, no script, no link.

Every piece of text that reaches the page goes through :func:`html.escape`
(file names, skip reasons, header values, configuration values, warnings),
so a hostile file name such as ``<script>...</script>.fits`` is shown as
text and never run.  A Content-Security-Policy ``<meta>`` forbids scripts
and any resource that is not embedded, as a second fence.
"""

from __future__ import annotations

import base64
import html
import json
import math
from pathlib import Path

__all__ = ["CSP", "esc", "image_data_uri", "table_html", "figure_html", "section_html", "page_html",
           "format_number", "note_html", "json_block"]

#: Content-Security-Policy of the page: only embedded images and inline styles; no scripts, no fetches
CSP = "default-src 'none'; img-src data:; style-src 'unsafe-inline'; script-src 'none'; base-uri 'none'; form-action 'none'"

_CSS = """
:root { --ink:#1d2430; --muted:#5b6575; --rule:#d6dbe3; --band:#f4f6f9; --warn:#8a3b12; --warnbg:#fff4e5; }
* { box-sizing: border-box; }
body { margin: 0 auto; max-width: 1080px; padding: 1.2rem 1.6rem 3rem; color: var(--ink);
       font: 15px/1.45 "DejaVu Sans", "Helvetica Neue", Arial, sans-serif; background: #fff; }
h1 { font-size: 1.55rem; margin: 0.2rem 0 0.2rem; }
h2 { font-size: 1.15rem; margin: 2rem 0 0.5rem; padding-bottom: 0.2rem; border-bottom: 2px solid var(--rule); }
h3 { font-size: 1rem; margin: 1.1rem 0 0.3rem; }
p.meta { color: var(--muted); margin: 0 0 0.8rem; font-size: 0.9rem; }
.caution { border-left: 5px solid var(--warn); background: var(--warnbg); padding: 0.7rem 1rem; margin: 1rem 0; }
.caution strong { color: var(--warn); }
.note { color: var(--muted); font-style: italic; margin: 0.3rem 0; }
table { border-collapse: collapse; margin: 0.4rem 0 0.8rem; font-size: 0.88rem; }
th, td { border: 1px solid var(--rule); padding: 0.25rem 0.55rem; text-align: left; vertical-align: top; }
th { background: var(--band); font-weight: 600; }
td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
tr.final td { font-weight: 600; background: #eef5ec; }
figure { margin: 0.6rem 0 1.2rem; }
figure img { max-width: 100%; height: auto; border: 1px solid var(--rule); }
figcaption { color: var(--muted); font-size: 0.85rem; margin-top: 0.25rem; }
pre { background: var(--band); padding: 0.6rem 0.8rem; overflow-x: auto; font-size: 0.8rem; }
nav a { margin-right: 0.9rem; }
.ok { color: #2f7d3b; font-weight: 600; } .bad { color: #b3261e; font-weight: 600; }
"""


def esc(value) -> str:
    """Text for the page, HTML-escaped (quotes included); None -> an en dash."""
    if value is None:
        return "\u2013"
    return html.escape(str(value), quote=True)


def format_number(value, spec: str = ".4g") -> str:
    """A number for a table cell (``spec`` format), en dash for None/NaN; non-numbers as text."""
    if value is None:
        return "\u2013"
    if isinstance(value, bool):
        return str(value)
    if isinstance(value, (int, float)):
        if isinstance(value, float) and not math.isfinite(value):
            return "\u2013"
        return format(value, spec)
    return str(value)


def image_data_uri(path) -> str:
    """``data:image/png;base64,...`` of a PNG file (RFC 2397)."""
    data = Path(path).read_bytes()
    return "data:image/png;base64," + base64.b64encode(data).decode("ascii")


def table_html(headers, rows, *, numeric=(), row_classes=None) -> str:
    """An HTML table; every header and cell is escaped.

    Parameters
    ----------
    headers : sequence of str
    rows : sequence of sequences
        Cell values (str, numbers or None).
    numeric : collection of int
        Column indices aligned right.
    row_classes : sequence of str or None, optional
        A CSS class per row (``"final"`` highlights a row).
    """
    out = ["<table>", "<thead><tr>" + "".join(f"<th>{esc(h)}</th>" for h in headers) + "</tr></thead>", "<tbody>"]
    for i, row in enumerate(rows):
        cls = row_classes[i] if row_classes else None
        cells = "".join(f"<td class=\"num\">{esc(c)}</td>" if j in numeric else f"<td>{esc(c)}</td>"
                        for j, c in enumerate(row))
        out.append(f"<tr class=\"{esc(cls)}\">{cells}</tr>" if cls else f"<tr>{cells}</tr>")
    out.append("</tbody></table>")
    return "\n".join(out)


def figure_html(path, caption: str, alt: str) -> str:
    """An embedded figure (its PNG as a data URI) with an escaped caption."""
    return (f"<figure><img src=\"{image_data_uri(path)}\" alt=\"{esc(alt)}\">"
            f"<figcaption>{esc(caption)}</figcaption></figure>")


def section_html(anchor: str, title: str, body: str) -> str:
    """``<section>`` with an ``<h2>``; ``body`` is already HTML (built from escaped parts)."""
    return f"<section id=\"{esc(anchor)}\"><h2>{esc(title)}</h2>\n{body}\n</section>"


def note_html(text: str) -> str:
    """A muted note paragraph (escaped)."""
    return f"<p class=\"note\">{esc(text)}</p>"


def json_block(obj) -> str:
    """Pretty JSON in a ``<pre>``, escaped."""
    return f"<pre>{esc(json.dumps(obj, indent=1, sort_keys=True, default=str))}</pre>"


def page_html(title: str, meta_line: str, cautions: list, sections: list) -> str:
    """The whole page.

    Parameters
    ----------
    title : str
        Plain text (escaped).
    meta_line : str
        Plain text under the title (escaped).
    cautions : list of str
        Plain text paragraphs shown prominently at the top (escaped).
    sections : list of (anchor, title, body_html)
        ``body_html`` built from escaped parts.
    """
    nav = " ".join(f"<a href=\"#{esc(a)}\">{esc(t)}</a>" for a, t, _ in sections)
    caution = "".join(f"<p>{'<strong>Caution.</strong> ' if i == 0 else ''}{esc(c)}</p>"
                      for i, c in enumerate(cautions))
    body = "\n".join(section_html(a, t, b) for a, t, b in sections)
    return (
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n"
        f"<meta http-equiv=\"Content-Security-Policy\" content=\"{CSP}\">\n"
        "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n"
        f"<title>{esc(title)}</title>\n<style>{_CSS}</style>\n</head>\n<body>\n"
        f"<header><h1>{esc(title)}</h1><p class=\"meta\">{esc(meta_line)}</p>\n"
        f"<div class=\"caution\" id=\"cautions\">{caution}</div>\n<nav>{nav}</nav></header>\n"
        f"<main>\n{body}\n</main>\n</body>\n</html>\n")
