"""Readable quantities from a solution: every location and quantity a sensor or a rating check needs.

:func:`quantity_rows` is array-level: it returns row labels and a (rows, samples) array
in the registry's units; :func:`quantity_arrays` gives the same as (samples, rows).
Rows are computed place-major: each quantity of many places at once, as one
(places, samples) array, so every row's samples are contiguous.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from labkit.core.conventions import pf_sense, wrap_deg
from labkit.core.crest import crest_factor
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


class QuantityRows:
    """Row labels and their values, gathered as groups of places x quantities.

    A group holds one (places, S) array per quantity. Its rows are place-major (every
    quantity of the first place, then of the next), so labels read place by place;
    :meth:`write` fills any (rows, S) array or view, such as a column block of a larger one.
    Labels are built when first asked for; :attr:`layout` names the rows more cheaply.
    """

    def __init__(self, n_samples: int, locations: set[str] | None = None) -> None:
        self.n = n_samples
        self.locations = locations
        self.n_rows = 0
        self._groups: list[tuple[int, int, list[NDArray]]] = []  # (first row, places, arrays)
        self._specs: list[tuple[tuple[str, ...], tuple[str, ...], str, Notes]] = []
        self._labels: list[RowLabel] | None = None

    @property
    def layout(self) -> tuple[tuple[tuple[str, ...], tuple[str, ...]], ...]:
        """(locations, quantities) of each group: equal layouts have equal rows in equal order."""
        return tuple((spec[0], spec[1]) for spec in self._specs)

    @property
    def labels(self) -> list[RowLabel]:
        """One label per row, in row order."""
        if self._labels is None:
            self._labels = []
            for locations, names, status, notes in self._specs:
                texts = {name: (note() if callable(note) else note) for name, note in notes.items()}
                self._labels += [RowLabel(location, name, status, texts[name][m] if name in texts else "")
                                 for m, location in enumerate(locations) for name in names]
        return self._labels

    def wanted(self, location: str, name: str = "") -> bool:
        """Whether rows at ``location`` are asked for (every ``loading`` row always is)."""
        return self.locations is None or location in self.locations or name == "loading"

    def add(self, location: str, name: str, values: NDArray | float, status: str = "energized",
            note: str = "") -> None:
        """One row, when its location is asked for."""
        if self.wanted(location, name):
            self.add_places([location], [name], [np.asarray(values, dtype=float)[None]],
                            status=status, notes={name: [note]})

    def add_places(self, locations: list[str], names: list[str], values: list[NDArray], *,
                   status: str = "energized", notes: Notes | None = None) -> None:
        """Quantities ``names`` at ``locations`` (already filtered); ``values[q]`` broadcasts to (places, S).

        ``notes`` maps a quantity to one note per place, or to a function giving them (called
        only when the labels are read).
        """
        if not locations:
            return
        scaled = []
        for name, arr in zip(names, values, strict=True):
            q = quantity(name)  # every emitted name must be registered
            arr = np.asarray(arr, dtype=float)
            scaled.append(arr * q.scale if q.scale != 1.0 else arr)
        self._groups.append((self.n_rows, len(locations), scaled))
        self._specs.append((tuple(locations), tuple(names), status, notes or {}))
        self.n_rows += len(locations) * len(names)
        self._labels = None

    def write(self, out: NDArray[np.float64]) -> NDArray[np.float64]:
        """Fill ``out`` (rows, S) and return it."""
        for first, n_places, arrays in self._groups:
            n_q = len(arrays)
            for q, arr in enumerate(arrays):
                out[first + q : first + n_q * n_places : n_q] = arr
        return out

    def matrix(self) -> NDArray[np.float64]:
        """All rows as a new (rows, S) array."""
        return self.write(np.empty((self.n_rows, self.n)))


Notes = dict[str, "list[str] | Callable[[], list[str]]"]


def _rms(x: NDArray) -> NDArray:
    """RMS over the harmonic axis of place-major phasors (places, H, S)."""
    return np.abs(x[:, 0]) if x.shape[1] == 1 else np.sqrt(np.sum(x.real**2 + x.imag**2, axis=1))


def _power_rows(rows: QuantityRows, locations: list[str], v: NDArray, i: NDArray,
                orders: list[int], v_angle: NDArray) -> dict[str, NDArray]:
    """v, i: (M, H, S) phasors at M places (currents in each place's reference direction), one pass for all.

    ``v_angle``: the angles (deg, from ``np.angle``) of ``v``'s fundamental (places at one bus
    share them). Returns the (M, S) arrays of ``p`` and ``q1`` (in W and var)
    for the line-loss rows.
    """
    v_rms, i_rms = _rms(v), _rms(i)
    s1 = v[:, 0] * np.conj(i[:, 0])
    p = s1.real if v.shape[1] == 1 else np.sum((v * np.conj(i)).real, axis=1)
    s = v_rms * i_rms
    with np.errstate(invalid="ignore", divide="ignore"):
        pf = np.where(s > 0, p / s, np.nan)
    i_angle = np.degrees(np.angle(i[:, 0]))
    phase = phase_deg(i_angle, v_angle, s1)
    i_angle = _half_turn_positive(i_angle)
    names = ["i_rms", "i_angle", "p", "q1", "s", "pf", "phase"]
    values = [i_rms, i_angle, p, s1.imag, s, pf, phase]
    if len(orders) > 1:
        with np.errstate(invalid="ignore", divide="ignore"):
            i1 = np.abs(i[:, 0])
            thd_i = np.sqrt(np.maximum(i_rms**2 - i1**2, 0)) / i1
            pf1 = np.where(np.abs(s1) > 0, s1.real / np.abs(s1), np.nan)
        names += ["thd_i", "i1_rms", "p1", "pf1", "crest_i"]
        values += [thd_i, i1, s1.real, pf1, crest_factor(i, orders)]
    first = s1[:, 0].copy()  # the leading or lagging sense of the first sample, named when labels are read
    notes: Notes = {"pf": lambda: [pf_sense(float(x.imag), float(x.real)) for x in first]}
    rows.add_places(locations, names, values, notes=notes)
    return {"p": p, "q1": s1.imag}


def phase_deg(i_angle: NDArray, v_angle: NDArray, s1: NDArray) -> NDArray:
    """The phase angle (deg, on (-180, 180]) of a current against its voltage, the angle of i conj(v):
    from the two phasors' angles (deg, from ``np.angle``), a subtraction where an arctangent of
    ``s1 = v conj(i)`` would cost as much as the angles themselves. Where ``s1`` is zero (no current
    or no voltage) the phase is 0, as ``np.angle`` gives for a zero phasor.
    """
    phase = i_angle - v_angle
    phase = np.where(phase > 180.0, phase - 360.0, np.where(phase <= -180.0, phase + 360.0, phase))
    phase[s1 == 0] = 0.0
    return phase


def _half_turn_positive(angle_deg: NDArray) -> NDArray:
    """An angle from ``np.angle`` in degrees, [-180, 180], on the (-180, 180] of ``wrap_deg``."""
    return np.where(angle_deg == -180.0, 180.0, angle_deg)


def quantity_arrays(sol: Solution, locations: set[str] | None = None) -> tuple[list[RowLabel], NDArray[np.float64]]:
    """Every predicted quantity of a solution: labels and values (S, rows), in the registry's units.

    With ``locations``, only rows at those locations (and every ``loading`` row, for the rating checks).
    """
    labels, values = quantity_rows(sol, locations)
    return labels, values.T


def quantity_rows(sol: Solution, locations: set[str] | None = None) -> tuple[list[RowLabel], NDArray[np.float64]]:
    """As :func:`quantity_arrays`, the values as (rows, S): each row's samples contiguous."""
    rows = collect_quantity_rows(sol, locations)
    return rows.labels, rows.matrix()


DEAD_NOTE = "de-energized: no source connected; capacitance may still hold charge"


def collect_quantity_rows(sol: Solution, locations: set[str] | None = None) -> QuantityRows:
    """The labels of every predicted row and the arrays to write them from (:meth:`QuantityRows.write`)."""
    net = sol.network
    bench = net.bench
    rows = QuantityRows(sol.n_samples, locations)
    v_t = np.ascontiguousarray(sol.v.transpose(2, 1, 0))  # (N, H, S)
    f_t = sol.island_frequency_hz.T

    # buses, in runs of energized buses between the de-energized ones
    run: list[str] = []
    for bus in [*bench.bus_names, None]:
        if bus is not None and bus in net.bus_node:
            if rows.wanted(bus):
                run.append(bus)
            continue
        _bus_rows(rows, run, [net.bus_node[b] for b in run], v_t, f_t, sol.orders)
        run = []
        if bus is not None:
            rows.add(bus, "v_rms", np.zeros(sol.n_samples), "de-energized", DEAD_NOTE)

    # element ends (current from the bus into the element), all at once
    end_currents = _end_currents(sol)
    ends = [(element_end(*key), key) for key in end_currents]
    ends = [(location, key) for location, key in ends if rows.wanted(location)]
    power: dict[str, NDArray] = {}
    end_column: dict[str, int] = {}
    if ends:
        i_ends = np.stack([end_currents[key] for _, key in ends])
        end_nodes = [net.bus_node[key[1]] for _, key in ends]
        v_ends = v_t[end_nodes]
        # each bus's voltage angle once, for the phase of every end at it
        nodes, at_node = np.unique(end_nodes, return_inverse=True)
        v_angle = np.degrees(np.angle(v_t[nodes, 0]))[at_node]
        power = _power_rows(rows, [location for location, _ in ends], v_ends, i_ends, sol.orders, v_angle)
        end_column = {location: m for m, (location, _) in enumerate(ends)}

    # line branches whose both ends are asked for
    branches = [br for br in bench.line_branches if rows.wanted(br.id)
                and element_end(br.id, br.from_bus) in end_column and element_end(br.id, br.to_bus) in end_column]
    if branches:
        ca = [end_column[element_end(br.id, br.from_bus)] for br in branches]
        cb = [end_column[element_end(br.id, br.to_bus)] for br in branches]
        va = _rms(v_t[[net.bus_node[br.from_bus] for br in branches]])
        vb = _rms(v_t[[net.bus_node[br.to_bus] for br in branches]])
        a_mag = np.array([_receiving_a(net, br.id) for br in branches])[:, None]
        rows.add_places([br.id for br in branches], ["p_loss", "q_loss", "v_drop", "regulation"],
                        [power["p"][ca] + power["p"][cb], power["q1"][ca] + power["q1"][cb], va - vb,
                         (va / a_mag - vb) / vb])
    _loading_rows(sol, rows, end_currents)
    _open_switch_rows(sol, rows, v_t, f_t)
    return rows


def _bus_rows(rows: QuantityRows, buses: list[str], nodes: list[int], v_t: NDArray, f_t: NDArray,
              orders: list[int]) -> None:
    if not buses:
        return
    v_bus = v_t[nodes]
    v1 = np.abs(v_bus[:, 0])
    names = ["v_rms", "v_angle", "frequency"]
    values = [_rms(v_bus), wrap_deg(np.degrees(np.angle(v_bus[:, 0]))), f_t[nodes]]
    if len(orders) > 1:
        with np.errstate(invalid="ignore", divide="ignore"):
            thd_v = np.sqrt(np.maximum(values[0] ** 2 - v1**2, 0)) / v1
        names += ["v1_rms", "thd_v"] + [f"v_h{h}" for h in orders[1:]]
        values += [v1, thd_v] + [np.abs(v_bus[:, k]) for k in range(1, len(orders))]
    rows.add_places(buses, names, values)


def end_current_phasors(sol: Solution, *, warn: bool = True) -> dict[tuple[str, str], NDArray]:
    """Current phasors (S, H) at every element end ``(owner, bus)``, from the bus into the element (A RMS).

    ``warn`` adds the solution's warning about a loop of closed switches (once per solve: callers that
    only read the phasors again pass False).
    """
    return {key: i.T for key, i in _end_currents(sol, warn=warn).items()}


def _end_currents(sol: Solution, *, warn: bool = True) -> dict[tuple[str, str], NDArray]:
    """As :func:`end_current_phasors`, place-major: each end's phasors (H, S)."""
    net, bench = sol.network, sol.network.bench
    i_t = np.ascontiguousarray(sol.i_elem.transpose(2, 1, 0))  # (E, H, S)
    end_currents: dict[tuple[str, str], NDArray] = {}
    for j, e in enumerate(net.elements):
        if e.owner_table == "sources":
            continue
        for bus_name, sign in ((e.bus_a, 1.0), (e.bus_b, -1.0)):
            if bus_name is None:
                continue
            key = (e.owner, bus_name)
            end_currents[key] = end_currents[key] + sign * i_t[j] if key in end_currents else sign * i_t[j]
    src_t = sol.source_current.transpose(2, 1, 0)
    for k, role in enumerate(net.sources):
        src = bench.source(role.source_id)
        end_currents[(src.id, src.bus)] = -src_t[k]
    end_currents.update(_switch_currents(sol, end_currents, warn=warn))
    return end_currents


_BENCH_CACHE: dict[int, tuple[object, dict, dict]] = {}
"""Per bench object (immutable): its sections' values, and the |A| of each branch chain already met."""


def _receiving_a(net: Network, branch_id: str) -> float:
    """|A| of a branch's nominal chain at its line position and the system frequency (field-reference §2.1)."""
    from labkit.core.lines import bench_section_values, branch_two_port, position_paths

    cached = _BENCH_CACHE.get(id(net.bench))
    if cached is None or cached[0] is not net.bench:
        if len(_BENCH_CACHE) > 32:
            _BENCH_CACHE.clear()
        cached = _BENCH_CACHE[id(net.bench)] = (net.bench, bench_section_values(net.bench), {})
    position = net.state.line_position(branch_id)
    key = (branch_id, position, net.frequency_hz)
    if key not in cached[2]:
        paths = position_paths(net.bench.branch(branch_id), position, cached[1])
        cached[2][key] = float(np.abs(branch_two_port(paths, 2 * np.pi * net.frequency_hz).abcd[..., 0, 0]))
    return cached[2][key]


def _switch_currents(sol: Solution, end_currents: dict[tuple[str, str], NDArray], *,
                     warn: bool = True) -> dict[tuple[str, str], NDArray]:
    """Currents through closed switches (H, S) from KCL over each group of buses they merge."""
    net = sol.network
    out: dict[tuple[str, str], NDArray] = {}
    by_node: dict[int, list[tuple[str, str, str]]] = {}
    for sw in net.switch_groups:
        by_node.setdefault(net.bus_node[sw[1]], []).append(sw)
    shape = (sol.v.shape[1], sol.v.shape[0])
    kcl = net.__dict__.setdefault("_switch_kcl", {})  # per compiled network: each group's buses, pinv, loop
    for node, switches in by_node.items():
        if node not in kcl:
            buses = [b for b, n in net.bus_node.items() if n == node]
            a = np.zeros((len(buses), len(switches)))
            for k, (_, f, t) in enumerate(switches):
                a[buses.index(f), k] = 1.0
                a[buses.index(t), k] = -1.0
            kcl[node] = (buses, np.linalg.pinv(a), np.linalg.matrix_rank(a) < len(switches))
        buses, pinv, loop = kcl[node]
        inj = np.zeros((len(buses), *shape), dtype=complex)
        own = {s[0] for s in switches}
        for (owner, bus_name), i in end_currents.items():
            if bus_name in buses and owner not in own:
                inj[buses.index(bus_name)] += i
        # A i_sw = -inj; least squares handles trees exactly (loops of switches: minimum-norm split)
        if warn and loop:
            sol.warnings.append("closed switches form a loop (" + ", ".join(s[0] for s in switches)
                                + "): how the current divides between them is not determined; shown evenly split")
        i_sw = np.tensordot(pinv, -inj, axes=(1, 0))
        for k, (sid, f, t) in enumerate(switches):
            out[(sid, f)] = i_sw[k]
            out[(sid, t)] = -i_sw[k]
    return out


def _loading_rows(sol: Solution, rows: QuantityRows, end_currents: dict[tuple[str, str], NDArray]) -> None:
    """Loading (% of rated current, on true RMS) of every section, load, closed switch and source."""
    net, bench = sol.network, sol.network.bench
    places: list[str] = []
    currents: list[NDArray] = []
    rated: list[float] = []
    i_t = sol.i_elem.transpose(2, 1, 0)
    for j, e in enumerate(net.elements):
        if e.owner_table == "line_branches" and e.part.endswith(".series") and e.section:
            places.append(e.section)
            currents.append(i_t[j])
            rated.append(bench.section(e.section).rated_current)
    for ld in bench.loads:
        if (ld.id, ld.bus) in end_currents:
            places.append(ld.id)
            currents.append(end_currents[(ld.id, ld.bus)])
            rated.append(ld.rated_current)
    for sw_id, f, _ in net.switch_groups:
        places.append(sw_id)
        currents.append(end_currents[(sw_id, f)])
        rated.append(bench.switch(sw_id).rated_current)
    src_t = sol.source_current.transpose(2, 1, 0)
    for k, role in enumerate(net.sources):
        src = bench.source(role.source_id)
        places.append(src.id)
        currents.append(src_t[k])
        rated.append(src.rating / bench.bench.nominal_voltage)
    if places:
        rows.add_places(places, ["loading"], [_rms(np.stack(currents)) / np.array(rated)[:, None]])


def _open_switch_rows(sol: Solution, rows: QuantityRows, v_t: NDArray, f_t: NDArray) -> None:
    """Slip, voltage difference and beat period across open switches with both sides energized."""
    net, bench = sol.network, sol.network.bench
    closed = {s[0] for s in net.switch_groups}
    pairs = [(sw.id, net.bus_node[sw.from_bus], net.bus_node[sw.to_bus]) for sw in bench.switches
             if sw.id not in closed and sw.from_bus in net.bus_node and sw.to_bus in net.bus_node
             and net.bus_node[sw.from_bus] != net.bus_node[sw.to_bus]]
    pairs = [p for p in pairs if rows.wanted(p[0])]
    if not pairs:
        return
    na, nb = [p[1] for p in pairs], [p[2] for p in pairs]
    # from_bus is the incoming side of a synchronizing switch (differences: incoming minus running)
    slip = f_t[na] - f_t[nb]
    va, vb = np.abs(v_t[na, 0]), np.abs(v_t[nb, 0])
    with np.errstate(divide="ignore"):
        beat = np.where(slip != 0, 1.0 / np.abs(slip), np.inf)
    across = np.abs(v_t[na, 0] - v_t[nb, 0])
    values = [slip, beat, (va - vb) / vb, across]
    synchronous = np.all(slip == 0, axis=1)  # v_across is a steady reading only without slip
    start = 0
    for k in range(1, len(pairs) + 1):  # runs of switches alike in that, as groups
        if k == len(pairs) or synchronous[k] != synchronous[start]:
            n_q = 4 if synchronous[start] else 3
            rows.add_places([p[0] for p in pairs[start:k]], ["slip", "beat_period", "dv_sync", "v_across"][:n_q],
                            [x[start:k] for x in values[:n_q]])
            start = k


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
