"""Frequency-control and load-sharing checks against outside sources (named beside each check)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import signal

from labkit.core import frequency as F
from labkit.core.errors import ModelInputError
from labkit.demo_files import DEMO_BENCH, demo_path
from labkit.files.loader import load_bench

S_BASE, F0, P = 1000.0, 60.0, 2
W0 = 2 * math.pi * F0 / P


def _demo_g1() -> F.DriveSet:
    return F.DriveSet.from_alternator_set(load_bench(demo_path(DEMO_BENCH)).bench.source("G1"))


# -- Saadat, Power System Analysis, Example 12.1 (field-reference 5.2, inputs [IN]) ----------------------------
def test_saadat_12_1_linear_model() -> None:
    tf = F.lfc_isolated_area(h_s=5.0, d_pu=0.8, r_pu=0.05, tau_g_s=0.2, tau_t_s=0.5)
    np.testing.assert_allclose(tf.den, [1.0, 7.08, 10.56, 20.8], rtol=1e-12)  # the script's closed-loop den
    np.testing.assert_allclose(tf.num, [-0.1, -0.7, -1.0], rtol=1e-12)
    roots = np.sort_complex(np.roots(tf.den))
    expected = np.sort_complex(np.array([-5.8863, -0.5968 + 1.7825j, -0.5968 - 1.7825j]))
    np.testing.assert_allclose(roots, expected, atol=1e-4)
    # steady state: -0.2 / (0.8 + 20) = -0.0096154 pu, i.e. -0.5769 Hz at 60 Hz
    dc = float(np.polyval(tf.num, 0) / np.polyval(tf.den, 0)) * 0.2
    assert dc == pytest.approx(-0.0096154, abs=5e-8)
    assert F.lfc_steady_state(0.2, 0.8, 0.05) * 60 == pytest.approx(-0.5769, abs=5e-5)
    # step-response peak -0.01488 pu at about 1.22 s ([CALC] with scipy in the field reference)
    t, y = signal.step(tf, T=np.linspace(0, 10, 20001))
    y = 0.2 * y
    assert y.min() == pytest.approx(-0.01488, abs=1e-5)
    assert t[np.argmin(y)] == pytest.approx(1.22, abs=0.01)


def _saadat_drive(mode: str, *, ki: float) -> tuple[F.DriveSet, float, F.ExponentLoad, F.ExponentLoad]:
    """A 1 kVA, 2-pole-pair drive scaled to Ex 12.1: H = 5 s, D = 0.8 (from a resistive-type load), R = 0.05."""
    j = 2 * 5.0 * S_BASE / W0**2  # H = J w0^2 / (2 S)
    base_load = F.ExponentLoad(0.4 * S_BASE, 2.0, F0)  # D = 2 * 0.4 = 0.8 pu
    if mode == "droop":
        drive = F.DriveSet("G", j, P, F0, S_BASE, kp=20.0, ki=ki, torque_limit_nm=1e3, mode="droop", droop=0.05)
        f_set = F0 + 0.05 * F0 * 0.4  # so the set runs at 60 Hz with the base load
    else:  # proportional-only isochronous loop: a droop without lag, 1/R = (kp w0^2 - P_m0) / S = 20
        drive = F.DriveSet("G", j, P, F0, S_BASE, kp=S_BASE * (20.0 + 0.4) / W0**2, ki=0.0, torque_limit_nm=1e3,
                           mode="isochronous")
        f_set = P * (W0 + base_load(F0) / W0 / drive.kp) / (2 * math.pi)
    return drive, f_set, base_load, F.ExponentLoad(1.0, 0.0, F0)


@pytest.mark.parametrize("mode", ["droop", "proportional"])
def test_drive_reduces_to_saadat_12_1_steady_state(mode: str) -> None:
    drive, f_set, base, _ = _saadat_drive(mode, ki=40.0)
    pu = F.drive_per_unit(drive, base, F0)
    assert (pu.h_s, pu.d_pu, pu.r_pu) == pytest.approx((5.0, 0.8, 0.05), rel=1e-6)
    assert F.steady_state_frequency(drive, f_set, base).frequency_hz == pytest.approx(F0, abs=1e-9)
    # Saadat Ex 12.1: dw_ss = -0.2 / (0.8 + 20) = -0.0096154 pu; the drive is nonlinear (P ~ f^2, T = P/w),
    # so the full step agrees to the curvature, and a small step agrees in the linear limit
    full = F.steady_state_frequency(drive, f_set, [base, F.ExponentLoad(0.2 * S_BASE, 0.0, F0)])
    assert (full.frequency_hz - F0) / F0 == pytest.approx(-0.0096154, rel=2e-2)
    small = F.steady_state_frequency(drive, f_set, [base, F.ExponentLoad(0.002 * S_BASE, 0.0, F0)])
    assert (small.frequency_hz - F0) / F0 / 0.002 == pytest.approx(-1 / 20.8, rel=2e-3)


def test_drive_time_response_matches_lfc_model_without_lags() -> None:
    # proportional loop, no integral: the drive is Ex 12.1's model with tau_g = tau_t -> 0 (first order,
    # tau = 2H / (D + 1/R) = 10 / 20.8 s); compared with scipy.signal on the linear model, small step
    drive, f_set, base, _ = _saadat_drive("proportional", ki=0.0)
    step = 0.002
    r = F.simulate_load_step(drive, f_set, base, [base, F.ExponentLoad(step * S_BASE, 0.0, F0)], 3.0, n_points=601)
    dw = (r.frequency_hz - F0) / F0
    tf = F.lfc_isolated_area(5.0, 0.8, 0.05, 1e-5, 1e-5)
    _, y = signal.step(tf, T=r.time_s)
    np.testing.assert_allclose(dw, step * y, atol=2e-3 * step / 20.8 * 10)
    tau = 10.0 / 20.8
    np.testing.assert_allclose(dw, -step / 20.8 * (1 - np.exp(-r.time_s / tau)), atol=3e-3 * step / 20.8)


# -- analytic limiting cases of the drive model ----------------------------------------------------------
def test_pure_inertia_constant_torque_deficit() -> None:
    # no speed control: J dw/dt = -T_L and f = p w / (2 pi), so df/dt = -p T_L / (2 pi J) (Newton's law)
    drive = F.DriveSet("G", 0.08, P, F0, S_BASE, kp=0.0, ki=0.0, torque_limit_nm=6.0, mode="isochronous")
    t_load = 2.0
    constant_torque = lambda f: t_load * 2 * np.pi * np.asarray(f) / P  # noqa: E731 - P = T w
    r = F.simulate_load_step(drive, F0, None, constant_torque, 0.5, f_initial_hz=F0, n_points=101)
    np.testing.assert_allclose(r.frequency_hz, F0 - P * t_load / (2 * np.pi * 0.08) * r.time_s, atol=1e-7)
    assert math.isnan(r.f_final_hz)
    assert math.isnan(r.settling_time_s)


def test_proportional_control_first_order() -> None:
    # P-only loop and constant torque load: J dw/dt = -kp dw - T_L -> exponential, tau = J / kp,
    # final dw = -T_L / kp (first-order ODE solution)
    drive = F.DriveSet("G", 0.08, P, F0, S_BASE, kp=0.4, ki=0.0, torque_limit_nm=6.0, mode="isochronous")
    t_load = 1.0
    load = lambda f: t_load * 2 * np.pi * np.asarray(f) / P  # noqa: E731
    r = F.simulate_load_step(drive, F0, None, load, 1.5, n_points=301)
    df_final = -t_load / 0.4 * P / (2 * np.pi)
    expected = F0 + df_final * (1 - np.exp(-r.time_s / (0.08 / 0.4)))
    np.testing.assert_allclose(r.frequency_hz, expected, atol=1e-6)
    assert r.f_final_hz == pytest.approx(F0 + df_final, abs=1e-9)
    assert r.overshoot_hz == 0.0
    # settling to 0.02 Hz: |df_final| e^{-t/tau} = 0.02 -> t = tau ln(|df_final| / 0.02)
    assert r.settling_time_s == pytest.approx(0.2 * math.log(abs(df_final) / 0.02), abs=r.time_s[1])


def test_saturated_torque_linear_ramp_and_anti_windup() -> None:
    # setpoint step 57 -> 63 Hz: kp * error = 0.4 * 18.85 N m > 6 N m limit, so the torque sits at the limit and
    # the frequency ramps at p T_lim / (2 pi J) = 23.87 Hz/s (Newton's law at constant torque)
    g1 = _demo_g1()
    r = F.simulate_load_step(g1, 57.0, None, None, 4.0, f_setpoint_after_hz=63.0, n_points=4001)
    early = r.time_s <= 0.04
    slope = P * g1.torque_limit_nm / (2 * np.pi * g1.inertia_kgm2)
    np.testing.assert_allclose(r.frequency_hz[early], 57.0 + slope * r.time_s[early], atol=1e-6)
    np.testing.assert_allclose(r.torque_nm[early], g1.torque_limit_nm)
    # anti-windup kept the integrator from winding up while saturated: the recovery overshoot stays small
    assert r.f_final_hz == pytest.approx(63.0)
    assert r.overshoot_hz < 0.5
    assert r.frequency_hz[-1] == pytest.approx(63.0, abs=0.02)


def test_stall_when_load_exceeds_torque_limit() -> None:
    g1 = _demo_g1()
    heavy = lambda f: 10.0 * 2 * np.pi * np.asarray(f) / P  # noqa: E731 - 10 N m constant torque > 6 N m
    with pytest.raises(ModelInputError, match="stall"):
        F.steady_state_frequency(g1, 60.0, heavy)


def test_resistive_island_droop_steady_state() -> None:
    # droop with integral action: f = f_set - droop f_rated P(f) / P_rated, P = (E f/f_r)^2 / R (brief's model)
    g1 = _demo_g1()
    load = F.resistive_island_load(127.0, 120.0, 60.0)
    ss = F.steady_state_frequency(g1, 60.0, load)
    assert ss.frequency_hz == pytest.approx(60.0 - 0.05 * 60 * float(load(ss.frequency_hz)) / 1000.0, abs=1e-10)
    assert float(load(ss.frequency_hz)) == pytest.approx((127 * ss.frequency_hz / 60) ** 2 / 120, rel=1e-12)


# -- infinite bus and closing --------------------------------------------------------------------------
def test_closing_onto_bus_settles_at_droop_power() -> None:
    g1 = _demo_g1()
    on_bus = F.steady_state_on_bus(g1, 60.1, 60.0)
    assert on_bus.power_w == pytest.approx(1000 * 0.1 / (0.05 * 60), rel=1e-12)  # droop line
    r = F.simulate_closing(g1, 60.1, 60.0, 5.0, F.synchronizing_power_max(127, 120, 2.0), 8.0,
                           damping_w_per_hz=200.0)
    assert r.f_final_hz == 60.0
    assert abs(r.frequency_hz[-1] - 60.0) < 1e-3
    assert r.power_w[-1] == pytest.approx(on_bus.power_w, rel=2e-2)
    assert np.max(np.abs(r.angle_deg)) < 180.0  # no pole slip
    iso = F.DriveSet("G", 0.08, P, F0, S_BASE, kp=0.4, ki=4.0, torque_limit_nm=6.0, mode="isochronous")
    assert F.steady_state_on_bus(iso, 60.1, 60.0).torque_limited


# -- load sharing (field-reference 5.1 formulas [C2], Saadat Ex 12.1 [IN]) -------------------------------------
def test_share_load_change_two_sets() -> None:
    g1 = F.DroopSource("G1", 1000.0, 0.05, 60.0)
    g2 = F.DroopSource("G2", 1000.0, 0.04, 60.0)
    sh = F.share_load_change(100.0, [g1, g2], 60.0)
    # per unit on 1 kVA: dw = -dP_L / (sum 1/R_i) = -0.1 / (20 + 25); unit i picks up -dw / R_i
    dw = -0.1 / (1 / 0.05 + 1 / 0.04)
    assert sh.delta_f_hz == pytest.approx(dw * 60, rel=1e-12)
    assert sh.shares_w["G1"] == pytest.approx(-dw / 0.05 * 1000, rel=1e-12)
    assert sh.shares_w["G2"] == pytest.approx(-dw / 0.04 * 1000, rel=1e-12)
    assert sum(sh.shares_w.values()) == pytest.approx(100.0)
    # the nonlinear common-frequency solve agrees in the linear (constant-power load) case
    f, powers = F.island_frequency([g1, g2], [60.0, 60.0], F.ExponentLoad(100.0, 0.0, 60.0))
    assert f == pytest.approx(sh.frequency_hz, abs=1e-9)
    assert powers["G2"] == pytest.approx(sh.shares_w["G2"])


def test_share_load_change_reproduces_saadat_12_1() -> None:
    # Ex 12.1 in SI: 250 MW base, R = 0.05, D = 0.8 pu, dP_L = 50 MW -> df = -0.5769 Hz
    base = 250e6
    sh = F.share_load_change(50e6, [F.DroopSource("unit", base, 0.05, 60.0)], 60.0,
                             load_damping_w_per_hz=0.8 * base / 60.0)
    assert sh.delta_f_hz == pytest.approx(-0.5769, abs=5e-5)
    assert sh.shares_w["unit"] + sh.damping_share_w == pytest.approx(50e6)


def test_share_load_change_bus_and_isochronous() -> None:
    g1 = F.DroopSource("G1", 1000.0, 0.05, 60.0)
    bus = F.share_load_change(100.0, [g1], 60.0, infinite_bus=True)
    assert bus.delta_f_hz == 0.0
    assert bus.bus_share_w == 100.0
    assert bus.shares_w["G1"] == 0.0
    iso = F.share_load_change(100.0, [g1, F.DroopSource("G2", 1000.0, 0.0, 60.0)], 60.0)
    assert iso.delta_f_hz == 0.0
    assert iso.shares_w == {"G1": 0.0, "G2": 100.0}
    with pytest.raises(ModelInputError, match="indeterminately"):
        F.share_load_change(1.0, [F.DroopSource("a", 1, 0, 60), F.DroopSource("b", 1, 0, 60)], 60.0)
    with pytest.raises(ModelInputError, match="torque limit"):
        F.share_load_change(1.0, [F.DroopSource("a", 1, 0, 60)], 60.0, infinite_bus=True)


def test_drive_steady_state_agrees_with_closed_form_sharing() -> None:
    # one droop drive + frequency-dependent load: the closed form is the drive's linearization
    drive, f_set, base, _ = _saadat_drive("droop", ki=40.0)
    dp = 1.0  # W, small step
    ss = F.steady_state_frequency(drive, f_set, [base, F.ExponentLoad(dp, 0.0, F0)])
    sh = F.share_load_change(dp, [F.DroopSource.from_drive(drive)], F0, load_damping_w_per_hz=base.damping_w_per_hz())
    assert ss.frequency_hz - F0 == pytest.approx(sh.delta_f_hz, rel=1e-3)


# -- comparison with a measured trend -------------------------------------------------------------------
def test_compare_with_trend() -> None:
    t = np.linspace(0, 2, 201)
    f = 60 - 0.3 * (1 - np.exp(-t / 0.4))
    tm = np.arange(0.05, 1.9, 1 / 60)  # a per-cycle trend with a known 10 mHz offset and one 30 mHz spike
    fm = 60 - 0.3 * (1 - np.exp(-tm / 0.4)) + 0.01
    fm[40] += 0.02
    c = F.compare_with_trend(t, f, tm, fm)
    assert c.max_error_hz == pytest.approx(0.03, abs=2e-4)
    assert c.t_max_error_s == pytest.approx(tm[40])
    assert 0.01 < c.rms_error_hz < 0.0105
    with pytest.raises(ModelInputError, match="outside"):
        F.compare_with_trend(t, f, tm + 1.0, fm)
