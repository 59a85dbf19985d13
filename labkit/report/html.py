"""Safe HTML building blocks: escaping per context, sanitized Markdown, tables, and the page shell.

Every piece of text that reaches a page goes through one of these:

* :func:`esc` for HTML text and double-quoted attribute values (``& < > " '``);
  SVG text and attributes inside the page use the same function;
* :func:`json_block` for JSON embedded in the page (``<``, ``>``, ``&`` and the
  line separators become ``\\uXXXX`` escapes, so no ``</script>`` can end the block);
* :func:`markdown` for template text: rendered by markdown-it-py with raw HTML
  disabled, then cleaned by an nh3 allow-list (tags, attributes, URL schemes).

:func:`page` wraps a body in a self-contained document: inline styles only, a
Content-Security-Policy that forbids scripts and every network fetch, and print
rules (a page break per step, tables that wrap instead of clipping).
"""

from __future__ import annotations

import html
import json
import math
import numbers
from collections.abc import Iterable, Sequence
from typing import Any

import numpy as np

CSP = "default-src 'none'; style-src 'unsafe-inline'; img-src data:"

_ALLOWED_TAGS = {"p", "br", "em", "strong", "code", "pre", "ul", "ol", "li", "blockquote", "a", "h4", "h5", "h6",
                 "hr", "sub", "sup", "table", "thead", "tbody", "tr", "th", "td"}
_ALLOWED_ATTRIBUTES = {"a": {"href", "title"}, "th": {"align"}, "td": {"align"}}
_URL_SCHEMES = {"http", "https", "mailto"}

STYLE = """
:root { --ink: #1d1d1f; --muted: #5b5b66; --rule: #c9c9d1; --ok: #1b6e3a; --warn: #8a5a00; --bad: #a1141c; }
* { box-sizing: border-box; }
body { font: 14px/1.45 system-ui, sans-serif; color: var(--ink); margin: 24px auto; max-width: 1100px;
       padding: 0 16px; }
h1 { font-size: 22px; margin: 0 0 4px; }
h2 { font-size: 18px; margin: 28px 0 8px; border-bottom: 1px solid var(--rule); }
h3 { font-size: 15px; margin: 18px 0 6px; }
table { border-collapse: collapse; margin: 8px 0 14px; width: 100%; table-layout: auto; }
th, td { border: 1px solid var(--rule); padding: 3px 6px; text-align: left; vertical-align: top;
         overflow-wrap: anywhere; }
th { background: #f1f1f4; } td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
.meta td:first-child { width: 14em; color: var(--muted); }
.caution { border-left: 4px solid var(--warn); padding: 4px 10px; margin: 6px 0; background: #fff8ec; }
.defer { color: var(--muted); font-style: italic; }
.v-accept { color: var(--ok); } .v-marginal { color: var(--warn); } .v-outside { color: var(--bad); font-weight: 600; }
.v-unchecked { color: var(--muted); }
.flag { font-weight: 600; color: var(--bad); }
figure { margin: 10px 0; } figcaption { color: var(--muted); font-size: 12px; }
svg { max-width: 100%; height: auto; } svg text { font-family: system-ui, sans-serif; }
.step { margin-top: 26px; } .muted { color: var(--muted); }
.grid2 { display: flex; flex-wrap: wrap; gap: 12px; } .grid2 > figure { flex: 1 1 420px; }
@media print {
  body { margin: 0; max-width: none; font-size: 11px; }
  .step { break-before: page; page-break-before: always; }
  table { page-break-inside: auto; } tr { break-inside: avoid; page-break-inside: avoid; }
  thead { display: table-header-group; } figure, svg { break-inside: avoid; }
  a { color: inherit; text-decoration: none; }
}
"""


def esc(value: object) -> str:
    """Escape any value for HTML/SVG text or a double-quoted attribute (``None`` -> empty)."""
    if value is None or type(value).__name__ == "NAType":  # pandas' missing value in nullable columns
        return ""
    if isinstance(value, float) and math.isnan(value):
        return ""
    return html.escape(str(value), quote=True)


def json_block(element_id: str, data: Any) -> str:
    """A JSON data block (never executed: ``type="application/json"``), safe against ``</script>``."""
    text = json.dumps(data, ensure_ascii=False, default=str, allow_nan=False, sort_keys=True)
    for raw, code in (("<", "\\u003c"), (">", "\\u003e"), ("&", "\\u0026"), ("\u2028", "\\u2028"),
                      ("\u2029", "\\u2029")):
        text = text.replace(raw, code)
    return f'<script type="application/json" id="{esc(element_id)}">{text}</script>'


def markdown(text: str | None) -> str:
    """Render template Markdown to HTML through an allow-list sanitizer (raw HTML in the source is escaped)."""
    if not text:
        return ""
    import nh3
    from markdown_it import MarkdownIt

    rendered = MarkdownIt("commonmark", {"html": False, "linkify": False}).enable("table").render(text)
    return nh3.clean(rendered, tags=_ALLOWED_TAGS, attributes=_ALLOWED_ATTRIBUTES, url_schemes=_URL_SCHEMES,
                     link_rel="noopener noreferrer")


def fmt(value: object, digits: int = 4) -> str:
    """A number in ``digits`` significant figures (empty for NaN/None), other values as text; escaped."""
    if value is None:
        return ""
    if isinstance(value, bool | np.bool_):
        return esc(bool(value))
    if isinstance(value, numbers.Integral):
        return esc(int(value))
    if isinstance(value, numbers.Real):
        v = float(value)
        if not math.isfinite(v):
            return "" if math.isnan(v) else esc(v)
        if v.is_integer() and abs(v) < 1e12:  # counts and round values: no exponent
            return esc(int(v))
        return esc(f"{v:.{digits}g}")
    return esc(value)


def table(headers: Sequence[str], rows: Iterable[Sequence[object]], *, numeric: Sequence[bool] | None = None,
          raw_columns: Sequence[int] = (), cls: str = "") -> str:
    """An HTML table; cells are escaped unless their column is in ``raw_columns`` (already-built safe HTML)."""
    numeric = list(numeric) if numeric is not None else [False] * len(headers)
    head = "".join(f"<th>{esc(h)}</th>" for h in headers)
    body = []
    for row in rows:
        cells = []
        for k, cell in enumerate(row):
            content = str(cell) if k in raw_columns else (fmt(cell) if numeric[k] else esc(cell))
            cells.append(f'<td class="num">{content}</td>' if numeric[k] else f"<td>{content}</td>")
        body.append("<tr>" + "".join(cells) + "</tr>")
    cls_attr = f' class="{esc(cls)}"' if cls else ""
    return f"<table{cls_attr}><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"


VERDICT_SYMBOL = {"accept": "\u2713", "marginal": "~", "outside": "\u2717", "unchecked": "?"}


def verdict_html(verdict: str) -> str:
    """A verdict as symbol + word with a class (colour is only an extra cue)."""
    word = verdict if verdict in VERDICT_SYMBOL else "unchecked"
    return f'<span class="v-{word}">{esc(VERDICT_SYMBOL[word])} {esc(verdict or "unchecked")}</span>'


def page(title: str, body: str, *, data: Any | None = None) -> str:
    """A complete, self-contained HTML document (no scripts, no network), with optional embedded JSON data."""
    data_block = json_block("labkit-data", data) if data is not None else ""
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            f'<meta http-equiv="Content-Security-Policy" content="{esc(CSP)}">'
            '<meta name="viewport" content="width=device-width, initial-scale=1">'
            f"<title>{esc(title)}</title><style>{STYLE}</style></head><body>"
            f"{body}{data_block}</body></html>\n")
