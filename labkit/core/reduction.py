"""Exact node elimination before a stacked solve: star-mesh (Kron) reduction of chain nodes.

A bench network is mostly chains: the inner nodes of pi sections, and buses that only pass a
line on. Such a node, with no injection and at most two neighbours besides the neutral, can be
eliminated exactly (Kron reduction of one node, which on elements is the star-mesh transform):
with ``y_p`` and ``y_q`` its admittances to neighbours ``p`` and ``q``, ``y_s`` to the neutral
and ``d = y_p + y_q + y_s``, it becomes an element ``p-q`` of ``y_p y_q / d`` and shunts
``y_p y_s / d`` at ``p`` and ``y_q y_s / d`` at ``q``; afterwards its voltage is
``V = (y_p V_p + y_q V_q) / d``. Eliminating every such node, repeatedly, leaves a much smaller
matrix to solve: 14 nodes become 6 on the benchmark network, and a stacked solve of 10,000
matrices costs about a quarter as much.

The plan (which node goes when, which element columns it sums) depends only on the topology,
so it is worked out once per pattern and cached; executing it is a few vectorized operations
per eliminated node on (S,) columns. Nothing here approximates: the result equals the full
solve to rounding (``tests/test_reduction.py`` checks it against ``numpy.linalg.solve`` of the
full matrices).
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from numpy.typing import NDArray

NEUTRAL = -1
WEAK_PIVOT = 1e-9
"""An eliminated node whose total admittance is below this fraction of its parts' (admittances
cancelling at a resonance) is solved again in full, with pivoting, for that member."""


@dataclass(frozen=True)
class _Elimination:
    """One eliminated node: the working columns summed per neighbour, and where the new columns go."""

    node: int
    p: int
    q: int  # NEUTRAL when the node had one neighbour
    cols_p: tuple[int, ...]
    cols_q: tuple[int, ...]
    cols_s: tuple[int, ...]
    new_pq: int  # working column of the new p-q element (-1: none)
    new_ps: int  # new shunt at p (-1: none)
    new_qs: int  # new shunt at q (-1: none)


@dataclass(frozen=True)
class EliminationPlan:
    """The reduction of one element pattern (see the module docstring)."""

    n_nodes: int
    a: NDArray[np.intp]  # the original element ends (for the full solve of weak members)
    b: NDArray[np.intp]
    n_elements: int
    n_columns: int  # original element columns, then the columns the eliminations create
    steps: tuple[_Elimination, ...]
    kept: NDArray[np.intp]  # original node index of each reduced node
    reduced_cols: NDArray[np.intp]  # working columns that form the reduced network
    reduced_a: NDArray[np.intp]  # their ends, in reduced node numbering (NEUTRAL for the neutral)
    reduced_b: NDArray[np.intp]
    stamp: NDArray[np.float64]  # (len(reduced_cols), U): Y_red.flat[positions] = y_red @ stamp
    positions: NDArray[np.intp]

    @property
    def n_kept(self) -> int:
        """Number of nodes left to solve."""
        return int(self.kept.size)


def plan_elimination(n_nodes: int, a: NDArray[np.intp], b: NDArray[np.intp],
                     injected: NDArray[np.intp]) -> EliminationPlan:
    """Plan the elimination of every node with at most two neighbours and no injection (cached)."""
    key = (n_nodes, np.asarray(a, np.intp).tobytes(), np.asarray(b, np.intp).tobytes(),
           np.unique(np.asarray(injected, np.intp)).tobytes())
    return _plan(*key)


@lru_cache(maxsize=256)
def _plan(n_nodes: int, a_bytes: bytes, b_bytes: bytes, injected_bytes: bytes) -> EliminationPlan:
    from labkit.core.network import stamp_pattern

    a = np.frombuffer(a_bytes, dtype=np.intp)
    b = np.frombuffer(b_bytes, dtype=np.intp)
    injected = set(np.frombuffer(injected_bytes, dtype=np.intp).tolist())
    ends: list[tuple[int, int]] = []
    active: set[int] = set()
    incident: list[set[int]] = [set() for _ in range(n_nodes)]

    def add(u: int, v: int) -> int:
        col = len(ends)
        ends.append((u, v))
        if u != v:  # an element whose ends share a node stamps nothing
            active.add(col)
            for node in (u, v):
                if node != NEUTRAL:
                    incident[node].add(col)
        return col

    for u, v in zip(a.tolist(), b.tolist(), strict=True):
        add(u, v)
    alive = [True] * n_nodes
    steps: list[_Elimination] = []
    progress = True
    while progress:
        progress = False
        for node in range(n_nodes):
            if not alive[node] or node in injected:
                continue
            groups: dict[int, list[int]] = {}
            for col in sorted(incident[node]):
                u, v = ends[col]
                groups.setdefault(v if u == node else u, []).append(col)
            neighbours = sorted(k for k in groups if k != NEUTRAL)
            if not neighbours or len(neighbours) > 2:
                continue  # an isolated node stays (the solve flags it); three or more would fill in
            p = neighbours[0]
            q = neighbours[1] if len(neighbours) == 2 else NEUTRAL
            cols_p, cols_q, cols_s = groups[p], groups.get(q, []) if q != NEUTRAL else [], groups.get(NEUTRAL, [])
            for col in cols_p + cols_q + cols_s:
                active.discard(col)
                for end in ends[col]:
                    if end != NEUTRAL:
                        incident[end].discard(col)
            alive[node] = False
            new_pq = add(p, q) if q != NEUTRAL else -1
            new_ps = add(p, NEUTRAL) if cols_s else -1
            new_qs = add(q, NEUTRAL) if cols_s and q != NEUTRAL else -1
            steps.append(_Elimination(node, p, q, tuple(cols_p), tuple(cols_q), tuple(cols_s), new_pq, new_ps, new_qs))
            progress = True
    kept = np.array([k for k in range(n_nodes) if alive[k]], dtype=np.intp)
    renumber = np.full(n_nodes + 1, NEUTRAL, dtype=np.intp)  # index -1 (the neutral) stays NEUTRAL
    renumber[kept] = np.arange(kept.size)
    cols = np.array(sorted(active), dtype=np.intp)
    end_arr = np.array([ends[c] for c in cols], dtype=np.intp).reshape(-1, 2)
    red_a, red_b = renumber[end_arr[:, 0]], renumber[end_arr[:, 1]]
    stamp, positions = stamp_pattern(kept.size, red_a, red_b)
    return EliminationPlan(n_nodes, a, b, a.size, len(ends), tuple(steps), kept, cols, red_a, red_b, stamp, positions)


def _total(columns: list[NDArray | None], cols: tuple[int, ...], s: int) -> NDArray[np.complex128]:
    if not cols:
        return np.zeros(s, dtype=complex)
    out = columns[cols[0]]
    for c in cols[1:]:
        out = out + columns[c]
    return out


def reduced_solve(plan: EliminationPlan, y: NDArray[np.complex128],
                  inj: NDArray[np.complex128]) -> tuple[NDArray[np.complex128], NDArray[np.bool_]]:
    """Node voltages (S, N) of element admittances ``y`` (S, E) and injections ``inj`` (S, N).

    The voltages are the (S, N) view of a node-major array (each node's samples contiguous).

    Members whose reduced matrix is singular come back NaN and flagged, as from
    :func:`labkit.core.solve.stacked_solve`; members with a weak pivot (see ``WEAK_PIVOT``)
    are solved in full instead.
    """
    from labkit.core.network import assemble
    from labkit.core.solve import stacked_solve

    s = y.shape[0]
    yt = np.ascontiguousarray(y.T)  # (E, S): each element's samples contiguous (free for an element-major y)
    columns: list[NDArray | None] = [*yt, *([None] * (plan.n_columns - plan.n_elements))]
    weights: list[tuple[NDArray, NDArray]] = []
    weak = np.zeros(s, dtype=bool)
    with np.errstate(divide="ignore", invalid="ignore"):
        for step in plan.steps:
            y_p = _total(columns, step.cols_p, s)
            y_q = _total(columns, step.cols_q, s)
            y_s = _total(columns, step.cols_s, s)
            d = y_p + y_q + y_s
            weak |= ~(np.abs(d) > WEAK_PIVOT * (np.abs(y_p) + np.abs(y_q) + np.abs(y_s)))
            t_p, t_q = y_p / d, y_q / d
            if step.new_pq >= 0:
                columns[step.new_pq] = t_p * y_q
            if step.new_ps >= 0:
                columns[step.new_ps] = t_p * y_s
            if step.new_qs >= 0:
                columns[step.new_qs] = t_q * y_s
            weights.append((t_p, t_q))
    n = plan.n_kept
    flat = np.zeros((s, n * n), dtype=complex)
    if plan.positions.size:
        pairs = np.empty((s, 2, plan.reduced_cols.size))  # one real matmul: (S, 2, E') @ (E', U)
        for k, c in enumerate(plan.reduced_cols):
            pairs[:, 0, k] = columns[c].real  # type: ignore[union-attr]
            pairs[:, 1, k] = columns[c].imag  # type: ignore[union-attr]
        stamped = pairs @ plan.stamp
        flat.real[:, plan.positions] = stamped[:, 0]
        flat.imag[:, plan.positions] = stamped[:, 1]
    v_t = np.empty((plan.n_nodes, s), dtype=complex)  # node-major: back-substitution writes whole rows
    v_kept, failed = stacked_solve(flat.reshape(s, n, n), inj[:, plan.kept])
    v_t[plan.kept] = v_kept.T
    with np.errstate(invalid="ignore", over="ignore"):  # weak members' values are garbage, solved again below
        for step, (t_p, t_q) in zip(reversed(plan.steps), reversed(weights), strict=True):
            vi = v_t[step.node]
            np.multiply(t_p, v_t[step.p], out=vi)
            if step.q != NEUTRAL:
                vi += t_q * v_t[step.q]
    v = v_t.T  # (S, N), a view
    redo = weak | (~failed & ~np.isfinite(v_t).all(axis=0))
    if np.any(redo):  # the few members elimination cannot take: the full matrix, with pivoting
        v[redo], failed[redo] = stacked_solve(assemble(plan.n_nodes, plan.a, plan.b, y[redo]), inj[redo])
    if np.any(failed):
        v[failed] = np.nan
    return v, failed
