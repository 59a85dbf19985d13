"""Text for HTML widgets: everything from users or files is escaped here (the HTML widget inserts raw HTML).

Only :class:`Safe` fragments, built by this module from escaped parts, pass through unescaped.
"""

from __future__ import annotations

import html
import math
from collections.abc import Iterable, Sequence

VERDICT_SYMBOL = {"accept": "\u2713", "marginal": "~", "outside": "\u2717", "unchecked": "?"}
VERDICT_WORD = {"accept": "ACCEPT", "marginal": "MARGINAL", "outside": "OUTSIDE", "unchecked": "UNCHECKED"}
VERDICT_HINT = {"accept": "inside the band, within the reading's tolerance",
                "marginal": "just beyond the band: within 3 tolerances",
                "outside": "far from the band: check the set-up",
                "unchecked": "no prediction to compare with"}


class Safe(str):
    """An HTML fragment already built from escaped parts."""


def esc(value: object) -> Safe:
    """Escape any value for HTML text or a double-quoted attribute (``None`` and NaN -> empty)."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return Safe("")
    if isinstance(value, Safe):
        return value
    return Safe(html.escape(str(value), quote=True))


def num(value: float, digits: int = 4) -> str:
    """A number in ``digits`` significant figures; empty for NaN."""
    if value is None or not math.isfinite(float(value)):
        return ""
    return f"{float(value):.{digits}g}"


def verdict_badge(verdict: str, *, pending: bool = False) -> Safe:
    """The verdict as symbol + word in a box whose border style differs per verdict (colour is only a cue)."""
    v = verdict if verdict in VERDICT_SYMBOL else "unchecked"
    extra = ' <span class="lk-pending">recording\u2026</span>' if pending else ""
    return Safe(f'<span class="lk-verdict lk-v-{v}" title="{esc(VERDICT_HINT[v])}">'
                f'<b>{VERDICT_SYMBOL[v]} {VERDICT_WORD[v]}</b></span>{extra}')


def tag(name: str, content: object, cls: str = "") -> Safe:
    """``<name class=cls>escaped content</name>`` (content passes unescaped only when :class:`Safe`)."""
    attr = f' class="{esc(cls)}"' if cls else ""
    return Safe(f"<{name}{attr}>{esc(content)}</{name}>")


def lines(items: Iterable[object], cls: str = "") -> Safe:
    """One ``<div>`` per item, escaped."""
    return Safe("".join(tag("div", i, cls) for i in items))


def table(headers: Sequence[str], rows: Iterable[Sequence[object]], cls: str = "lk-table") -> Safe:
    """An HTML table; every cell escaped unless it is :class:`Safe`."""
    head = "".join(f"<th>{esc(h)}</th>" for h in headers)
    body = "".join("<tr>" + "".join(f"<td>{esc(c)}</td>" for c in row) + "</tr>" for row in rows)
    return Safe(f'<table class="{esc(cls)}"><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>')


def message(text: object, kind: str = "info") -> Safe:
    """A boxed message: ``info``, ``ok``, ``problem`` (the word leads, so the kind is not told by colour alone)."""
    lead = {"info": "Note", "ok": "Done", "problem": "Problem"}.get(kind, "Note")
    return Safe(f'<div class="lk-msg lk-msg-{esc(kind)}"><b>{lead}:</b> {esc(text)}</div>')


def set_choices(dropdown: object, options: list, keep: bool = True) -> None:
    """Give a dropdown new ``(label, value)`` options and select the current value if still offered, else the first.

    (ipywidgets 8 leaves the value at None when options are replaced.)
    """
    current = getattr(dropdown, "value", None)
    dropdown.options = options  # type: ignore[attr-defined]
    values = [o[1] if isinstance(o, tuple) else o for o in options]
    if keep and current in values:
        dropdown.value = current  # type: ignore[attr-defined]
    elif values:
        dropdown.value = values[0]  # type: ignore[attr-defined]
