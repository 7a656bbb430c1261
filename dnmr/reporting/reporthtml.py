"""The pieces of dnmr's HTML reports: escaped text, tables, lists, sections, the page itself, and figures
embedded as data URIs, so that a report is one self-contained file that makes no request of any kind.

Text taken from the input files is always HTML-escaped (:func:`esc`).
"""
from __future__ import annotations

import base64
import html
from collections.abc import Iterable, Sequence
from pathlib import Path

from dnmr.formatting import format_with_error

FIGURE_DPI = 110
"""Resolution (dots per inch) of the figures a report embeds."""


STYLE = """
body { font-family: "DejaVu Sans", "Liberation Sans", Arial, sans-serif; color: #111; background: #fff;
       max-width: 68rem; margin: 1.5rem auto; padding: 0 1rem; line-height: 1.4; }
h1 { font-size: 1.6rem; border-bottom: 2px solid #333; padding-bottom: .3rem; }
h2 { font-size: 1.25rem; border-bottom: 1px solid #999; margin-top: 2rem; }
h3 { font-size: 1.05rem; margin-bottom: .3rem; }
table { border-collapse: collapse; margin: .5rem 0 1rem; font-size: .9rem; }
th, td { border: 1px solid #bbb; padding: .2rem .5rem; text-align: left; vertical-align: top; }
th { background: #eee; }
td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
pre { background: #f6f6f6; border: 1px solid #ddd; padding: .5rem; font-size: .8rem; overflow-x: auto;
      white-space: pre-wrap; }
figure { margin: .5rem 0 1.5rem; }
figure img { max-width: 100%; height: auto; border: 1px solid #ddd; }
figcaption { font-size: .85rem; color: #333; }
.warn { color: #8a3b00; }
.muted { color: #555; font-size: .85rem; }
@media print {
  body { max-width: none; margin: 0; font-size: 10pt; }
  h2 { page-break-after: avoid; }
  figure, table, pre { page-break-inside: avoid; }
  pre { white-space: pre-wrap; }
}
"""


def esc(value) -> str:
    """Text of `value`, HTML-escaped (quotes too)."""
    return html.escape(str(value), quote=True)


def table(headers: Sequence[str], rows: Iterable[Sequence], numeric: Sequence[bool] = ()) -> str:
    """An HTML table; every header and cell is escaped. `numeric` right-aligns columns."""
    head = "".join(f"<th>{esc(h)}</th>" for h in headers)
    body = []
    for row in rows:
        cells = [f'<td class="num">{esc(c)}</td>' if i < len(numeric) and numeric[i] else f"<td>{esc(c)}</td>"
                 for i, c in enumerate(row)]
        body.append("<tr>" + "".join(cells) + "</tr>")
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def bullets(items: Iterable[str], css: str = "") -> str:
    """An escaped bullet list ('' when empty)."""
    items = list(items)
    cls = f' class="{css}"' if css else ""
    return f"<ul{cls}>" + "".join(f"<li>{esc(i)}</li>" for i in items) + "</ul>" if items else ""


def pre(text: str) -> str:
    """Preformatted, escaped text (a report of the analysis as it prints it)."""
    return f"<pre>{esc(text)}</pre>"


def section(anchor: str, title: str, body: str) -> str:
    """A <section> with an <h2>."""
    return f'<section id="{esc(anchor)}"><h2>{esc(title)}</h2>{body}</section>'


def html_document(title: str, sections: Sequence[str]) -> str:
    """The whole HTML page: `title` (escaped) as its title and heading, the inline style, then `sections`."""
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            f"<title>{esc(title)}</title><style>{STYLE}</style></head><body>"
            f"<h1>{esc(title)}</h1>{''.join(sections)}</body></html>\n")


def png_data_uri(data: bytes) -> str:
    """``data:image/png;base64,...`` URI of PNG bytes."""
    return "data:image/png;base64," + base64.b64encode(data).decode("ascii")


def figure_html(data: bytes, caption: str, alt: str) -> str:
    """A <figure> with the PNG embedded and an escaped caption."""
    return (f'<figure><img src="{png_data_uri(data)}" alt="{esc(alt)}">'
            f"<figcaption>{esc(caption)}</figcaption></figure>")


def written_figure(path: Path) -> Path | None:
    """The figure asked for at `path` as written: with the suffix of any figure format (PNG first), or None."""
    from dnmr.io.output import FIGURE_FORMAT_CHOICES

    found = [path.with_suffix("." + f) for f in FIGURE_FORMAT_CHOICES if path.with_suffix("." + f).is_file()]
    return found[0] if found else None


def figure_from_file(path: Path, caption: str, alt: str) -> str:
    """Embed the figure asked for at `path` (``.png``) in whichever format it was written (PNG or SVG
    embedded; a PDF named by its place beside the report), or say that it is missing."""
    found = written_figure(path)
    if found is None:
        return f'<p class="warn">figure {esc(path.name)} not found in {esc(path.parent.name)}</p>'
    if found.suffix == ".pdf":
        return (f'<p class="muted">{esc(caption)}: written as PDF, {esc(found.parent.name)}/{esc(found.name)} '
                "(open it beside this report)</p>")
    if found.suffix == ".svg":
        uri = "data:image/svg+xml;base64," + base64.b64encode(found.read_bytes()).decode("ascii")
        return f'<figure><img src="{uri}" alt="{esc(alt)}"><figcaption>{esc(caption)}</figcaption></figure>'
    return figure_html(found.read_bytes(), caption, alt)


def parameter_cell(key: str, value: float, stderr: float) -> str:
    """A table cell showing 'value ± error' and carrying the exact numbers in data attributes."""
    return (f'<td class="num" data-key="{esc(key)}" data-value="{value!r}" data-stderr="{stderr!r}">'
            f"{esc(format_with_error(value, stderr))}</td>")
