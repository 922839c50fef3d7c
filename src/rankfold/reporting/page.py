"""One self-contained HTML page: inline CSS, figures as base64 ``data:`` URIs, no script, no network.

A page is a title, a few lines of facts, and a list of :class:`Section`s; each
section holds paragraphs, at most one figure and at most one table.  Every
text goes through :func:`html.escape`, so names from the data (feature names,
labels, paths) cannot break the page.
"""

from __future__ import annotations

import base64
import html
from dataclasses import dataclass, field

_CSS = """
:root { --paper:#fbf8f1; --ink:#1f2b3d; --muted:#6f7682; --rule:#e4ddcf; --accent:#c4572f; --teal:#23708a; }
* { box-sizing: border-box; }
body { margin:0; background:var(--paper); color:var(--ink);
       font: 15px/1.5 "DejaVu Sans", "Segoe UI", system-ui, sans-serif; }
header { padding: 28px 40px 18px; border-bottom: 4px solid var(--teal); }
header h1 { margin:0 0 6px; font-size: 24px; letter-spacing: .01em; }
header .sub { color: var(--muted); margin: 0; }
dl.facts { display:grid; grid-template-columns: max-content 1fr; gap: 2px 18px; margin: 14px 0 0; font-size: 14px; }
dl.facts dt { color: var(--muted); }
dl.facts dd { margin: 0; overflow-wrap: anywhere; }
main { max-width: 980px; padding: 8px 40px 48px; }
section { margin: 30px 0 0; }
section h2 { font-size: 18px; margin: 0 0 8px; padding-left: 10px; border-left: 4px solid var(--accent); }
section p { margin: 6px 0; max-width: 72ch; }
p.absent { color: var(--muted); font-style: italic; }
figure { margin: 12px 0; }
figure img { max-width: 100%; height: auto; border: 1px solid var(--rule); border-radius: 4px; }
figcaption { color: var(--muted); font-size: 13px; }
table { border-collapse: collapse; margin: 10px 0; font-size: 13.5px; font-variant-numeric: tabular-nums; }
th, td { padding: 4px 12px; text-align: right; border-bottom: 1px solid var(--rule); }
th { color: var(--muted); font-weight: 600; border-bottom: 2px solid var(--muted); }
th:first-child, td:first-child { text-align: left; }
tr.chosen td { background: #f4e2c4; font-weight: 600; }
footer { color: var(--muted); font-size: 12.5px; padding: 0 40px 30px; }
"""


@dataclass
class Section:
    """A heading, paragraphs, an optional figure and an optional table.

    ``figure`` is ``(png_bytes, alt_text, file_name)``; ``table`` is
    ``(header, rows)`` with every cell already formatted as text;
    ``highlight`` is the index of a table row to mark (e.g. the recommended setting).
    ``absent`` paragraphs explain a figure left out (drawn muted).
    """

    title: str
    paragraphs: list[str] = field(default_factory=list)
    figure: tuple[bytes, str, str] | None = None
    table: tuple[list[str], list[list[str]]] | None = None
    highlight: int | None = None
    absent: list[str] = field(default_factory=list)


def data_uri(png: bytes) -> str:
    """``data:image/png;base64,...`` for embedding ``png`` in the page."""
    return "data:image/png;base64," + base64.b64encode(png).decode("ascii")


def _table(header: list[str], rows: list[list[str]], highlight: int | None) -> str:
    e = html.escape
    head = "".join(f"<th>{e(h)}</th>" for h in header)
    body = []
    for i, row in enumerate(rows):
        cls = ' class="chosen"' if i == highlight else ""
        body.append(f"<tr{cls}>" + "".join(f"<td>{e(str(c))}</td>" for c in row) + "</tr>")
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def render_page(title: str, subtitle: str, facts: list[tuple[str, str]], sections: list[Section],
                footer: str) -> str:
    """The whole page as one string of HTML."""
    e = html.escape
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{e(title)}</title><style>{_CSS}</style></head><body>",
        f"<header><h1>{e(title)}</h1><p class=\"sub\">{e(subtitle)}</p>",
        '<dl class="facts">' + "".join(f"<dt>{e(k)}</dt><dd>{e(v)}</dd>" for k, v in facts) + "</dl>",
        "</header><main>",
    ]
    for s in sections:
        slug = "".join(ch if ch.isalnum() else "-" for ch in s.title.lower()).strip("-")
        parts.append(f'<section id="{e(slug)}"><h2>{e(s.title)}</h2>')
        parts += [f"<p>{e(p)}</p>" for p in s.paragraphs]
        parts += [f'<p class="absent">{e(p)}</p>' for p in s.absent]
        if s.figure is not None:
            png, alt, name = s.figure
            parts.append(f'<figure><img src="{data_uri(png)}" alt="{e(alt)}" data-file="{e(name)}">'
                         f"<figcaption>{e(alt)} (also saved as {e(name)})</figcaption></figure>")
        if s.table is not None:
            parts.append(_table(*s.table, s.highlight))
        parts.append("</section>")
    parts.append(f"</main><footer>{e(footer)}</footer></body></html>")
    return "\n".join(parts)
