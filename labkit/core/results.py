"""Readable quantities from a solution: every location and quantity a sensor or a rating check needs.

:func:`quantity_arrays` is array-level: it returns row labels and a (samples, rows)
array in the registry's units. :func:`predictions_frame` turns nominal values and
tolerance bands into the tidy DataFrame (one row per location and quantity).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from labkit.core.conventions import pf_sense, wrap_deg
from labkit.core.locations import element_end
from labkit.core.network import Network
from labkit.core.quantities import quantity
from labkit.core.solve import Solution


@dataclass(frozen=True)
class RowLabel:
    """The location, quantity and status of one predicted value."""

    location: str
    quantity: str
    status: str = "energized"  # or "de-energized"
    note: str = ""


class _Rows:
    def __init__(self, n_samples: int, locations: set[str] | None = None) -> None:
        self.labels: list[RowLabel] = []
        self.values: list[NDArray] = []
        self.n = n_samples
        self.locations = locations

    def add(self, location: str, name: str, values: NDArray | float, status: str = "energized",
            note: str = "") -> None:
        if self.locations is not None and location not in self.locations and name != "loading":
            return
        q = quantity(name)  # every emitted name must be registered
        arr = np.asarray(values, dtype=float)
        if arr.shape != (self.n,):
            arr = np.broadcast_to(arr, (self.n,))
        if q.scale != 1.0:
            arr = arr * q.scale
        self.labels.append(RowLabel(location, name, status, note))
        self.values.append(arr)


def _power_rows(rows: _Rows, locations: list[str], v: NDArray, i: NDArray, harmonic: bool) -> None:
    """v, i: (S, H, M) phasors at M places (currents in each place's reference direction), one pass for all."""
    v_rms = np.sqrt(np.sum(np.abs(v) ** 2, axis=1))
    i_rms = np.sqrt(np.sum(np.abs(i) ** 2, axis=1))
    s1 = v[:, 0] * np.conj(i[:, 0])
    p = np.sum((v * np.conj(i)).real, axis=1)
    s = v_rms * i_rms
    i_arg = np.angle(i[:, 0])
    with np.errstate(invalid="ignore", divide="ignore"):
        pf = np.where(s > 0, p / s, np.nan)
        pf1 = np.where(np.abs(s1) > 0, s1.real / np.abs(s1), np.nan)
        i1 = np.abs(i[:, 0])
        thd_i = np.sqrt(np.maximum(i_rms**2 - i1**2, 0)) / i1 if harmonic else None
    phase = _half_turn_positive(np.degrees(np.angle(i[:, 0] * np.conj(v[:, 0]))))
    i_angle = _half_turn_positive(np.degrees(i_arg))
    for m, location in enumerate(locations):
        rows.add(location, "i_rms", i_rms[:, m])
        rows.add(location, "i_angle", i_angle[:, m])
        rows.add(location, "p", p[:, m])
        rows.add(location, "q1", s1.imag[:, m])
        rows.add(location, "s", s[:, m])
        rows.add(location, "pf", pf[:, m], note=pf_sense(float(s1.imag[0, m]), float(s1.real[0, m])))
        rows.add(location, "phase", phase[:, m])
        if harmonic:
            assert thd_i is not None
            rows.add(location, "thd_i", thd_i[:, m])
            rows.add(location, "i1_rms", i1[:, m])
            rows.add(location, "p1", s1.real[:, m])
            rows.add(location, "pf1", pf1[:, m])
            rows.add(location, "crest_i", _crest(i[:, :, m]))


def _half_turn_positive(angle_deg: NDArray) -> NDArray:
    """An angle from ``np.angle`` in degrees, [-180, 180], on the (-180, 180] of ``wrap_deg``."""
    return np.where(angle_deg == -180.0, 180.0, angle_deg)


def _crest(x: NDArray) -> NDArray:
    """Crest factor of a periodic signal from its harmonic phasors (S, H), sampled over one period."""
    # 256 points per fundamental period resolve harmonics up to the 63rd
    return np.zeros(x.shape[0]) if x.shape[1] == 0 else _crest_impl(x)


def _crest_impl(x: NDArray) -> NDArray:
    t = np.linspace(0.0, 1.0, 256, endpoint=False)
    orders = np.asarray(_crest_impl.orders)  # type: ignore[attr-defined]
    # sqrt(2) Re(sum_h X_h e^(j 2 pi h t)) as two real matrix products over the orders
    arg = 2 * np.pi * orders[:, None] * t[None, :]
    wave = np.sqrt(2) * (x.real @ np.cos(arg) - x.imag @ np.sin(arg))
    rms = np.sqrt(np.mean(wave**2, axis=1))
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.max(np.abs(wave), axis=1) / rms


def quantity_arrays(sol: Solution, locations: set[str] | None = None) -> tuple[list[RowLabel], NDArray[np.float64]]:
    """Every predicted quantity of a solution: labels and values (S, rows), in the registry's units.

    With ``locations``, only rows at those locations (and every ``loading`` row, for the rating checks).
    """
    labels, values = quantity_rows(sol, locations)
    return labels, np.stack(values, axis=1) if values else np.zeros((sol.n_samples, 0))


def quantity_rows(sol: Solution, locations: set[str] | None = None) -> tuple[list[RowLabel], list[NDArray]]:
    """As :func:`quantity_arrays`, the values left as one (S,) array per row (no stacking)."""
    net = sol.network
    bench = net.bench
    _crest_impl.orders = sol.orders  # type: ignore[attr-defined]
    harmonic = len(sol.orders) > 1
    rows = _Rows(sol.n_samples, locations)
    dead_note = "de-energized: no source connected; capacitance may still hold charge"

    # buses, all at once
    live = [bus for bus in bench.bus_names if bus in net.bus_node and (locations is None or bus in locations)]
    nodes = [net.bus_node[bus] for bus in live]
    v_bus = sol.v[:, :, nodes]
    v_rms_bus = np.sqrt(np.sum(np.abs(v_bus) ** 2, axis=1))
    v_angle_bus = wrap_deg(np.degrees(np.angle(v_bus[:, 0])))
    v1_bus = np.abs(v_bus[:, 0])
    with np.errstate(invalid="ignore", divide="ignore"):
        thd_v_bus = np.sqrt(np.maximum(v_rms_bus**2 - v1_bus**2, 0)) / v1_bus
    column = {bus: m for m, bus in enumerate(live)}
    for bus in bench.bus_names:
        if bus not in net.bus_node:
            rows.add(bus, "v_rms", 0.0, "de-energized", dead_note)
            continue
        if bus not in column:
            continue  # not asked for
        m = column[bus]
        rows.add(bus, "v_rms", v_rms_bus[:, m])
        rows.add(bus, "v_angle", v_angle_bus[:, m])
        rows.add(bus, "frequency", sol.island_frequency_hz[:, nodes[m]])
        if harmonic:
            rows.add(bus, "v1_rms", v1_bus[:, m])
            rows.add(bus, "thd_v", thd_v_bus[:, m])
            for k, h in enumerate(sol.orders[1:], start=1):
                rows.add(bus, f"v_h{h}", np.abs(v_bus[:, k, m]))

    # element ends (current from the bus into the element), all at once
    end_currents = end_current_phasors(sol)
    ends = [(element_end(*key), key) for key in end_currents]
    ends = [(location, key) for location, key in ends if locations is None or location in locations]
    if ends:
        i_ends = np.stack([end_currents[key] for _, key in ends], axis=-1)
        v_ends = sol.v[:, :, [net.bus_node[key[1]] for _, key in ends]]
        _power_rows(rows, [location for location, _ in ends], v_ends, i_ends, harmonic)

    # element-level quantities
    p_end = {lab.location: val for lab, val in zip(rows.labels, rows.values, strict=True) if lab.quantity == "p"}
    q_end = {lab.location: val for lab, val in zip(rows.labels, rows.values, strict=True) if lab.quantity == "q1"}
    for br in bench.line_branches:
        a, b = element_end(br.id, br.from_bus), element_end(br.id, br.to_bus)
        if a in p_end and b in p_end:
            rows.add(br.id, "p_loss", p_end[a] + p_end[b])
            rows.add(br.id, "q_loss", q_end[a] + q_end[b])
            va = np.sqrt(np.sum(np.abs(sol.v[:, :, net.bus_node[br.from_bus]]) ** 2, 1))
            vb = np.sqrt(np.sum(np.abs(sol.v[:, :, net.bus_node[br.to_bus]]) ** 2, 1))
            rows.add(br.id, "v_drop", va - vb)
            rows.add(br.id, "regulation", _regulation(sol, br.id, va, vb))
    _loading_rows(sol, rows, end_currents)
    _open_switch_rows(sol, rows)
    return rows.labels, rows.values


def end_current_phasors(sol: Solution, *, warn: bool = True) -> dict[tuple[str, str], NDArray]:
    """Current phasors (S, H) at every element end ``(owner, bus)``, from the bus into the element (A RMS).

    ``warn`` adds the solution's warning about a loop of closed switches (once per solve: callers that
    only read the phasors again pass False).
    """
    net, bench = sol.network, sol.network.bench
    end_currents: dict[tuple[str, str], NDArray] = {}
    for j, e in enumerate(net.elements):
        if e.owner_table == "sources":
            continue
        for bus_name, sign in ((e.bus_a, 1.0), (e.bus_b, -1.0)):
            if bus_name is None:
                continue
            key = (e.owner, bus_name)
            end_currents[key] = end_currents.get(key, 0) + sign * sol.i_elem[:, :, j]
    for k, role in enumerate(net.sources):
        src = bench.source(role.source_id)
        end_currents[(src.id, src.bus)] = -sol.source_current[:, :, k]
    end_currents.update(_switch_currents(sol, end_currents, warn=warn))
    return end_currents


_SECTION_VALUES: dict[int, tuple[object, dict]] = {}  # per bench object: its sections' values (immutable)


def _regulation(sol: Solution, branch_id: str, vs: NDArray, vr: NDArray) -> NDArray:
    """(|Vs|/|A| - |Vr|) / |Vr| with the from-bus as sending end (field-reference §2.1)."""
    net = sol.network
    by_branch = net.__dict__.setdefault("_receiving_a", {})  # |A| of the nominal chain, per compiled network
    if branch_id not in by_branch:
        by_branch[branch_id] = np.abs(_nominal_a(net, branch_id))
    return (vs / by_branch[branch_id] - vr) / vr


def _nominal_a(net: Network, branch_id: str) -> NDArray:
    from labkit.core.lines import bench_section_values, branch_two_port, position_paths

    branch = net.bench.branch(branch_id)
    cached = _SECTION_VALUES.get(id(net.bench))
    if cached is None or cached[0] is not net.bench:
        if len(_SECTION_VALUES) > 32:
            _SECTION_VALUES.clear()
        cached = _SECTION_VALUES[id(net.bench)] = (net.bench, bench_section_values(net.bench))
    paths = position_paths(branch, net.state.line_position(branch_id), cached[1])
    return branch_two_port(paths, 2 * np.pi * net.frequency_hz).abcd[..., 0, 0]


def _switch_currents(sol: Solution, end_currents: dict[tuple[str, str], NDArray], *,
                     warn: bool = True) -> dict[tuple[str, str], NDArray]:
    """Currents through closed switches from KCL over each group of buses they merge."""
    net = sol.network
    out: dict[tuple[str, str], NDArray] = {}
    by_node: dict[int, list[tuple[str, str, str]]] = {}
    for sw in net.switch_groups:
        by_node.setdefault(net.bus_node[sw[1]], []).append(sw)
    for node, switches in by_node.items():
        buses = [b for b, n in net.bus_node.items() if n == node]
        a = np.zeros((len(buses), len(switches)))
        for k, (_, f, t) in enumerate(switches):
            a[buses.index(f), k] = 1.0
            a[buses.index(t), k] = -1.0
        inj = np.zeros((len(buses), *sol.v.shape[:2]), dtype=complex)
        for (owner, bus_name), i in end_currents.items():
            if bus_name in buses and owner not in {s[0] for s in switches}:
                inj[buses.index(bus_name)] += i
        # A i_sw = -inj; least squares handles trees exactly (loops of switches: minimum-norm split)
        if warn and np.linalg.matrix_rank(a) < len(switches):
            sol.warnings.append("closed switches form a loop (" + ", ".join(s[0] for s in switches)
                                + "): how the current divides between them is not determined; shown evenly split")
        pinv = np.linalg.pinv(a)
        i_sw = np.tensordot(pinv, -inj, axes=(1, 0))
        for k, (sid, f, t) in enumerate(switches):
            out[(sid, f)] = i_sw[k]
            out[(sid, t)] = -i_sw[k]
    return out


def _loading_rows(sol: Solution, rows: _Rows, end_currents: dict[tuple[str, str], NDArray]) -> None:
    net, bench = sol.network, sol.network.bench
    for j, e in enumerate(net.elements):
        if e.owner_table == "line_branches" and e.part.endswith(".series") and e.section:
            sec = bench.section(e.section)
            i_rms = np.sqrt(np.sum(np.abs(sol.i_elem[:, :, j]) ** 2, 1))
            rows.add(e.section, "loading", i_rms / sec.rated_current)
    for ld in bench.loads:
        key = (ld.id, ld.bus)
        if key in end_currents:
            rows.add(ld.id, "loading", np.sqrt(np.sum(np.abs(end_currents[key]) ** 2, 1)) / ld.rated_current)
    for sw_id, f, _ in net.switch_groups:
        sw = bench.switch(sw_id)
        rows.add(sw_id, "loading", np.sqrt(np.sum(np.abs(end_currents[(sw_id, f)]) ** 2, 1)) / sw.rated_current)
    for k, role in enumerate(net.sources):
        src = bench.source(role.source_id)
        rated_i = src.rating / bench.bench.nominal_voltage
        rows.add(src.id, "loading", np.sqrt(np.sum(np.abs(sol.source_current[:, :, k]) ** 2, 1)) / rated_i)


def _open_switch_rows(sol: Solution, rows: _Rows) -> None:
    """Slip, voltage difference and beat period across open switches with both sides energized."""
    net, bench = sol.network, sol.network.bench
    closed = {s[0] for s in net.switch_groups}
    for sw in bench.switches:
        if sw.id in closed or sw.from_bus not in net.bus_node or sw.to_bus not in net.bus_node:
            continue
        na, nb = net.bus_node[sw.from_bus], net.bus_node[sw.to_bus]
        if na == nb:
            continue
        # from_bus is the incoming side of a synchronizing switch (differences: incoming minus running)
        slip = sol.island_frequency_hz[:, na] - sol.island_frequency_hz[:, nb]
        va, vb = np.abs(sol.v[:, 0, na]), np.abs(sol.v[:, 0, nb])
        rows.add(sw.id, "slip", slip)
        with np.errstate(divide="ignore"):
            rows.add(sw.id, "beat_period", np.where(slip != 0, 1.0 / np.abs(slip), np.inf))
        rows.add(sw.id, "dv_sync", (va - vb) / vb)
        if np.all(slip == 0):
            rows.add(sw.id, "v_across", np.abs(sol.v[:, 0, na] - sol.v[:, 0, nb]))


__all__ = ["RowLabel", "end_current_phasors", "quantity_arrays", "quantity_rows"]


# quantities that change sign when a current's reference direction is reversed; angles turn by 180 deg
_SIGNED = {"p", "q1", "pf", "p1", "pf1", "ph"}
_TURNED = {"i_angle", "phase"}


def sensor_direction(bench: object, location: str, sensor_id: str | None = None) -> int:
    """+1 when a current sensor at ``ELEMENT@BUS`` points from the bus into the element, else -1.

    Uses the named sensor's placement, or the first current sensor placed there;
    +1 (the passive convention of predictions) when no sensor is placed there.
    """
    for sensor in getattr(bench, "sensors", []):
        if sensor.kind != "current" or (sensor_id is not None and sensor.id != sensor_id):
            continue
        for placement in sensor.placements:
            if placement.location == location:
                element, _, bus = location.partition("@")
                return 1 if (placement.from_, placement.to) == (bus, element) else -1
    return 1


def oriented(quantity_name: str, values: NDArray, direction: int) -> NDArray:
    """Values of a current-related quantity seen in a sensor's reference direction (+1 or -1)."""
    if direction == 1:
        return values
    if quantity_name in _SIGNED:
        return -values
    if quantity_name in _TURNED:
        return wrap_deg(values + 180.0)
    return values
