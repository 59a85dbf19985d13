"""Compile a bench in a given state into a nodal admittance network, and solve it (stacked).

The network is compiled per configuration: only connected elements enter,
closed switches merge their buses into one electrical node (an ideal switch is
a zero-impedance link), and parts with no started source are left out and
reported de-energized. Every element is a two-terminal admittance between two
nodes (or a node and the neutral), so assembly is one ``bincount`` and the
solve is one stacked :func:`numpy.linalg.solve` over configurations, parameter
samples and frequencies alike.

Element kinds (``ElementKind``):

``series``    1 / (R + jwL + 1/(jwC)); C absent is ``inf``
``parallel``  1/R + 1/(jwL) + jwC; R and L absent are ``inf``, C absent is 0
``fixed``     a given admittance at the compiled frequency (exact-pi line parts)

Sources are Norton equivalents: the internal impedance as a ``series`` element
to the neutral plus an injection ``E / Z``.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Literal

import numpy as np
from numpy.typing import NDArray

from labkit.core.bench import AlternatorSet, Bench, LinearLoad, MainsReference, NonlinearLoad
from labkit.core.errors import LabkitError
from labkit.core.state import BenchState

NEUTRAL = -1
ElementKind = Literal["series", "parallel", "fixed"]
_KIND_CODE = {"series": 0, "parallel": 1, "fixed": 2}


class NetworkError(LabkitError, ValueError):
    """A network that cannot be solved: a short, a zero impedance, an ill-conditioned matrix."""


@dataclass(frozen=True)
class Element:
    """One two-terminal admittance of the compiled network.

    ``owner`` is the bench element it belongs to (a line branch, a load, a
    source); ``part`` says which piece (``S1.series``, ``S1.shunt_from``,
    ``step2``, ``internal``); ``bus_a`` and ``bus_b`` are the bench buses at its
    terminals (``None`` for the neutral or an inner node of a line).
    """

    owner: str
    owner_table: str
    part: str
    kind: ElementKind
    node_a: int
    node_b: int
    r_ohm: float = 0.0
    l_h: float = 0.0
    c_f: float = 0.0
    y_fixed: complex = 0j
    bus_a: str | None = None
    bus_b: str | None = None
    # indices into the parameter vector varied for tolerance bands (-1: not varied)
    r_param: int = -1
    l_param: int = -1
    c_param: int = -1
    fixed_param: int = -1
    section: str | None = None


@dataclass(frozen=True)
class SourceRole:
    """How a started, connected source enters the solve."""

    source_id: str
    role: Literal["slack", "island_frequency", "droop", "isochronous", "given"]
    element_index: int  # its internal-impedance element
    node: int
    emf_v: float  # EMF magnitude at the compiled frequency
    angle_deg: float = 0.0


@dataclass
class Network:
    """A compiled configuration: nodes, elements, sources, and what was left out."""

    bench: Bench
    state: BenchState
    frequency_hz: float
    node_names: list[str]  # merged buses are named "B1+G1T"
    bus_node: dict[str, int]  # every energized bench bus -> its node
    elements: list[Element]
    sources: list[SourceRole]
    de_energized_buses: list[str] = field(default_factory=list)
    switch_groups: list[tuple[str, str, str]] = field(default_factory=list)  # closed switches (id, from, to)
    parameters: list[tuple[str, str, float, float]] = field(default_factory=list)  # (component, name, nominal, tol)
    warnings: list[str] = field(default_factory=list)
    nonlinear_loads: list[str] = field(default_factory=list)

    @property
    def n_nodes(self) -> int:
        """Number of electrical nodes."""
        return len(self.node_names)

    # arrays -----------------------------------------------------------------------------
    def element_arrays(self) -> dict[str, NDArray]:
        """The element table as arrays (one entry per element; built once, read-only)."""
        cached = self.__dict__.get("_element_arrays")
        if cached is None or cached[0] != len(self.elements):
            arrays = self._build_element_arrays()
            for value in arrays.values():
                value.setflags(write=False)
            cached = self.__dict__["_element_arrays"] = (len(self.elements), arrays)
        return cached[1]

    def element_model(self) -> ElementModel:
        """The elements' admittances as a function of tolerance factors (built once)."""
        cached = self.__dict__.get("_element_model")
        if cached is None or cached[0] != len(self.elements):
            cached = self.__dict__["_element_model"] = (len(self.elements), ElementModel.from_network(self))
        return cached[1]

    def _build_element_arrays(self) -> dict[str, NDArray]:
        e = self.elements
        return {
            "kind": np.array([_KIND_CODE[x.kind] for x in e], dtype=np.int8),
            "a": np.array([x.node_a for x in e], dtype=np.intp),
            "b": np.array([x.node_b for x in e], dtype=np.intp),
            "r": np.array([x.r_ohm for x in e]),
            "l": np.array([x.l_h for x in e]),
            "c": np.array([x.c_f for x in e]),
            "y_fixed": np.array([x.y_fixed for x in e], dtype=complex),
            "r_param": np.array([x.r_param for x in e], dtype=np.intp),
            "l_param": np.array([x.l_param for x in e], dtype=np.intp),
            "c_param": np.array([x.c_param for x in e], dtype=np.intp),
            "fixed_param": np.array([x.fixed_param for x in e], dtype=np.intp),
        }


# -- admittances ---------------------------------------------------------------------------------
@dataclass(frozen=True)
class ElementModel:
    """A network's element admittances as a function of tolerance factors, prepared once.

    Kinds: ``series`` 1 / (R + jwL + 1/(jwC)), C absent is ``inf``; ``parallel`` 1/R + 1/(jwL) + jwC,
    R and L absent are ``inf``, C absent is 0; ``fixed`` a given admittance. Each kind keeps only the
    terms its elements have (a pi section's shunt is ``jwC`` alone, a resistive load ``1/R`` alone)
    and samples only the factors of those terms, which is what a 10,000-sample tolerance band
    spends its time on.
    ``factors`` are (S, n_params) multipliers of ``net.parameters``; a parameter index of -1
    means "not varied".
    """

    n_elements: int
    n_params: int
    series: NDArray[np.intp]
    ser_r: NDArray[np.float64]
    ser_r_param: NDArray[np.intp]
    ser_l: NDArray[np.float64]
    ser_l_param: NDArray[np.intp]
    ser_c_at: NDArray[np.intp]  # positions within ``series`` that have a capacitor
    ser_c: NDArray[np.float64]
    ser_c_param: NDArray[np.intp]
    parallel: NDArray[np.intp]
    par_g_at: NDArray[np.intp]  # positions within ``parallel`` with a conductance, an inductor, a capacitor
    par_r: NDArray[np.float64]
    par_r_param: NDArray[np.intp]
    par_l_at: NDArray[np.intp]
    par_l: NDArray[np.float64]
    par_l_param: NDArray[np.intp]
    par_c_at: NDArray[np.intp]
    par_c: NDArray[np.float64]
    par_c_param: NDArray[np.intp]
    fixed: NDArray[np.intp]
    fix_y: NDArray[np.complex128]
    fix_param: NDArray[np.intp]

    @classmethod
    def from_network(cls, net: Network) -> ElementModel:
        """Prepare a compiled network's elements."""
        ea = net.element_arrays()
        kind = ea["kind"]
        ser, par, fix = (np.flatnonzero(kind == k) for k in (0, 1, 2))
        ser_c_at = np.flatnonzero(np.isfinite(ea["c"][ser]))
        r_par, l_par, c_par = ea["r"][par], ea["l"][par], ea["c"][par]
        g_at, l_at, c_at = np.flatnonzero(np.isfinite(r_par)), np.flatnonzero(np.isfinite(l_par)), np.flatnonzero(c_par)
        return cls(kind.size, len(net.parameters),
                   ser, ea["r"][ser], ea["r_param"][ser], ea["l"][ser], ea["l_param"][ser],
                   ser_c_at, ea["c"][ser][ser_c_at], ea["c_param"][ser][ser_c_at],
                   par, g_at, r_par[g_at], ea["r_param"][par][g_at], l_at, l_par[l_at], ea["l_param"][par][l_at],
                   c_at, c_par[c_at], ea["c_param"][par][c_at], fix, ea["y_fixed"][fix], ea["fixed_param"][fix])

    def admittances(self, factors: NDArray[np.float64] | None, omega: float | NDArray) -> NDArray[np.complex128]:
        """Element admittances (S, E) for factors (S, n_params) (None: nominal, S = 1).

        ``omega`` (rad/s) is a scalar, (S, 1) per member, or (S, E) per element. The result is
        the (S, E) view of an element-major (E, S) array: every element's samples are contiguous,
        so each term is computed with the samples as numpy's inner loop (a sample-major layout
        would loop over a handful of elements per sample) and a reduction reads columns for free.
        """
        if factors is None:
            factors = np.ones((1, self.n_params))
        w = np.asarray(omega, dtype=float)
        s = max(factors.shape[0], w.shape[0] if w.ndim == 2 else 1)  # nominal factors may meet stacked omegas
        pad = np.empty((self.n_params + 1, factors.shape[0]))  # (params + 1, S): index -1 -> factor 1
        pad[:-1] = factors.T
        pad[-1] = 1.0
        w_t = w.T if w.ndim == 2 else w.reshape(1, -1)  # (1 or E, S or 1)
        per_element = w_t.shape[0] == self.n_elements and self.n_elements > 1

        def at(cols: NDArray[np.intp]) -> NDArray[np.float64]:
            return w_t[cols] if per_element else w_t

        def factor(param: NDArray[np.intp]) -> NDArray[np.float64]:
            return pad[param] if pad.shape[1] == s else np.broadcast_to(pad[param], (param.size, s))

        out = np.empty((self.n_elements, s), dtype=complex)
        with np.errstate(divide="ignore", invalid="ignore"):
            if self.series.size:
                w_ser = at(self.series)
                r = factor(self.ser_r_param) * self.ser_r[:, None]
                x = factor(self.ser_l_param) * (w_ser * self.ser_l[:, None])
                if self.ser_c_at.size:
                    w_c = w_ser[self.ser_c_at] if per_element else w_ser
                    x[self.ser_c_at] -= 1.0 / (factor(self.ser_c_param) * (w_c * self.ser_c[:, None]))
                den = r * r
                den += x * x
                run = _as_slice(self.series)
                part = out[run] if run is not None else np.empty((self.series.size, s), dtype=complex)
                np.divide(r, den, out=part.real)
                np.divide(x, den, out=part.imag)
                np.negative(part.imag, out=part.imag)
                if run is None:
                    out[self.series] = part
            if self.parallel.size:
                part = np.zeros((self.parallel.size, s), dtype=complex)
                if self.par_g_at.size:
                    part.real[self.par_g_at] = 1.0 / (factor(self.par_r_param) * self.par_r[:, None])
                if self.par_c_at.size:
                    w_c = at(self.parallel[self.par_c_at])
                    part.imag[self.par_c_at] = factor(self.par_c_param) * (w_c * self.par_c[:, None])
                if self.par_l_at.size:
                    part.imag[self.par_l_at] -= 1.0 / (factor(self.par_l_param)
                                                       * (at(self.parallel[self.par_l_at]) * self.par_l[:, None]))
                out[self.parallel] = part
        if self.fixed.size:
            out[self.fixed] = factor(self.fix_param) * self.fix_y[:, None]
        return out.T


def _as_slice(index: NDArray[np.intp]) -> slice | None:
    """The slice of an index array that is one increasing run (a view to write into), else None."""
    if index.size and int(index[-1]) - int(index[0]) == index.size - 1 and bool(np.all(np.diff(index) == 1)):
        return slice(int(index[0]), int(index[-1]) + 1)
    return None


def assemble(n_nodes: int, a: NDArray, b: NDArray, y: NDArray) -> NDArray[np.complex128]:
    """Nodal admittance matrices for stacked element admittances ``y`` (..., E) -> (..., N, N).

    ``a`` and ``b`` are the node indices of each element (``NEUTRAL`` = -1 for the
    neutral), shape (E,) shared by the stack or the stack's own shape (..., E).
    """
    y = np.asarray(y, dtype=complex)
    lead = y.shape[:-1]
    batch = int(np.prod(lead)) if lead else 1
    n_el = y.shape[-1]
    if np.ndim(a) == 1 and batch >= 64:
        return _assemble_shared(n_nodes, np.asarray(a), np.asarray(b), y.reshape(batch, n_el)).reshape(
            *lead, n_nodes, n_nodes)
    yf = y.reshape(batch, n_el)
    af = np.broadcast_to(a, (*lead, n_el)).reshape(batch, n_el)
    bf = np.broadcast_to(b, (*lead, n_el)).reshape(batch, n_el)
    n2 = n_nodes * n_nodes
    off = (np.arange(batch) * n2)[:, None]
    ga, gb = af >= 0, bf >= 0
    both = ga & gb
    idx = np.concatenate([(af * (n_nodes + 1) + off)[ga], (bf * (n_nodes + 1) + off)[gb],
                          (af * n_nodes + bf + off)[both], (bf * n_nodes + af + off)[both]])
    weights = np.concatenate([yf[ga], yf[gb], -yf[both], -yf[both]])
    total = batch * n2
    re = np.bincount(idx, weights=weights.real, minlength=total)
    im = np.bincount(idx, weights=weights.imag, minlength=total)
    return (re + 1j * im).reshape(*lead, n_nodes, n_nodes)


def stamp_pattern(n_nodes: int, a: NDArray, b: NDArray) -> tuple[NDArray[np.float64], NDArray[np.intp]]:
    """The stamp of a fixed element pattern: ``Y.flat[positions] = y @ stamp`` for element admittances ``y``.

    ``stamp`` is (E, U) with +1/-1 entries, ``positions`` the U flat matrix positions it fills.
    """
    ga, gb = a >= 0, b >= 0
    both = ga & gb
    el = np.arange(a.size)
    pos = np.concatenate([a[ga] * (n_nodes + 1), b[gb] * (n_nodes + 1), a[both] * n_nodes + b[both],
                          b[both] * n_nodes + a[both]])
    src = np.concatenate([el[ga], el[gb], el[both], el[both]])
    sign = np.concatenate([np.ones(ga.sum() + gb.sum()), -np.ones(2 * both.sum())])
    unique, inverse = np.unique(pos, return_inverse=True)
    stamp = np.zeros((a.size, unique.size))
    np.add.at(stamp, (src, inverse), sign)
    return stamp, unique


def _assemble_shared(n_nodes: int, a: NDArray, b: NDArray, y: NDArray) -> NDArray[np.complex128]:
    """Many samples of one pattern: a small real stamp matrix turns the scatter into one matmul."""
    stamp, unique = stamp_pattern(n_nodes, a, b)
    # one real matmul on the (re, im) pairs: (S, 2, E) @ (E, U); any memory layout of y
    pairs = np.stack([y.real, y.imag], axis=1)
    stamped = pairs @ stamp
    out = np.zeros((y.shape[0], n_nodes * n_nodes), dtype=complex)
    out.real[:, unique] = stamped[:, 0]
    out.imag[:, unique] = stamped[:, 1]
    return out.reshape(-1, n_nodes, n_nodes)


# -- compilation -----------------------------------------------------------------------------------
class _UnionFind:
    def __init__(self, items: list[str]) -> None:
        self.parent = {x: x for x in items}

    def find(self, x: str) -> str:
        while self.parent[x] != x:
            self.parent[x] = self.parent[self.parent[x]]
            x = self.parent[x]
        return x

    def union(self, a: str, b: str) -> None:
        ra, rb = self.find(a), self.find(b)
        if ra != rb:
            self.parent[rb] = ra


def source_emf(bench: Bench, state: BenchState, source_id: str, frequency_hz: float) -> float:
    """EMF magnitude of a started source (V RMS) at the given frequency.

    Mains reference: mains voltage x transformer ratio x tap. Alternator set:
    emf_rated x field x (f / f_rated), EMF proportional to speed at a fixed field.
    An as-found EMF in the state's settings overrides the model.
    """
    src = bench.source(source_id)
    setting = state.setting(source_id)
    if setting.emf_v is not None:
        return float(setting.emf_v)
    if isinstance(src, MainsReference):
        tap = setting.tap if setting.tap is not None else src.transformer.tap_default
        return src.mains_voltage * src.transformer.ratio * tap
    field_setting = setting.field if setting.field is not None else src.field_default
    return src.emf_rated * field_setting * frequency_hz / src.rated_frequency


def compile_network(bench: Bench, state: BenchState, frequency_hz: float | None = None,
                    harmonic: int = 1, section_model: object | None = None) -> Network:
    """Compile the bench in ``state`` into a :class:`Network` at ``harmonic`` x the fundamental.

    ``frequency_hz`` is the fundamental (default: the running frequency implied by
    the state, see :func:`running_frequency`).
    """
    f0 = frequency_hz if frequency_hz is not None else running_frequency(bench, state)
    omega = 2 * np.pi * f0 * harmonic
    buses = bench.bus_names
    uf = _UnionFind(buses)
    closed = [sw for sw in bench.switches if state.switch_closed(sw.id)]
    for sw in closed:
        uf.union(sw.from_bus, sw.to_bus)

    # connectivity graph of merged buses through lines, to find energized parts
    adjacency: dict[str, set[str]] = {uf.find(b): set() for b in buses}
    active_positions = {}
    for br in bench.line_branches:
        pos_name = state.line_position(br.id)
        if pos_name == "open":
            continue
        pos = next(p for p in br.positions if p.name == pos_name)
        active_positions[br.id] = pos
        ra, rb = uf.find(br.from_bus), uf.find(br.to_bus)
        adjacency[ra].add(rb)
        adjacency[rb].add(ra)
    started = [s for s in bench.sources if s.id in state.started]
    energized_roots: set[str] = set()
    frontier = [uf.find(s.bus) for s in started]
    while frontier:
        node = frontier.pop()
        if node in energized_roots:
            continue
        energized_roots.add(node)
        frontier += list(adjacency[node] - energized_roots)

    roots = sorted({uf.find(b) for b in buses if uf.find(b) in energized_roots}, key=buses.index)
    groups = {r: [b for b in buses if uf.find(b) == r] for r in roots}
    node_names = ["+".join(groups[r]) for r in roots]
    root_index = {r: i for i, r in enumerate(roots)}
    bus_node = {b: root_index[uf.find(b)] for b in buses if uf.find(b) in root_index}
    de_energized = [b for b in buses if b not in bus_node]

    elements: list[Element] = []
    params: list[tuple[str, str, float, float]] = []

    def param(component: str, name: str, nominal: float, tol: float) -> int:
        if tol <= 0 or not np.isfinite(nominal) or nominal == 0:
            return -1
        params.append((component, name, nominal, tol))
        return len(params) - 1

    # line branches: each path is a chain of pi sections with inner nodes
    for br_id, pos in active_positions.items():
        br = bench.branch(br_id)
        if br.from_bus not in bus_node:
            continue
        for k, path in enumerate(pos.paths):
            prev_node, prev_bus = bus_node[br.from_bus], br.from_bus
            for m, sid in enumerate(path):
                sec = bench.section(sid)
                last = m == len(path) - 1
                if last:
                    next_node, next_bus = bus_node[br.to_bus], br.to_bus
                else:
                    node_names.append(f"{br_id}.{pos.name}.p{k}.n{m + 1}")
                    next_node, next_bus = len(node_names) - 1, None
                rp, lp, cp = (param(sid, "r", sec.r or 0.0, sec.tolerance),
                              param(sid, "l", sec.l or 0.0, sec.tolerance),
                              param(sid, "c", sec.c or 0.0, sec.tolerance))
                common = {"owner": br_id, "owner_table": "line_branches", "section": sid}
                if sec.full_scale is None:
                    r_ohm, l_h, c_f = float(sec.r or 0.0), float(sec.l or 0.0), float(sec.c or 0.0)
                    if r_ohm == 0 and l_h == 0:
                        msg = f'line section "{sid}" of branch "{br_id}" has zero series impedance (a short)'
                        raise NetworkError(msg)
                    elements.append(Element(part=f"{sid}.series", kind="series", node_a=prev_node, node_b=next_node,
                                            r_ohm=r_ohm, l_h=l_h, c_f=np.inf, bus_a=prev_bus, bus_b=next_bus,
                                            r_param=rp, l_param=lp, **common))
                    for end, node, bus_name in (("shunt_from", prev_node, prev_bus), ("shunt_to", next_node, next_bus)):
                        if c_f > 0:
                            elements.append(Element(part=f"{sid}.{end}", kind="parallel", node_a=node, node_b=NEUTRAL,
                                                    r_ohm=np.inf, l_h=np.inf, c_f=c_f / 2, bus_a=bus_name,
                                                    c_param=cp, **common))
                else:
                    # exact (or nominal) pi of the full-scale line, as lumped equivalents at this frequency
                    from labkit.core.lines import section_pi  # only full-scale sections need it

                    z_series, y_half = section_pi(sec, bench.line_scaling, omega)
                    z_series, y_half = complex(np.asarray(z_series).ravel()[0]), complex(np.asarray(y_half).ravel()[0])
                    rp, lp, cp = (param(sid, "r", z_series.real, sec.tolerance),
                                  param(sid, "l", z_series.imag / omega, sec.tolerance),
                                  param(sid, "c", y_half.imag / omega, sec.tolerance))
                    elements.append(Element(part=f"{sid}.series", kind="series", node_a=prev_node, node_b=next_node,
                                            r_ohm=z_series.real, l_h=z_series.imag / omega, c_f=np.inf,
                                            bus_a=prev_bus, bus_b=next_bus, r_param=rp, l_param=lp, **common))
                    g_half = y_half.real
                    for end, node, bus_name in (("shunt_from", prev_node, prev_bus), ("shunt_to", next_node, next_bus)):
                        elements.append(Element(part=f"{sid}.{end}", kind="parallel", node_a=node, node_b=NEUTRAL,
                                                r_ohm=1 / g_half if g_half > 0 else np.inf, l_h=np.inf,
                                                c_f=y_half.imag / omega, bus_a=bus_name, c_param=cp, **common))
                prev_node, prev_bus = next_node, next_bus

    # loads
    nonlinear: list[str] = []
    for ld in bench.loads:
        step = state.load_step(ld.id)
        if step == 0 or ld.bus not in bus_node:
            continue
        node = bus_node[ld.bus]
        if isinstance(ld, NonlinearLoad):
            nonlinear.append(ld.id)
            # fundamental: constant-power admittance at rated voltage, refined by the solver's iteration
            s1 = complex(ld.p1, ld.q1)
            y_rated = np.conj(s1) / ld.rated_voltage**2
            # present at every order so the harmonic networks keep the same structure (zeroed there)
            elements.append(Element(ld.id, "loads", "fundamental", "fixed", node, NEUTRAL, y_fixed=complex(y_rated),
                                    bus_a=ld.bus, fixed_param=param(ld.id, "p1", 1.0, ld.tolerance)))
            continue
        assert isinstance(ld, LinearLoad)
        st = ld.steps[step - 1]
        series = ld.combination == "series"
        absent_rl = 0.0 if series else np.inf
        r_ohm = st.r if st.r is not None else absent_rl
        l_h = st.l if st.l is not None else absent_rl
        c_f = st.c if st.c is not None else (np.inf if series else 0.0)
        comp = f"{ld.id}.step{step}"
        elements.append(Element(ld.id, "loads", f"step{step}", "series" if series else "parallel", node, NEUTRAL,
                                r_ohm=r_ohm, l_h=l_h, c_f=c_f, bus_a=ld.bus,
                                r_param=param(comp, "r", r_ohm, ld.tolerance),
                                l_param=param(comp, "l", l_h, ld.tolerance),
                                c_param=param(comp, "c", c_f, ld.tolerance)))

    # sources: internal impedance to the neutral (Norton)
    roles: list[SourceRole] = []
    for src in started:
        if src.bus not in bus_node:
            continue
        if src.r_internal == 0 and src.l_internal == 0:
            msg = f'source "{src.id}" has zero internal impedance; give r_internal and l_internal'
            raise NetworkError(msg)
        node = bus_node[src.bus]
        elements.append(Element(src.id, "sources", "internal", "series", node, NEUTRAL, r_ohm=src.r_internal,
                                l_h=src.l_internal, c_f=np.inf, bus_a=src.bus,
                                r_param=param(src.id, "r", src.r_internal, src.tolerance),
                                l_param=param(src.id, "l", src.l_internal, src.tolerance)))
        roles.append(SourceRole(src.id, "given", len(elements) - 1, node, source_emf(bench, state, src.id, f0)))

    net = Network(bench, state, f0, node_names, bus_node, elements, roles, de_energized,
                  [(sw.id, sw.from_bus, sw.to_bus) for sw in closed if sw.from_bus in bus_node], params,
                  nonlinear_loads=nonlinear)
    _assign_roles(net)
    return net


def running_frequency(bench: Bench, state: BenchState) -> float:
    """The frequency the started sources run at before any droop correction.

    The mains reference's (as-found or nominal) frequency when it is started,
    else the setpoint of the first started alternator set, else nominal.
    """
    for src in bench.sources:
        if src.id in state.started and isinstance(src, MainsReference):
            found = state.setting(src.id).frequency_hz
            return float(found) if found is not None else src.mains_frequency
    for src in bench.sources:
        if src.id in state.started and isinstance(src, AlternatorSet):
            sp = state.setting(src.id).setpoint_hz
            return float(sp) if sp is not None else src.speed_control.setpoint_default
    return bench.bench.nominal_frequency


def _islands(net: Network) -> list[set[int]]:
    """Node sets connected through series elements."""
    parent = list(range(net.n_nodes))

    def find(x: int) -> int:
        while parent[x] != x:
            parent[x] = parent[parent[x]]
            x = parent[x]
        return x

    for e in net.elements:
        if e.node_a >= 0 and e.node_b >= 0:
            ra, rb = find(e.node_a), find(e.node_b)
            if ra != rb:
                parent[rb] = ra
    out: dict[int, set[int]] = {}
    for n in range(net.n_nodes):
        out.setdefault(find(n), set()).add(n)
    return list(out.values())


def _assign_roles(net: Network) -> None:
    """Give each source its role in its island (see :mod:`labkit.core.solve`)."""
    islands = _islands(net)
    new_roles = []
    for island in islands:
        members = [r for r in net.sources if r.node in island]
        refs = [r for r in members if isinstance(net.bench.source(r.source_id), MainsReference)]
        sets = [r for r in members if not isinstance(net.bench.source(r.source_id), MainsReference)]
        iso = [r for r in sets if net.bench.source(r.source_id).speed_control.mode == "isochronous"]  # type: ignore[union-attr]
        if refs:
            for r in refs:
                new_roles.append(_with_role(r, "slack"))
            for r in iso:
                net.warnings.append(f'isochronous set "{r.source_id}" in parallel with the mains reference: its share '
                                    "of the load is not determined (it fights the mains); shown with given EMF angle 0")
            for r in sets:
                new_roles.append(_with_role(r, "given" if r in iso else "droop"))
        elif len(sets) == 1:
            new_roles.append(_with_role(sets[0], "island_frequency"))
        elif sets:
            if len(iso) > 1:
                net.warnings.append("two or more isochronous sets in parallel ("
                                    + ", ".join(r.source_id for r in iso) + "): load sharing is not determined; "
                                    "set all but one to droop. Shown with given EMF angles 0")
                new_roles += [_with_role(r, "given") for r in sets]
            else:
                new_roles += [_with_role(r, "isochronous" if r in iso else "droop") for r in sets]
    net.sources = new_roles


def _with_role(role: SourceRole, name: str) -> SourceRole:
    return SourceRole(role.source_id, name, role.element_index, role.node, role.emf_v, role.angle_deg)  # type: ignore[arg-type]
