"""The bench's switch space: configurations near an intended one, solved as one stacked batch.

Diagnosis asks "which wiring or switch mistake would give these readings?". The
candidates are the states reachable from the intended state by changing one,
two, ... switch items (a switch open or closed, a line branch's position, a load
bank's step), searched outward under a time budget. Each batch is solved in one
stacked :func:`numpy.linalg.solve`: the compiled networks are padded to a common
size (padding elements carry zero admittance, padding nodes a unit admittance
to the neutral), and every source keeps the EMF phasor it has in the intended
configuration's full solution. That screening is exact for networks fed by the
mains reference alone and close otherwise; :func:`search` re-solves the best
candidates with the full source-role solution before ranking them.
"""

from __future__ import annotations

import itertools
import time
from collections.abc import Iterator, Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from labkit.core.bench import Bench, LinearLoad
from labkit.core.network import Network, NetworkError, compile_network
from labkit.core.results import quantity_arrays
from labkit.core.solve import Solution, element_arrays, solve_network, stacked_solve
from labkit.core.state import BenchState

Change = tuple[str, str, object]  # (table, id, new value)


def switch_items(bench: Bench) -> list[tuple[str, str, list[object]]]:
    """Every switch item of the bench and the values it can take."""
    items: list[tuple[str, str, list[object]]] = [("switches", s.id, [False, True]) for s in bench.switches]
    items += [("lines", b.id, ["open", *[p.name for p in b.positions]]) for b in bench.line_branches]
    items += [("loads", ld.id, list(range(len(ld.steps) + 1 if isinstance(ld, LinearLoad) else 2)))
              for ld in bench.loads]
    return items


def _apply(state: BenchState, changes: Sequence[Change]) -> BenchState:
    grouped: dict[str, dict] = {"switches": {}, "lines": {}, "loads": {}}
    for table, key, value in changes:
        grouped[table][key] = value
    return state.with_changes(**grouped)


def neighbours(bench: Bench, state: BenchState, max_changes: int) -> Iterator[tuple[tuple[Change, ...], BenchState]]:
    """States reachable by changing 1..max_changes switch items, nearest first."""
    current = {"switches": dict(state.switches), "lines": dict(state.lines), "loads": dict(state.loads)}
    items = switch_items(bench)
    defaults = {"switches": False, "lines": "open", "loads": 0}
    for n in range(1, max_changes + 1):
        for chosen in itertools.combinations(items, n):
            options = [[(table, key, v) for v in values if v != current[table].get(key, defaults[table])]
                       for table, key, values in chosen]
            for combo in itertools.product(*options):
                yield combo, _apply(state, combo)


@dataclass
class Batch:
    """Padded arrays of several compiled networks, ready for one stacked solve."""

    networks: list[Network]
    n_nodes: int
    kind: NDArray
    a: NDArray
    b: NDArray
    r: NDArray
    l: NDArray  # noqa: E741
    c: NDArray
    y_fixed: NDArray
    src_node: NDArray  # (C, n_src_max), -1 padding
    src_elem: NDArray
    stamp_index: NDArray | None = None  # flat (C*N*N) positions of every stamp entry, fixed per batch
    stamp_source: NDArray | None = None  # flat (C*E) element of each stamp entry
    stamp_sign: NDArray | None = None
    stamp_starts: NDArray | None = None

    def __post_init__(self) -> None:
        c, e = self.a.shape
        n = self.n_nodes
        off_m = (np.arange(c) * n * n)[:, None]
        off_e = (np.arange(c) * e)[:, None] + np.arange(e)[None, :]
        # an element with both ends on one node (a line whose ends a closed switch joins) stamps nothing
        loop = (self.a == self.b) & (self.a >= 0)
        ga, gb = (self.a >= 0) & ~loop, (self.b >= 0) & ~loop
        both = ga & gb
        index = np.concatenate([(self.a * (n + 1) + off_m)[ga], (self.b * (n + 1) + off_m)[gb],
                                (self.a * n + self.b + off_m)[both], (self.b * n + self.a + off_m)[both]])
        source = np.concatenate([off_e[ga], off_e[gb], off_e[both], off_e[both]])
        sign = np.concatenate([np.ones(ga.sum() + gb.sum()), -np.ones(2 * both.sum())])
        # sorted by matrix position, so one gather and one segmented sum build every matrix
        order = np.argsort(index, kind="stable")
        index, self.stamp_source, self.stamp_sign = index[order], source[order], sign[order]
        self.stamp_index, starts = np.unique(index, return_index=True)
        self.stamp_starts = starts
        # a matrix position is either diagonal (all terms +) or off-diagonal (all terms -): one sign each
        self.stamp_sign = self.stamp_sign[starts]
        valid = self.src_node >= 0
        self._inj_flat = (np.arange(c)[:, None] * n + self.src_node)[valid]
        self._inj_elem = (np.arange(c)[:, None] * e + self.src_elem)[valid]
        self._inj_valid = valid
        # the element values do not change between solves of a batch: keep each kind's terms ready
        kind = self.kind.ravel()
        self._series, self._parallel, self._fixed = (np.flatnonzero(kind == k) for k in (0, 1, 2))
        r, l_, c_ = self.r.ravel(), self.l.ravel(), self.c.ravel()
        s_, p_ = self._series, self._parallel
        with np.errstate(divide="ignore"):
            self._terms = (r[s_], l_[s_], np.where(np.isfinite(c_[s_]), 1.0 / c_[s_], 0.0),
                           np.where(np.isfinite(r[p_]), 1.0 / r[p_], 0.0), c_[p_],
                           np.where(np.isfinite(l_[p_]), 1.0 / l_[p_], 0.0), self.y_fixed.ravel()[self._fixed])

    def admittances(self, omega: float) -> NDArray[np.complex128]:
        """Element admittances (C, E) at ``omega`` (rad/s)."""
        r_s, l_s, cinv_s, g_p, c_p, linv_p, y_f = self._terms
        out = np.empty(self.kind.size, dtype=complex)
        out[self._series] = 1.0 / (r_s + 1j * (omega * l_s - cinv_s / omega))
        out[self._parallel] = g_p + 1j * (omega * c_p - linv_p / omega)
        out[self._fixed] = y_f
        return out.reshape(self.kind.shape)


def make_batch(networks: Sequence[Network]) -> Batch:
    """Pad compiled networks to a common node and element count."""
    n_max = max(n.n_nodes for n in networks)
    arrays = [element_arrays(n) for n in networks]
    e_max = max(len(n.elements) for n in networks) + n_max  # room for the padding-node shunts
    s_max = max((len(n.sources) for n in networks), default=0)
    c = len(networks)
    kind = np.full((c, e_max), 2, dtype=np.int8)
    a = np.zeros((c, e_max), dtype=np.intp)
    b = np.full((c, e_max), -1, dtype=np.intp)
    r = np.ones((c, e_max))
    l_ = np.ones((c, e_max))
    cc = np.ones((c, e_max))
    y_fixed = np.zeros((c, e_max), dtype=complex)
    src_node = np.full((c, s_max), -1, dtype=np.intp)
    src_elem = np.zeros((c, s_max), dtype=np.intp)
    for k, (net, arr) in enumerate(zip(networks, arrays, strict=True)):
        m = len(net.elements)
        kind[k, :m], a[k, :m], b[k, :m] = arr.kind, arr.a, arr.b
        r[k, :m], l_[k, :m], cc[k, :m], y_fixed[k, :m] = arr.r[0], arr.l[0], arr.c[0], arr.y_fixed[0]
        pad_nodes = np.arange(net.n_nodes, n_max)
        a[k, m : m + len(pad_nodes)] = pad_nodes
        y_fixed[k, m : m + len(pad_nodes)] = 1.0
        for j, role in enumerate(net.sources):
            src_node[k, j], src_elem[k, j] = role.node, role.element_index
    return Batch(list(networks), n_max, kind, a, b, r, l_, cc, y_fixed, src_node, src_elem)


def solve_batch(batch: Batch, emf: NDArray[np.complex128], frequency_hz: float) -> tuple[NDArray, NDArray, NDArray]:
    """One stacked solve of a batch with given EMF phasors (C, n_src_max).

    Returns node voltages (C, N), element admittances (C, E) and the failed flags (C,).
    """
    y_el = batch.admittances(2 * np.pi * frequency_hz)
    c, n = y_el.shape[0], batch.n_nodes
    # the stamp positions are fixed per batch: one gather and one segmented sum build every matrix
    flat_y = y_el.ravel()
    flat = np.zeros(c * n * n, dtype=complex)
    flat[batch.stamp_index] = np.add.reduceat(flat_y[batch.stamp_source], batch.stamp_starts) * batch.stamp_sign
    ymat = flat.reshape(c, n, n)
    inj = np.zeros(c * n, dtype=complex)
    np.add.at(inj, batch._inj_flat, emf[batch._inj_valid] * flat_y[batch._inj_elem])
    v, failed = stacked_solve(ymat, inj.reshape(c, n))
    return v, y_el, failed


def _emf_like(intended: Solution, net: Network) -> NDArray[np.complex128]:
    by_id = {r.source_id: intended.emf[0, k] for k, r in enumerate(intended.network.sources)}
    out = np.zeros(len(net.sources), dtype=complex)
    for k, role in enumerate(net.sources):
        out[k] = by_id.get(role.source_id, role.emf_v)
    return out


def screen(bench: Bench, intended: Solution, states: Sequence[BenchState]) -> list[Solution | None]:
    """Solve many states as one stacked batch with the intended configuration's EMF phasors.

    States that cannot be compiled (a short, say) give ``None``.
    """
    nets: list[Network | None] = []
    for st in states:
        try:
            nets.append(compile_network(bench, st, frequency_hz=intended.network.frequency_hz))
        except NetworkError:
            nets.append(None)
    good = [n for n in nets if n is not None and n.n_nodes > 0]
    if not good:
        return [None] * len(states)
    batch = make_batch(good)
    s_max = batch.src_node.shape[1]
    emf = np.zeros((len(good), s_max), dtype=complex)
    for k, net in enumerate(good):
        e = _emf_like(intended, net)
        emf[k, : len(e)] = e
    v, y_el, failed = solve_batch(batch, emf, intended.network.frequency_hz)
    out: list[Solution | None] = []
    k = 0
    for net in nets:
        if net is None or net.n_nodes == 0:
            out.append(None)
            continue
        if failed[k]:
            out.append(None)
            k += 1
            continue
        n, m = net.n_nodes, len(net.elements)
        vk = v[k, :n][None, None, :]
        ya = y_el[k, :m][None, :]
        arr = element_arrays(net)
        va = np.where(arr.a >= 0, vk[..., np.maximum(arr.a, 0)], 0)
        vb = np.where(arr.b >= 0, vk[..., np.maximum(arr.b, 0)], 0)
        i_el = (va - vb) * ya[:, None, :]
        e = _emf_like(intended, net)[None, :]
        src_nodes = [r.node for r in net.sources]
        i_src = ((e - vk[0][:, src_nodes]) * ya[:, [r.element_index for r in net.sources]])[:, None, :]
        out.append(Solution(net, [1], vk, i_el, e, np.full((1, n), net.frequency_hz), i_src))
        k += 1
    return out


@dataclass(frozen=True)
class Candidate:
    """A configuration and how well its predictions match a set of readings."""

    changes: tuple[Change, ...]
    state: BenchState
    score: float  # sum of squared (measured - predicted) / tolerance
    predicted: dict[tuple[str, str], float]


def _score(sol: Solution, readings: dict[tuple[str, str], tuple[float, float]]) -> tuple[float, dict]:
    labels, values = quantity_arrays(sol)
    table = {(lab.location, lab.quantity): values[0, k] for k, lab in enumerate(labels)}
    total, predicted = 0.0, {}
    for key, (measured, tolerance) in readings.items():
        p = table.get(key, 0.0)  # a place that is not energized reads zero
        predicted[key] = float(p)
        total += ((measured - p) / max(tolerance, 1e-12)) ** 2
    return total, predicted


def search(bench: Bench, intended: BenchState, readings: dict[tuple[str, str], tuple[float, float]], *,
           max_changes: int = 2, budget_s: float = 2.0, batch_size: int = 256, confirm: int = 8) -> list[Candidate]:
    """Configurations near ``intended`` ranked by how well they explain ``readings``.

    ``readings`` maps (location, quantity) to (measured value, tolerance), in the
    registry's units. The intended configuration itself is candidate 0 changes.
    """
    start = time.perf_counter()
    base = solve_network(compile_network(bench, intended), harmonics=False)
    score0, pred0 = _score(base, readings)
    found = [Candidate((), intended, score0, pred0)]
    pending: list[tuple[tuple[Change, ...], BenchState]] = []

    def flush() -> None:
        sols = screen(bench, base, [s for _, s in pending])
        for (changes, st), sol in zip(pending, sols, strict=True):
            if sol is not None:
                sc, pred = _score(sol, readings)
                found.append(Candidate(changes, st, sc, pred))
        pending.clear()

    for changes, st in neighbours(bench, intended, max_changes):
        pending.append((changes, st))
        if len(pending) >= batch_size:
            flush()
            if time.perf_counter() - start > budget_s:
                break
    if pending and time.perf_counter() - start <= budget_s:
        flush()
    found.sort(key=lambda c: c.score)
    # confirm the best few with the full source-role solution
    confirmed = []
    for cand in found[:confirm]:
        try:
            sol = solve_network(compile_network(bench, cand.state), harmonics=False)
        except NetworkError:
            continue
        sc, pred = _score(sol, readings)
        confirmed.append(Candidate(cand.changes, cand.state, sc, pred))
    return sorted(confirmed, key=lambda c: (c.score, len(c.changes))) + found[confirm:]


def sweep(bench: Bench, state: BenchState, table: str, item_id: str,
          values: Sequence[object] | None = None) -> list[tuple[object, Solution | None]]:
    """A load bank through all its steps, or a line branch through all its positions, as one stacked solve.

    ``table`` is ``loads``, ``lines`` or ``switches``. Sources keep the EMF phasors of
    ``state``'s own solution (exact when the mains reference feeds the bench alone).
    """
    items = {(t, k): v for t, k, v in switch_items(bench)}
    if (table, item_id) not in items:
        from labkit.core.errors import UnknownNameError, did_you_mean

        known = [k for t, k in items if t == table]
        msg = f'nothing to sweep: no {table} item "{item_id}"{did_you_mean(item_id, known)}'
        raise UnknownNameError(msg)
    chosen = list(values) if values is not None else items[(table, item_id)]
    base = solve_network(compile_network(bench, state), harmonics=False)
    states = [_apply(state, [(table, item_id, v)]) for v in chosen]
    return list(zip(chosen, screen(bench, base, states), strict=True))
