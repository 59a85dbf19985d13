"""Solve a compiled network: source roles, the nonlinear load, harmonics; stacked over samples.

Source roles (assigned in :func:`labkit.core.network.compile_network`):

``slack``             the mains reference: fixed EMF (tap x mains), angle 0, its frequency
``island_frequency``  an alternator set alone in its island: angle 0; with droop the island
                      frequency follows ``f = f_set - droop * f_rated * P / S_rated``; isochronous
                      holds ``f = f_set``
``droop``             a set in parallel: EMF magnitude from its field (and speed), angle such
                      that the power at its EMF equals its droop power at the common frequency
``isochronous``       the one isochronous set of an island of droop sets: fixes the frequency
``given``             EMF magnitude and angle fixed (given-phasor mode; also the fallback when
                      the sharing is not determined, with a warning)

The droop power of a set is ``P = S_rated * (f_set - f) / (droop * f_rated)``, limited by its
torque limit (``P_max = T_max * 2*pi*f / pole_pairs``). The unknowns (island frequencies and
set angles) are found by Newton's method with a finite-difference Jacobian around the linear
solve, for all samples of a stack at once.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from numpy.typing import NDArray

from labkit.core.bench import AlternatorSet, NonlinearLoad
from labkit.core.network import (
    NEUTRAL,
    Network,
    NetworkError,
    assemble,
    compile_network,
    stamp_pattern,
)
from labkit.core.reduction import plan_elimination, reduced_solve

MAX_NEWTON = 30
REDUCE_MIN_STACK = 16  # stacks at least this tall eliminate chain nodes first (labkit.core.reduction)
NEWTON_TOL_W = 1e-9  # relative to the set's rating


@dataclass
class Solution:
    """Node voltages and element currents of a solved network, stacked over samples (axis 0).

    Harmonic arrays have an axis for the orders in ``orders`` (the fundamental is order 1,
    always first).
    """

    network: Network
    orders: list[int]
    v: NDArray[np.complex128]  # (S, H, N) node voltage phasors, V RMS
    i_elem: NDArray[np.complex128]  # (S, H, E) element currents from node_a to node_b, A RMS
    emf: NDArray[np.complex128]  # (S, n_sources) source EMF phasors at the fundamental
    island_frequency_hz: NDArray[np.float64]  # (S, N) frequency of each node's island
    source_current: NDArray[np.complex128]  # (S, H, n_sources) current out of each source into its bus
    converged: bool = True
    n_iter: int = 0
    warnings: list[str] = field(default_factory=list)
    failed: NDArray[np.bool_] | None = None  # (S,) members whose matrix was singular

    @property
    def n_samples(self) -> int:
        """Number of stacked samples."""
        return self.v.shape[0]


# -- linear algebra ---------------------------------------------------------------------------------
def stacked_solve(y: NDArray[np.complex128], i: NDArray[np.complex128]) -> tuple[NDArray, NDArray[np.bool_]]:
    """Solve ``y @ v = i`` for stacked matrices; singular members give NaN and are flagged.

    1 x 1 and 2 x 2 systems (what elimination often leaves) are solved in closed form: LAPACK's
    per-matrix call costs more than the arithmetic at that size.
    """
    n = y.shape[-1]
    if n in (1, 2) and y.ndim == 3:
        if n == 1:
            det = y[:, 0, 0]
            num = i
        else:
            a, b, c, d = y[:, 0, 0], y[:, 0, 1], y[:, 1, 0], y[:, 1, 1]
            det = a * d - b * c  # Cramer's rule, forward stable for 2 x 2
            num = np.stack([d * i[:, 0] - b * i[:, 1], a * i[:, 1] - c * i[:, 0]], axis=1)
        bad = (det == 0) | ~np.isfinite(det)
        with np.errstate(divide="ignore", invalid="ignore"):
            v = num / det[:, None]
        v[bad] = np.nan
        return v, bad
    try:
        return np.linalg.solve(y, i[..., None])[..., 0], np.zeros(y.shape[:-2], dtype=bool)
    except np.linalg.LinAlgError:
        flat_y = y.reshape(-1, *y.shape[-2:])
        flat_i = i.reshape(-1, i.shape[-1])
        out = np.full(flat_i.shape, np.nan + 0j)
        bad = np.zeros(flat_i.shape[0], dtype=bool)
        for k in range(flat_y.shape[0]):  # only reached when some member is singular
            try:
                out[k] = np.linalg.solve(flat_y[k], flat_i[k])
            except np.linalg.LinAlgError:
                bad[k] = True
        return out.reshape(i.shape), bad.reshape(y.shape[:-2])


@dataclass
class Arrays:
    """The per-element arrays of a network, with tolerance factors applied (S samples)."""

    kind: NDArray
    a: NDArray
    b: NDArray
    r: NDArray  # (S, E)
    l: NDArray  # noqa: E741
    c: NDArray
    y_fixed: NDArray


def element_arrays(net: Network, factors: NDArray[np.float64] | None = None) -> Arrays:
    """Element arrays, with per-sample parameter factors ``(S, n_params)`` applied (default: nominal)."""
    ea = net.element_arrays()
    n_p = len(net.parameters)
    f = np.ones((1, n_p)) if factors is None else np.asarray(factors, dtype=float)
    s = f.shape[0]
    pad = np.concatenate([f, np.ones((s, 1))], axis=1)  # index -1 -> factor 1

    def scaled(values: NDArray, idx: NDArray) -> NDArray:
        return values[None, :] * pad[:, idx]

    y_fixed = ea["y_fixed"][None, :] * pad[:, ea["fixed_param"]]
    return Arrays(ea["kind"], ea["a"], ea["b"], scaled(ea["r"], ea["r_param"]), scaled(ea["l"], ea["l_param"]),
                  scaled(ea["c"], ea["c_param"]), y_fixed)


def _source_emf_magnitude(net: Network, f_node: NDArray[np.float64]) -> NDArray[np.float64]:
    """EMF magnitudes (S, n_src): alternator EMF proportional to speed, the slack's fixed."""
    out = np.empty((f_node.shape[0], len(net.sources)))
    for k, role in enumerate(net.sources):
        src = net.bench.source(role.source_id)
        if isinstance(src, AlternatorSet) and net.state.setting(src.id).emf_v is None:
            out[:, k] = role.emf_v * f_node[:, role.node] / net.frequency_hz
        else:
            out[:, k] = role.emf_v
    return out


def _droop_power(net: Network, f_src: NDArray[np.float64]) -> NDArray[np.float64]:
    """Droop power (S, n_src) of each set at its frequency, torque-limited; NaN for non-sets."""
    out = np.full(f_src.shape, np.nan)
    for k, role in enumerate(net.sources):
        src = net.bench.source(role.source_id)
        if not isinstance(src, AlternatorSet):
            continue
        sc = src.speed_control
        setpoint = net.state.setting(src.id).setpoint_hz or sc.setpoint_default
        f = f_src[:, k]
        if sc.mode == "droop" and sc.droop > 0:
            p = src.rating * (setpoint - f) / (sc.droop * src.rated_frequency)
        else:
            p = np.full_like(f, np.nan)
        p_max = sc.torque_limit * 2 * np.pi * f / src.pole_pairs
        out[:, k] = np.clip(p, -p_max, p_max)
    return out


def _linear(net: Network, factors: NDArray[np.float64] | None, f_node: NDArray, emf: NDArray[np.complex128],
            extra_y: NDArray[np.complex128] | None = None) -> tuple[NDArray, NDArray, NDArray[np.bool_]]:
    """One stacked linear solve at the fundamental; returns (v (S,N), y_elem (S,E), failed (S,))."""
    arr = net.element_arrays()
    if np.all(f_node == f_node[:, :1]):  # one frequency per member: no per-element gather
        omega = 2 * np.pi * f_node[:, :1]
    else:
        omega = 2 * np.pi * f_node[:, np.where(arr["a"] >= 0, arr["a"], arr["b"])]
    y_el = net.element_model().admittances(factors, omega)
    if y_el.shape[0] != emf.shape[0]:  # nominal elements shared by a stack of EMFs or frequencies
        y_el = np.broadcast_to(y_el, (emf.shape[0], y_el.shape[1])).copy()
    if extra_y is not None:
        y_el = y_el + extra_y
    inj = np.zeros((emf.shape[0], net.n_nodes), dtype=complex)
    for k, role in enumerate(net.sources):
        inj[:, role.node] += emf[:, k] * y_el[:, role.element_index]
    if y_el.shape[0] >= REDUCE_MIN_STACK:
        plan = plan_elimination(net.n_nodes, arr["a"], arr["b"], np.array([r.node for r in net.sources], dtype=np.intp))
        v, failed = reduced_solve(plan, y_el, inj)
        return v, y_el, failed
    ymat = assemble(net.n_nodes, arr["a"], arr["b"], y_el)
    v, failed = stacked_solve(ymat, inj)
    if ymat.shape[0] == 1 and ymat.shape[-1] > 1:
        _check_conditioning(net, ymat[0], y_el[0])
    return v, y_el, failed


ILL_CONDITIONED = 1e13


def _check_conditioning(net: Network, ymat: NDArray, y_el: NDArray) -> None:
    """Refuse a nominal network whose admittance matrix is numerically singular, naming the extremes."""
    cond = np.linalg.cond(ymat)
    if np.isfinite(cond) and cond < ILL_CONDITIONED:
        return
    mags = np.abs(y_el)
    order = np.argsort(mags)
    weakest, strongest = net.elements[order[0]], net.elements[order[-1]]
    msg = (f"the network is ill-conditioned (condition number {cond:.3g}): admittances range from "
           f"{mags[order[0]]:.3g} S ({weakest.owner} {weakest.part}) to {mags[order[-1]]:.3g} S "
           f"({strongest.owner} {strongest.part}); check those values")
    raise NetworkError(msg)


def _currents(arr_a: NDArray, arr_b: NDArray, v: NDArray, y_el: NDArray) -> NDArray:
    """Element currents (S, E) from node voltages (S, N); node index -1 is the neutral (0 V).

    The result is the (S, E) view of an element-major array.

    The voltage across each element is one matrix product with the element-node incidence
    matrix (entries +1, -1, 0: exact for finite voltages, and far faster than gathering columns);
    members with a non-finite voltage (a singular member is NaN) are gathered instead, so a NaN
    stays where it belongs.
    """
    n_nodes = v.shape[1]
    incidence = np.zeros((arr_a.size, n_nodes))
    elements = np.arange(arr_a.size)
    incidence[elements[arr_a >= 0], arr_a[arr_a >= 0]] = 1.0
    incidence[elements[arr_b >= 0], arr_b[arr_b >= 0]] -= 1.0
    # element-major (E, S), as the stacked admittances and voltages are laid out: no transposing copies
    across = incidence @ v.T
    bad = ~np.isfinite(v).all(axis=1)
    if bad.any():
        v_ext = np.zeros((int(bad.sum()), n_nodes + 1), dtype=complex)
        v_ext[:, :-1] = v[bad]  # the last column stands for the neutral, so index -1 reads 0 V
        across[:, bad] = (v_ext[:, arr_a] - v_ext[:, arr_b]).T
    across *= y_el.T  # in place: a fresh array of this size costs its page faults again on every block
    return across.T


def solve_network(net: Network, factors: NDArray[np.float64] | None = None, *, harmonics: bool = True,
                  given_angles_deg: dict[str, float] | None = None, warm_start: Solution | None = None
                  ) -> Solution:
    """Solve a compiled network for stacked parameter samples.

    Parameters
    ----------
    net
        From :func:`~labkit.core.network.compile_network`.
    factors
        (S, n_params) multiplicative factors of ``net.parameters`` (tolerance samples);
        ``None`` solves the nominal network once.
    harmonics
        Also solve the harmonic orders injected by nonlinear loads.
    given_angles_deg
        Given-phasor mode: every source keeps its EMF magnitude and takes this angle
        (degrees); no role is solved.
    warm_start
        A converged solution of the same network (its nominal one, say): the iterations
        (source roles, nonlinear loads' equivalent admittances) start from its operating
        point instead of the setpoints. The answer is the same to the iterations' tolerance.
    """
    factors = None if factors is None else np.asarray(factors, dtype=float)
    arr = net.element_arrays()
    s = 1 if factors is None else factors.shape[0]
    n_src = len(net.sources)
    islands = _node_islands(net)
    f_node = np.full((s, net.n_nodes), net.frequency_hz)
    warnings = list(net.warnings)

    # unknowns: free island frequencies, then droop angles
    free_islands: list[int] = []
    angle_unknowns: list[int] = []
    fixed_f: dict[int, float] = {}
    if given_angles_deg is None:
        for isl_id, isl in enumerate(islands):
            roles = [(k, r) for k, r in enumerate(net.sources) if r.node in isl]
            kinds = {r.role for _, r in roles}
            if "slack" in kinds:
                angle_unknowns += [k for k, r in roles if r.role == "droop"]
                continue
            if not roles:
                continue
            iso = [r for _, r in roles if r.role == "isochronous"]
            solo = [r for _, r in roles if r.role == "island_frequency"]
            leader = (iso or solo or [roles[0][1]])[0]
            src = net.bench.source(leader.source_id)
            setpoint = net.state.setting(src.id).setpoint_hz or src.speed_control.setpoint_default  # type: ignore[union-attr]
            if leader.role == "isochronous" or src.speed_control.mode == "isochronous":  # type: ignore[union-attr]
                fixed_f[isl_id] = setpoint
            else:
                free_islands.append(isl_id)
            for k, r in roles:
                if r.role == "droop" and r is not leader:
                    angle_unknowns.append(k)
        for isl_id, fval in fixed_f.items():
            f_node[:, sorted(islands[isl_id])] = fval
    angles = np.zeros((s, n_src))
    if given_angles_deg is not None:
        for k, r in enumerate(net.sources):
            angles[:, k] = given_angles_deg.get(r.source_id, 0.0)
    # initial island frequencies: the leader's setpoint
    for isl_id in free_islands:
        roles = [r for r in net.sources if r.node in islands[isl_id]]
        src = net.bench.source(roles[0].source_id)
        f_node[:, sorted(islands[isl_id])] = net.state.setting(src.id).setpoint_hz or src.speed_control.setpoint_default  # type: ignore[union-attr]

    # equations: droop sets (incl. a droop leader of a free island) match power
    eq_sources = [k for k, r in enumerate(net.sources)
                  if r.role in ("droop", "island_frequency")
                  and net.bench.source(r.source_id).speed_control.mode == "droop"]  # type: ignore[union-attr]
    eq_sources = [k for k in eq_sources if any(net.sources[k].node in islands[i] for i in free_islands)
                  or k in angle_unknowns]
    n_x = len(free_islands) + len(angle_unknowns)
    node_island = np.zeros(net.n_nodes, dtype=int)
    for isl_id, isl in enumerate(islands):
        node_island[sorted(isl)] = isl_id
    src_nodes = np.array([r.node for r in net.sources], dtype=int)
    nl_elems = [(j, e) for j, e in enumerate(net.elements) if e.owner_table == "loads" and e.part == "fundamental"]
    y_nl = np.zeros((s, len(net.elements)), dtype=complex) if nl_elems else None
    y_fixed = None if not nl_elems else net.element_model().admittances(factors, 2 * np.pi * net.frequency_hz)

    def evaluate(x: NDArray, y_extra: NDArray | None) -> tuple[NDArray, NDArray, NDArray, NDArray, NDArray]:
        fn = f_node.copy() if x.shape[0] == s else np.repeat(f_node, x.shape[0] // s, axis=0)
        ang = angles.copy() if x.shape[0] == s else np.repeat(angles, x.shape[0] // s, axis=0)
        for m, isl_id in enumerate(free_islands):
            fn[:, sorted(islands[isl_id])] = x[:, m : m + 1]
        for m, k in enumerate(angle_unknowns):
            ang[:, k] = x[:, len(free_islands) + m]
        reps = x.shape[0] // s
        f_rep = factors if reps == 1 or factors is None else np.repeat(factors, reps, 0)
        emf = _source_emf_magnitude(net, fn) * np.exp(1j * np.radians(ang))
        ye = y_extra if reps == 1 or y_extra is None else np.repeat(y_extra, reps, 0)
        v, y_el, failed = _linear(net, f_rep, fn, emf, ye)
        i_src = (emf - v[:, src_nodes]) * y_el[:, [r.element_index for r in net.sources]] if n_src else emf
        p_emf = (emf * np.conj(i_src)).real
        return v, y_el, fn, emf, p_emf if n_src else np.zeros((x.shape[0], 0)), failed  # type: ignore[return-value]

    last: dict[str, tuple] = {}  # the latest evaluation at the unknowns, reused once they have converged

    def residual(x: NDArray, y_extra: NDArray) -> NDArray:
        result = evaluate(x, y_extra)
        if x.shape[0] == s:
            last["at"] = (x, y_extra, result)
        _, _, fn, _, p_emf, _ = result
        f_src = fn[:, src_nodes]
        p_set = _droop_power(net, f_src)
        scale = np.array([net.bench.source(r.source_id).rating for r in net.sources])
        return ((p_emf - p_set) / scale)[:, eq_sources]

    x = np.zeros((s, n_x))
    for m, isl_id in enumerate(free_islands):
        x[:, m] = f_node[:, sorted(islands[isl_id])[0]]
    if warm_start is not None:  # start from a converged operating point of the same network
        for m, isl_id in enumerate(free_islands):
            x[:, m] = warm_start.island_frequency_hz[0, sorted(islands[isl_id])[0]]
        for m, k in enumerate(angle_unknowns):
            x[:, len(free_islands) + m] = np.degrees(np.angle(warm_start.emf[0, k]))
        if nl_elems:
            assert y_nl is not None
            assert y_fixed is not None
            for j, e in nl_elems:
                y_nl[:, j] = _extra_admittance(y_fixed[:, j], net.bench.load(e.owner).rated_voltage,
                                               warm_start.v[0, 0, e.node_a])
    converged, n_iter = True, 0
    by_compensation = (NONLINEAR_BY_COMPENSATION and not n_x and nl_elems
                       and all(e.node_b == NEUTRAL for _, e in nl_elems)
                       and len({e.node_a for _, e in nl_elems}) == len(nl_elems))
    if by_compensation:  # the nonlinear loads' fixed point on their buses alone (the same iterates)
        assert y_nl is not None
        assert y_fixed is not None
        result = _nonlinear_by_compensation(net, evaluate(x, None), nl_elems, y_nl, y_fixed)
    for _outer in range(0 if by_compensation else NONLINEAR_MAX_ITER if nl_elems else 1):
        if n_x:
            converged = False
            for n_iter in range(1, MAX_NEWTON + 1):  # noqa: B007
                r0 = residual(x, y_nl)
                if np.all(np.abs(r0) < NEWTON_TOL_W):
                    converged = True
                    break
                steps = np.where(np.arange(n_x) < len(free_islands), 1e-6, 1e-6)
                xp = np.repeat(x[:, None, :], n_x, axis=1) + np.eye(n_x)[None] * steps
                rp = residual(xp.reshape(s * n_x, n_x), y_nl).reshape(s, n_x, n_x)
                jac = np.swapaxes((rp - r0[:, None, :]) / steps[None, :, None], 1, 2)
                try:
                    dx = np.linalg.solve(jac, -r0[..., None])[..., 0]
                except np.linalg.LinAlgError as exc:
                    msg = "the source-role iteration met a singular Jacobian (sets that cannot share load)"
                    raise NetworkError(msg) from exc
                # keep frequency steps modest for robustness
                dx[:, : len(free_islands)] = np.clip(dx[:, : len(free_islands)], -2.0, 2.0)
                dx[:, len(free_islands):] = np.clip(dx[:, len(free_islands):], -30.0, 30.0)
                x = x + dx
        if not nl_elems:
            break
        v, *_ = evaluate(x, y_nl)
        assert y_nl is not None
        assert y_fixed is not None
        y_new = np.zeros_like(y_nl)
        for j, e in nl_elems:
            ld = net.bench.load(e.owner)
            assert isinstance(ld, NonlinearLoad)
            y_new[:, j] = _extra_admittance(y_fixed[:, j], ld.rated_voltage, v[:, e.node_a])
        change = np.max(np.abs(y_new - y_nl)) if y_nl.size else 0.0
        y_nl = y_new
        if change < NONLINEAR_TOL:
            break
    if not converged:
        warnings.append(f"source-role iteration did not converge in {MAX_NEWTON} steps")
    seen = last.get("at")
    reuse = converged and seen is not None and seen[0] is x and seen[1] is y_nl
    if by_compensation:
        v, y_el, fn, emf, _, failed = result
    else:
        v, y_el, fn, emf, _, failed = seen[2] if reuse else evaluate(x, y_nl)  # type: ignore[index]
    i_el = _currents(arr["a"], arr["b"], v, y_el)
    i_src = (emf - v[:, src_nodes]) * y_el[:, [r.element_index for r in net.sources]] if n_src else np.zeros((s, 0))

    orders = [1]
    v_all, i_all, isrc_all = [v], [i_el], [i_src]
    if harmonics and net.nonlinear_loads:
        h_orders, v_h, i_h, isrc_h = _solve_harmonics(net, v, i_el, fn, factors)
        orders += h_orders
        v_all += v_h
        i_all += i_h
        isrc_all += isrc_h
    if np.any(failed):
        warnings.append(f"{int(np.sum(failed))} stacked member(s) had a singular admittance matrix")
    return Solution(net, orders, _sample_last(v_all), _sample_last(i_all), emf, fn, _sample_last(isrc_all),
                    converged, n_iter, warnings, failed)


NONLINEAR_TOL = 1e-12  # change of the nonlinear loads' equivalent admittances (S) between iterates
NONLINEAR_MAX_ITER = 40
NONLINEAR_BY_COMPENSATION = True
"""Where it applies, iterate the nonlinear loads on their buses alone (False: re-solve the whole
network at every iterate, the general path, kept as the reference)."""


def _extra_admittance(fixed: NDArray[np.complex128], rated_voltage: NDArray | float,
                      v_bus: NDArray[np.complex128] | complex) -> NDArray[np.complex128]:
    """A nonlinear load's fundamental admittance beyond its compiled one, at bus voltage ``v_bus``:
    constant fundamental power, Y = conj(S1) / |V|^2, where the compiled Y is at rated voltage."""
    return fixed * (rated_voltage**2 / np.maximum(np.abs(v_bus) ** 2, 1e-12) - 1.0)


def _nonlinear_by_compensation(net: Network, base: tuple, nl_elems: list, y_nl: NDArray[np.complex128],
                               y_fixed: NDArray[np.complex128]) -> tuple:
    """The nonlinear loads' fixed point by the compensation theorem, for sources of fixed EMF (no
    source-role unknowns), on buses of their own, each load between its bus and neutral.

    ``base`` is the network solved with each nonlinear load at its compiled admittance. With
    Z (S, k, k) the network's impedances between the k loads' buses (one solve per bus, EMFs
    shorted), extra admittances dY at those buses give bus voltages u = (I + Z dY)^-1 u0, so
    the iteration of :func:`solve_network` (each load's admittance from its fundamental power
    at its bus voltage, until the admittances change by less than ``NONLINEAR_TOL``) runs on the
    k buses only, and the node voltages follow as v = v0 - sum_j x_j dY_j u_j, where x_j is the
    response to a unit current into bus j. Returns what ``evaluate`` returns.
    """
    v0, y_el, fn, emf, p_emf, failed = base
    arr = net.element_arrays()
    columns = [j for j, _ in nl_elems]
    nodes = np.array([e.node_a for _, e in nl_elems], dtype=np.intp)
    s, k = v0.shape[0], nodes.size
    tall = s >= REDUCE_MIN_STACK
    plan = plan_elimination(net.n_nodes, arr["a"], arr["b"], nodes) if tall else None
    matrix = None if tall else assemble(net.n_nodes, arr["a"], arr["b"], y_el)
    responses = []
    for node in nodes:  # a unit current into each load's bus, every EMF shorted
        unit = np.zeros((s, net.n_nodes), dtype=complex)
        unit[:, node] = 1.0
        x, bad = reduced_solve(plan, y_el, unit) if plan is not None else stacked_solve(matrix, unit)  # type: ignore[arg-type]
        responses.append(x)
        failed = failed | bad
    z = np.stack([x[:, nodes] for x in responses], axis=2)  # (S, k, k): z[:, i, j] = response at i to j
    u0 = v0[:, nodes]
    rated = np.array([net.bench.load(e.owner).rated_voltage for _, e in nl_elems])
    fixed = y_fixed[:, columns]
    dy = y_nl[:, columns]

    def bus_voltages(dy: NDArray[np.complex128]) -> NDArray[np.complex128]:  # u = (I + Z dY)^-1 u0
        if k == 1:
            return u0 / (1 + z[:, 0, 0] * dy[:, 0])[:, None]
        return np.linalg.solve(np.eye(k) + z * dy[:, None, :], u0[..., None])[..., 0]

    for _ in range(NONLINEAR_MAX_ITER):
        dy_new = _extra_admittance(fixed, rated, bus_voltages(dy))
        change = np.max(np.abs(dy_new - dy))
        dy = dy_new
        if change < NONLINEAR_TOL:
            break
    u = bus_voltages(dy)
    v = v0.T.copy()  # node-major, as the linear solves give it
    for j, x in enumerate(responses):
        v -= x.T * (dy[:, j] * u[:, j])
    y_total = y_el.copy()
    y_total[:, columns] += dy
    return v.T, y_total, fn, emf, p_emf, failed


def _sample_last(per_order: list[NDArray[np.complex128]]) -> NDArray[np.complex128]:
    """(S, H, X) from one (S, X) array per order, stored (X, H, S): every place's samples contiguous,
    the layout the readings are computed in (:mod:`labkit.core.results`), so they need no copy."""
    if len(per_order) == 1 and per_order[0].T.flags.c_contiguous:
        return per_order[0].T[:, None, :].transpose(2, 1, 0)  # already place-major: a view
    out = np.empty((per_order[0].shape[1], len(per_order), per_order[0].shape[0]), dtype=complex)
    for k, x in enumerate(per_order):
        out[:, k] = x.T
    return out.transpose(2, 1, 0)


def _node_islands(net: Network) -> list[set[int]]:
    from labkit.core.network import _islands

    return _islands(net)


def _harmonic_network(net: Network, f0: float, order: int) -> Network:
    """The network at one harmonic order, compiled once per fundamental network and frequency."""
    compiled = net.__dict__.setdefault("_harmonic_networks", {})
    if (f0, order) not in compiled:
        compiled[(f0, order)] = compile_network(net.bench, net.state, frequency_hz=f0, harmonic=order)
    return compiled[(f0, order)]


def _solve_harmonics(net: Network, v1: NDArray, i1: NDArray, f_node: NDArray,
                     factors: NDArray | None) -> tuple[list[int], list, list, list]:
    """Harmonic voltages and currents from the nonlinear loads' current injections."""
    loads = [net.bench.load(lid) for lid in net.nonlinear_loads]
    orders = sorted({h.order for ld in loads if isinstance(ld, NonlinearLoad) for h in ld.harmonics})
    out_v, out_i, out_src = [], [], []
    f0 = float(np.mean(f_node))
    for h in orders:
        net_h = _harmonic_network(net, f0, h)
        arr = net_h.element_arrays()
        s = v1.shape[0]
        y_el = net_h.element_model().admittances(factors, 2 * np.pi * f0 * h)
        if y_el.shape[0] != s:
            y_el = np.broadcast_to(y_el, (s, y_el.shape[1])).copy()
        # the nonlinear load is a current source at harmonics, not an admittance
        for j, e in enumerate(net_h.elements):
            if e.owner_table == "loads" and e.owner in net.nonlinear_loads:
                y_el[:, j] = 0
        inj = np.zeros((s, net_h.n_nodes), dtype=complex)
        for ld in loads:
            assert isinstance(ld, NonlinearLoad)
            spec = next((x for x in ld.harmonics if x.order == h), None)
            if spec is None:
                continue
            node1 = net.bus_node[ld.bus]
            j1 = next(j for j, e in enumerate(net.elements) if e.owner == ld.id and e.part == "fundamental")
            i_fund = np.abs(i1[:, j1])
            theta = np.angle(v1[:, node1])
            i_h = spec.magnitude * i_fund * np.exp(1j * (np.radians(spec.angle) + h * theta))
            inj[:, net_h.bus_node[ld.bus]] -= i_h
        if s >= REDUCE_MIN_STACK:
            injected = np.array([net_h.bus_node[ld.bus] for ld in loads], dtype=np.intp)
            v_h, _ = reduced_solve(plan_elimination(net_h.n_nodes, arr["a"], arr["b"], injected), y_el, inj)
        else:
            v_h, _ = stacked_solve(assemble(net_h.n_nodes, arr["a"], arr["b"], y_el), inj)
        i_el_h = _currents(arr["a"], arr["b"], v_h, y_el)
        # nonlinear load elements carry their injected harmonic current
        for j, e in enumerate(net_h.elements):
            if e.owner_table == "loads" and e.owner in net.nonlinear_loads:
                i_el_h[:, j] = -inj[:, e.node_a]
        if net_h.n_nodes != net.n_nodes or len(net_h.elements) != len(net.elements):
            msg = "harmonic network differs from the fundamental network"
            raise NetworkError(msg)
        src_nodes = [r.node for r in net.sources]
        i_src_h = -v_h[:, src_nodes] * y_el[:, [r.element_index for r in net.sources]]
        out_v.append(v_h)
        out_i.append(i_el_h)
        out_src.append(i_src_h)
    return orders, out_v, out_i, out_src


def sample_factors(net: Network, n_samples: int, seed: int) -> NDArray[np.float64]:
    """Uniform tolerance factors (n_samples, n_params) in [1 - tol, 1 + tol], seeded."""
    return ToleranceDraws(net, seed).next(n_samples)


class ToleranceDraws:
    """Seeded tolerance factors drawn a block at a time, in order: the blocks, stacked, are the
    same numbers as :func:`sample_factors` with that seed (numpy's generator fills them in turn)."""

    def __init__(self, net: Network, seed: int) -> None:
        self._rng = np.random.default_rng(seed)
        self._tol = np.array([p[3] for p in net.parameters])

    def next(self, n_samples: int) -> NDArray[np.float64]:
        """The next ``n_samples`` samples' factors (n_samples, n_params)."""
        # in place, and the same numbers as 1 + uniform(-1, 1) * tol: uniform draws -1 + 2 * random()
        out = self._rng.random((n_samples, self._tol.size))
        out *= 2.0
        out -= 1.0
        out *= self._tol
        out += 1.0
        return out


def element_node_current_into(sol: Solution, element_index: int, node: int) -> NDArray[np.complex128]:
    """Current (S, H) flowing from ``node`` into an element."""
    e = sol.network.elements[element_index]
    i = sol.i_elem[:, :, element_index]
    return i if e.node_a == node else -i if e.node_b == node else np.zeros_like(i)


__all__ = ["NEUTRAL", "Solution", "ToleranceDraws", "sample_factors", "solve_network", "stacked_solve"]


@dataclass
class LinearSystem:
    """One configuration prepared for repeated solves: the array-level fast path.

    Everything that does not change between solves (the stamp pattern, the element
    groups, the source injections) is computed once by :meth:`from_network`;
    :meth:`solve` then evaluates the admittances, stamps them with one small matmul
    and solves. Given-EMF mode: each source keeps its compiled EMF (angle 0) unless
    ``emf`` is passed.
    """

    n_nodes: int
    series: NDArray[np.intp]
    parallel: NDArray[np.intp]
    fixed: NDArray[np.intp]
    r: NDArray[np.float64]
    l: NDArray[np.float64]  # noqa: E741
    c_inv: NDArray[np.float64]  # 1/C for series elements, C for parallel ones
    g: NDArray[np.float64]  # 1/R for parallel elements
    l_inv: NDArray[np.float64]  # 1/L for parallel elements
    y_fixed: NDArray[np.complex128]
    stamp: NDArray[np.float64]  # (E, U)
    positions: NDArray[np.intp]  # (U,) flat positions in the N x N matrix
    src_node: NDArray[np.intp]
    src_elem: NDArray[np.intp]
    emf: NDArray[np.complex128]

    @classmethod
    def from_network(cls, net: Network) -> LinearSystem:
        """Prepare a compiled network."""
        ea = net.element_arrays()
        kind = ea["kind"]
        n = net.n_nodes
        stamp, unique = stamp_pattern(n, ea["a"], ea["b"])
        with np.errstate(divide="ignore"):
            c_inv = np.where(kind == 0, np.where(np.isfinite(ea["c"]), 1.0 / ea["c"], 0.0), ea["c"])
            g = np.where(np.isfinite(ea["r"]) & (kind == 1), 1.0 / ea["r"], 0.0)
            l_inv = np.where(np.isfinite(ea["l"]) & (kind == 1), 1.0 / ea["l"], 0.0)
        return cls(n, np.flatnonzero(kind == 0), np.flatnonzero(kind == 1), np.flatnonzero(kind == 2),
                   ea["r"], ea["l"], c_inv, g, l_inv, ea["y_fixed"], stamp, unique,
                   np.array([s.node for s in net.sources], dtype=np.intp),
                   np.array([s.element_index for s in net.sources], dtype=np.intp),
                   np.array([s.emf_v for s in net.sources], dtype=complex))

    def admittances(self, omega: float) -> NDArray[np.complex128]:
        """Element admittances at ``omega`` (rad/s)."""
        y = np.empty(self.r.size, dtype=complex)
        s, p = self.series, self.parallel
        y[s] = 1.0 / (self.r[s] + 1j * (omega * self.l[s] - self.c_inv[s] / omega))
        y[p] = self.g[p] + 1j * (omega * self.c_inv[p] - self.l_inv[p] / omega)
        y[self.fixed] = self.y_fixed[self.fixed]
        return y

    def matrix(self, y: NDArray[np.complex128]) -> NDArray[np.complex128]:
        """The nodal admittance matrix (N, N) of element admittances ``y``."""
        flat = np.zeros(self.n_nodes * self.n_nodes, dtype=complex)
        flat[self.positions] = y @ self.stamp
        return flat.reshape(self.n_nodes, self.n_nodes)

    def solve(self, omega: float, emf: NDArray[np.complex128] | None = None) -> NDArray[np.complex128]:
        """Node voltage phasors (N,) at ``omega`` with the sources' EMFs (compiled ones by default)."""
        y = self.admittances(omega)
        inj = np.zeros(self.n_nodes, dtype=complex)
        np.add.at(inj, self.src_node, (self.emf if emf is None else emf) * y[self.src_elem])
        return np.linalg.solve(self.matrix(y), inj)


def thevenin_impedance(net: Network, node: int, frequency_hz: float | None = None) -> complex:
    """Thevenin impedance (ohm) of a compiled network seen at ``node``: the node's entry of Y^-1.

    Sources count as their internal impedances (EMFs shorted), as for a surge estimate.
    """
    system = LinearSystem.from_network(net)
    f = net.frequency_hz if frequency_hz is None else frequency_hz
    unit = np.zeros(system.n_nodes, dtype=complex)
    unit[node] = 1.0
    return complex(np.linalg.solve(system.matrix(system.admittances(2 * np.pi * f)), unit)[node])
