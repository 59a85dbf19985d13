"""Two-port algebra and full-scale line models of labkit.core.lines, against textbook worked examples.

Reference values come from /work/shared/field-reference.md section 2; each check names its source and
the value's provenance mark there ([IN]: inputs confirmed, outputs computed; [CALC]; [C2]: published,
secondary transcription).
"""

from __future__ import annotations

import doctest

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import labkit.core.lines as lines_module
from labkit.core.errors import ModelInputError
from labkit.core.lines import (
    SectionValues,
    TwoPort,
    abcd_to_y,
    characteristic_impedance,
    line_equivalent_pi,
    line_nominal_pi,
    parallel,
    path_two_port,
    propagation_constant,
    surge_impedance,
    surge_impedance_loading,
    voltage_regulation,
    y_to_abcd,
)

SQRT3 = np.sqrt(3.0)
W60 = 2 * np.pi * 60.0


def assert_printed(value: complex | float, printed: float, decimals: int, rtol: float = 1e-6) -> None:
    """``value`` agrees with a number printed to ``decimals`` places: within 1e-6 relative, or within half a
    unit of the last printed digit when the printed value carries fewer digits than that."""
    tol = max(rtol * abs(printed), 0.5 * 10.0**-decimals)
    assert abs(value - printed) <= tol, f"{value} vs printed {printed} (tolerance {tol:g})"


def load_currents(s_three_phase: complex, v_ll: float) -> tuple[complex, complex]:
    """Per-phase receiving-end voltage (reference angle 0) and current of a three-phase load."""
    vr = v_ll / SQRT3
    return vr, np.conj(s_three_phase / (3.0 * vr))


# -- Saadat, Power System Analysis, Example 5.2 (field-reference 2.2, [IN]) ---------------------------
# 345 kV, 60 Hz, 130 km; r = 0.036 ohm/km, l = 0.8 mH/km, c = 0.0112 uF/km; 270 MVA 0.8 pf lagging at 325 kV.
EX52_Z_KM = 0.036 + 1j * W60 * 0.8e-3
EX52_Y_KM = 1j * W60 * 0.0112e-6
EX52_LOAD = 270e6 * (0.8 + 0.6j)


def test_saadat_ex52_nominal_pi():
    # Saadat, Power System Analysis, Example 5.2 (nominal pi); outputs [IN] from field-reference 2.2.
    line = TwoPort.nominal_pi(EX52_Z_KM * 130, EX52_Y_KM * 130)
    z, y_half = line_nominal_pi(EX52_Z_KM, EX52_Y_KM, 130)
    assert_printed(z.real, 4.68, 2)
    assert_printed(z.imag, 39.2071, 4)
    assert_printed((2 * y_half).imag, 5.48899e-4, 9)
    assert_printed(line.a.real, 0.989240, 6)
    assert_printed(line.a.imag, 0.001284, 6)
    np.testing.assert_allclose(line.d, line.a, rtol=1e-15)
    assert_printed(line.c.real, -3.525e-7, 10)
    assert_printed(line.c.imag, 5.45946e-4, 9)
    vr, ir = load_currents(EX52_LOAD, 325e3)
    vs, is_ = line.send(vr, ir)
    assert_printed(abs(is_), 421.132, 3)
    assert_printed(np.cos(np.angle(vs) - np.angle(is_)), 0.869657, 6)
    assert_printed(SQRT3 * abs(vs) / 1e3, 345.002, 3)
    assert_printed(abs(vs) / 1e3, 199.187, 3)
    assert_printed(np.degrees(np.angle(vs)), 4.0127, 4)
    ss = 3 * vs * np.conj(is_) / 1e6
    assert_printed(ss.real, 218.851, 3)
    assert_printed(ss.imag, 124.230, 3)
    assert_printed(100 * line.regulation(vs, vr), 7.30913, 5)
    assert_printed(100 * voltage_regulation(vs, vr, line.a), 7.30913, 5)


def test_saadat_ex52_exact_long_line():
    # Saadat Example 5.2 data with the exact long-line model; values [IN], field-reference 2.2 last row.
    line = TwoPort.exact_line(EX52_Z_KM, EX52_Y_KM, 130)
    vr, ir = load_currents(EX52_LOAD, 325e3)
    vs, is_ = line.send(vr, ir)
    assert_printed(SQRT3 * abs(vs) / 1e3, 344.912, 3)
    assert_printed(abs(is_), 421.081, 3)
    ss = 3 * vs * np.conj(is_) / 1e6
    assert_printed(ss.real, 218.843, 3)
    assert_printed(ss.imag, 124.048, 3)
    # And back again: receive() inverts send().
    vr2, ir2 = line.receive(vs, is_)
    np.testing.assert_allclose([vr2, ir2], [vr, ir], rtol=1e-12)


def test_saadat_ex55_lossless_line():
    # Saadat, Power System Analysis, Example 5.5 (lossless line); outputs [IN], field-reference 2.2.
    # 500 kV, 300 km, l = 0.97 mH/km, c = 0.0115 uF/km, SR = 800 + j600 MVA.
    z_km, y_km = 1j * W60 * 0.97e-3, 1j * W60 * 0.0115e-6
    gamma = propagation_constant(z_km, y_km)
    assert gamma.real == 0.0
    assert_printed(gamma.imag, 1.259116e-3, 9)
    assert_printed(np.degrees(gamma.imag * 300), 21.6426, 4)
    assert_printed(W60 / gamma.imag, 2.99409e5, 0)  # velocity, km/s
    assert_printed(2 * np.pi / gamma.imag, 4990.15, 2)  # wavelength, km
    zc = characteristic_impedance(z_km, y_km)
    assert_printed(zc.real, 290.427, 3)
    assert zc.imag == 0.0
    assert_printed(surge_impedance(0.97e-3, 0.0115e-6), 290.427, 3)
    line = TwoPort.exact_line(z_km, y_km, 300)
    vr, ir = load_currents(800e6 + 600e6j, 500e3)
    vs, is_ = line.send(vr, ir)
    assert_printed(SQRT3 * abs(vs) / 1e3, 617.546, 3)
    assert_printed(np.degrees(np.angle(vs)), 16.112, 3)
    assert_printed(abs(is_), 902.331, 3)
    ss = 3 * vs * np.conj(is_) / 1e6
    assert_printed(ss.real, 800.0, 1)
    assert_printed(ss.imag, 539.925, 3)
    assert_printed(100 * line.regulation(vs, vr), 32.877, 3)
    assert_printed(surge_impedance_loading(500e3, zc.real) / 1e6, 860.80, 2)
    # Lossless form of the same relation (field-reference 2.1): Vs = cos(βl) Vr + j Zc sin(βl) Ir.
    bl = gamma.imag * 300
    np.testing.assert_allclose(vs, np.cos(bl) * vr + 1j * zc * np.sin(bl) * ir, rtol=1e-12)


def test_short_published_lossless_check():
    # GATE-style problem (doubtnut.com page), field-reference 2.4 [C2]: z = j0.5 ohm/km, y = j5 uS/km, 400 km.
    z_km, y_km = 0.5j, 5e-6j
    assert abs(characteristic_impedance(z_km, y_km) - 316.22) < 0.01  # page value, 2 decimals (truncated)
    assert abs(propagation_constant(z_km, y_km).imag - 1.58e-3) < 5e-6  # page value, 3 digits
    z_prime, _ = line_equivalent_pi(z_km, y_km, 400)
    assert abs(z_prime - 186.92j) < 0.02  # page answer j186.92 ohm; computed j186.931 [CALC]
    assert_printed(z_prime.imag, 186.931, 3)  # [CALC]
    assert_printed(TwoPort.exact_line(z_km, y_km, 400).a.real, 0.806578, 6)  # A = cos(βl) [CALC]


def test_equivalent_pi_reproduces_the_exact_line():
    # Equivalent pi formulas, field-reference 2.1 (Z' = Zc sinh γl, Y'/2 = tanh(γl/2)/Zc) [C2].
    z_prime, y_half = line_equivalent_pi(EX52_Z_KM, EX52_Y_KM, 130)
    gl = propagation_constant(EX52_Z_KM, EX52_Y_KM) * 130
    zc = characteristic_impedance(EX52_Z_KM, EX52_Y_KM)
    np.testing.assert_allclose(z_prime, zc * np.sinh(gl), rtol=1e-13)
    np.testing.assert_allclose(y_half, np.tanh(gl / 2) / zc, rtol=1e-13)
    exact = TwoPort.exact_line(EX52_Z_KM, EX52_Y_KM, 130)
    assert TwoPort.pi(z_prime, y_half).allclose(exact, rtol=1e-13)
    zs, ys, yr = exact.equivalent_pi()
    np.testing.assert_allclose([zs, ys, yr], [z_prime, y_half, y_half], rtol=1e-11)


def test_exact_line_without_shunt_is_the_short_line():
    # Short-line model A = D = 1, B = Z, C = 0 (field-reference 2.1).
    line = TwoPort.exact_line([0.1 + 0.4j, 0.2 + 0.3j], 0.0, 50.0)
    np.testing.assert_allclose(line.abcd, TwoPort.series(np.array([0.1 + 0.4j, 0.2 + 0.3j]) * 50).abcd, rtol=1e-15)
    z_prime, y_half = line_equivalent_pi(0.1 + 0.4j, 0.0, 50.0)
    assert z_prime == pytest.approx(5 + 20j)
    assert y_half == 0


# -- algebra ----------------------------------------------------------------------------------------
def test_pi_is_shunt_series_shunt():
    # Definition of the pi section (field-reference 2.1) as a cascade of its three elements.
    z, ys, yr = 3 + 40j, 2e-4j, 5e-5 + 3e-4j
    built = TwoPort.shunt(ys) @ TwoPort.series(z) @ TwoPort.shunt(yr)
    assert TwoPort.pi(z, ys, yr).allclose(built, rtol=1e-15)
    np.testing.assert_allclose(TwoPort.pi(z, ys, yr).equivalent_pi(), (z, ys, yr), rtol=1e-12)


def test_reversed_swaps_the_ends():
    # Seen from the other end, a pi section has its two shunt admittances swapped (common practice).
    z, ys, yr = 3 + 40j, 2e-4j, 5e-5 + 3e-4j
    assert TwoPort.pi(z, ys, yr).reversed().allclose(TwoPort.pi(z, yr, ys), rtol=1e-13)
    chain = TwoPort.pi(z, ys, yr) @ TwoPort.series(1 + 2j)
    assert chain.reversed().reversed().allclose(chain, rtol=1e-13)


def test_y_matrix_signs_by_nodal_analysis():
    # Nodal analysis of a pi (common practice): Y11 = 1/Z + Ys, Y22 = 1/Z + Yr, Y12 = Y21 = -1/Z.
    z, ys, yr = 3 + 40j, 2e-4j, 5e-5 + 3e-4j
    y = TwoPort.pi(z, ys, yr).to_y()
    expected = np.array([[1 / z + ys, -1 / z], [-1 / z, 1 / z + yr]])
    np.testing.assert_allclose(y, expected, rtol=1e-13)
    np.testing.assert_allclose(abcd_to_y(y_to_abcd(expected)), expected, rtol=1e-13)


def test_power_matches_repeated_cascade_on_stacks():
    sections = TwoPort.pi(np.array([1 + 2j, 0.5 + 3j, 2 + 1j]), np.array([1e-3j, 2e-3j, 5e-4j]))
    for n in (0, 1, 2, 5, 8, 13):
        chained = TwoPort.identity(sections.shape)
        for _ in range(n):
            chained = chained @ sections
        assert sections.power(n).allclose(chained, rtol=1e-12, atol=1e-15)
    with pytest.raises(ModelInputError, match="whole number"):
        sections.power(-1)
    with pytest.raises(ModelInputError, match="whole number"):
        sections.power(2.0)  # type: ignore[arg-type]


def test_parallel_of_identical_branches_halves_z_and_doubles_y():
    # Common practice: two identical pi branches in parallel have half the series Z and twice the shunt Y.
    z, y_half = line_equivalent_pi(EX52_Z_KM, EX52_Y_KM, np.array([65.0, 130.0, 260.0]))
    one = TwoPort.pi(z, y_half)
    zs, ys, yr = parallel(one, one).equivalent_pi()
    np.testing.assert_allclose(zs, z / 2, rtol=1e-12)
    np.testing.assert_allclose(ys, 2 * y_half, rtol=1e-12)
    np.testing.assert_allclose(yr, 2 * y_half, rtol=1e-12)
    assert one.parallel(one, one).allclose(TwoPort.pi(z / 3, 3 * y_half), rtol=1e-12)


def test_bad_input_is_reported():
    with pytest.raises(ModelInputError, match=r"shape \(\.\.\., 2, 2\)"):
        TwoPort(np.zeros((3, 2)))
    with pytest.raises(ModelInputError, match="finite"):
        TwoPort.series(np.inf)
    with pytest.raises(ModelInputError, match="B = 0"):
        TwoPort.shunt(1e-3j).to_y()
    with pytest.raises(ModelInputError, match="B = 0"):
        TwoPort.shunt(1e-3j).equivalent_pi()
    with pytest.raises(ModelInputError, match="not reciprocal"):
        TwoPort(np.array([[2.0, 1.0], [0.0, 1.0]])).equivalent_pi()
    with pytest.raises(ModelInputError, match="Y21 = 0"):
        TwoPort.from_y(np.eye(2))
    with pytest.raises(ModelInputError, match="length"):
        TwoPort.exact_line(1j, 1j, -3.0)
    with pytest.raises(ModelInputError, match="non-zero shunt"):
        characteristic_impedance(1j, 0.0)
    with pytest.raises(ModelInputError, match="expected a TwoPort"):
        TwoPort.series(1.0).cascade("S1")  # type: ignore[arg-type]


def test_doctests():
    assert doctest.testmod(lines_module).failed == 0


# -- properties -------------------------------------------------------------------------------------
section_strategy = st.builds(
    SectionValues,
    r=st.floats(0.0, 20.0),
    l=st.floats(1e-4, 0.2),
    c=st.floats(0.0, 2e-5),
    g=st.floats(0.0, 1e-4),
    model=st.sampled_from(["nominal_pi", "exact_pi"]),
)


@settings(max_examples=60, deadline=None)
@given(path=st.lists(section_strategy, min_size=1, max_size=8),
       omega=st.lists(st.floats(1.0, 2 * np.pi * 3000), min_size=1, max_size=4))
def test_every_chain_is_reciprocal(path, omega):
    # AD - BC = 1 for any cascade of passive reciprocal sections (field-reference 2.1).
    chain = path_two_port(path, np.array(omega))
    scale = np.abs(chain.a * chain.d) + np.abs(chain.b * chain.c)
    assert np.all(np.abs(chain.determinant() - 1) <= 1e-10 * np.maximum(scale, 1.0))
    # The chain's Y matrix is symmetric (reciprocity) and converts back to the same ABCD. Y12 = -(AD-BC)/B
    # carries the rounding of AD - BC, about 1e-16 (|AD| + |BC|) / |B| (large in a resonant lossless chain).
    y = chain.to_y()
    rounding = 1e-13 * scale / np.abs(chain.b) + 1e-12 * np.max(np.abs(y), axis=(-2, -1))
    assert np.all(np.abs(y[..., 0, 1] - y[..., 1, 0]) <= rounding)
    np.testing.assert_allclose(chain.to_y(reciprocal=True)[..., 0, 1], y[..., 1, 0], rtol=1e-15)
    # Back from Y, C = -det(Y) / Y21 cancels terms of size |Y11 Y22|: its rounding is about eps |Y11 Y22 / Y21|
    # (a small shunt C behind a small series L, where |Y| is huge, loses digits of C that way).
    cancel = float(np.max(np.abs(y[..., 0, 0] * y[..., 1, 1] / y[..., 1, 0])))
    assert TwoPort.from_y(y).allclose(chain, rtol=1e-7, atol=1e-12 * float(np.max(np.abs(chain.abcd))) + 1e-14 * cancel)


def test_nominal_pi_sections_converge_to_the_exact_line():
    # Field-reference 2.1: N identical nominal-pi sections of l/N converge to the exact ABCD; the error of a
    # lumped approximation falls as 1/N^2 (common practice). Saadat Ex 5.2 line, and 3x its length.
    for length in (130.0, 390.0):
        exact = TwoPort.exact_line(EX52_Z_KM, EX52_Y_KM, length)
        counts = np.array([1, 2, 4, 8, 16, 32, 64])
        errors = np.array([
            np.max(np.abs(TwoPort.nominal_pi(EX52_Z_KM * length / n, EX52_Y_KM * length / n).power(int(n)).abcd
                          - exact.abcd) / np.abs(exact.abcd).max())
            for n in counts])
        assert np.all(np.diff(errors) < 0)
        ratios = errors[1:] / errors[:-1]
        np.testing.assert_allclose(ratios[2:], 0.25, atol=0.01)  # halving the section doubles the accuracy twice
