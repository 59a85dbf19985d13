"""Diagram geometry (labkit.core.diagram) on the demo bench (DEMO DATA).

Outside references: scipy.sparse.csgraph (graph distances and connected components, computed independently
of labkit's network compiler), plane geometry (rotation of points and arcs), and the symbol conventions of
IEEE 315 / IEC 60617 one-line diagrams (common practice: an open switch's blade is raised off its contact,
a capacitor is two parallel plates, a source a circle).
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from scipy.sparse import coo_matrix, csr_matrix
from scipy.sparse.csgraph import connected_components, shortest_path

from labkit.core.bench import Bench
from labkit.core.diagram import (
    Arc,
    Circle,
    Line,
    Polyline,
    Rect,
    Text,
    _Frame,
    _place,
    bench_diagram,
    bus_grid,
    reference_bus,
)
from labkit.core.state import BenchState, initial_state, states_after_steps
from labkit.files.loader import load_template


@pytest.fixture(scope="module")
def lab2_states(demo_bench: Bench, demo_folder) -> list[BenchState]:
    template = load_template(demo_folder / "lab2-synchronize.toml", demo_bench).template
    return states_after_steps(demo_bench, template)


def _adjacency(bench: Bench, edges: list[tuple[str, str]]) -> csr_matrix:
    index = {b: k for k, b in enumerate(bench.bus_names)}
    rows = [index[a] for a, b in edges] + [index[b] for a, b in edges]
    cols = [index[b] for a, b in edges] + [index[a] for a, b in edges]
    n = len(index)
    return coo_matrix((np.ones(len(rows)), (rows, cols)), shape=(n, n)).tocsr()


def test_columns_are_graph_distances_from_the_reference(demo_bench: Bench) -> None:
    # reference: scipy's unweighted shortest paths over every switch and line branch
    edges = [(s.from_bus, s.to_bus) for s in demo_bench.switches]
    edges += [(b.from_bus, b.to_bus) for b in demo_bench.line_branches]
    dist = shortest_path(_adjacency(demo_bench, edges), unweighted=True, directed=False)
    ref = demo_bench.bus_names.index(reference_bus(demo_bench))
    grid = bus_grid(demo_bench)
    for k, bus in enumerate(demo_bench.bus_names):
        assert grid[bus][0] == int(dist[ref, k]), bus
    # rows within one column are distinct (no two bars on top of each other)
    assert len(set(grid.values())) == len(grid)


def test_energized_flags_match_independent_connectivity(demo_bench: Bench, lab2_states: list[BenchState]) -> None:
    for state in [initial_state(demo_bench), *lab2_states]:
        # independent reference: components over closed switches and connected branches (scipy), energized
        # when a started source sits in the component
        edges = [(s.from_bus, s.to_bus) for s in demo_bench.switches if state.switch_closed(s.id)]
        edges += [(b.from_bus, b.to_bus) for b in demo_bench.line_branches if state.line_position(b.id) != "open"]
        _, labels = connected_components(_adjacency(demo_bench, edges), directed=False)
        live_labels = {labels[demo_bench.bus_names.index(demo_bench.source(s).bus)] for s in state.started}
        d = bench_diagram(demo_bench, state)
        for k, bus in enumerate(demo_bench.bus_names):
            item = d.item(bus, "bus")
            assert item.energized == (labels[k] in live_labels), bus
            assert item.tag == ("energized" if item.energized else "de-energized")


def test_state_never_shown_by_colour_alone(demo_bench: Bench, lab2_states: list[BenchState]) -> None:
    d = bench_diagram(demo_bench, lab2_states[2])
    for shape in d.shapes:
        assert shape.style == ("solid" if shape.energized else "dashed")
    d = bench_diagram(demo_bench, lab2_states[2], sensors={"VA": "B1", "IB": "CB@B3"})
    for item in d.items:
        # every element's state is also written out in a label of its own
        texts = " | ".join(s.text for s in d.shapes_of(item.id if item.kind != "sensor" else f"sensor:{item.id}")
                           if isinstance(s, Text))
        assert item.tag, item.id
        assert item.tag in texts or (item.kind == "sensor" and item.energized), (item.id, item.tag, texts)
    assert "de-energized" in " ".join(s.text for s in d.shapes_of("sensor:IB") if isinstance(s, Text))


def _blade(d, switch_id: str) -> Line:
    blades = [s for s in d.shapes_of(switch_id) if isinstance(s, Line) and s.weight == 2.0]
    assert len(blades) == 1
    return blades[0]


def test_switch_blade_raised_when_open_and_along_the_axis_when_closed(demo_bench: Bench,
                                                                     lab2_states: list[BenchState]) -> None:
    before, after = lab2_states[2], lab2_states[3]  # SYNC1 open before the synchronize step, closed after
    assert not before.switch_closed("SYNC1")
    assert after.switch_closed("SYNC1")
    open_blade = _blade(bench_diagram(demo_bench, before), "SYNC1")
    closed_blade = _blade(bench_diagram(demo_bench, after), "SYNC1")
    # open: the blade leaves the axis at 30 deg (a raised blade, common practice); closed: it lies on the axis
    angle = math.degrees(math.atan2(abs(open_blade.y2 - open_blade.y1), abs(open_blade.x2 - open_blade.x1)))
    assert angle == pytest.approx(30.0, abs=1e-9)
    assert closed_blade.y1 == pytest.approx(closed_blade.y2)
    assert bench_diagram(demo_bench, before).item("SYNC1").closed is False
    assert bench_diagram(demo_bench, after).item("SYNC1").tag == "closed"


def test_open_switch_has_no_through_line_under_its_blade(demo_bench: Bench, lab2_states: list[BenchState]) -> None:
    d = bench_diagram(demo_bench, lab2_states[2])
    blade = _blade(d, "SYNC1")
    contacts = [s for s in d.shapes_of("SYNC1") if isinstance(s, Circle) and s.filled]
    assert len(contacts) == 2
    (a, b) = sorted((c.cx, c.cy) for c in contacts)
    # nothing of SYNC1 joins the two contacts except the raised blade
    for s in d.shapes_of("SYNC1"):
        if isinstance(s, Polyline):
            for (x0, y0), (x1, y1) in zip(s.points, s.points[1:], strict=False):
                if y0 == y1 == a[1]:
                    lo, hi = sorted((x0, x1))
                    assert not (lo < a[0] + 1 and hi > b[0] - 1)
    assert blade.y2 != blade.y1


@pytest.mark.parametrize(("position", "n_sections"), [("short", 1), ("medium", 2), ("long", 4), ("double", 4)])
def test_line_branch_drawn_as_pi_sections_of_its_position(demo_bench: Bench, position: str,
                                                          n_sections: int) -> None:
    state = initial_state(demo_bench).with_changes(started={"REF"}, switches={"SWR": True},
                                                   lines={"L12": position})
    d = bench_diagram(demo_bench, state)
    shapes = d.shapes_of("L12")
    # per pi section: one series box (IEC resistor), one coil of arcs, two shunt capacitors (two plates each)
    boxes = [s for s in shapes if isinstance(s, Rect)]
    plates = [s for s in shapes if isinstance(s, Line) and s.weight == 2.0
              and abs(s.y1 - s.y2) < 1e-9 and abs(abs(s.x2 - s.x1) - 16.0) < 1e-9]
    assert len(boxes) == n_sections
    assert len(plates) == 2 * 2 * n_sections
    labels = sorted(s.text for s in shapes if isinstance(s, Text) and s.text.startswith("S"))
    pos = next(p for p in demo_bench.branch("L12").positions if p.name == position)
    assert labels == sorted(sid for path in pos.paths for sid in path)
    assert d.item("L12").energized
    assert d.item("L12").closed


def test_coil_arcs_join_end_to_end(demo_bench: Bench) -> None:
    state = initial_state(demo_bench).with_changes(started={"REF"}, switches={"SWR": True}, loads={"LB": 1})
    arcs = [s for s in bench_diagram(demo_bench, state).shapes_of("LB") if isinstance(s, Arc)]
    assert len(arcs) == 4
    for first, second in itertools.pairwise(arcs):
        assert first.endpoints()[1] == pytest.approx(second.endpoints()[0], abs=1e-9)


def test_symbols_of_sources_and_nonlinear_load(demo_bench: Bench) -> None:
    state = initial_state(demo_bench).with_changes(started={"REF"}, switches={"SWR": True}, lines={"L13": "on"},
                                                   loads={"NL": 1})
    d = bench_diagram(demo_bench, state)
    ref = d.shapes_of("REF")
    assert any(isinstance(s, Circle) and not s.filled and s.r == 15.0 for s in ref)
    sine = next(s for s in ref if isinstance(s, Polyline))
    ys = [y for _, y in sine.points]
    assert max(ys) > sine.points[0][1] > min(ys)  # one full period of a sine inside the circle
    nl = d.shapes_of("NL")
    assert any(isinstance(s, Rect) for s in nl)
    triangle = next(s for s in nl if isinstance(s, Polyline))
    assert len(triangle.points) == 4
    assert triangle.points[0] == triangle.points[-1]
    assert d.item("NL").energized
    assert d.item("G1").tag == "stopped"


def test_rotation_of_primitives_is_a_rigid_motion() -> None:
    # plane geometry: a quarter turn maps the arc's endpoints to the turned endpoints
    arc = Arc("x", True, "solid", cx=3.0, cy=1.0, r=2.0, start_deg=180.0, end_deg=360.0)
    for quarter in range(4):
        frame = _Frame(10.0, 20.0, quarter)
        turned = _place(arc, frame)
        for got, want in zip(turned.endpoints(), arc.endpoints(), strict=True):
            assert got == pytest.approx(frame.point(*want), abs=1e-9)
        line = _place(Line("x", True, "solid", x1=0.0, y1=0.0, x2=5.0, y2=0.0), frame)
        assert math.hypot(line.x2 - line.x1, line.y2 - line.y1) == pytest.approx(5.0)


def test_layout_is_deterministic_and_bounded(demo_bench: Bench, lab2_states: list[BenchState]) -> None:
    a = bench_diagram(demo_bench, lab2_states[-1], sensors={"VA": "B1", "IA": "SYNC1@B1"})
    b = bench_diagram(demo_bench, lab2_states[-1], sensors={"VA": "B1", "IA": "SYNC1@B1"})
    assert a.shapes == b.shapes
    assert a.items == b.items
    for s in a.shapes:
        if isinstance(s, Line):
            assert min(s.x1, s.x2) >= 0
            assert max(s.x1, s.x2) <= a.width
            assert min(s.y1, s.y2) >= 0
            assert max(s.y1, s.y2) <= a.height
    sensor = a.item("IA", "sensor")
    assert sensor.detail == "SYNC1@B1"
    assert sensor.energized
    # bars never overlap one another
    bars = [it for it in a.items if it.kind == "bus"]
    for i, p in enumerate(bars):
        for q in bars[i + 1:]:
            overlap_x = p.x < q.x + q.width and q.x < p.x + p.width
            assert not (overlap_x and abs(p.y - q.y) < 1.0), (p.id, q.id)


def test_links_never_share_a_lane_and_sensors_sit_at_element_ends(demo_bench: Bench) -> None:
    state = initial_state(demo_bench).with_changes(
        started={"REF", "G1"}, switches={"SWR": True, "SYNC1": True},
        lines={"L12": "double", "L23": "parallel", "L13": "on"}, loads={"RB": 2, "CB": 1})
    d = bench_diagram(demo_bench, state, sensors={"IA": "L12@B1", "IB": "CB@B3"})
    links = {s.id for s in demo_bench.switches} | {b.id for b in demo_bench.line_branches}
    segments = []  # horizontal route segments per element: (y, x_low, x_high, element)
    for s in d.shapes:
        if isinstance(s, Polyline) and s.element in links:
            for (x0, y0), (x1, y1) in itertools.pairwise(s.points):
                if y0 == y1 and x0 != x1:
                    segments.append((y0, min(x0, x1), max(x0, x1), s.element))
    for (ya, a0, a1, ea), (yb, b0, b1, eb) in itertools.combinations(segments, 2):
        if ea != eb and abs(ya - yb) < 1.0:
            assert a1 <= b0 or b1 <= a0, (ea, eb, ya)  # common practice: one lane per route
    ia = d.item("IA", "sensor")
    x_end, y_end = d.ends[("L12", "B1")]
    assert ia.x + ia.width / 2 == pytest.approx(x_end + 10.0)
    assert ia.y + ia.height / 2 == pytest.approx(y_end)
    assert d.item("IB", "sensor").energized
