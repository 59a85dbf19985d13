"""Escaping, sanitized Markdown and inline SVG of the report layer.

Outside references: Python's own parsers (html.parser.HTMLParser and xml.etree.ElementTree) read back what
the report writes; json.loads reads back embedded JSON; numpy.array_split and numpy.histogram are the
references of the decimation and the histogram; plane trigonometry places phasor tips.
"""

from __future__ import annotations

import json
import math
import re
import warnings
import xml.etree.ElementTree as ET
from html.parser import HTMLParser

import numpy as np
import pytest

from labkit.core.diagram import Text
from labkit.report.html import CSP, esc, json_block, markdown, page, table
from labkit.report.svg import Phasor, Series, histogram_svg, line_chart, minmax_envelope, phasor_svg, shape_svg

PAYLOADS = [
    "<script>document.title='pwned';window.__pwned=1</script>",
    "<img src=x onerror=\"window.__pwned=1\">",
    "<svg onload=\"window.__pwned=1\"></svg>",
    "[click](javascript:window.__pwned=1)",
    "</style><script>window.__pwned=1</script>",
    "\" onmouseover=\"window.__pwned=1\" x=\"",
    "' onfocus='window.__pwned=1' autofocus='",
    "</script><script>window.__pwned=1</script>",
    "<a href=\"javascript:alert(1)\">x</a>",
    "\u2028\u2029&amp;<!--",
]


class _Collector(HTMLParser):
    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.tags: list[tuple[str, list[tuple[str, str | None]]]] = []
        self.text: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.append((tag, attrs))

    def handle_data(self, data: str) -> None:
        self.text.append(data)


def parse(html_text: str) -> _Collector:
    c = _Collector()
    c.feed(html_text)
    c.close()
    return c


@pytest.mark.parametrize("payload", PAYLOADS)
def test_escaped_text_and_attributes_read_back_verbatim(payload: str) -> None:
    doc = f'<p title="{esc(payload)}">{esc(payload)}</p>'
    c = parse(doc)
    assert [t for t, _ in c.tags] == ["p"]  # no tag came out of the payload
    assert c.tags[0][1] == [("title", payload)]  # the attribute holds the payload and nothing broke out
    assert "".join(c.text) == payload


@pytest.mark.parametrize("payload", PAYLOADS)
def test_json_block_cannot_be_closed_early(payload: str) -> None:
    block = json_block("data", {"note": payload, "list": [payload]})
    inner = block[block.index(">") + 1: block.rindex("</script>")]
    assert "<" not in inner
    assert ">" not in inner
    assert json.loads(inner) == {"note": payload, "list": [payload]}


@pytest.mark.parametrize("payload", PAYLOADS)
def test_markdown_goes_through_the_allow_list(payload: str) -> None:
    out = markdown(f"Step text with **bold** and a [safe link](https://example.org) {payload}")
    c = parse(out)
    allowed = {"p", "br", "em", "strong", "code", "pre", "ul", "ol", "li", "blockquote", "a", "h4", "h5", "h6",
               "hr", "sub", "sup", "table", "thead", "tbody", "tr", "th", "td"}
    for tag, attrs in c.tags:
        assert tag in allowed, tag
        for name, value in attrs:
            assert not name.startswith("on"), name
            if name == "href":
                assert value is not None
                assert value.startswith(("https:", "http:", "mailto:")), value
    assert "<strong>bold</strong>" in out
    assert not re.search(r"<(script|img|svg|style)", out, re.IGNORECASE)


def test_page_is_self_contained_with_a_script_forbidding_policy() -> None:
    doc = page("t <script>", "<p>x</p>", data={"a": "</script>"})
    c = parse(doc)
    metas = [dict(a) for t, a in c.tags if t == "meta"]
    assert {"http-equiv": "Content-Security-Policy", "content": CSP} in metas
    assert "script-src" not in CSP
    assert "default-src 'none'" in CSP  # scripts fall back to default-src 'none': none run
    scripts = [dict(a) for t, a in c.tags if t == "script"]
    assert scripts == [{"type": "application/json", "id": "labkit-data"}]
    assert not [t for t, a in c.tags if t in ("link", "iframe", "object", "embed")]
    assert "@media print" in doc
    assert "break-before: page" in doc


def test_table_escapes_cells_unless_marked_raw() -> None:
    out = table(["a", "b"], [["<b>x</b>", "<i>ok</i>"]], raw_columns=(1,))
    assert "&lt;b&gt;x&lt;/b&gt;" in out
    assert "<i>ok</i>" in out


@pytest.mark.parametrize("payload", PAYLOADS)
def test_svg_text_is_well_formed_xml_and_round_trips(payload: str) -> None:
    svg = ('<svg xmlns="http://www.w3.org/2000/svg">'
           + shape_svg(Text(payload, True, "solid", x=1.0, y=2.0, text=payload)) + "</svg>")
    root = ET.fromstring(svg)
    (text_el,) = list(root)
    assert text_el.text == payload
    assert text_el.get("data-element") == payload


def test_minmax_envelope_matches_array_split_chunks() -> None:
    rng = np.random.default_rng(3)
    y = rng.normal(size=10_007)
    y[[5, 600, 601]] = np.nan
    for columns in (1, 7, 500, 10_006):
        lo, hi, starts = minmax_envelope(y, columns)
        chunks = np.array_split(y, columns)  # reference: numpy's own split
        assert np.array_equal(starts, np.cumsum([0] + [len(c) for c in chunks[:-1]]))
        with warnings.catch_warnings():  # an all-NaN chunk gives NaN in the reference too
            warnings.simplefilter("ignore", RuntimeWarning)
            want_lo, want_hi = [np.nanmin(c) for c in chunks], [np.nanmax(c) for c in chunks]
        assert np.allclose(lo, want_lo, equal_nan=True)
        assert np.allclose(hi, want_hi, equal_nan=True)
    lo, hi, starts = minmax_envelope(y[:10], 50)
    assert np.array_equal(lo, y[:10], equal_nan=True)
    assert np.array_equal(starts, np.arange(10))
    with pytest.raises(ValueError, match="columns"):
        minmax_envelope(y, 0)


def test_long_series_drawn_with_at_most_two_points_per_pixel_column() -> None:
    t = np.linspace(0.0, 1.0, 200_000)
    svg = line_chart([Series("v", t, np.sin(2 * np.pi * 60 * t))], xlabel="t", ylabel="v", width=520.0)
    root = ET.fromstring(svg)
    (poly,) = root.findall("{http://www.w3.org/2000/svg}polyline")
    points = poly.get("points").split()
    assert len(points) <= 2 * 520
    ys = [float(p.split(",")[1]) for p in points]
    # the envelope still reaches both peaks of the sine (the top and bottom of the plot area)
    assert min(ys) == pytest.approx(14.0, abs=1.0)
    assert max(ys) == pytest.approx(260.0 - 40.0, abs=1.0)


def test_histogram_bars_follow_numpy_histogram() -> None:
    rng = np.random.default_rng(11)
    values = rng.normal(0.0, 0.01, 5000)
    svg = histogram_svg(values, bins=25, xlabel="relative error")
    counts, _ = np.histogram(values, bins=25)  # reference
    root = ET.fromstring(svg)
    bars = [r for r in root.findall("{http://www.w3.org/2000/svg}rect") if r.get("fill") == "#9db7dc"]
    assert len(bars) == int((counts > 0).sum())
    heights = np.array([float(b.get("height")) for b in bars])
    nonzero = counts[counts > 0]
    assert np.allclose(heights / heights.max(), nonzero / nonzero.max(), atol=0.01)
    assert "n = 5000" in svg


def test_phasor_tips_sit_at_their_angles() -> None:
    size = 300.0
    svg = phasor_svg([Phasor("B1", 120.0, 30.0), Phasor("B2", 60.0, -45.0), Phasor("L12@B1", 2.0, -20.0, "current")],
                     size=size)
    root = ET.fromstring(svg)
    lines = [ln for ln in root.findall("{http://www.w3.org/2000/svg}line") if ln.get("stroke-width") == "1.8"]
    assert len(lines) == 3
    r, c = size / 2 - 46.0, size / 2
    # trigonometry: counter-clockwise angles on a y-down canvas; each kind scaled to its own largest
    for line, (mag, ang, full) in zip(lines, [(120.0, 30.0, 120.0), (60.0, -45.0, 120.0), (2.0, -20.0, 2.0)],
                                      strict=True):
        x2, y2 = float(line.get("x2")), float(line.get("y2"))
        assert x2 == pytest.approx(c + r * mag / full * math.cos(math.radians(ang)), abs=0.06)
        assert y2 == pytest.approx(c - r * mag / full * math.sin(math.radians(ang)), abs=0.06)
    assert lines[2].get("stroke-dasharray")  # currents dashed, not told apart by colour alone
