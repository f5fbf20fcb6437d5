"""HTML pieces of the report: one file, inline styles and images, every data string escaped.

Nothing here loads anything from outside the file: no script, no font, no stylesheet link; the
figures are PNG bytes inline as ``data:`` URLs. Every string that came from data (premise ids,
policy names, reasons) goes through ``esc`` before it is placed in the page.
"""

from __future__ import annotations

import base64
import datetime as dt
import html
import math
from collections.abc import Sequence
from typing import Any

CSS = """
body { margin: 0; background: #f3f1ea; color: #22303a; font: 15px/1.45 system-ui, -apple-system,
  "Segoe UI", "DejaVu Sans", sans-serif; }
header, main { max-width: 1000px; margin: 0 auto; padding: 0 20px; }
header { padding-top: 18px; }
h1 { font-size: 24px; margin: 8px 0 4px; }
h2 { font-size: 20px; margin: 28px 0 8px; border-bottom: 2px solid #2a7f8f; padding-bottom: 3px; }
h3 { font-size: 16px; margin: 20px 0 6px; }
nav a { margin-right: 14px; color: #2a7f8f; }
.caution { background: #fff6e0; border-left: 5px solid #d08c2e; padding: 8px 12px; margin: 12px 0; }
.facts { display: flex; flex-wrap: wrap; gap: 10px; margin: 10px 0; }
.fact { background: #fff; border: 1px solid #d9d4c7; padding: 6px 10px; min-width: 140px; }
.fact b { display: block; font-size: 19px; }
.absent { color: #6b7a86; font-style: italic; }
figure { margin: 10px 0 18px; background: #fff; border: 1px solid #d9d4c7; padding: 8px; }
figure img { max-width: 100%; height: auto; display: block; }
figcaption { font-size: 13px; color: #4d5b66; margin-top: 4px; }
table { border-collapse: collapse; margin: 6px 0 14px; background: #fff; font-size: 13px; }
th, td { border: 1px solid #d9d4c7; padding: 3px 7px; text-align: left; }
td.n { text-align: right; font-variant-numeric: tabular-nums; }
th { background: #e8e4d8; }
.scroll { overflow-x: auto; }
"""


def esc(value: Any) -> str:
    """Any value as text safe inside HTML element content and quoted attributes."""
    return html.escape("" if value is None else str(value), quote=True)


def number(value: Any, digits: int = 2) -> str:
    """A number as the report prints it: thousands separated, '-' for none."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "-"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        return f"{value:,}"
    if isinstance(value, float):
        return f"{value:,.{digits}f}"
    if isinstance(value, dt.datetime):
        return value.strftime("%Y-%m-%d %H:%M %Z").strip()
    return str(value)


def table(columns: Sequence[str], rows: Sequence[Sequence[Any]], digits: int = 2) -> str:
    """An HTML table with the given header labels; numbers right-aligned, all text escaped."""
    head = "".join(f"<th>{esc(c)}</th>" for c in columns)
    body = []
    for row in rows:
        cells = []
        for value in row:
            numeric = isinstance(value, int | float) and not isinstance(value, bool)
            cls = ' class="n"' if numeric or value is None else ""
            cells.append(f"<td{cls}>{esc(number(value, digits))}</td>")
        body.append("<tr>" + "".join(cells) + "</tr>")
    return f'<div class="scroll"><table><tr>{head}</tr>{"".join(body)}</table></div>'


def figure(png: bytes, caption: str, name: str) -> str:
    """A figure: the PNG inline, its caption and the name of the PNG file written beside the report."""
    data = base64.b64encode(png).decode("ascii")
    return (
        f'<figure data-figure="{esc(name)}"><img alt="{esc(caption)}" src="data:image/png;base64,{data}">'
        f"<figcaption>{esc(caption)} (also figures/{esc(name)}.png)</figcaption></figure>"
    )


def absent(text: str) -> str:
    """A plain sentence saying what this run's ledger does not hold."""
    return f'<p class="absent">{esc(text)}</p>'


def facts(items: Sequence[tuple[str, Any]]) -> str:
    """A row of headline figures."""
    cells = "".join(f'<div class="fact"><b>{esc(number(v, 0))}</b>{esc(k)}</div>' for k, v in items)
    return f'<div class="facts">{cells}</div>'


def document(title: str, header: str, body: str) -> str:
    """The whole page."""
    return (
        "<!DOCTYPE html>\n"
        '<html lang="en"><head><meta charset="utf-8">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        # The page may load nothing: only its own inline style and data: images.
        '<meta http-equiv="Content-Security-Policy"'
        " content=\"default-src 'none'; img-src data:; style-src 'unsafe-inline'\">"
        f"<title>{esc(title)}</title><style>{CSS}</style></head>"
        f"<body><header>{header}</header><main>{body}</main></body></html>\n"
    )
