"""Synchronization model checks against outside sources (named beside each check)."""

from __future__ import annotations

import argparse
import json
import math

import numpy as np
import pytest

from labkit.cli.sync import add_sync_parser
from labkit.core import sync as S
from labkit.core.bench import SyncLimits
from labkit.core.errors import ModelInputError, UnknownNameError
from labkit.demo_files import DEMO_BENCH, demo_path

SQRT2 = math.sqrt(2.0)


# -- IEEE 1547-2018 Table 5 (field-reference section 1.1, [C2] transcription of the standard's table) ------
@pytest.mark.parametrize(
    ("rating_kva", "slip", "dv", "dphi"),
    [(1.0, 0.3, 0.10, 20.0), (500.0, 0.3, 0.10, 20.0),  # row 0-500 kVA, upper bound inclusive
     (500.001, 0.2, 0.05, 15.0), (1500.0, 0.2, 0.05, 15.0),  # row >500-1500 kVA
     (1500.01, 0.1, 0.03, 10.0), (9000.0, 0.1, 0.03, 10.0)],  # row >1500 kVA
)
def test_ieee1547_table5_rows_and_boundaries(rating_kva: float, slip: float, dv: float, dphi: float) -> None:
    # IEEE 1547-2018 Table 5: values of the row for this aggregate rating
    lim = S.ieee1547_limits(rating_kva)
    assert (lim.max_slip_hz, lim.dv_max, -lim.dv_min, lim.max_dphi_deg) == (slip, dv, dv, dphi)
    assert lim.voltage_base == "nominal"
    vn = 120.0
    # each boundary is inclusive (field-reference 1.1: 0.3 passes, 0.3001 fails)
    on = S.within_limits([slip, -slip], vn, vn, 0.0, lim, vn)["slip"]
    off = S.within_limits([slip + 1e-4, -slip - 1e-4], vn, vn, 0.0, lim, vn)["slip"]
    assert on.all()
    assert not off.any()
    # |V_in - V_run| / V_nom: running side at 118 V, nominal 120 V
    v_run = 118.0
    ok = S.within_limits(0.0, [v_run + dv * vn, v_run - dv * vn], v_run, 0.0, lim, vn)["voltage"]
    bad = S.within_limits(0.0, [v_run + (dv + 1e-4) * vn, v_run - (dv + 1e-4) * vn], v_run, 0.0, lim, vn)["voltage"]
    assert ok.all()
    assert not bad.any()
    assert S.within_limits(0.0, vn, vn, [dphi, -dphi], lim, vn)["phase"].all()
    assert not S.within_limits(0.0, vn, vn, [dphi + 1e-3, -dphi - 1e-3], lim, vn)["phase"].any()


def test_ieee1547_slip_boundary_from_frequencies() -> None:
    # IEEE 1547-2018 Table 5, 0-500 kVA: 0.3 Hz passes (60.3 - 60.0 in binary is 0.29999999999999716), 0.3001 fails
    lim = S.ieee1547_limits(10)
    assert S.sync_verdict(float(S.slip_hz(60.3, 60.0)), 120, 120, 0, lim, 120).within
    verdict = S.sync_verdict(float(S.slip_hz(60.3001, 60.0)), 120, 120, 0, lim, 120)
    assert not verdict.within
    assert verdict.text.startswith("outside the configured limits (IEEE 1547-2018 Table 5, 0-500 kVA: slip")


def test_ieee1547_needs_positive_rating_and_nominal_voltage() -> None:
    with pytest.raises(ModelInputError, match="rating_kva"):
        S.ieee1547_limits(0)
    with pytest.raises(ModelInputError, match="nominal voltage"):
        S.within_limits(0.1, 120, 120, 0, S.ieee1547_limits(1))


# -- generator practice, IEEE C50.12/C50.13 as transcribed (field-reference section 1.2, [C2]) ---------------
def test_generator_practice_asymmetric_voltage_window() -> None:
    gp = S.generator_practice_limits()
    ieee = S.ieee1547_limits(1)
    # field-reference 1.2 edge case: V_gen = 0.99 V_bus passes 1547 but fails C50 (never below the line)
    assert S.sync_verdict(0.01, 118.8, 120.0, 0.0, ieee, 120.0).within
    v = S.sync_verdict(0.01, 118.8, 120.0, 0.0, gp)
    assert not v.within
    assert "voltage difference -1.00 %" in v.text
    assert "+0 .. +5 %" in v.text
    # up to +5 % of the running side passes, beyond fails; slip +-0.067 Hz, angle +-10 deg
    assert S.within_limits(0.0, [120.0, 126.0], 120.0, 0.0, gp)["voltage"].all()
    assert not S.within_limits(0.0, 126.01, 120.0, 0.0, gp)["voltage"]
    assert S.within_limits([0.067, -0.067], 121, 120, [10, -10], gp)["all"].all()
    assert not S.within_limits([0.0671, -0.0671], 121, 120, 0, gp)["slip"].any()
    # field-reference 1.2 [CALC]: 0.067 Hz is a slip cycle of 14.9 s
    assert float(S.beat_period_s(0.067)) == pytest.approx(14.925, abs=5e-4)


def test_bench_limits_and_errors() -> None:
    lim = S.bench_limits(SyncLimits(max_slip="0.2 Hz", max_voltage_difference="5 %", max_phase_difference="10 deg"),
                         "demo-bench")
    assert (lim.max_slip_hz, lim.dv_min, lim.dv_max, lim.max_dphi_deg, lim.voltage_base) == (
        0.2, -0.05, 0.05, 10.0, "running")
    with pytest.raises(ModelInputError, match=r"no \[bench\]\.sync_limits"):
        S.bench_limits(None, "demo-bench")
    with pytest.raises(UnknownNameError, match='did you mean "ieee1547"'):
        S.limit_set("ieee1574", rating_kva=1)
    with pytest.raises(ModelInputError, match="rating"):
        S.limit_set("ieee1547")


# -- beat, window and advance-angle relations (field-reference 1.4 and 1.5, [CALC] textbook identities) -----
SLIP_TABLE = [  # slip Hz, beat period s, time inside +-10 deg, time inside +-20 deg (field-reference 1.5)
    (0.067, 14.925, 0.829, 1.658), (0.1, 10.000, 0.556, 1.111), (0.2, 5.000, 0.278, 0.556),
    (0.3, 3.333, 0.185, 0.370), (0.5, 2.000, 0.111, 0.222), (1.0, 1.000, 0.0556, 0.111),
]


def test_beat_and_window_table() -> None:
    slip = np.array([r[0] for r in SLIP_TABLE])
    # beat relation T = 1/|f1 - f2|, both signs of slip
    np.testing.assert_allclose(S.beat_period_s(slip), [r[1] for r in SLIP_TABLE], atol=5e-4)
    np.testing.assert_allclose(S.beat_period_s(-slip), [r[1] for r in SLIP_TABLE], atol=5e-4)
    np.testing.assert_allclose(S.window_time_s(10.0, slip), [r[2] for r in SLIP_TABLE], atol=6e-4)
    np.testing.assert_allclose(S.window_time_s(20.0, slip), [r[3] for r in SLIP_TABLE], atol=6e-4)
    assert np.isinf(S.beat_period_s(0.0))


def test_window_relation_and_advance_angle() -> None:
    # field-reference 1.4: T = 2 dphi / (360 df); 30 deg at 1.0 Hz -> 0.1667 s, at 0.1 Hz -> 1.667 s
    assert float(S.window_time_s(30, 1.0)) == pytest.approx(0.1667, abs=5e-5)
    assert float(S.window_time_s(30, 0.1)) == pytest.approx(1.667, abs=5e-4)
    # advance angle 360 * slip * t_close: 1.0 Hz x 0.040 s = 14.4 deg
    assert float(S.advance_angle_deg(1.0, 0.040)) == pytest.approx(14.4, rel=1e-12)
    assert float(S.advance_angle_deg(-1.0, 0.040)) == pytest.approx(-14.4, rel=1e-12)


def test_closing_windows_follow_the_window_relation() -> None:
    # windows are centred on the dark points, one beat apart, each 2 dphi / (360 |slip|) long (field-reference 1.4)
    for slip in (0.25, -0.25):
        starts, ends = S.closing_windows(-30.0, slip, 20.0, 0.0, 12.0)
        full = (starts > 0) & (ends < 12.0)
        np.testing.assert_allclose(ends[full] - starts[full], float(S.window_time_s(20.0, slip)), rtol=1e-12)
        np.testing.assert_allclose(np.diff(starts[full]), float(S.beat_period_s(slip)), rtol=1e-12)
        edges = S.phase_difference_deg(-30.0, slip, np.concatenate([starts[full], ends[full]]))
        np.testing.assert_allclose(np.abs(edges), 20.0, atol=1e-9)
    # zero slip: always inside or never
    assert S.closing_windows(5.0, 0.0, 10.0, 0.0, 3.0)[0].tolist() == [0.0]
    assert S.closing_windows(15.0, 0.0, 10.0, 0.0, 3.0)[0].size == 0


V_ACROSS_PU = [(5, 0.08724), (10, 0.17431), (15, 0.26105), (20, 0.34730), (30, 0.51764), (60, 1.0), (90, 1.41421),
               (180, 2.0)]


def test_voltage_across_table() -> None:
    # field-reference 1.5: |1 - e^{j delta}| in pu, and the |dV| cases
    d = np.array([r[0] for r in V_ACROSS_PU], dtype=float)
    np.testing.assert_allclose(S.voltage_across_rms(1.0, 1.0, d), [r[1] for r in V_ACROSS_PU], atol=6e-6)
    cases = [((120, 114, 0), 6.000), ((120, 108, 20), 41.318), ((1.0, 1.05, 10), 0.18548), ((1.0, 0.95, 20), 0.34218)]
    for (v1, v2, delta), expected in cases:
        assert float(S.voltage_across_rms(v1, v2, delta)) == pytest.approx(expected, abs=6e-4 * max(1, expected))
    # lamp proxy: dark in phase, 1 in opposition (proportional to V^2: common practice)
    assert float(S.lamp_brightness(S.voltage_across_rms(120, 120, 0), 120, 120)) == 0.0
    assert float(S.lamp_brightness(S.voltage_across_rms(120, 120, 180), 120, 120)) == pytest.approx(1.0)


def test_beat_detected_from_synthesized_waveforms() -> None:
    # field-reference 1.5 test: v1 = sqrt2 120 sin(2 pi 60 t), v2 = sqrt2 120 sin(2 pi 60.25 t)
    t = np.arange(0.0, 12.0, 1e-4)
    v1 = SQRT2 * 120 * np.sin(2 * np.pi * 60 * t)
    v2 = SQRT2 * 120 * np.sin(2 * np.pi * 60.25 * t)
    beat = S.measure_beat(t, v2, v1)
    assert beat.beat_period_s == pytest.approx(4.000, abs=5e-4)
    assert beat.envelope_peak_v == pytest.approx(339.41, abs=0.01)  # 2 sqrt2 120
    # the phasor envelope model gives the same peak, at half a beat, and 2 Vpk |sin(pi fs t)| throughout
    inc, run = S.SideState(120, 60.25, -90.0), S.SideState(120, 60.0, -90.0)  # sin = cos shifted by -90 deg
    env = S.voltage_across_envelope(t, inc, run)
    np.testing.assert_allclose(env, 2 * SQRT2 * 120 * np.abs(np.sin(np.pi * 0.25 * t)), atol=1e-9)
    np.testing.assert_allclose(S.voltage_across_waveform(t, inc, run), v2 - v1, atol=1e-8)
    with pytest.raises(ModelInputError, match="less than one beat"):
        S.measure_beat(t[:20000], v2[:20000], v1[:20000])


# -- prediction, age, advice --------------------------------------------------------------------------------
def test_prediction_extrapolates_from_the_data_time() -> None:
    lim = S.ieee1547_limits(1)
    inc, run = S.SideState(121.0, 60.25, -30.0), S.SideState(120.0, 60.0, 0.0)
    p = S.predict_sync(inc, run, lim, data_time_s=100.0, now_s=100.5, closing_time_s=0.04, v_nominal=120.0)
    assert p.data_age_s == pytest.approx(0.5)
    assert p.dphi_now_deg == pytest.approx(-30.0 + 360 * 0.25 * 0.5)
    assert p.dphi_at_touch_deg == pytest.approx(-30.0 + 360 * 0.25 * 0.54)
    assert p.phase_trajectory(100.0 + 1 / 0.25) == pytest.approx(-30.0)  # one beat later
    # a close commanded inside a command window touches inside the phase limit
    mid = 0.5 * (p.window_command_start_s + p.window_command_end_s)
    assert np.all(np.abs(p.phase_trajectory(mid + p.closing_time_s)) <= 20.0)
    assert np.all(p.window_command_start_s >= p.now_s - 1e-12)
    d = p.as_dict()
    assert d["permissive"] is (abs(d["dphi_at_touch_deg"]) <= 20.0)
    with pytest.raises(ModelInputError, match="before the data"):
        S.predict_sync(inc, run, lim, data_time_s=1.0, now_s=0.5, v_nominal=120)


def test_advice_trims_toward_the_window() -> None:
    lim = S.bench_limits(SyncLimits(max_slip="0.2 Hz", max_voltage_difference="5 %", max_phase_difference="10 deg"))
    p = S.predict_sync(S.SideState(110.0, 60.35, 0.0), S.SideState(120.0, 60.0), lim, incoming_name="G1",
                       field_setting=0.9)
    text = " ".join(p.advice)
    # slip 0.35 Hz -> target +0.1 Hz: lower by 0.25 Hz; voltage -8.3 % -> raise by 10 V to the running side's 120 V
    assert "lower G1's frequency setpoint by 0.25 Hz" in text
    assert "raise G1's field (voltage) by about 10.0 V" in text
    assert "from 0.900 to about 0.982" in text
    assert not p.permissive
    assert p.window_touch_start_s.size == 0
    assert "safe" not in text.lower()


# -- closing surge and recorded closes ----------------------------------------------------------------------
def test_surge_estimate_formula() -> None:
    # stated basis: peak = sqrt2 |V_across| / |j X'' + Z_net|; V_across = 41.318 V (field-reference 1.5 case)
    v = float(S.voltage_across_rms(120, 108, 20))
    est = S.closing_surge_estimate(v, [0.6, 0.7], 0.3 + 0.5j)
    assert float(est.peak_a) == pytest.approx(SQRT2 * v / abs(0.3 + 1.8j), rel=1e-12)
    assert "estimate" in est.basis
    with pytest.raises(ModelInputError, match="zero"):
        S.closing_surge_estimate(10.0, 0.0, 0j)


def test_close_estimated_from_waveforms() -> None:
    # synthesized capture with known values at the close, plus noise
    fs, t_close = 5000.0, 0.4
    t = np.arange(0.0, 0.5, 1 / fs)
    rng = np.random.default_rng(7)
    vi = SQRT2 * 123 * np.cos(2 * np.pi * 60.1 * (t - t_close) + np.radians(8.0)) + rng.normal(0, 0.5, t.size)
    vr = SQRT2 * 120 * np.cos(2 * np.pi * 60.0 * (t - t_close) + np.radians(0.5)) + rng.normal(0, 0.5, t.size)
    est = S.estimate_close_from_waveforms(t, vi, vr, t_close, 60.0, n_cycles=4)
    assert est.slip_hz == pytest.approx(0.1, abs=2e-3)
    assert est.dv_running == pytest.approx(3 / 120, abs=5e-4)
    assert est.dphi_deg == pytest.approx(7.5, abs=0.1)
    v = S.recorded_close_verdict(est.slip_hz, est.dv_running, est.dphi_deg, S.generator_practice_limits())
    assert not v.within
    assert "slip" in v.text
    assert "phase" not in v.text
    with pytest.raises(ModelInputError, match="cover"):
        S.estimate_close_from_waveforms(t, vi, vr, 0.02, 60.0)
    with pytest.raises(ModelInputError, match="uniformly"):
        S.fit_sines(np.r_[t[:100], t[101:200]], vi[:199], 60.0, 0.0)


def test_recorded_close_on_nominal_base() -> None:
    lim = S.ieee1547_limits(1)
    # 9 % over a 110 V running side is 8.25 % of a 120 V nominal: inside the 10 % window
    assert S.recorded_close_verdict(0.1, 0.09, 5.0, lim, v_running=110.0, v_nominal=120.0).within
    assert not S.recorded_close_verdict(0.1, 0.11, 5.0, lim, v_running=120.0, v_nominal=120.0).within


# -- CLI ----------------------------------------------------------------------------------------------------
def _run(argv: list[str], capsys: pytest.CaptureFixture[str]) -> tuple[int, str, str]:
    parser = argparse.ArgumentParser()
    add_sync_parser(parser.add_subparsers(dest="command"))
    args = parser.parse_args(["sync", *argv])
    rc = args.func(args)
    out = capsys.readouterr()
    return rc, out.out, out.err


def test_cli_json_with_rating(capsys: pytest.CaptureFixture[str]) -> None:
    rc, out, _ = _run(["--incoming", "121,60.25,-30", "--running", "120,60", "--rating-kva", "800",
                       "--closing-time", "0.04", "--format", "json"], capsys)
    assert rc == 0
    d = json.loads(out)
    assert d["limits"]["name"] == "ieee1547"
    assert d["limits"]["max_slip_hz"] == 0.2
    assert d["slip_hz"] == pytest.approx(0.25)
    assert d["beat_period_s"] == pytest.approx(4.0)
    assert d["dv_pct"] == pytest.approx(100 / 120)
    assert d["dphi_deg"] == pytest.approx(-30.0)
    assert d["permissive"] is False
    assert "outside the configured limits" in d["verdict"]
    assert "supervisor decides" in d["caution"]
    assert isinstance(d["advice"], list)


def test_cli_bench_limits_and_missing_bench(capsys: pytest.CaptureFixture[str]) -> None:
    rc, out, _ = _run(["--incoming", "121,60.1,2", "--running", "120,60", "--bench", str(demo_path(DEMO_BENCH)),
                       "--switch", "SYNC1", "--name", "G1"], capsys)
    assert rc == 0
    assert "bench limits of demo-bench" in out
    assert "closing time 40 ms" in out
    assert "caution: Closing out of phase" in out
    rc, _, err = _run(["--incoming", "121,60.1", "--running", "120,60"], capsys)
    assert rc == 2
    assert "needs a bench file" in err
    assert "caution" in err
