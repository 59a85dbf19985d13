"""Inline SVG: diagrams from :mod:`labkit.core.diagram` primitives, and the report's plots.

Plots are drawn here without a plotting library so a page needs nothing
external: line charts (with a min/max envelope for long signals and an optional
shaded band), histograms, phasor diagrams. All text goes through
:func:`labkit.report.html.esc`. Series are told apart by dash pattern and a
legend label as well as colour.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from labkit.core.diagram import Arc, Circle, Diagram, Line, Polyline, Rect, Shape, Text
from labkit.report.html import esc

LIVE = "#1d1d1f"
DEAD = "#7a7a86"
SERIES_STYLES = (("#1f4e8c", ""), ("#a1141c", "6 3"), ("#1b6e3a", "2 2"), ("#8a5a00", "8 3 2 3"),
                 ("#5b2a86", "1 3"), ("#0f6f74", "10 4"))


def _n(x: float) -> str:
    return f"{x:.1f}".rstrip("0").rstrip(".") if math.isfinite(x) else "0"


def _stroke(shape: Shape) -> str:
    color = LIVE if shape.energized else DEAD
    dash = ' stroke-dasharray="5 4"' if shape.style == "dashed" else ""
    return f'stroke="{color}"{dash}'


def shape_svg(shape: Shape) -> str:
    """One primitive as an SVG element (escaped)."""
    cls = f'class="el" data-element="{esc(shape.element)}"'
    if isinstance(shape, Line):
        return (f'<line {cls} x1="{_n(shape.x1)}" y1="{_n(shape.y1)}" x2="{_n(shape.x2)}" y2="{_n(shape.y2)}" '
                f'{_stroke(shape)} stroke-width="{_n(shape.weight)}"/>')
    if isinstance(shape, Polyline):
        pts = " ".join(f"{_n(x)},{_n(y)}" for x, y in shape.points)
        return f'<polyline {cls} points="{pts}" fill="none" {_stroke(shape)} stroke-width="{_n(shape.weight)}"/>'
    if isinstance(shape, Circle):
        fill = (LIVE if shape.energized else DEAD) if shape.filled else "none"
        return (f'<circle {cls} cx="{_n(shape.cx)}" cy="{_n(shape.cy)}" r="{_n(shape.r)}" fill="{fill}" '
                f'{_stroke(shape)} stroke-width="1.5"/>')
    if isinstance(shape, Arc):
        (x0, y0), (x1, y1) = shape.endpoints()
        sweep_deg = (shape.end_deg - shape.start_deg) % 360.0
        large = 1 if sweep_deg > 180.0 else 0
        return (f'<path {cls} d="M {_n(x0)} {_n(y0)} A {_n(shape.r)} {_n(shape.r)} 0 {large} 1 {_n(x1)} {_n(y1)}" '
                f'fill="none" {_stroke(shape)} stroke-width="1.5"/>')
    if isinstance(shape, Rect):
        return (f'<rect {cls} x="{_n(shape.x)}" y="{_n(shape.y)}" width="{_n(shape.width)}" '
                f'height="{_n(shape.height)}" fill="white" {_stroke(shape)} stroke-width="1.5"/>')
    assert isinstance(shape, Text)
    color = LIVE if shape.energized else DEAD
    return (f'<text {cls} x="{_n(shape.x)}" y="{_n(shape.y)}" text-anchor="{shape.anchor}" '
            f'font-size="{_n(shape.size)}" fill="{color}">{esc(shape.text)}</text>')


def diagram_svg(diagram: Diagram, *, label: str = "") -> str:
    """The whole diagram as one ``<svg>`` with a legend of the line styles."""
    w, h = diagram.width, diagram.height + 30.0
    parts = [f'<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 {_n(w)} {_n(h)}" width="{_n(w)}" '
             f'height="{_n(h)}" role="img" aria-label="{esc(label or diagram.title or "bench diagram")}">']
    if diagram.title:
        parts.append(f'<text x="10" y="18" font-size="13" fill="{LIVE}">{esc(diagram.title)}</text>')
    parts += [shape_svg(s) for s in diagram.shapes]
    y = h - 12.0
    parts.append(f'<line x1="10" y1="{_n(y)}" x2="40" y2="{_n(y)}" stroke="{LIVE}" stroke-width="2"/>'
                 f'<text x="46" y="{_n(y + 4)}" font-size="10">energized (solid)</text>'
                 f'<line x1="170" y1="{_n(y)}" x2="200" y2="{_n(y)}" stroke="{DEAD}" stroke-width="2" '
                 f'stroke-dasharray="5 4"/><text x="206" y="{_n(y + 4)}" font-size="10">de-energized (dashed)</text>')
    parts.append("</svg>")
    return "".join(parts)


# -- decimation ---------------------------------------------------------------------------------------
def minmax_envelope(y: ArrayLike, columns: int) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.intp]]:
    """Min and max of ``y`` per pixel column, and each column's first sample index.

    Samples are split into ``columns`` contiguous, nearly equal chunks (``numpy.array_split`` boundaries);
    a signal shorter than ``columns`` comes back unchanged (min = max = y). NaN samples are ignored; a
    column of NaN only gives NaN.
    """
    arr = np.asarray(y, dtype=float).ravel()
    if columns < 1:
        msg = f"columns: expected a positive number of pixel columns, found {columns}"
        raise ValueError(msg)
    n = arr.size
    if n <= columns:
        return arr.copy(), arr.copy(), np.arange(n)
    # numpy.array_split's chunks: the first n % columns chunks are one sample longer
    sizes = np.full(columns, n // columns)
    sizes[: n % columns] += 1
    starts = np.concatenate([[0], np.cumsum(sizes)[:-1]])
    lo = np.fmin.reduceat(np.where(np.isnan(arr), np.inf, arr), starts)
    hi = np.fmax.reduceat(np.where(np.isnan(arr), -np.inf, arr), starts)
    lo = np.where(np.isinf(lo) & (lo > 0), np.nan, lo)
    hi = np.where(np.isinf(hi) & (hi < 0), np.nan, hi)
    return lo, hi, starts


# -- charts ---------------------------------------------------------------------------------------------
@dataclass
class Series:
    """One plotted series: x and y values (same length) with a legend label."""

    label: str
    x: NDArray[np.float64]
    y: NDArray[np.float64]
    markers: bool = False


def _nice_ticks(lo: float, hi: float, n: int = 5) -> list[float]:
    if not (math.isfinite(lo) and math.isfinite(hi)):
        return []
    if hi <= lo:
        hi = lo + 1.0
    raw = (hi - lo) / max(n, 1)
    mag = 10 ** math.floor(math.log10(raw))
    step = min((m * mag for m in (1, 2, 2.5, 5, 10) if m * mag >= raw), default=10 * mag)
    first = math.ceil(lo / step) * step
    return [first + k * step for k in range(int((hi - first) / step + 1e-9) + 1)]


class _Axes:
    def __init__(self, xlim: tuple[float, float], ylim: tuple[float, float], width: float, height: float) -> None:
        self.left, self.right, self.top, self.bottom = 62.0, 12.0, 14.0, 40.0
        self.w, self.h = width, height
        x0, x1 = xlim
        y0, y1 = ylim
        if x1 <= x0:
            x0, x1 = x0 - 0.5, x0 + 0.5
        if y1 <= y0:
            pad = abs(y0) * 0.05 or 1.0
            y0, y1 = y0 - pad, y1 + pad
        self.xlim, self.ylim = (x0, x1), (y0, y1)

    def px(self, x: NDArray | float) -> NDArray:
        x0, x1 = self.xlim
        return self.left + (np.asarray(x, float) - x0) / (x1 - x0) * (self.w - self.left - self.right)

    def py(self, y: NDArray | float) -> NDArray:
        y0, y1 = self.ylim
        return self.top + (1.0 - (np.asarray(y, float) - y0) / (y1 - y0)) * (self.h - self.top - self.bottom)

    @property
    def plot_width_px(self) -> int:
        return max(int(self.w - self.left - self.right), 1)

    def frame(self, xlabel: str, ylabel: str) -> list[str]:
        out = [f'<rect x="{_n(self.left)}" y="{_n(self.top)}" width="{_n(self.w - self.left - self.right)}" '
               f'height="{_n(self.h - self.top - self.bottom)}" fill="none" stroke="#9a9aa6"/>']
        for t in _nice_ticks(*self.xlim):
            x = float(self.px(t))
            out.append(f'<line x1="{_n(x)}" y1="{_n(self.h - self.bottom)}" x2="{_n(x)}" '
                       f'y2="{_n(self.h - self.bottom + 4)}" stroke="#555"/>'
                       f'<text x="{_n(x)}" y="{_n(self.h - self.bottom + 15)}" font-size="10" '
                       f'text-anchor="middle">{esc(f"{t:.4g}")}</text>')
        for t in _nice_ticks(*self.ylim):
            y = float(self.py(t))
            out.append(f'<line x1="{_n(self.left - 4)}" y1="{_n(y)}" x2="{_n(self.left)}" y2="{_n(y)}" '
                       f'stroke="#555"/><line x1="{_n(self.left)}" y1="{_n(y)}" x2="{_n(self.w - self.right)}" '
                       f'y2="{_n(y)}" stroke="#e4e4ea"/>'
                       f'<text x="{_n(self.left - 6)}" y="{_n(y + 3)}" font-size="10" '
                       f'text-anchor="end">{esc(f"{t:.4g}")}</text>')
        out.append(f'<text x="{_n((self.left + self.w - self.right) / 2)}" y="{_n(self.h - 6)}" font-size="11" '
                   f'text-anchor="middle">{esc(xlabel)}</text>')
        out.append(f'<text x="12" y="{_n(self.h / 2)}" font-size="11" text-anchor="middle" '
                   f'transform="rotate(-90 12 {_n(self.h / 2)})">{esc(ylabel)}</text>')
        return out


def _open(width: float, height: float, label: str) -> str:
    return (f'<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 {_n(width)} {_n(height)}" width="{_n(width)}" '
            f'height="{_n(height)}" role="img" aria-label="{esc(label)}">')


def line_chart(series: Sequence[Series], *, xlabel: str, ylabel: str, title: str = "", width: float = 520.0,
               height: float = 260.0, band: tuple[float, float] | None = None, band_label: str = "",
               hbands: Sequence[tuple[float, float]] = (), vspans: Sequence[tuple[float, float]] = (),
               vspan_label: str = "") -> str:
    """A line chart; long series are drawn as their min/max envelope per pixel column.

    ``band`` shades a horizontal band (e.g. a tolerance band or a permitted phase window); ``vspans``
    shade x intervals (e.g. closing windows). Each shaded thing is named in the legend.
    """
    finite_x = [s.x[np.isfinite(s.x)] for s in series if s.x.size]
    finite_y = [s.y[np.isfinite(s.y)] for s in series if s.y.size]
    xs = np.concatenate(finite_x) if finite_x else np.array([0.0, 1.0])
    ys = np.concatenate(finite_y) if finite_y else np.array([0.0, 1.0])
    ys_all = list(ys) + ([band[0], band[1]] if band else [])
    ys_all += [v for hb in hbands for v in hb]
    if not len(xs):
        xs = np.array([0.0, 1.0])
    ax = _Axes((float(np.min(xs)), float(np.max(xs))), (float(np.min(ys_all)), float(np.max(ys_all))), width,
               height)
    out = [_open(width, height, title or ylabel)]
    for lo, hi in [*([band] if band else []), *hbands]:
        y_hi, y_lo = float(ax.py(hi)), float(ax.py(lo))
        out.append(f'<rect x="{_n(ax.left)}" y="{_n(y_hi)}" width="{_n(ax.w - ax.left - ax.right)}" '
                   f'height="{_n(max(y_lo - y_hi, 0.5))}" fill="#dfe9f6" stroke="#1f4e8c" stroke-dasharray="2 2"/>')
    for x0, x1 in vspans:
        a, b = float(ax.px(x0)), float(ax.px(x1))
        out.append(f'<rect x="{_n(a)}" y="{_n(ax.top)}" width="{_n(max(b - a, 0.8))}" '
                   f'height="{_n(ax.h - ax.top - ax.bottom)}" fill="#e3f1e6" stroke="#1b6e3a" '
                   f'stroke-dasharray="1 2"/>')
    out += ax.frame(xlabel, ylabel)
    legend: list[tuple[str, str, str]] = []
    for k, s in enumerate(series):
        color, dash = SERIES_STYLES[k % len(SERIES_STYLES)]
        dash_attr = f' stroke-dasharray="{dash}"' if dash else ""
        ok = np.isfinite(s.x) & np.isfinite(s.y)
        x, y = s.x[ok], s.y[ok]
        if x.size > ax.plot_width_px:
            lo, hi, starts = minmax_envelope(y, ax.plot_width_px)
            xc = x[starts]
            pts = np.column_stack([np.repeat(ax.px(xc), 2), np.column_stack([ax.py(lo), ax.py(hi)]).ravel()])
        else:
            pts = np.column_stack([ax.px(x), ax.py(y)])
        if pts.size:
            path = " ".join(f"{_n(px)},{_n(py)}" for px, py in pts)
            out.append(f'<polyline points="{path}" fill="none" stroke="{color}" stroke-width="1.4"{dash_attr}/>')
        if s.markers:
            out += [f'<circle cx="{_n(px)}" cy="{_n(py)}" r="2.6" fill="{color}"/>'
                    for px, py in np.column_stack([ax.px(x), ax.py(y)])]
        legend.append((s.label, color, dash))
    if band:
        legend.append((band_label or "band", "#1f4e8c", "2 2"))
    if vspans:
        legend.append((vspan_label or "windows", "#1b6e3a", "1 2"))
    lx = ax.left + 6.0
    for k, (label, color, dash) in enumerate(legend):
        ly = ax.top + 12.0 + 13.0 * k
        dash_attr = f' stroke-dasharray="{dash}"' if dash else ""
        out.append(f'<line x1="{_n(lx)}" y1="{_n(ly - 3)}" x2="{_n(lx + 18)}" y2="{_n(ly - 3)}" stroke="{color}" '
                   f'stroke-width="2"{dash_attr}/><text x="{_n(lx + 22)}" y="{_n(ly)}" font-size="10">'
                   f"{esc(label)}</text>")
    out.append("</svg>")
    return "".join(out)


def histogram_svg(values: ArrayLike, *, bins: int = 30, xlabel: str, title: str = "", width: float = 420.0,
                  height: float = 220.0) -> str:
    """A histogram of the finite values (``numpy.histogram`` bin edges), with the count of values shown."""
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v)]
    if v.size == 0:
        return f'<p class="muted">{esc(title)}: no values</p>'
    counts, edges = np.histogram(v, bins=bins)
    ax = _Axes((float(edges[0]), float(edges[-1])), (0.0, float(counts.max()) * 1.08), width, height)
    out = [_open(width, height, title or xlabel)]
    out += ax.frame(xlabel, "count")
    for c, a, b in zip(counts, edges[:-1], edges[1:], strict=True):
        if c == 0:
            continue
        x0, x1, y = float(ax.px(a)), float(ax.px(b)), float(ax.py(c))
        out.append(f'<rect x="{_n(x0)}" y="{_n(y)}" width="{_n(max(x1 - x0 - 0.5, 0.5))}" '
                   f'height="{_n(ax.py(0.0) - y)}" fill="#9db7dc" stroke="#1f4e8c" stroke-width="0.6"/>')
    out.append(f'<text x="{_n(width - 14)}" y="{_n(ax.top + 12)}" font-size="10" text-anchor="end">'
               f"n = {v.size}</text></svg>")
    return "".join(out)


@dataclass
class Phasor:
    """One phasor to draw: RMS magnitude, angle (deg), label and kind ("voltage" or "current")."""

    label: str
    magnitude: float
    angle_deg: float
    kind: str = "voltage"


def phasor_svg(phasors: Sequence[Phasor], *, title: str = "", size: float = 300.0) -> str:
    """Phasor diagram: voltages and currents on their own scales (each longest at the radius).

    Angles are drawn counter-clockwise from +x (the reference), as is usual for phasor diagrams; voltages are
    solid arrows, currents dashed, and each is labelled with its magnitude and angle.
    """
    r = size / 2 - 46.0
    cx = cy = size / 2
    out = [_open(size, size, title or "phasor diagram")]
    out.append(f'<circle cx="{_n(cx)}" cy="{_n(cy)}" r="{_n(r)}" fill="none" stroke="#e0e0e6"/>'
               f'<line x1="{_n(cx - r - 8)}" y1="{_n(cy)}" x2="{_n(cx + r + 8)}" y2="{_n(cy)}" stroke="#c9c9d1"/>'
               f'<line x1="{_n(cx)}" y1="{_n(cy - r - 8)}" x2="{_n(cx)}" y2="{_n(cy + r + 8)}" stroke="#c9c9d1"/>')
    scale = {}
    for kind in ("voltage", "current"):
        mags = [p.magnitude for p in phasors if p.kind == kind and math.isfinite(p.magnitude)]
        scale[kind] = (r / max(mags)) if mags and max(mags) > 0 else 0.0
    drawn: list[float] = []

    def same_angle(k: int) -> int:
        angle = phasors[k].angle_deg
        count = sum(1 for a in drawn if abs((a - angle + 180.0) % 360.0 - 180.0) < 8.0)
        drawn.append(angle)
        return count

    for k, p in enumerate(phasors):
        if not (math.isfinite(p.magnitude) and math.isfinite(p.angle_deg)):
            continue
        length = p.magnitude * scale[p.kind]
        a = math.radians(p.angle_deg)
        x, y = cx + length * math.cos(a), cy - length * math.sin(a)
        color, _ = SERIES_STYLES[k % len(SERIES_STYLES)]
        dash = ' stroke-dasharray="5 3"' if p.kind == "current" else ""
        # arrow head as two short strokes, so no marker definitions (ids) are needed
        heads = []
        for side in (+1, -1):
            b = a + math.pi + side * math.radians(24)
            heads.append(f'<line x1="{_n(x)}" y1="{_n(y)}" x2="{_n(x + 9 * math.cos(b))}" '
                         f'y2="{_n(y - 9 * math.sin(b))}" stroke="{color}" stroke-width="1.6"/>')
        unit = "V" if p.kind == "voltage" else "A"
        out.append(f'<line x1="{_n(cx)}" y1="{_n(cy)}" x2="{_n(x)}" y2="{_n(y)}" stroke="{color}" '
                   f'stroke-width="1.8"{dash}/>' + "".join(heads))
        # labels of phasors at nearly the same angle are stacked, not overprinted
        tx, ty = cx + (length + 14) * math.cos(a), cy - (length + 14) * math.sin(a) + 11.0 * same_angle(k)
        anchor = "start" if math.cos(a) > 0.2 else ("end" if math.cos(a) < -0.2 else "middle")
        out.append(f'<text x="{_n(tx)}" y="{_n(ty)}" font-size="9.5" text-anchor="{anchor}" fill="{color}">'
                   f"{esc(p.label)} {esc(f'{p.magnitude:.3g}')} {unit} "
                   f"\u2220{esc(f'{p.angle_deg:.1f}')}\u00b0</text>")
    out.append(f'<text x="6" y="{_n(size - 6)}" font-size="9" fill="#5b5b66">voltages solid, currents dashed; '
               "each kind on its own scale</text></svg>")
    return "".join(out)
