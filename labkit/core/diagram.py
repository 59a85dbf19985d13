"""Geometry of a bench's one-line diagram in a given state: plain primitives, no drawing library.

:func:`bench_diagram` lays a bench out deterministically and returns a
:class:`Diagram` of primitives (lines, polylines, circles, arcs, rectangles,
text) in a y-down coordinate system (px), so an SVG writer
(:mod:`labkit.report.svg`) or a plotting widget can draw the same picture.

Layout (common practice for one-line diagrams, our own arrangement):

* buses are horizontal bars; their column is the graph distance (over switches
  and line branches) from the reference source's bus, their row the order in
  which a breadth-first walk meets them;
* sources and loads hang below their bus; switches and line branches join two
  buses through an orthogonal route (over the bars, or beside them when both
  buses share a column) that carries the element's symbol;
* symbols follow the IEEE 315 / IEC 60617 conventions for a one-line diagram:
  a source is a circle with a sine, a switch two contacts with a blade (raised
  when open), a resistor an IEC box, an inductor a coil of arcs, a capacitor two
  plates, a nonlinear load a box holding a diode; a line branch in an active
  position is drawn as pi sections (series box and coil, a shunt capacitor to
  earth at each end of each section).

Every primitive carries the element it belongs to and whether that element is
energized; energized parts are solid and de-energized parts dashed, and every
element has a text tag ("on"/"off", "open"/"closed"), so nothing relies on
colour alone.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import Literal

from labkit.core.bench import AlternatorSet, Bench, LinearLoad, MainsReference, NonlinearLoad
from labkit.core.network import compile_network
from labkit.core.state import BenchState

LineStyle = Literal["solid", "dashed"]
ItemKind = Literal["bus", "source", "switch", "line_branch", "load", "sensor"]

# layout constants (px)
COLUMN_GAP = 90.0  # free space between the bars of two columns, before symbols need more
BAR_SLOT = 54.0  # width on a bar per attached element
BAR_MIN = 120.0
HANG = 150.0  # height below a bar taken by hanging elements and their labels
LANE = 44.0  # spacing of link routes (room for a pi section's shunt capacitors)
MARGIN = 40.0
SECTION_LENGTH = 96.0  # one pi section along its route
SWITCH_LENGTH = 44.0


# -- primitives -------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Primitive:
    """Common fields: the element drawn, its state, and the stroke style that shows the state."""

    element: str
    energized: bool
    style: LineStyle


@dataclass(frozen=True)
class Line(Primitive):
    """A straight stroke from (x1, y1) to (x2, y2), px."""

    x1: float = 0.0
    y1: float = 0.0
    x2: float = 0.0
    y2: float = 0.0
    weight: float = 1.5


@dataclass(frozen=True)
class Polyline(Primitive):
    """An open stroke through points, px."""

    points: tuple[tuple[float, float], ...] = ()
    weight: float = 1.5


@dataclass(frozen=True)
class Circle(Primitive):
    """A circle of centre (cx, cy) and radius r, px; ``filled`` for contact dots."""

    cx: float = 0.0
    cy: float = 0.0
    r: float = 1.0
    filled: bool = False


@dataclass(frozen=True)
class Arc(Primitive):
    """A circular arc of centre (cx, cy), radius r (px) from ``start_deg`` to ``end_deg``.

    Angles are measured clockwise from +x on the y-down drawing plane, and the arc
    runs from start to end in the direction of increasing angle.
    """

    cx: float = 0.0
    cy: float = 0.0
    r: float = 1.0
    start_deg: float = 0.0
    end_deg: float = 180.0

    def endpoints(self) -> tuple[tuple[float, float], tuple[float, float]]:
        """Start and end points of the arc (px)."""
        a, b = math.radians(self.start_deg), math.radians(self.end_deg)
        return ((self.cx + self.r * math.cos(a), self.cy + self.r * math.sin(a)),
                (self.cx + self.r * math.cos(b), self.cy + self.r * math.sin(b)))


@dataclass(frozen=True)
class Rect(Primitive):
    """An axis-aligned rectangle with its top-left corner at (x, y), px."""

    x: float = 0.0
    y: float = 0.0
    width: float = 0.0
    height: float = 0.0


@dataclass(frozen=True)
class Text(Primitive):
    """A label anchored at (x, y) px; ``anchor`` start, middle or end; ``size`` in px."""

    x: float = 0.0
    y: float = 0.0
    text: str = ""
    anchor: Literal["start", "middle", "end"] = "middle"
    size: float = 11.0


Shape = Line | Polyline | Circle | Arc | Rect | Text


@dataclass(frozen=True)
class DiagramItem:
    """One bench element as placed: its kind, state, tag and bounding box (px)."""

    id: str
    kind: ItemKind
    energized: bool
    closed: bool | None  # switches and line branches: True closed/connected; None where it does not apply
    tag: str  # the state in words: "energized", "de-energized", "open", "closed", "off"
    x: float
    y: float
    width: float
    height: float
    buses: tuple[str, ...] = ()
    detail: str = ""


@dataclass
class Diagram:
    """A laid-out diagram: its size, primitives in drawing order, and the placed items."""

    width: float
    height: float
    shapes: list[Shape] = field(default_factory=list)
    items: list[DiagramItem] = field(default_factory=list)
    title: str = ""
    ends: dict[tuple[str, str], tuple[float, float]] = field(default_factory=dict)
    """Where each element meets a bus, (element, bus) -> (x, y) px: the place of an ``ELEMENT@BUS`` sensor."""

    def item(self, item_id: str, kind: ItemKind | None = None) -> DiagramItem:
        """The placed item with this id (and kind, when ids could be shared by a sensor placement)."""
        for it in self.items:
            if it.id == item_id and (kind is None or it.kind == kind):
                return it
        msg = f'no item "{item_id}" in the diagram'
        raise KeyError(msg)

    def shapes_of(self, element: str) -> list[Shape]:
        """Primitives drawn for one element."""
        return [s for s in self.shapes if s.element == element]


# -- transforms (symbols are built along +x, with +y the "down to earth" side) ----------------------
@dataclass(frozen=True)
class _Frame:
    """Rotation by a multiple of 90 deg (clockwise, y down) then a translation."""

    ox: float
    oy: float
    quarter: int = 0  # 0: along +x, 1: along +y (down), 2: along -x, 3: along -y (up)

    def point(self, x: float, y: float) -> tuple[float, float]:
        q = self.quarter % 4
        rx, ry = ((x, y), (-y, x), (-x, -y), (y, -x))[q]
        return self.ox + rx, self.oy + ry


def _place(shape: Shape, fr: _Frame) -> Shape:
    if isinstance(shape, Line):
        (x1, y1), (x2, y2) = fr.point(shape.x1, shape.y1), fr.point(shape.x2, shape.y2)
        return replace(shape, x1=x1, y1=y1, x2=x2, y2=y2)
    if isinstance(shape, Polyline):
        return replace(shape, points=tuple(fr.point(x, y) for x, y in shape.points))
    if isinstance(shape, Circle):
        cx, cy = fr.point(shape.cx, shape.cy)
        return replace(shape, cx=cx, cy=cy)
    if isinstance(shape, Arc):
        cx, cy = fr.point(shape.cx, shape.cy)
        turn = 90.0 * (fr.quarter % 4)
        return replace(shape, cx=cx, cy=cy, start_deg=shape.start_deg + turn, end_deg=shape.end_deg + turn)
    if isinstance(shape, Rect):
        (xa, ya), (xb, yb) = fr.point(shape.x, shape.y), fr.point(shape.x + shape.width, shape.y + shape.height)
        return replace(shape, x=min(xa, xb), y=min(ya, yb), width=abs(xb - xa), height=abs(yb - ya))
    x, y = fr.point(shape.x, shape.y)
    return replace(shape, x=x, y=y)


class _Pen:
    """Builds one element's primitives in its local frame with its state."""

    def __init__(self, element: str, energized: bool) -> None:
        self.element = element
        self.energized = energized
        self.style: LineStyle = "solid" if energized else "dashed"
        self.shapes: list[Shape] = []

    def _common(self) -> dict[str, object]:
        return {"element": self.element, "energized": self.energized, "style": self.style}

    def line(self, x1: float, y1: float, x2: float, y2: float, weight: float = 1.5) -> None:
        self.shapes.append(Line(**self._common(), x1=x1, y1=y1, x2=x2, y2=y2, weight=weight))  # type: ignore[arg-type]

    def poly(self, points: Iterable[tuple[float, float]], weight: float = 1.5) -> None:
        self.shapes.append(Polyline(**self._common(), points=tuple(points), weight=weight))  # type: ignore[arg-type]

    def circle(self, cx: float, cy: float, r: float, filled: bool = False) -> None:
        self.shapes.append(Circle(**self._common(), cx=cx, cy=cy, r=r, filled=filled))  # type: ignore[arg-type]

    def arc(self, cx: float, cy: float, r: float, start: float, end: float) -> None:
        self.shapes.append(Arc(**self._common(), cx=cx, cy=cy, r=r, start_deg=start, end_deg=end))  # type: ignore[arg-type]

    def rect(self, x: float, y: float, w: float, h: float) -> None:
        self.shapes.append(Rect(**self._common(), x=x, y=y, width=w, height=h))  # type: ignore[arg-type]

    def text(self, x: float, y: float, text: str, anchor: str = "middle", size: float = 11.0) -> None:
        self.shapes.append(Text(**self._common(), x=x, y=y, text=text, anchor=anchor, size=size))  # type: ignore[arg-type]

    def placed(self, fr: _Frame) -> list[Shape]:
        return [_place(s, fr) for s in self.shapes]


# -- symbols in a local frame -------------------------------------------------------------------------
def _ground(p: _Pen, x: float, y: float) -> None:
    """Earth symbol: three shrinking bars below (x, y)."""
    for k, half in enumerate((9.0, 6.0, 3.0)):
        p.line(x - half, y + 4.0 * k, x + half, y + 4.0 * k)


def _box(p: _Pen, x0: float, length: float = 24.0, height: float = 10.0) -> None:
    """IEC resistor box along +x from x0 (on the y = 0 axis)."""
    p.rect(x0, -height / 2, length, height)


def _coil(p: _Pen, x0: float, turns: int = 4, radius: float = 4.0) -> None:
    """Inductor: ``turns`` half-circle arcs along +x from x0, bulging to -y."""
    for k in range(turns):
        p.arc(x0 + radius * (2 * k + 1), 0.0, radius, 180.0, 360.0)


def _capacitor_down(p: _Pen, x: float, y0: float, gap: float = 5.0, plate: float = 16.0) -> None:
    """Capacitor on a vertical lead at x: plates across the lead at y0 and y0 + gap."""
    p.line(x - plate / 2, y0, x + plate / 2, y0, weight=2.0)
    p.line(x - plate / 2, y0 + gap, x + plate / 2, y0 + gap, weight=2.0)


def _sine_in_circle(p: _Pen, cx: float, cy: float, r: float) -> None:
    p.circle(cx, cy, r)
    n = 17
    pts = [(cx - 0.6 * r + 1.2 * r * k / (n - 1), cy - 0.35 * r * math.sin(2 * math.pi * k / (n - 1)))
           for k in range(n)]
    p.poly(pts, weight=1.2)


def _switch_symbol(p: _Pen, length: float, closed: bool) -> None:
    """Two contacts on the axis and a blade: along the axis when closed, raised 30 deg when open."""
    a, b = 10.0, length - 10.0
    p.line(0.0, 0.0, a, 0.0)
    p.line(b, 0.0, length, 0.0)
    p.circle(a, 0.0, 2.5, filled=True)
    p.circle(b, 0.0, 2.5, filled=True)
    if closed:
        p.line(a, 0.0, b, 0.0, weight=2.0)
    else:
        blade = b - a
        p.line(a, 0.0, a + blade * math.cos(math.radians(30)), -blade * math.sin(math.radians(30)), weight=2.0)


def _pi_section(p: _Pen, x0: float) -> None:
    """One pi section from x0 to x0 + SECTION_LENGTH: shunt C, series box + coil, shunt C."""
    xa, xb = x0 + 14.0, x0 + SECTION_LENGTH - 14.0
    p.line(x0, 0.0, x0 + 28.0, 0.0)
    _box(p, x0 + 28.0, 18.0)
    p.line(x0 + 46.0, 0.0, x0 + 50.0, 0.0)
    _coil(p, x0 + 50.0, turns=3, radius=4.0)
    p.line(x0 + 74.0, 0.0, x0 + SECTION_LENGTH, 0.0)
    for x in (xa, xb):
        p.circle(x, 0.0, 1.8, filled=True)
        p.line(x, 0.0, x, 12.0)
        _capacitor_down(p, x, 12.0)
        p.line(x, 17.0, x, 24.0)
        _ground(p, x, 24.0)


# -- layout ---------------------------------------------------------------------------------------------
@dataclass
class _Link:
    id: str
    kind: Literal["switch", "line_branch"]
    a: str
    b: str
    length: float  # along the route, px, needed by the symbol
    paths: int = 1  # parallel paths drawn side by side (each takes a lane)


def _links(bench: Bench, state: BenchState) -> list[_Link]:
    out = [_Link(sw.id, "switch", sw.from_bus, sw.to_bus, SWITCH_LENGTH) for sw in bench.switches]
    for br in bench.line_branches:
        pos_name = state.line_position(br.id)
        pos = next((p for p in br.positions if p.name == pos_name), None)
        n_sections = max((len(path) for path in pos.paths), default=1) if pos is not None else 0
        length = SWITCH_LENGTH + max(n_sections, 1) * SECTION_LENGTH
        out.append(_Link(br.id, "line_branch", br.from_bus, br.to_bus, length, len(pos.paths) if pos else 1))
    return out


def reference_bus(bench: Bench) -> str:
    """The bus the layout starts from: the mains reference's bus, else the first source's."""
    for src in bench.sources:
        if isinstance(src, MainsReference):
            return src.bus
    return bench.sources[0].bus


def bus_grid(bench: Bench, links: Sequence[_Link] | None = None) -> dict[str, tuple[int, int]]:
    """(column, row) of every bus: column = graph distance from the reference bus, row = discovery order.

    Buses not reachable from the reference get columns after the others (each unreached part starts a
    new walk, in file order), so the layout is total and deterministic.
    """
    links = list(links) if links is not None else _links(bench, BenchState())
    adjacency: dict[str, list[str]] = {b: [] for b in bench.bus_names}
    for ln in links:
        adjacency[ln.a].append(ln.b)
        adjacency[ln.b].append(ln.a)
    grid: dict[str, tuple[int, int]] = {}
    rows_used: dict[int, int] = {}
    starts = [reference_bus(bench), *bench.bus_names]
    col_offset = 0
    for start in starts:
        if start in grid:
            continue
        dist = {start: 0}
        order = [start]
        k = 0
        while k < len(order):
            bus = order[k]
            k += 1
            for nxt in adjacency[bus]:
                if nxt not in dist:
                    dist[nxt] = dist[bus] + 1
                    order.append(nxt)
        for bus in order:
            col = col_offset + dist[bus]
            grid[bus] = (col, rows_used.get(col, 0))
            rows_used[col] = rows_used.get(col, 0) + 1
        col_offset = max(c for c, _ in grid.values()) + 1
    return grid


def bench_diagram(bench: Bench, state: BenchState, *, sensors: Mapping[str, str] | None = None,
                  title: str = "") -> Diagram:
    """Lay out the bench in ``state`` as a :class:`Diagram`.

    Parameters
    ----------
    bench
        The bench (type or cart-specialized).
    state
        Its present state (what is started, closed, connected, switched on).
    sensors
        Sensor id -> location of the sensors placed now (e.g. those a step reads); each gets a marker at its
        bus or element end. ``None`` places none.
    title
        Shown above the drawing.

    Returns
    -------
    Diagram
        Primitives in px (y down) and one :class:`DiagramItem` per bus, source, switch, line branch, load
        and placed sensor.
    """
    net = compile_network(bench, state)
    live_buses = set(net.bus_node)
    links = _links(bench, state)
    grid = bus_grid(bench, links)
    hanging: dict[str, list[str]] = {b: [] for b in bench.bus_names}
    for src in bench.sources:
        hanging[src.bus].append(src.id)
    for ld in bench.loads:
        hanging[ld.bus].append(ld.id)
    attach_top: dict[str, list[_Link]] = {b: [] for b in bench.bus_names}
    attach_side: dict[str, list[_Link]] = {b: [] for b in bench.bus_names}
    for ln in links:
        same_col = grid[ln.a][0] == grid[ln.b][0]
        for end in (ln.a, ln.b):
            (attach_side if same_col else attach_top)[end].append(ln)
    bar_width = {b: max(BAR_MIN, BAR_SLOT * (len(hanging[b]) + len(attach_top[b])) + 20.0) for b in bench.bus_names}

    # column widths and gaps from the longest symbol that crosses each gap
    n_cols = max(c for c, _ in grid.values()) + 1
    col_width = [max([bar_width[b] for b, (c, _) in grid.items() if c == col] + [BAR_MIN]) for col in range(n_cols)]
    gaps = [COLUMN_GAP] * max(n_cols - 1, 0)
    side_room = [0.0] * n_cols
    for ln in links:
        ca, cb = sorted((grid[ln.a][0], grid[ln.b][0]))
        if ca == cb:
            side_room[ca] = max(side_room[ca], 30.0 + LANE * len([x for x in links if grid[x.a][0] == grid[x.b][0]
                                                                  == ca]))
            continue
        span = sum(col_width[ca + 1:cb]) + sum(gaps[ca:cb])
        need = ln.length + 40.0 - span - col_width[ca] / 2 - col_width[cb] / 2
        if need > 0:
            gaps[cb - 1] += need
    for col in range(n_cols - 1):
        gaps[col] += side_room[col]
    col_x = [MARGIN]
    for col in range(1, n_cols):
        col_x.append(col_x[-1] + col_width[col - 1] + gaps[col - 1])

    # row heights: lanes above each bar, then what hangs below; same-column links need their length
    n_rows = max(r for _, r in grid.values()) + 1
    lanes_of_row = [1 + max([sum(ln.paths for ln in attach_top[b]) for b, (_, r) in grid.items() if r == row] + [0])
                    for row in range(n_rows)]
    row_y = [MARGIN + 30.0 + LANE * lanes_of_row[0]]
    for row in range(1, n_rows):
        pitch = HANG + LANE * lanes_of_row[row] + 20.0
        for ln in links:
            (ca, ra), (cb, rb) = grid[ln.a], grid[ln.b]
            if ca == cb and {ra, rb} == {row - 1, row}:
                pitch = max(pitch, ln.length + 40.0)
        row_y.append(row_y[-1] + pitch)

    diagram = Diagram(width=0.0, height=0.0, title=title)
    bar_left = {b: col_x[c] + (col_width[c] - bar_width[b]) / 2 for b, (c, _) in grid.items()}
    bar_y = {b: row_y[r] for b, (_, r) in grid.items()}
    next_slot = dict.fromkeys(bench.bus_names, 0)

    def slot_x(bus: str) -> float:
        k = next_slot[bus]
        next_slot[bus] += 1
        return bar_left[bus] + 10.0 + BAR_SLOT * (k + 0.5)

    # buses
    for name in bench.bus_names:
        live = name in live_buses
        p = _Pen(name, live)
        x0, y0, w = bar_left[name], bar_y[name], bar_width[name]
        p.line(x0, y0, x0 + w, y0, weight=5.0)
        tag = "energized" if live else "de-energized"
        p.text(x0, y0 - 8.0, name, anchor="start", size=12.0)
        p.text(x0 + w, y0 - 8.0, tag, anchor="end", size=9.0)
        diagram.shapes += p.shapes
        diagram.items.append(DiagramItem(name, "bus", live, None, tag, x0, y0 - 3.0, w, 6.0, (name,)))

    # hanging elements: sources, then loads, in file order
    for src in bench.sources:
        _hang_source(diagram, src, state, src.bus in live_buses and src.id in state.started, slot_x(src.bus),
                     bar_y[src.bus])
    for ld in bench.loads:
        step = state.load_step(ld.id)
        live = step > 0 and ld.bus in live_buses
        _hang_load(diagram, ld, step, live, slot_x(ld.bus), bar_y[ld.bus])

    # links
    lane_count: dict[str, int] = dict.fromkeys(bench.bus_names, 0)
    side_count: dict[int, int] = {}
    for ln in links:
        _draw_link(diagram, bench, state, ln, grid, live_buses, slot_x, bar_left, bar_width, bar_y, col_x,
                   col_width, lane_count, side_count)

    # sensors
    for sensor_id, location in (sensors or {}).items():
        _place_sensor(diagram, bench, sensor_id, location, live_buses)

    xs = [s.x2 for s in diagram.shapes if isinstance(s, Line)] + [s.x1 for s in diagram.shapes if isinstance(s, Line)]
    xs += [it.x + it.width for it in diagram.items]
    ys = [s.y2 for s in diagram.shapes if isinstance(s, Line)] + [it.y + it.height for it in diagram.items]
    diagram.width = max(xs) + MARGIN
    diagram.height = max(ys) + MARGIN
    return diagram


def _hang_source(diagram: Diagram, src: MainsReference | AlternatorSet, state: BenchState, live: bool, x: float,
                 y_bar: float) -> None:
    p = _Pen(src.id, live)
    r = 15.0
    p.line(x, y_bar, x, y_bar + 30.0)
    _sine_in_circle(p, x, y_bar + 30.0 + r, r)
    p.line(x, y_bar + 30.0 + 2 * r, x, y_bar + 72.0)
    _ground(p, x, y_bar + 72.0)
    started = src.id in state.started
    tag = "energized" if live else ("started" if started else "stopped")
    kind = "mains ref." if isinstance(src, MainsReference) else "set"
    p.text(x, y_bar + 98.0, src.id, size=11.0)
    p.text(x, y_bar + 111.0, kind, size=9.0)
    p.text(x, y_bar + 123.0, tag, size=9.0)
    diagram.shapes += p.shapes
    diagram.items.append(DiagramItem(src.id, "source", live, None, tag, x - r, y_bar, 2 * r, 124.0, (src.bus,),
                                     kind))
    diagram.ends[(src.id, src.bus)] = (x, y_bar + 14.0)


def _hang_load(diagram: Diagram, ld: LinearLoad | NonlinearLoad, step: int, live: bool, x: float,
               y_bar: float) -> None:
    p = _Pen(ld.id, live)
    y = y_bar
    p.line(x, y, x, y + 24.0)
    y += 24.0
    # each symbol is built along +x and turned to run downward
    down = _Frame(x, y, quarter=1)
    sym = _Pen(ld.id, live)
    if isinstance(ld, NonlinearLoad):
        sym.rect(0.0, -12.0, 36.0, 24.0)
        # diode inside, conducting along the lead: triangle pointing to +x and a bar
        sym.poly([(10.0, -7.0), (10.0, 7.0), (24.0, 0.0), (10.0, -7.0)], weight=1.2)
        sym.line(24.0, -7.0, 24.0, 7.0, weight=1.2)
        length, what = 36.0, "nonlinear"
    elif ld.kind == "resistive":
        _box(sym, 0.0, 30.0, 12.0)
        length, what = 30.0, "R"
    elif ld.kind == "inductive":
        _coil(sym, 0.0, turns=4, radius=4.0)
        length, what = 32.0, "L"
    elif ld.kind == "capacitive":
        sym.line(0.0, 0.0, 12.0, 0.0)
        sym.line(12.0, -9.0, 12.0, 9.0, weight=2.0)
        sym.line(18.0, -9.0, 18.0, 9.0, weight=2.0)
        sym.line(18.0, 0.0, 30.0, 0.0)
        length, what = 30.0, "C"
    else:  # combined bank: a box and a coil in series
        _box(sym, 0.0, 18.0, 10.0)
        sym.line(18.0, 0.0, 22.0, 0.0)
        _coil(sym, 22.0, turns=2, radius=4.0)
        length, what = 38.0, "RLC"
    p.shapes += sym.placed(down)
    y += length
    p.line(x, y, x, y + 14.0)
    _ground(p, x, y + 14.0)
    tag = f"step {step}" if step > 0 else "off"
    state_word = "energized" if live else "de-energized"
    p.text(x, y_bar + 112.0, ld.id, size=11.0)
    p.text(x, y_bar + 124.0, f"{what}, {tag}", size=9.0)
    p.text(x, y_bar + 136.0, state_word, size=9.0)
    diagram.shapes += p.shapes
    diagram.items.append(DiagramItem(ld.id, "load", live, None, state_word if step > 0 else "off", x - 12.0, y_bar,
                                     24.0, 138.0, (ld.bus,), f"{what}, {tag}"))
    diagram.ends[(ld.id, ld.bus)] = (x, y_bar + 12.0)


def _draw_link(diagram: Diagram, bench: Bench, state: BenchState, ln: _Link, grid: Mapping[str, tuple[int, int]],
               live_buses: set[str], slot_x: object, bar_left: Mapping[str, float], bar_width: Mapping[str, float],
               bar_y: Mapping[str, float], col_x: Sequence[float], col_width: Sequence[float],
               lane_count: dict[str, int], side_count: dict[int, int]) -> None:
    if ln.kind == "switch":
        closed = state.switch_closed(ln.id)
        position = "closed" if closed else "open"
    else:
        position = state.line_position(ln.id)
        closed = position != "open"
    either_live = ln.a in live_buses or ln.b in live_buses
    live = either_live and (closed or (ln.a in live_buses and ln.b in live_buses))
    # a closed element with one live side is live; an open one is live only when both sides are
    p = _Pen(ln.id, live)
    (ca, _), (cb, _) = grid[ln.a], grid[ln.b]
    a, b = (ln.a, ln.b) if (grid[ln.a][0], grid[ln.a][1]) <= (grid[ln.b][0], grid[ln.b][1]) else (ln.b, ln.a)
    if ca != cb:
        xa, xb = slot_x(a), slot_x(b)  # type: ignore[operator]
        lane = max(lane_count[a], lane_count[b]) + 1
        lane_count[a] = lane_count[b] = lane + ln.paths - 1  # extra parallel paths take the lanes above
        diagram.ends[(ln.id, a)] = (xa, bar_y[a] - 14.0)
        diagram.ends[(ln.id, b)] = (xb, bar_y[b] - 14.0)
        y_lane = min(bar_y[a], bar_y[b]) - LANE * lane
        mid = (xa + xb) / 2
        start = mid - ln.length / 2
        # the route stops at the symbol's ends, so an open blade never sits over a through line
        p.poly([(xa, bar_y[a]), (xa, y_lane), (start, y_lane)])
        p.poly([(start + ln.length, y_lane), (xb, y_lane), (xb, bar_y[b])])
        frame = _Frame(start, y_lane, quarter=0)
        label_at = (mid, y_lane - (24.0 + LANE * (ln.paths - 1) if ln.kind == "line_branch" else 10.0))
    else:
        col = ca
        k = side_count.get(col, 0) + 1
        side_count[col] = k + ln.paths - 1
        x_side = col_x[col] + col_width[col] + 16.0 + LANE * (k - 1)
        ya, yb = bar_y[a], bar_y[b]
        xa_end, xb_end = bar_left[a] + bar_width[a], bar_left[b] + bar_width[b]
        mid = (ya + yb) / 2
        diagram.ends[(ln.id, a)] = (xa_end + 10.0, ya)
        diagram.ends[(ln.id, b)] = (xb_end + 10.0, yb)
        p.poly([(xa_end, ya), (x_side, ya), (x_side, mid - ln.length / 2)])
        p.poly([(x_side, mid + ln.length / 2), (x_side, yb), (xb_end, yb)])
        frame = _Frame(x_side, mid - ln.length / 2, quarter=1)
        label_at = (x_side + 8.0, mid - ln.length / 2 - 6.0)
    sym = _Pen(ln.id, live)
    sections: list[list[str]] = []
    if ln.kind == "switch":
        _switch_symbol(sym, ln.length, closed)
    else:
        br = bench.branch(ln.id)
        pos = next((q for q in br.positions if q.name == position), None)
        _switch_symbol(sym, SWITCH_LENGTH, closed)
        if pos is None:
            sym.line(SWITCH_LENGTH, 0.0, ln.length, 0.0)
        else:
            sections = [list(path) for path in pos.paths]
            n_paths = len(sections)
            for k_path, path in enumerate(sections):
                offset = -LANE * k_path  # parallel paths stacked on the far side from earth, a lane apart
                if n_paths > 1:
                    sym.line(SWITCH_LENGTH, 0.0, SWITCH_LENGTH, offset)
                    sym.line(ln.length, 0.0, ln.length, offset)
                sub = _Pen(ln.id, live)
                for m, sid in enumerate(path):
                    _pi_section(sub, SWITCH_LENGTH + m * SECTION_LENGTH)
                    sub.text(SWITCH_LENGTH + m * SECTION_LENGTH + 37.0, -10.0, sid, size=8.0)
                end = SWITCH_LENGTH + len(path) * SECTION_LENGTH
                if end < ln.length:
                    sub.line(end, 0.0, ln.length, 0.0)
                sym.shapes += [_place(s, _Frame(0.0, offset, 0)) for s in sub.shapes]
    p.shapes += sym.placed(frame)
    words = ("closed" if closed else "open") if ln.kind == "switch" else (
        f"position {position}" if closed else "open")
    p.text(label_at[0], label_at[1], f"{ln.id}: {words}" + ("" if live else " (de-energized)"),
           anchor="middle" if ca != cb else "start", size=9.5)
    diagram.shapes += p.shapes
    xs = [pt[0] for s in p.shapes if isinstance(s, Polyline) for pt in s.points]
    ys = [pt[1] for s in p.shapes if isinstance(s, Polyline) for pt in s.points]
    diagram.items.append(DiagramItem(ln.id, ln.kind, live, closed, words, min(xs), min(ys), max(xs) - min(xs),
                                     max(ys) - min(ys), (ln.a, ln.b),
                                     " / ".join("-".join(path) for path in sections) or position))


def _place_sensor(diagram: Diagram, bench: Bench, sensor_id: str, location: str, live_buses: set[str]) -> None:
    sensor = bench.sensor(sensor_id)
    if "@" in location:
        element, bus = location.split("@", 1)
        if (element, bus) not in diagram.ends:
            return
        try:
            live = diagram.item(element).energized and bus in live_buses
        except KeyError:
            return
        x, y = diagram.ends[(element, bus)]
        cx, cy = x + 10.0, y  # beside the lead, so the marker does not hide the element
    else:
        try:
            host = diagram.item(location, "bus")
        except KeyError:
            return
        live = location in live_buses
        cx, cy = host.x + host.width - 12.0, host.y - 22.0
    p = _Pen(f"sensor:{sensor_id}", live)
    p.circle(cx, cy, 8.0)
    p.text(cx, cy + 3.5, "V" if sensor.kind == "voltage" else "A", size=9.0)
    p.text(cx + 11.0, cy - 9.0, sensor_id + ("" if live else " (de-energized)"), anchor="start", size=8.0)
    diagram.shapes += p.shapes
    diagram.items.append(DiagramItem(sensor_id, "sensor", live, None, "energized" if live else "de-energized",
                                     cx - 8.0, cy - 8.0, 16.0, 16.0, (), location))
