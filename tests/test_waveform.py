"""Waveform analysis against IEEE 1459-2010 definitions, analytic signals and scipy.signal."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import optimize, signal

from labkit.core.errors import CaptureError
from labkit.core.quantities import is_registered
from labkit.core.waveform import (
    analyze,
    check_time_axis,
    detect_clipping,
    estimate_frequency,
    fit_harmonics,
)

SQ2 = np.sqrt(2.0)


def cos_wave(t, f, spec):
    """sum of sqrt(2)*X*cos(h*w*t + angle) for (h, X, angle_deg) in spec (labkit's phasor convention)."""
    return sum(SQ2 * x * np.cos(h * 2 * np.pi * f * t + np.radians(a)) for h, x, a in spec)


# --- IEEE 1459-2010 Annex B spectrum; computed values from /work/shared/field-reference.md §3.2 [CALC] ---------
# Inputs [C2] (transcription of Annex B), waveform x = sqrt(2)*X_h*sin(h*w*t + phi_h); 3 cycles at 60 Hz, 25 kS/s.
ANNEX_V = [(1, 100.0, 0.0), (3, 8.0, -70.0), (5, 15.0, 140.0), (7, 5.0, 20.0)]
ANNEX_I = [(1, 100.0, -30.0), (3, 20.0, -165.0), (5, 15.0, 234.0), (7, 10.0, 234.0)]
ANNEX_B = {  # field-reference §3.2 results [CALC]; clauses of IEEE 1459-2010 (field-reference §3.1)
    "v_rms": 101.5579, "i_rms": 103.5616, "vh_rms": 17.7200, "ih_rms": 26.9258,  # 3.1.2
    "thd_v": 0.17720, "thd_i": 0.26926,  # 3.1.2.1
    "p": 8589.162, "p1": 8660.254, "ph": -71.092,  # 3.1.2.3, 3.1.2.5
    "q1": 5000.000, "s": 10517.493, "s1": 10000.0, "sn": 3258.474,  # 3.1.2.7 - 3.1.2.9
    "di": 2692.582, "dv": 1772.005, "sh": 477.127, "dh": 471.801, "n": 6069.921,  # 3.1.2.10 - 3.1.2.14
    "pf": 0.81666, "pf1": 0.86603,  # 3.1.2.17, 3.1.2.16
}


def _sin_wave(t, f, spec):
    return sum(SQ2 * x * np.sin(h * 2 * np.pi * f * t + np.radians(a)) for h, x, a in spec)


def _annex_exact():
    """The Annex B quantities computed here from the input spectra with the 1459 formulas, full precision."""
    v = {h: x * np.exp(1j * np.radians(a)) for h, x, a in ANNEX_V}
    i = {h: x * np.exp(1j * np.radians(a)) for h, x, a in ANNEX_I}
    V, I = np.sqrt(sum(abs(z) ** 2 for z in v.values())), np.sqrt(sum(abs(z) ** 2 for z in i.values()))  # noqa: E741
    V1, I1 = abs(v[1]), abs(i[1])
    VH, IH = np.sqrt(V**2 - V1**2), np.sqrt(I**2 - I1**2)
    P = sum((v[h] * np.conj(i[h])).real for h in v)
    P1 = (v[1] * np.conj(i[1])).real
    Q1 = (v[1] * np.conj(i[1])).imag
    S, S1 = V * I, V1 * I1
    PH, SH = P - P1, VH * IH
    return {"v_rms": V, "i_rms": I, "vh_rms": VH, "ih_rms": IH, "thd_v": VH / V1, "thd_i": IH / I1, "p": P,
            "p1": P1, "ph": PH, "q1": Q1, "s": S, "s1": S1, "sn": np.sqrt(S**2 - S1**2), "di": V1 * IH,
            "dv": VH * I1, "sh": SH, "dh": np.sqrt(SH**2 - PH**2), "n": np.sqrt(S**2 - P**2), "pf": P / S,
            "pf1": P1 / S1}


def test_annex_b_spectrum_matches_ieee1459_computed_values():
    # Source: IEEE 1459-2010 Annex B inputs, computed results in field-reference §3.2 [CALC]:
    # 3 cycles at 60 Hz and 25 kS/s (an integer number of cycles), asserted to 1e-6 relative.
    fs, f = 25_000.0, 60.0
    t = np.arange(1250) / fs
    x = np.vstack([_sin_wave(t, f, ANNEX_V), _sin_wave(t, f, ANNEX_I)])
    pair = analyze(x, fs, [(0, 1)]).pairs[0]
    exact = _annex_exact()
    for name, published in ANNEX_B.items():
        got = getattr(pair, name)
        assert got == pytest.approx(exact[name], rel=1e-6), name
        # and the rounded figures printed in field-reference §3.2, to their last printed digit
        assert got == pytest.approx(published, abs=6e-4 * max(1.0, abs(published) / 1000)), name
    # the [CALC] identity S^2 = S1^2 + DI^2 + DV^2 + SH^2 (field-reference §3.1, 3.1.2.9)
    assert pair.s**2 == pytest.approx(pair.s1**2 + pair.di**2 + pair.dv**2 + pair.sh**2, rel=1e-9)
    assert pair.frequency == pytest.approx(60.0, abs=1e-6)


def test_annex_b_harmonic_table_and_angles():
    # Source: Annex B spectrum (field-reference §3.2). Table angles are against the voltage fundamental:
    # sin(theta) = cos(theta - 90 deg), so in the cos convention angle_h = phi_h - 90 and the table shows
    # (phi_h - 90) - h*(phi_v1 - 90).
    fs, f = 25_000.0, 60.0
    t = np.arange(1250) / fs
    res = analyze(np.vstack([_sin_wave(t, f, ANNEX_V), _sin_wave(t, f, ANNEX_I)]), fs, [(0, 1)])
    table = res.harmonics
    for row, spec in ((0, ANNEX_V), (1, ANNEX_I)):
        for h, x, a in spec:
            assert table.magnitude[row, h - 1] == pytest.approx(x, rel=1e-7)
            expected = (a - 90.0) - h * (0.0 - 90.0)
            diff = (table.angle_deg[row, h - 1] - expected + 180.0) % 360.0 - 180.0
            assert abs(diff) < 1e-5
        assert table.magnitude[row, 1] < 1e-6  # even order absent
    # THD from the table equals the 1459 THD when all content is at orders <= 15
    assert res.pairs[0].thd_v_table == pytest.approx(res.pairs[0].thd_v, rel=1e-7)


def test_pure_sine_lagging_current_simple_example():
    # Source: field-reference §3.2 "simple sinusoidal" [CALC]: V = 120 V, I = 10 A lagging 30 deg ->
    # P = 1039.2305 W, Q = 600 var, S = 1200 VA, PF = 0.866025 lagging (IEEE 1459 3.1.1).
    fs, f = 10_000.0, 60.0
    t = np.arange(10_000) / fs
    x = np.vstack([cos_wave(t, f, [(1, 120.0, 10.0)]), cos_wave(t, f, [(1, 10.0, -20.0)])])
    p = analyze(x, fs, [(0, 1)]).pairs[0]
    assert p.p == pytest.approx(1039.2305, abs=1e-3)
    assert p.q1 == pytest.approx(600.0, abs=1e-3)
    assert p.s == pytest.approx(1200.0, abs=1e-3)
    assert p.pf == pytest.approx(0.866025, abs=1e-6)
    assert p.phase == pytest.approx(-30.0, abs=1e-6)  # current lags: negative (labkit conventions)
    assert p.thd_v < 1e-6
    assert p.crest_v == pytest.approx(SQ2, rel=1e-4)


@pytest.mark.parametrize("f0", [59.7, 60.0, 60.37])
@pytest.mark.parametrize("dirty", [False, True])
def test_frequency_within_1_mhz(f0, dirty):
    # Analytic signal of known frequency; 2 s at 10 kS/s (a non-integer number of cycles at 59.7 and 60.37 Hz).
    # dirty: 3rd (8 %) and 5th (4 %) harmonics and white noise at 40 dB SNR. Requirement: |error| < 1 mHz.
    fs = 10_000.0
    t = np.arange(20_000) / fs
    spec = [(1, 120.0, 17.0)] + ([(3, 9.6, -40.0), (5, 4.8, 110.0)] if dirty else [])
    x = cos_wave(t, f0, spec)
    if dirty:
        x = x + np.random.default_rng(5).normal(0.0, 1.2, t.size)  # 120 V / 1.2 V: 40 dB SNR
    assert abs(estimate_frequency(x, fs)[0] - f0) < 1e-3
    v = np.vstack([x, 0.5 * x])
    assert abs(analyze(v, fs, [(0, 1)]).frequency - f0) < 1e-3


def test_off_nominal_non_integer_cycles_rms_and_phasor():
    # Analytic: RMS of sqrt(2)*X*cos is X; a 60.37 Hz capture of 0.5137 s holds 31.01 cycles.
    fs, f = 12_000.0, 60.37
    t = np.arange(int(0.5137 * fs)) / fs
    x = np.vstack([cos_wave(t, f, [(1, 230.0, 40.0)]), cos_wave(t, f, [(1, 4.0, 40.0 - 63.0)])])
    res = analyze(x, fs, [(0, 1)])
    p = res.pairs[0]
    assert p.v_rms == pytest.approx(230.0, rel=1e-7)
    assert p.i_rms == pytest.approx(4.0, rel=1e-7)
    assert p.v1_rms == pytest.approx(230.0, rel=1e-8)
    assert p.phase == pytest.approx(-63.0, abs=1e-6)
    assert p.p == pytest.approx(230 * 4 * np.cos(np.radians(63)), rel=1e-7)
    assert p.q1 == pytest.approx(230 * 4 * np.sin(np.radians(63)), rel=1e-7)
    assert res.cycle_rms.shape == (2, res.cycles)
    np.testing.assert_allclose(res.cycle_rms[0], 230.0, rtol=1e-5)


def test_third_and_fifth_harmonics_thd_and_powers():
    # IEEE 1459-2010 3.1.2.1: THD_V = VH/V1 = sqrt((V/V1)^2 - 1); 3.1.2.5: PH = sum_h Vh*Ih*cos(theta_h).
    fs, f = 10_000.0, 59.7
    t = np.arange(15_000) / fs
    vs = [(1, 120.0, 0.0), (3, 6.0, 30.0), (5, 3.6, -50.0)]
    cs = [(1, 8.0, -25.0), (3, 2.4, 10.0), (5, 1.2, 80.0)]
    p = analyze(np.vstack([cos_wave(t, f, vs), cos_wave(t, f, cs)]), fs, [(0, 1)]).pairs[0]
    thd_v = np.hypot(6.0, 3.6) / 120.0
    thd_i = np.hypot(2.4, 1.2) / 8.0
    assert p.thd_v == pytest.approx(thd_v, rel=1e-6)
    assert p.thd_i == pytest.approx(thd_i, rel=1e-6)
    ph = 6 * 2.4 * np.cos(np.radians(30 - 10)) + 3.6 * 1.2 * np.cos(np.radians(-50 - 80))
    assert p.ph == pytest.approx(ph, rel=1e-5)
    assert p.p1 == pytest.approx(120 * 8 * np.cos(np.radians(25)), rel=1e-7)
    assert p.dh == pytest.approx(np.sqrt((p.vh_rms * p.ih_rms) ** 2 - ph**2), rel=1e-5)  # 3.1.2.13


def test_dc_offset_counts_in_vh_and_is_reported():
    # IEEE 1459-2010 3.1.2: VH is all non-fundamental content, dc included (field-reference §3.1).
    fs, f = 10_000.0, 60.0
    t = np.arange(10_000) / fs
    v = 5.0 + cos_wave(t, f, [(1, 100.0, 0.0)])
    i = -0.2 + cos_wave(t, f, [(1, 2.0, 0.0)])
    p = analyze(np.vstack([v, i]), fs, [(0, 1)]).pairs[0]
    assert p.v_dc == pytest.approx(5.0, rel=1e-8)
    assert p.i_dc == pytest.approx(-0.2, rel=1e-7)
    assert p.v_rms == pytest.approx(np.hypot(100.0, 5.0), rel=1e-8)
    assert p.vh_rms == pytest.approx(5.0, rel=1e-6)
    assert p.thd_v == pytest.approx(0.05, rel=1e-6)
    assert p.p == pytest.approx(200.0 + 5.0 * -0.2, rel=1e-7)  # dc power enters P and PH
    assert p.ph == pytest.approx(-1.0, rel=1e-5)


def test_noise_at_stated_snr():
    # White noise of RMS sigma adds sigma^2 to the mean square (analytic); 30 dB SNR on a 100 V sine.
    fs, f = 10_000.0, 60.0
    t = np.arange(40_000) / fs
    sigma = 100.0 / 10 ** (30 / 20)
    rng = np.random.default_rng(11)
    v = cos_wave(t, f, [(1, 100.0, 0.0)]) + rng.normal(0, sigma, t.size)
    i = cos_wave(t, f, [(1, 5.0, -10.0)]) + rng.normal(0, 0.005, t.size)
    res = analyze(np.vstack([v, i]), fs, [(0, 1)])
    p = res.pairs[0]
    assert p.v_rms == pytest.approx(np.hypot(100.0, sigma), rel=2e-3)
    assert p.v1_rms == pytest.approx(100.0, rel=1e-3)  # estimator std ~ sigma*sqrt(1/N)
    assert p.phase == pytest.approx(-10.0, abs=0.05)
    assert p.thd_v == pytest.approx(sigma / 100.0, rel=0.05)
    assert not res.warnings


def test_harmonics_against_scipy_periodogram_and_curve_fit():
    # Independent references: scipy.signal.periodogram with a flat-top window (amplitude-flat peaks) for the
    # harmonic magnitudes, scipy.optimize.curve_fit for the frequency.
    fs, f = 10_000.0, 60.0
    t = np.arange(100_000) / fs  # 10 s: 0.1 Hz bins, harmonics on bins
    spec = [(1, 100.0, 12.0), (3, 7.0, -33.0), (5, 4.0, 71.0), (7, 2.5, 5.0), (11, 1.0, 160.0)]
    x = cos_wave(t, f, spec) + np.random.default_rng(2).normal(0, 0.05, t.size)
    freqs, pxx = signal.periodogram(x, fs, window="flattop", scaling="spectrum")
    mags, _ = fit_harmonics(x, fs, 60.0)
    for h, _, _ in spec:
        k = np.argmin(np.abs(freqs - h * f))
        ref = np.sqrt(pxx[k - 2:k + 3].max())  # spectrum scaling gives RMS^2 at the peak
        assert abs(mags[0, h - 1]) == pytest.approx(ref, rel=2e-3)
    seg = x[:4000]
    tt = t[:4000]
    popt, _ = optimize.curve_fit(lambda tt, a, b, fr: a * np.cos(2 * np.pi * fr * tt) + b * np.sin(
        2 * np.pi * fr * tt), tt, seg, p0=[100, 0, 59.9])
    est = estimate_frequency(seg, fs)[0]
    assert est == pytest.approx(popt[2], abs=2e-3)
    assert est == pytest.approx(60.0, abs=1e-3)


def test_frequency_and_rms_trends_follow_a_step():
    # Analytic: the amplitude steps from 100 to 110 V and the frequency from 60.0 to 60.5 Hz half way.
    fs = 10_000.0
    n = 20_000
    t = np.arange(n) / fs
    f_inst = np.where(t < 1.0, 60.0, 60.5)
    phase = 2 * np.pi * np.cumsum(f_inst) / fs
    amp = np.where(t < 1.0, 100.0, 110.0)
    v = SQ2 * amp * np.cos(phase)
    res = analyze(np.vstack([v, 0.1 * v]), fs, [(0, 1)])
    early = res.cycle_times < 0.9
    late = res.cycle_times > 1.1
    np.testing.assert_allclose(res.cycle_frequency[early], 60.0, atol=0.02)
    np.testing.assert_allclose(res.cycle_frequency[late], 60.5, atol=0.02)
    # cycle windows are periods of the capture's mean frequency (60.25 Hz), 0.4 % off each half's own period:
    # the per-cycle RMS of a sine then ripples by up to about 0.4 %/2 (analytic bound); 3e-3 allows for it
    np.testing.assert_allclose(res.cycle_rms[0, early], 100.0, rtol=3e-3)
    np.testing.assert_allclose(res.cycle_rms[0, late], 110.0, rtol=3e-3)
    frame = res.trends_frame()
    assert list(frame.columns) == ["time_s", "frequency_hz", "ch0_rms", "ch1_rms"]


def test_delay_correction_restores_phase_and_power():
    # A current channel sampled 200 us late looks 4.32 deg more lagging at 60 Hz (360*f*delay).
    fs, f, delay = 10_000.0, 60.0, 2e-4
    t = np.arange(10_000) / fs
    v = cos_wave(t, f, [(1, 120.0, 0.0), (3, 5.0, 20.0)])
    i = cos_wave(t - delay, f, [(1, 10.0, 0.0), (3, 1.0, 20.0)])
    skewed = analyze(np.vstack([v, i]), fs, [(0, 1)]).pairs[0]
    assert skewed.phase == pytest.approx(-360 * f * delay, abs=1e-6)
    fixed = analyze(np.vstack([v, i]), fs, [(0, 1)], delays_s=[0.0, delay]).pairs[0]
    assert fixed.phase == pytest.approx(0.0, abs=1e-6)
    assert fixed.p == pytest.approx(1200.0 + 5.0, rel=1e-6)


def test_tidy_frame_uses_registered_names_and_units():
    fs, f = 10_000.0, 60.0
    t = np.arange(5_000) / fs
    res = analyze(np.vstack([cos_wave(t, f, [(1, 120, 0), (3, 3, 0)]), cos_wave(t, f, [(1, 2, -30)])]), fs,
                  [(0, 1)], names=["vb", "il"])
    frame = res.to_frame()
    assert {"location", "quantity", "unit", "value"} <= set(frame.columns)
    assert all(is_registered(q) for q in frame["quantity"])
    names = set(frame["quantity"])
    for q in ("v_rms", "i_rms", "v1_rms", "i1_rms", "vh_rms", "ih_rms", "phase", "p", "p1", "ph", "q1", "s", "s1",
              "sn", "di", "dv", "sh", "dh", "n", "pf", "pf1", "thd_v", "thd_i", "frequency", "v_dc", "i_dc",
              "crest_v", "crest_i", "v_h3", "i_h15", "v_h3_angle"):
        assert q in names
    thd = frame[(frame.quantity == "thd_v")].value.item()
    assert thd == pytest.approx(2.5, rel=1e-6)  # % in the table (registry scale)
    assert frame[(frame.quantity == "v_h3")].value.item() == pytest.approx(3.0, rel=1e-7)


# --- bad captures ---------------------------------------------------------------------------------------------


def _pair(n=5000, fs=10_000.0):
    t = np.arange(n) / fs
    return np.vstack([cos_wave(t, 60.0, [(1, 120.0, 0.0)]), cos_wave(t, 60.0, [(1, 5.0, -20.0)])])


def test_nan_sample_is_refused_with_its_place():
    x = _pair()
    x[1, 1234] = np.nan
    with pytest.raises(CaptureError, match=r"ch1.*index 1234"):
        analyze(x, 10_000.0, [(0, 1)])


def test_short_capture_is_refused():
    with pytest.raises(CaptureError, match="cycles"):
        analyze(_pair(n=300), 10_000.0, [(0, 1)])  # 1.8 cycles


def test_fundamental_near_nyquist_is_refused():
    fs = 500.0
    t = np.arange(2000) / fs
    x = np.vstack([np.cos(2 * np.pi * 100 * t), np.cos(2 * np.pi * 100 * t)])  # 5 samples per cycle
    with pytest.raises(CaptureError, match="Nyquist"):
        analyze(x, fs, [(0, 1)])


def test_clipping_detected_with_and_without_full_scale():
    x = _pair()
    clipped = np.clip(x, -150.0, 150.0)  # 120*sqrt(2) = 169.7 V peak flattened at 150 V
    res = analyze(clipped, 10_000.0, [(0, 1)])
    assert [w.code for w in res.warnings] == ["clipped"]
    assert res.warnings[0].channel == "ch0"
    res = analyze(clipped, 10_000.0, [(0, 1)], full_scale=[[-150.0, 150.0], [-10.0, 10.0]])
    assert [w.channel for w in res.warnings if w.code == "clipped"] == ["ch0"]
    assert not detect_clipping(x)  # unclipped float sine: no warning
    # coarsely quantized (8 bit) but unclipped: no warning either
    q = np.round(x / (400 / 256)) * (400 / 256)
    assert not detect_clipping(q)
    with pytest.raises(CaptureError, match="clipped"):
        analyze(clipped, 10_000.0, [(0, 1)], strict=True)


def test_current_channel_of_noise_only_is_flagged_not_reported():
    x = _pair()
    x[1] = np.random.default_rng(0).normal(0, 0.01, x.shape[1])
    res = analyze(x, 10_000.0, [(0, 1)])
    assert any(w.code == "no_fundamental" and w.channel == "ch1" for w in res.warnings)
    p = res.pairs[0]
    assert np.isnan(p.phase)
    assert np.isnan(p.q1)
    assert np.isnan(p.pf1)
    assert np.isfinite(p.i_rms)
    assert "no_fundamental" in set(res.to_frame().note)


def test_time_axis_dropped_and_uneven_samples():
    t = np.arange(1000) / 1000.0
    assert check_time_axis(t) == pytest.approx(1000.0)
    with pytest.raises(CaptureError, match=r"1 dropped sample\(s\) after sample 499"):
        check_time_axis(np.delete(t, 500))
    jitter = t.copy()
    jitter[300] += 0.0004
    with pytest.raises(CaptureError, match="uneven"):
        check_time_axis(jitter)


def test_ac_coupled_marks_dc_unavailable():
    res = analyze(_pair(), 10_000.0, [(0, 1)], ac_coupled=True)
    assert np.isnan(res.pairs[0].v_dc)
    assert not res.dc_available
    assert any(w.code == "dc_unavailable" for w in res.warnings)
