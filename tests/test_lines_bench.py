"""Per-unit scaling between full-scale lines and bench sections, bench sections, and line branches.

Outside references: Saadat, Power System Analysis, Example 5.2 (field-reference.md 2.2, [IN]) carried
through the bench scaling; the per-unit system itself (Zbase = V^2/S, common practice); the
lumped-line construction of field-reference 2.1; Kron reduction of internal nodes (common practice).
"""

from __future__ import annotations

import numpy as np
import pytest

from labkit.core.bench import Bench, LineScaling, LineSection
from labkit.core.errors import ModelInputError, UnknownNameError
from labkit.core.lines import (
    ScalingBases,
    SectionValues,
    TwoPort,
    bench_section_values,
    branch_admittance,
    branch_layout,
    branch_two_port,
    internal_node_name,
    line_equivalent_pi,
    line_nominal_pi,
    position_layout,
    position_paths,
    scale_to_bench,
    scale_to_full_scale,
    section_pi,
    section_values,
)

W60 = 2 * np.pi * 60.0
# Saadat Ex 5.2 line per metre (field-reference 2.2): r = 0.036 ohm/km, l = 0.8 mH/km, c = 0.0112 uF/km.
R_M, L_M, C_M = 0.036e-3, 0.8e-6, 0.0112e-9
DEMO_SCALING = LineScaling(full_scale_voltage="199.186 kV", full_scale_power="90 MVA", full_scale_frequency="60 Hz",
                           bench_voltage="120 V", bench_power="1 kVA")  # the demo bench's [line_scaling]


def bases(bench_frequency: float = 60.0) -> ScalingBases:
    return ScalingBases.from_line_scaling(DEMO_SCALING, bench_frequency)


def full_scale_section(length: str, model: str) -> LineSection:
    return LineSection(id="X1", rated_current="5 A", full_scale={
        "length": length, "r_per_length": "0.036 ohm/km", "l_per_length": "0.8 mH/km",
        "c_per_length": "0.0112 uF/km", "model": model})


# -- per-unit scaling -------------------------------------------------------------------------------
def test_per_unit_bases():
    # Zbase = V^2 / S on each side (per-unit system, common practice).
    b = bases()
    assert b.full_scale_impedance_base == pytest.approx(199186.0**2 / 90e6, rel=1e-15)
    assert b.bench_impedance_base == pytest.approx(14.4, rel=1e-15)
    assert b.impedance_ratio == pytest.approx(14.4 / (199186.0**2 / 90e6), rel=1e-15)


def test_scale_to_bench_keeps_per_unit_values_at_matching_frequency():
    z, y = (R_M + 1j * W60 * L_M) * 130e3, 1j * W60 * C_M * 130e3
    lumped = scale_to_bench(z, y, bases())
    k = bases().impedance_ratio
    # Same per-unit impedance on both sides (per-unit system, common practice).
    np.testing.assert_allclose((lumped.r + 1j * W60 * lumped.l) / 14.4, z / bases().full_scale_impedance_base,
                               rtol=1e-14)
    np.testing.assert_allclose(1j * W60 * lumped.c * 14.4, y * bases().full_scale_impedance_base, rtol=1e-14)
    np.testing.assert_allclose([lumped.r, lumped.l, lumped.c], [R_M * 130e3 * k, L_M * 130e3 * k, C_M * 130e3 / k],
                               rtol=1e-14)
    np.testing.assert_allclose(lumped.z_pu_bench, lumped.z_pu_full_scale, rtol=1e-15)
    assert lumped.differences == ()


def test_scale_to_bench_reports_a_different_bench_frequency():
    # A 50 Hz bench standing for a 60 Hz line: L and C are chosen at 60 Hz, so per-unit reactances shrink by 5/6.
    z, y = (R_M + 1j * W60 * L_M) * 130e3, 1j * W60 * C_M * 130e3
    at60, at50 = scale_to_bench(z, y, bases(60.0)), scale_to_bench(z, y, bases(50.0))
    np.testing.assert_allclose([at50.r, at50.l, at50.c], [at60.r, at60.l, at60.c], rtol=1e-15)
    assert at50.frequency_ratio == pytest.approx(5 / 6)
    np.testing.assert_allclose(at50.z_pu_bench.imag, at50.z_pu_full_scale.imag * 5 / 6, rtol=1e-14)
    np.testing.assert_allclose(at50.y_pu_bench.imag, at50.y_pu_full_scale.imag * 5 / 6, rtol=1e-14)
    assert len(at50.differences) == 2
    assert "50 Hz differs from the full-scale 60 Hz" in at50.differences[0]
    assert "X/R changes from 8.37758 (full scale) to 6.98132 (bench)" in at50.differences[1]


def test_per_unit_round_trip_and_implied_length():
    # scale_to_bench then scale_to_full_scale gives back the line; each per-length parameter implies 130 km.
    lengths = np.array([10e3, 65e3, 130e3])
    z, y = (R_M + 1j * W60 * L_M) * lengths, (2e-12 + 1j * W60 * C_M) * lengths
    for f_bench in (50.0, 60.0):
        lumped = scale_to_bench(z, y, bases(f_bench))
        back = scale_to_full_scale(lumped.r, lumped.l, lumped.c, bases(f_bench), g=lumped.g,
                                   r_per_length=R_M, l_per_length=L_M, c_per_length=C_M)
        np.testing.assert_allclose(back.z_series, z, rtol=1e-14)
        np.testing.assert_allclose(back.y_shunt, y, rtol=1e-14)
        np.testing.assert_allclose(back.z_pu, lumped.z_pu_full_scale, rtol=1e-14)
        for implied in (back.length_from_r, back.length_from_l, back.length_from_c, back.length):
            np.testing.assert_allclose(implied, lengths, rtol=1e-13)
    assert scale_to_full_scale(1.0, 1e-3, 1e-6, bases()).length is None


def test_demo_sections_stand_for_65_km():
    # The demo bench's lumped sections S1..S4 in full-scale terms, and the full-scale S5 back to 65 km.
    back = scale_to_full_scale(0.6, 6e-3, 4e-6, bases(), l_per_length=L_M)
    np.testing.assert_allclose(back.length, 6e-3 / bases().impedance_ratio / L_M, rtol=1e-14)
    s5 = section_values(full_scale_section("65 km", "exact_pi"), DEMO_SCALING)
    back5 = scale_to_full_scale(s5.r, s5.l, s5.c, bases(), r_per_length=R_M, l_per_length=L_M, c_per_length=C_M)
    for implied in (back5.length_from_r, back5.length_from_l, back5.length_from_c):
        assert implied == pytest.approx(65e3, rel=1e-13)


def test_scaling_rejects_what_a_bench_cannot_build():
    with pytest.raises(ModelInputError, match="non-negative reactance"):
        scale_to_bench(1 - 5j, 1e-4j, bases())
    with pytest.raises(ModelInputError, match="non-negative susceptance"):
        scale_to_bench(1 + 5j, -1e-4j, bases())
    with pytest.raises(ModelInputError, match=r"bench_frequency: expected finite values > 0 Hz"):
        ScalingBases.from_line_scaling(DEMO_SCALING, 0.0)


# -- the bench stand-in of Saadat Example 5.2 ------------------------------------------------------
@pytest.mark.parametrize(("model", "vs_ll_kv", "is_a"),
                         [("nominal_pi", 345.002, 421.132), ("exact_pi", 344.912, 421.081)])
def test_bench_section_reproduces_saadat_ex52_in_per_unit(model, vs_ll_kv, is_a):
    # Saadat, Power System Analysis, Example 5.2 (field-reference 2.2 [IN]), nominal pi and exact model,
    # built as one bench section scaled to 120 V / 1 kVA per phase: per-unit results are those of the line.
    section = full_scale_section("130 km", model)
    z, y_half = section_pi(section, DEMO_SCALING, W60)
    base = bases()
    v_base, i_base = 120.0, 1000.0 / 120.0
    vr_pu = (325e3 / np.sqrt(3)) / 199186.0
    s_pu = 90e6 * (0.8 + 0.6j) / 90e6  # 270 MVA three-phase is 90 MVA per phase = 1 per unit
    vr = vr_pu * v_base
    ir = np.conj(s_pu * 1000.0 / vr)
    vs, is_ = TwoPort.pi(z, y_half).send(vr, ir)
    assert np.sqrt(3) * abs(vs) / v_base * 199186.0 / 1e3 == pytest.approx(vs_ll_kv, abs=5e-4)
    assert abs(is_) / i_base * (90e6 / 199186.0) == pytest.approx(is_a, abs=5e-4)
    # and the bench pi in per unit equals the full-scale pi in per unit, at the fundamental and at harmonics
    omega = W60 * np.arange(1, 8)
    z_b, yh_b = section_pi(section, DEMO_SCALING, omega)
    pi_fs = line_nominal_pi if model == "nominal_pi" else line_equivalent_pi
    z_fs, yh_fs = pi_fs(R_M + 1j * omega * L_M, 1j * omega * C_M, 130e3)
    np.testing.assert_allclose(z_b / base.bench_impedance_base, z_fs / base.full_scale_impedance_base, rtol=1e-13)
    np.testing.assert_allclose(yh_b * base.bench_impedance_base, yh_fs * base.full_scale_impedance_base, rtol=1e-13)


def test_exact_pi_section_equivalent_lumped_values():
    # The lumped pi that matches an exact_pi section at 60 Hz equals it there and differs at harmonics.
    s5 = section_values(full_scale_section("260 km", "exact_pi"), DEMO_SCALING)
    build = s5.equivalent_lumped(W60)
    np.testing.assert_allclose(build.pi(W60), s5.pi(W60), rtol=1e-13)
    assert not np.allclose(build.pi(5 * W60)[1], s5.pi(5 * W60)[1], rtol=1e-3)


# -- demo bench sections and branches --------------------------------------------------------------
def test_demo_bench_section_values(demo_bench: Bench):
    values = bench_section_values(demo_bench)
    assert set(values) == {"S1", "S2", "S3", "S4", "S5", "S6", "S7"}
    s1 = values["S1"]
    assert (float(s1.r), float(s1.l), float(s1.c), s1.model) == (0.6, 6e-3, 4e-6, "nominal_pi")
    s5 = values["S5"]
    k = bases().impedance_ratio
    assert s5.model == "exact_pi"
    np.testing.assert_allclose([s5.r, s5.l, s5.c], [R_M * 65e3 * k, L_M * 65e3 * k, C_M * 65e3 / k], rtol=1e-14)
    # The same numbers through the general scaling function (both paths of the code agree).
    lumped = scale_to_bench((R_M + 1j * W60 * L_M) * 65e3, 1j * W60 * C_M * 65e3, bases())
    np.testing.assert_allclose([s5.r, s5.l, s5.c], [lumped.r, lumped.l, lumped.c], rtol=1e-14)


def test_full_scale_section_needs_line_scaling():
    with pytest.raises(ModelInputError, match=r"section X1: .*\[line_scaling\]"):
        section_values(full_scale_section("65 km", "exact_pi"), None)


def test_nominal_section_pi_is_the_lumped_pi():
    # Field-reference 2.1 (lumped bench line): series R + jwL, C/2 at each end.
    section = LineSection(id="S1", r="0.6 ohm", l="6 mH", c="4 uF", rated_current="5 A")
    omega = W60 * np.array([1, 3, 5])
    z, y_half = section_pi(section, None, omega)
    np.testing.assert_allclose(z, 0.6 + 1j * omega * 6e-3, rtol=1e-15)
    np.testing.assert_allclose(y_half, 1j * omega * 2e-6, rtol=1e-15)


def test_branch_positions_of_the_demo_bench(demo_bench: Bench):
    values = bench_section_values(demo_bench)
    l12, l23 = demo_bench.branch("L12"), demo_bench.branch("L23")
    omega = W60 * np.array([1.0, 3.0, 5.0])
    one = values["S1"].two_port(omega)
    long = branch_two_port(position_paths(l12, "long", values), omega)
    assert long.allclose(one.power(4), rtol=1e-12)  # four equal sections in series
    double = branch_two_port(position_paths(l12, "double", values), omega)
    assert double.allclose(parallel_of_two(one @ one), rtol=1e-10)
    # Parallel of two identical sections: half the series impedance, twice the shunt admittance.
    zs, ys, yr = branch_two_port(position_paths(l23, "parallel", values), omega).equivalent_pi()
    z5, yh5 = values["S5"].pi(omega)
    np.testing.assert_allclose([zs, ys, yr], [z5 / 2, 2 * yh5, 2 * yh5], rtol=1e-10)
    # The reduced admittance matrix of a branch is the two-port's.
    for position in ("short", "medium", "long", "double"):
        paths = position_paths(l12, position, values)
        np.testing.assert_allclose(branch_admittance(paths, omega), branch_two_port(paths, omega).to_y(),
                                   rtol=1e-9, atol=1e-12)
    assert position_paths(l23, "open", values) == []
    np.testing.assert_array_equal(branch_admittance([], omega), np.zeros((3, 2, 2)))


def parallel_of_two(port: TwoPort) -> TwoPort:
    return TwoPort.from_y(2 * port.to_y())


def test_branch_layout_stamps_reduce_to_the_branch_admittance(demo_bench: Bench):
    # Kron reduction (Schur complement) of the full nodal matrix with internal nodes, common practice,
    # must give the reduced 2x2 admittance of the branch.
    values = bench_section_values(demo_bench)
    l12 = demo_bench.branch("L12")
    omega = W60 * np.array([1.0, 7.0])
    for position in ("short", "medium", "long", "double"):
        layout = position_layout(l12, position, values)
        nodes = ["B1", "B2", *layout.internal_nodes]
        index = {n: i for i, n in enumerate(nodes)}
        y_full = np.zeros((omega.size, len(nodes), len(nodes)), dtype=complex)
        for stamp in layout.sections:
            i, j = index[stamp.node_from], index[stamp.node_to]
            y2 = stamp.admittance(omega)
            for a, p in enumerate((i, j)):
                for b, q in enumerate((i, j)):
                    y_full[:, p, q] += y2[:, a, b]
        ext, inner = slice(0, 2), slice(2, None)
        reduced = y_full[:, ext, ext] - y_full[:, ext, inner] @ np.linalg.solve(
            y_full[:, inner, inner], y_full[:, inner, ext]) if layout.internal_nodes else y_full
        expected = branch_admittance(position_paths(l12, position, values), omega)
        np.testing.assert_allclose(reduced, expected, rtol=1e-9, atol=1e-12)
    layout = position_layout(l12, "double", values)
    assert layout.internal_nodes == (internal_node_name("L12", 0, 1), internal_node_name("L12", 1, 1))
    assert [(s.section_id, s.node_from, s.node_to) for s in layout.sections] == [
        ("S1", "B1", "L12/p0/n1"), ("S2", "L12/p0/n1", "B2"), ("S3", "B1", "L12/p1/n1"), ("S4", "L12/p1/n1", "B2")]
    assert position_layout(l12, "open", values).sections == ()


def test_monte_carlo_samples_broadcast_against_frequencies(demo_bench: Bench):
    # Shapes: parameters (n_samples,) first, then frequencies; equal to evaluating one sample at a time.
    rng = np.random.default_rng(7)
    n = 50
    sampled = SectionValues(r=0.6 * rng.normal(1, 0.05, n), l=6e-3 * rng.normal(1, 0.05, n),
                            c=4e-6 * rng.normal(1, 0.05, n), section_id="S1")
    exact = section_values(demo_bench.section("S5"), demo_bench.line_scaling)
    exact_sampled = exact.with_values(l=exact.l * rng.normal(1, 0.05, n))
    omega = W60 * np.arange(1, 10)
    paths = [[sampled, exact_sampled], [exact]]
    y = branch_admittance(paths, omega)
    assert y.shape == (n, omega.size, 2, 2)
    for i in (0, 17, n - 1):
        one = [[SectionValues(r=sampled.r[i], l=sampled.l[i], c=sampled.c[i]),
                exact.with_values(l=exact_sampled.l[i])], [exact]]
        np.testing.assert_allclose(y[i], branch_admittance(one, omega), rtol=1e-12)
    with pytest.raises(ModelInputError, match="one sample shape"):
        SectionValues(r=np.ones(3), l=np.ones(4), c=0.0)
    with pytest.raises(ModelInputError, match="some of r, l, c, g"):
        exact.with_values(x=1.0)


def test_branch_errors(demo_bench: Bench):
    values = bench_section_values(demo_bench)
    l12 = demo_bench.branch("L12")
    with pytest.raises(UnknownNameError, match='no position "lonng" \\(did you mean "long"\\?\\)'):
        position_paths(l12, "lonng", values)
    without_s3 = {k: v for k, v in values.items() if k != "S3"}
    with pytest.raises(UnknownNameError, match='no line section "S3"'):
        position_paths(l12, "long", without_s3)
    twice = l12.model_copy(update={"positions": [l12.positions[0].model_copy(update={"paths": [["S1"], ["S1"]]})]})
    with pytest.raises(ModelInputError, match="S1 used more than once"):
        position_paths(twice, "short", values)
    with pytest.raises(ModelInputError, match="open branch"):
        branch_two_port([], W60)
    with pytest.raises(ModelInputError, match="path 0 has no section"):
        branch_layout("L9", "B1", "B2", [[]])
    with pytest.raises(ModelInputError, match="omega: expected finite values >= 0 rad/s"):
        values["S1"].pi(-1.0)
    with pytest.raises(ModelInputError, match="zero series impedance"):
        SectionValues(r=0.0, l=0.0, c=1e-6, section_id="S0").admittance(W60)
