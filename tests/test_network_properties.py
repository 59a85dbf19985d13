"""Physical properties of the network solution: power balance, droop sharing, roles, islands, stacks.

Outside references: conservation of complex power (Tellegen's theorem, textbook circuit
theory); the droop steady-state relation of field-reference §5.1 (Saadat, *Power System
Analysis*, ch. 12: each unit picks up ΔP_i = -Δω / R_i).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from labkit.core.bench import AlternatorSet, Bench
from labkit.core.network import NetworkError, compile_network
from labkit.core.predict import predict_state
from labkit.core.results import quantity_arrays
from labkit.core.solve import ToleranceDraws, sample_factors, solve_network, stacked_solve
from labkit.core.state import BenchState, SourceSetting, states_after_steps
from labkit.files.loader import load_bench, load_template
from tests.network_cases import random_bench

ROOT = Path(__file__).resolve().parent.parent / "session_templates"


@pytest.fixture
def demo() -> Bench:
    return load_bench(ROOT / "demo-bench.toml").bench


def _balance(sol) -> tuple[np.ndarray, np.ndarray]:
    """(power delivered by the EMFs, power absorbed by every element incl. internal impedances), per sample."""
    net = sol.network
    delivered = np.sum((sol.emf * np.conj(sol.source_current[:, 0, :])), axis=1)
    absorbed = np.zeros(sol.n_samples, dtype=complex)
    for j, e in enumerate(net.elements):
        va = sol.v[:, 0, e.node_a] if e.node_a >= 0 else 0
        vb = sol.v[:, 0, e.node_b] if e.node_b >= 0 else 0
        if e.owner_table == "sources":
            k = next(i for i, r in enumerate(net.sources) if r.element_index == j)
            i_s = sol.source_current[:, 0, k]
            z = e.r_ohm + 1j * 2 * np.pi * sol.island_frequency_hz[:, e.node_a] * e.l_h
            absorbed += np.abs(i_s) ** 2 * z
        else:
            absorbed += (va - vb) * np.conj(sol.i_elem[:, 0, j])
    return delivered, absorbed


@pytest.mark.parametrize("seed", range(12))
def test_power_balance_random_networks(seed: int) -> None:
    bench, state, angles = random_bench(seed)
    sol = solve_network(compile_network(bench, state), given_angles_deg=angles, harmonics=False)
    delivered, absorbed = _balance(sol)
    np.testing.assert_allclose(absorbed, delivered, rtol=1e-9, atol=1e-9 * np.max(np.abs(delivered)))


def test_power_balance_every_demo_step_with_roles(demo: Bench) -> None:
    for name in ("lab1-line-and-loads", "lab2-synchronize"):
        template = load_template(ROOT / f"{name}.toml", demo).template
        for state in states_after_steps(demo, template):
            sol = solve_network(compile_network(demo, state), harmonics=False)
            delivered, absorbed = _balance(sol)
            np.testing.assert_allclose(absorbed, delivered, rtol=1e-9, atol=1e-9)


def _island_of_two_sets(demo: Bench, setpoints: tuple[float, float]) -> BenchState:
    return BenchState(started=frozenset({"G1", "G2"}),
                      settings=(("G1", SourceSetting(setpoint_hz=setpoints[0])),
                                ("G2", SourceSetting(setpoint_hz=setpoints[1]))),
                      switches=(("SYNC1", True), ("SYNC2", True)), lines=(("L12", "short"), ("L13", "on")),
                      loads=(("LB", 3), ("RB", 4)))


@pytest.mark.parametrize("setpoints", [(60.0, 60.0), (60.1, 59.95), (60.3, 60.2)])
def test_droop_sharing_matches_steady_state_formula(demo: Bench, setpoints: tuple[float, float]) -> None:
    # field-reference §5.1: unit i delivers S_i (f_set,i - f) / (R_i f_rated); the common f follows from the total
    sol = solve_network(compile_network(demo, _island_of_two_sets(demo, setpoints)), harmonics=False)
    assert sol.converged
    p_emf = (sol.emf[0] * np.conj(sol.source_current[0, 0])).real
    sets = [demo.source(r.source_id) for r in sol.network.sources]
    assert all(isinstance(s, AlternatorSet) for s in sets)
    gains = np.array([s.rating / (s.speed_control.droop * s.rated_frequency) for s in sets])  # W per Hz
    total = p_emf.sum()
    f_formula = (np.sum(gains * np.array(setpoints)) - total) / gains.sum()
    f = sol.island_frequency_hz[0, 0]
    assert f == pytest.approx(f_formula, abs=1e-9)
    np.testing.assert_allclose(p_emf, gains * (np.array(setpoints) - f), rtol=1e-8)


def test_droop_set_against_mains_takes_its_droop_power(demo: Bench) -> None:
    template = load_template(ROOT / "lab2-synchronize.toml", demo).template
    state = states_after_steps(demo, template)[template.index_of("sync-g1")]
    sol = solve_network(compile_network(demo, state), harmonics=False)
    k = [r.source_id for r in sol.network.sources].index("G1")
    p = (sol.emf[0, k] * np.conj(sol.source_current[0, 0, k])).real
    g1 = demo.source("G1")
    assert isinstance(g1, AlternatorSet)
    # 60.1 Hz setpoint against a 60 Hz reference: S (0.1 Hz) / (0.05 x 60 Hz) (common practice droop definition)
    assert p == pytest.approx(g1.rating * 0.1 / (0.05 * 60.0), rel=1e-8)


def _raw_demo() -> dict:
    import tomllib

    return tomllib.loads((ROOT / "demo-bench.toml").read_text())


def test_two_isochronous_sets_give_a_warning_not_a_number() -> None:
    data = _raw_demo()
    for src in data["sources"]:
        if src["kind"] == "alternator_set":
            src["speed_control"]["mode"] = "isochronous"
    iso = Bench.model_validate(data)
    net = compile_network(iso, _island_of_two_sets(iso, (60.0, 60.0)))
    assert any("isochronous" in w and "not determined" in w for w in net.warnings)
    assert {r.role for r in net.sources} == {"given"}


def test_isochronous_set_against_mains_warns() -> None:
    data = _raw_demo()
    data["sources"][1]["speed_control"]["mode"] = "isochronous"
    iso = Bench.model_validate(data)
    state = BenchState(started=frozenset({"REF", "G1"}), switches=(("SWR", True), ("SYNC1", True)))
    net = compile_network(iso, state)
    assert any("fights the mains" in w for w in net.warnings)


def test_isochronous_set_alone_holds_its_setpoint() -> None:
    data = _raw_demo()
    data["sources"][1]["speed_control"]["mode"] = "isochronous"
    iso = Bench.model_validate(data)
    state = BenchState(started=frozenset({"G1"}), settings=(("G1", SourceSetting(setpoint_hz=59.8)),),
                       switches=(("SYNC1", True),), lines=(("L12", "short"),), loads=(("RB", 3),))
    sol = solve_network(compile_network(iso, state), harmonics=False)
    assert np.all(sol.island_frequency_hz == 59.8)


def test_part_without_source_is_de_energized_never_a_crash(demo: Bench) -> None:
    state = BenchState(started=frozenset({"REF"}), switches=(("SWR", True),), lines=(("L12", "short"),),
                       loads=(("CB", 3), ("RB", 2)))
    pred = predict_state(demo, state, n_samples=50)
    rows = {(lab.location, lab.quantity): (lab, pred.nominal[k]) for k, lab in enumerate(pred.labels)}
    lab, value = rows[("B3", "v_rms")]
    assert lab.status == "de-energized"
    assert value == 0.0
    assert "charge" in lab.note  # never labelled safe: capacitance holds charge
    assert ("CB@B3", "i_rms") not in rows


def test_zero_impedance_section_is_a_clear_error_naming_it() -> None:
    data = _raw_demo()
    data["line_sections"][0].update(r="0 ohm", l="0 mH")
    bad = Bench.model_validate(data)
    state = BenchState(started=frozenset({"REF"}), switches=(("SWR", True),), lines=(("L12", "short"),))
    with pytest.raises(NetworkError, match=r'"S1".*zero series impedance'):
        compile_network(bad, state)


def test_singular_member_of_a_stack_is_handled_alone() -> None:
    rng = np.random.default_rng(3)
    y = rng.normal(size=(6, 4, 4)) + 1j * rng.normal(size=(6, 4, 4))
    y[2] = 0.0  # an island with nothing to fix its voltage
    y[4, :, 1] = 0.0  # a node connected to nothing
    y[4, 1, :] = 0.0
    i = rng.normal(size=(6, 4)) + 0j
    v, failed = stacked_solve(y, i)
    assert failed.tolist() == [False, False, True, False, True, False]
    good = ~failed
    np.testing.assert_allclose(np.einsum("sij,sj->si", y[good], v[good]), i[good], atol=1e-10)
    assert np.all(np.isnan(v[failed]))


def test_tolerance_band_contains_nominal_and_is_reproducible(demo: Bench) -> None:
    template = load_template(ROOT / "lab1-line-and-loads.toml", demo).template
    state = states_after_steps(demo, template)[4]
    a = predict_state(demo, state, n_samples=400, seed=7)
    b = predict_state(demo, state, n_samples=400, seed=7)
    np.testing.assert_array_equal(a.band_low, b.band_low)
    assert np.all(a.band_low <= a.nominal + 1e-12)
    assert np.all(a.nominal <= a.band_high + 1e-12)
    k = next(k for k, lab in enumerate(a.labels) if (lab.location, lab.quantity) == ("LB@B2", "i_rms"))
    assert a.band_high[k] - a.band_low[k] > 0.01 * a.nominal[k]  # a 5 % component tolerance shows


def test_tolerance_factors_are_numpys_seeded_uniform_draws(demo: Bench) -> None:
    # a recorded seed keeps its samples: numpy's Generator.uniform(-1, 1) scaled by each tolerance
    template = load_template(ROOT / "lab1-line-and-loads.toml", demo).template
    net = compile_network(demo, states_after_steps(demo, template)[4])
    tol = np.array([p[3] for p in net.parameters])
    expected = 1.0 + np.random.default_rng(23).uniform(-1.0, 1.0, size=(300, tol.size)) * tol
    np.testing.assert_array_equal(sample_factors(net, 300, seed=23), expected)
    # drawn a block at a time, as a band does while it solves: the same numbers
    draws = ToleranceDraws(net, seed=23)
    np.testing.assert_array_equal(np.concatenate([draws.next(k) for k in (1, 99, 200)]), expected)


def test_monte_carlo_stack_equals_one_by_one(demo: Bench) -> None:
    template = load_template(ROOT / "lab2-synchronize.toml", demo).template
    state = states_after_steps(demo, template)[-1]
    net = compile_network(demo, state)
    factors = sample_factors(net, 5, seed=11)
    stacked = solve_network(net, factors, harmonics=False)
    for k in range(5):
        single = solve_network(net, factors[k : k + 1], harmonics=False)
        np.testing.assert_allclose(stacked.v[k], single.v[0], rtol=1e-9, atol=1e-9)


def test_every_emitted_quantity_is_registered(demo: Bench) -> None:
    from labkit.core.quantities import is_registered

    template = load_template(ROOT / "lab2-synchronize.toml", demo).template
    for state in states_after_steps(demo, template):
        labels, _ = quantity_arrays(solve_network(compile_network(demo, state)))
        assert all(is_registered(lab.quantity) for lab in labels)


def test_ill_conditioned_network_is_a_clear_error_naming_the_elements() -> None:
    data = _raw_demo()
    # a near-short line fed through a source impedance of a gigaohm: nothing sensible holds the voltages
    data["line_sections"][0].update(r="1 uohm", l="1 nH", c="0 uF")
    data["sources"][0].update(r_internal="1 Gohm", l_internal="0 mH")
    data["loads"][0]["steps"][1]["r"] = "1 Gohm"
    bad = Bench.model_validate(data)
    state = BenchState(started=frozenset({"REF"}), switches=(("SWR", True),), lines=(("L12", "short"),),
                       loads=(("RB", 2),))
    with pytest.raises(NetworkError, match=r"ill-conditioned.*S1"):
        solve_network(compile_network(bad, state), harmonics=False)


@pytest.mark.parametrize("position", ["single", "series", "parallel"])
def test_full_scale_branch_obeys_its_abcd_two_port(demo: Bench, position: str) -> None:
    # the stamped exact-pi sections (with inner nodes) must satisfy [Vs, Is] = ABCD [Vr, Ir] of the
    # branch computed by the two-port module (exact line: Saadat ch. 5 / field-reference §2.1)
    from labkit.core.lines import bench_section_values, branch_two_port, position_paths

    state = BenchState(started=frozenset({"REF"}), switches=(("SWR", True),),
                       lines=(("L12", "short"), ("L23", position)), loads=(("RB3", 2), ("CB", 1)))
    sol = solve_network(compile_network(demo, state), harmonics=False)
    labels, values = quantity_arrays(sol)
    table = {(lab.location, lab.quantity): values[0, k] for k, lab in enumerate(labels)}

    def phasor(loc: str, q: str) -> complex:
        return table[(loc, f"{q}_rms")] * np.exp(1j * np.radians(table[(loc, f"{q}_angle")]))

    vs, vr = phasor("B2", "v"), phasor("B3", "v")
    i_s, i_r = phasor("L23@B2", "i"), -phasor("L23@B3", "i")
    paths = position_paths(demo.branch("L23"), position, bench_section_values(demo))
    abcd = branch_two_port(paths, 2 * np.pi * 60.0).abcd
    np.testing.assert_allclose(abcd @ np.array([vr, i_r]), [vs, i_s], rtol=1e-9)


def test_band_percentiles_equal_numpy_percentile() -> None:
    # numpy.percentile (linear interpolation) is the outside reference for the fast partition path
    from labkit.core.bands import BAND_PERCENTILES, row_percentiles

    rng = np.random.default_rng(5)
    values = rng.normal(size=(1001, 7))
    values[3, 2] = np.nan
    values[9, 4] = np.inf  # a non-finite sample is ignored like NaN
    expected = np.nanpercentile(np.where(np.isfinite(values), values, np.nan), BAND_PERCENTILES, axis=0)
    np.testing.assert_allclose(row_percentiles(values.T.copy()), expected, rtol=1e-12)


@pytest.mark.parametrize("seed", range(6))
def test_fast_linear_system_equals_the_stacked_solve(seed: int) -> None:
    from labkit.core.solve import LinearSystem

    bench, state, _ = random_bench(seed)
    net = compile_network(bench, state)
    zero = {r.source_id: 0.0 for r in net.sources}
    ref = solve_network(net, given_angles_deg=zero, harmonics=False).v[0, 0]
    v = LinearSystem.from_network(net).solve(2 * np.pi * net.frequency_hz)
    np.testing.assert_allclose(v, ref, rtol=1e-12, atol=1e-12)


def test_thevenin_impedance_of_source_and_load_in_parallel(demo: Bench) -> None:
    # textbook circuit theory: the Thevenin impedance of a source impedance beside a resistor is Zs*R/(Zs+R)
    from labkit.core.solve import thevenin_impedance

    state = BenchState(started=frozenset({"REF"}), switches=(("SWR", True),), lines=(("L12", "open"),),
                       loads=())
    net = compile_network(demo, state)
    ref = demo.source("REF")
    zs = ref.r_internal + 2j * np.pi * 60.0 * ref.l_internal
    assert thevenin_impedance(net, net.bus_node["B1"]) == pytest.approx(zs, rel=1e-12)


def test_sync_step_carries_slip_before_closing_and_a_labelled_surge_estimate(demo: Bench) -> None:
    from labkit.core.predict import predict_template

    template = load_template(ROOT / "lab2-synchronize.toml", demo).template
    steps = predict_template(demo, template, n_samples=50)
    sync = next(s for s in steps if s.step_id == "sync-g1").prediction
    assert sync.value("SYNC1", "slip") == pytest.approx(0.1, abs=1e-9)  # setpoint 60.1 Hz vs the 60 Hz mains
    k = sync.index("SYNC1", "surge_peak")
    assert "estimate" in sync.labels[k].note
    # sqrt(2)|V_across|/|jX'' + Z_th| with |V_across| <= 2V sin(dphi/2) + |dV|: a bound from the field reference §1.5
    assert 10.0 < sync.nominal[k] < 2 * np.sqrt(2) * 125 * np.sin(np.radians(5)) / 0.6 + 20


def test_sweep_of_a_load_bank_equals_solving_each_step(demo: Bench) -> None:
    from labkit.core.switchspace import sweep

    state = BenchState(started=frozenset({"REF"}), switches=(("SWR", True),), lines=(("L12", "long"),))
    results = sweep(demo, state, "loads", "RB")
    assert [v for v, _ in results] == [0, 1, 2, 3, 4]
    for value, sol in results:
        exact = solve_network(compile_network(demo, state.with_changes(loads={"RB": value})), harmonics=False)
        np.testing.assert_allclose(sol.v[0, 0], exact.v[0, 0], rtol=1e-12)


def test_padded_batch_equals_each_configuration_solved_alone() -> None:
    # the whole 2-change switch space of the benchmark network, including states where a closed tie joins both
    # ends of a line (its series element then stamps nothing); reference: each network's own LinearSystem
    from labkit.core.solve import LinearSystem
    from labkit.core.switchspace import make_batch, neighbours, solve_batch
    from tests.benchmarks.test_bench_network import benchmark_bench

    bench, state = benchmark_bench()
    nets = [compile_network(bench, s) for _, s in neighbours(bench, state, 2)]
    batch = make_batch(nets)
    emf = np.zeros((len(nets), batch.src_node.shape[1]), dtype=complex)
    emf[:, 0] = 120.0
    v, _, failed = solve_batch(batch, emf, 60.0)
    assert not failed.any()
    for k, net in enumerate(nets):
        alone = LinearSystem.from_network(net).solve(2 * np.pi * 60.0, emf[k, : len(net.sources)])
        np.testing.assert_allclose(v[k, : net.n_nodes], alone, rtol=1e-9, atol=1e-9)


def _with_second_rectifier() -> tuple[Bench, BenchState]:
    data = _raw_demo()
    first = next(ld for ld in data["loads"] if ld["kind"] == "nonlinear")
    data["loads"].append({**first, "id": "NL2", "bus": "B2", "p1": "35 W", "q1": "3 var"})
    bench = Bench.model_validate(data)
    template = load_template(ROOT / "lab3-harmonics.toml", bench).template
    state = states_after_steps(bench, template)[-1]
    return bench, state.with_changes(loads={"NL2": 1})


@pytest.mark.parametrize("second_rectifier", [False, True])
def test_nonlinear_loads_take_their_power_in_every_sample_by_compensation(demo: Bench, second_rectifier: bool,
                                                                        monkeypatch: pytest.MonkeyPatch) -> None:
    # the rectifiers' operating point is found on their buses alone (compensation theorem); each
    # sample's fundamental power at a rectifier is its rated P1 + jQ1 times its tolerance factor (the
    # constant-power model the bench file states), and the node voltages are those of re-solving the whole
    # network at every iterate (the general path)
    if second_rectifier:
        bench, state = _with_second_rectifier()
    else:
        bench = demo
        state = states_after_steps(demo, load_template(ROOT / "lab3-harmonics.toml", demo).template)[-1]
    net = compile_network(bench, state)
    factors = sample_factors(net, 64, seed=3)
    sol = solve_network(net, factors)
    nominal = solve_network(net)  # one member: the full matrix instead of the elimination
    loads = [(j, e) for j, e in enumerate(net.elements) if e.owner_table == "loads" and e.part == "fundamental"]
    assert len(loads) == (2 if second_rectifier else 1)
    for j, e in loads:
        spec = bench.load(e.owner)
        factor = factors[:, next(k for k, p in enumerate(net.parameters) if p[0] == e.owner)]
        s1 = sol.v[:, 0, e.node_a] * np.conj(sol.i_elem[:, 0, j])
        np.testing.assert_allclose(s1, factor * complex(spec.p1, spec.q1), rtol=1e-9)
    from labkit.core import solve

    monkeypatch.setattr(solve, "NONLINEAR_BY_COMPENSATION", False)  # the whole network at every iterate
    full = solve_network(net, factors)
    scale = np.max(np.abs(full.v))
    np.testing.assert_allclose(sol.v, full.v, rtol=0, atol=1e-10 * scale)
    np.testing.assert_allclose(sol.i_elem, full.i_elem, rtol=0, atol=1e-10 * np.max(np.abs(full.i_elem)))
    reference = solve_network(net)
    np.testing.assert_allclose(nominal.v, reference.v, rtol=0, atol=1e-10 * scale)


def test_phase_from_the_two_angles_is_the_angle_of_i_conj_v() -> None:
    # the phase of a current against its voltage, taken as the difference of the phasors' angles, against
    # numpy's angle of i conj(v) directly; the whole circle, the +-180 deg seam, zero current and zero voltage
    from labkit.core.results import phase_deg

    rng = np.random.default_rng(4)
    v = rng.normal(size=2000) + 1j * rng.normal(size=2000)
    i = rng.normal(size=2000) + 1j * rng.normal(size=2000)
    i[:50] = -v[:50] * rng.uniform(0.1, 2.0, 50)  # exactly reversed: 180 deg
    i[50:60] = 0.0
    v[60:70] = 0.0
    s1 = v * np.conj(i)
    got = phase_deg(np.degrees(np.angle(i)), np.degrees(np.angle(v)), s1)
    expected = np.degrees(np.angle(i * np.conj(v)))
    expected = np.where(expected == -180.0, 180.0, expected)  # on (-180, 180]
    diff = (got - expected + 180.0) % 360.0 - 180.0  # a value at the seam may land on either side of it
    some = s1 != 0  # numpy's angle of a zero product is 0 or 180 by the signs of its zeros: not compared
    np.testing.assert_allclose(diff[some], 0.0, atol=1e-12)
    assert np.all((got > -180.0) & (got <= 180.0))
    assert np.all(got[50:70] == 0.0)
