"""Typed readings, peak conversion by the predicted crest factor, and the simulated bench against the predictions.

Outside references:
- crest factor of a sine is sqrt 2 (textbook identity), and of a harmonic mix as computed here with numpy on a
  waveform synthesized independently (dense cosine sums, max |x| / RMS);
- the form factor of a sine is pi / (2 sqrt 2) (textbook identity);
- IEEE 1459-2010 clause 3.1.2 relations (S = V I, PF = P / S, via /work/shared/field-reference.md §3.1) when a
  simulated capture is analysed by labkit.core.waveform and compared with the predicted v_rms, i_rms, p, pf.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from labkit.core.errors import UnitError
from labkit.core.predict import predict_state
from labkit.core.state import apply_step, initial_state
from labkit.core.template import ReadingSpec
from labkit.files.loader import load_bench, load_template
from labkit.session.readings import (
    ChannelFault,
    analyse_for,
    location_spectrum,
    parse_typed,
    predicted_wave_shape,
    simulated_capture,
    value_from_analysis,
    wave_shape_from_phasors,
)
from tests.conftest import DEMO


@pytest.fixture(scope="module")
def demo():
    bench = load_bench(DEMO / "demo-bench.toml", DEMO / "demo-cart-03.toml").bench
    return bench


def _prediction_after(bench, template_name, step_id, n_samples=100):
    t = load_template(DEMO / template_name, bench).template
    state = initial_state(bench)
    for step in t.steps:
        state = apply_step(bench, state, step)
        if step.id == step_id:
            return predict_state(bench, state, n_samples=n_samples), step
    raise KeyError(step_id)


def _spec(q, loc, unit, tol="instrument"):
    return ReadingSpec(quantity=q, location=loc, unit=unit, tolerance=tol)


def _numpy_crest(orders, phasors):
    """Independent synthesis: x(t) = sum sqrt2 |X| cos(h w t + angle) on 100 000 points of one period."""
    t = np.linspace(0.0, 1.0, 100_000, endpoint=False)
    x = sum(math.sqrt(2) * abs(p) * np.cos(2 * np.pi * h * t + np.angle(p)) for h, p in zip(orders, phasors,
                                                                                              strict=True))
    return np.max(np.abs(x)) / np.sqrt(np.mean(x**2)), np.sqrt(np.mean(x**2)) / np.mean(np.abs(x))


def test_crest_and_form_factor_of_a_sine():
    shape = wave_shape_from_phasors([1], np.array([120 * np.exp(0.3j)]))
    assert shape.crest == pytest.approx(math.sqrt(2), rel=1e-5)  # textbook identity
    assert shape.form_factor == pytest.approx(math.pi / (2 * math.sqrt(2)), rel=1e-5)  # textbook identity


def test_crest_of_a_harmonic_mix_matches_an_independent_numpy_synthesis():
    orders = [1, 3, 5, 7, 9]
    phasors = np.array([1.0, 0.7 * np.exp(1j * np.pi), 0.4, 0.18 * np.exp(1j * np.pi), 0.08]) * np.exp(0.2j)
    crest, ff = _numpy_crest(orders, phasors)
    shape = wave_shape_from_phasors(orders, phasors)
    assert shape.crest == pytest.approx(crest, rel=2e-4)
    assert shape.form_factor == pytest.approx(ff, rel=2e-4)
    assert abs(shape.crest - math.sqrt(2)) > 0.3  # distorted: sqrt 2 would be badly wrong


def test_typed_values_units_and_slips(demo):
    v = parse_typed("118.6 V", _spec("v_rms", "B2", "V"), step_index=4, spec_index=0)
    assert v.value == pytest.approx(118.6)
    assert v.unit == "V"
    assert "118.6 V" in v.echo
    i = parse_typed("850 mA", _spec("i_rms", "LB@B2", "mA"), step_index=4, spec_index=1)
    assert i.value == pytest.approx(0.85)
    assert i.unit == "A"
    with pytest.raises(UnitError, match="decimal comma"):
        parse_typed("118,6 V", _spec("v_rms", "B2", "V"), step_index=4, spec_index=0)
    ok = parse_typed("118,6 V", _spec("v_rms", "B2", "V"), step_index=4, spec_index=0, decimal_comma=True)
    assert ok.value == pytest.approx(118.6)
    with pytest.raises(UnitError, match='did you mean "850 mA"'):
        parse_typed("850 MA", _spec("i_rms", "LB@B2", "mA"), step_index=4, spec_index=1)
    with pytest.raises(UnitError, match="not a unit of current"):
        parse_typed("850 mV", _spec("i_rms", "LB@B2", "mA"), step_index=4, spec_index=1)
    pf = parse_typed("0.93", _spec("pf", "L12@B1", "1", "0.03"), step_index=4, spec_index=2)
    assert pf.value == pytest.approx(0.93)
    thd = parse_typed("4.2", _spec("thd_v", "B3", "%", "0.5"), step_index=4, spec_index=2)
    assert thd.value == pytest.approx(4.2)
    ranged = parse_typed("118.6 V", _spec("v_rms", "B2", "V"), step_index=4, spec_index=0, meter_range="200 V")
    assert ranged.meter_range == pytest.approx(200.0)


def test_peak_of_a_distorted_current_is_converted_by_the_predicted_crest_factor(demo):
    pred, _ = _prediction_after(demo, "lab3-harmonics.toml", "nonlinear-on")
    orders, phasors = location_spectrum(pred, "NL@B3", "i")
    crest, _ = _numpy_crest(orders, phasors)
    i_rms = pred.value("NL@B3", "i_rms")
    peak_text = f"{i_rms * crest:.6g} A"
    parsed = parse_typed(peak_text, _spec("i_rms", "NL@B3", "A"), step_index=3, spec_index=0, form="peak",
                         prediction=pred)
    assert parsed.value == pytest.approx(i_rms, rel=1e-4)
    assert parsed.value != pytest.approx(i_rms * crest / math.sqrt(2), rel=0.05)  # sqrt 2 would be wrong
    p2p = parse_typed(f"{2 * i_rms * crest:.6g} A", _spec("i_rms", "NL@B3", "A"), step_index=3, spec_index=0,
                      form="peak_to_peak", prediction=pred)
    assert p2p.value == pytest.approx(i_rms, rel=1e-4)
    assert any("distorted" in n for n in parsed.notes)


def test_peak_and_average_of_a_sinusoidal_voltage(demo):
    pred, _ = _prediction_after(demo, "lab1-line-and-loads.toml", "resistive-load")
    v = pred.value("B2", "v_rms")
    peak = parse_typed(f"{v * math.sqrt(2):.6g} V", _spec("v_rms", "B2", "V"), step_index=2, spec_index=0,
                       form="peak", prediction=pred)
    assert peak.value == pytest.approx(v, rel=1e-4)
    avg = parse_typed(f"{v:.6g} V", _spec("v_rms", "B2", "V"), step_index=2, spec_index=0, form="average",
                      prediction=pred)
    assert avg.value == pytest.approx(v, rel=1e-4)  # an average meter reads a sine right
    assert predicted_wave_shape(pred, "B2", "v_rms").crest == pytest.approx(math.sqrt(2), rel=1e-4)
    with pytest.raises(ValueError, match="only v_rms and i_rms"):
        parse_typed("60 W", _spec("p", "L12@B1", "W", "3 %"), step_index=2, spec_index=2, form="peak",
                    prediction=pred)


@pytest.mark.parametrize(("template", "step_id", "location"), [
    ("lab1-line-and-loads.toml", "add-inductive", "L12@B1"),
    ("lab3-harmonics.toml", "nonlinear-on", "NL@B3"),
])
def test_simulated_capture_reproduces_the_predicted_ieee1459_quantities(demo, template, step_id, location):
    pred, _ = _prediction_after(demo, template, step_id)
    spec = _spec("p", location, "W", "3 %")
    cap = simulated_capture(pred, demo, spec, seed=11, snr_db=50.0, gain_error=0.002)
    analysis = analyse_for(cap)
    pair = analysis.pair(location)
    v_pred = pred.value(location.partition("@")[2], "v_rms")
    i_pred, p_pred, pf_pred = (pred.value(location, q) for q in ("i_rms", "p", "pf"))
    # stated noise: 50 dB SNR (0.32 % RMS white noise) and 0.2 % gain error per channel
    assert pair.v_rms == pytest.approx(v_pred, rel=5e-3)
    assert pair.i_rms == pytest.approx(i_pred, rel=5e-3)
    assert pair.p == pytest.approx(p_pred, rel=1e-2)
    # IEEE 1459-2010 3.1.2: S = V I and PF = P / S
    assert pair.s == pytest.approx(pair.v_rms * pair.i_rms, rel=1e-12)
    assert pair.pf == pytest.approx(pair.p / pair.s, rel=1e-12)
    assert pair.pf == pytest.approx(pf_pred, abs=1e-2)
    assert value_from_analysis(analysis, "pf", location) == pytest.approx(pair.pf)


def test_a_reversed_sensor_fault_flips_the_power(demo):
    pred, _ = _prediction_after(demo, "lab1-line-and-loads.toml", "resistive-load")
    spec = _spec("p", "L12@B1", "W", "3 %")
    cap = simulated_capture(pred, demo, spec, seed=2, faults={"i@L12@B1": ChannelFault(gain=-1.0)})
    p = analyse_for(cap).pair("L12@B1").p
    assert p == pytest.approx(-pred.value("L12@B1", "p"), rel=1e-2)


@pytest.mark.parametrize("max_order", [3, 13, 25, 49])
def test_predicted_crest_factors_match_a_dense_numpy_synthesis(max_order):
    # the predictions' crest factor (coarse samples refined by Newton steps) against 100 000 points per period
    from labkit.core.crest import crest_factor

    rng = np.random.default_rng(max_order)
    orders = [1, *range(3, max_order + 1, 2)]
    amplitude = np.array([1.0, *(rng.uniform(0.0, 0.6, len(orders) - 1) / np.arange(1, len(orders)))])
    spectra = amplitude[None, :] * np.exp(2j * np.pi * rng.random((40, len(orders))))
    got = crest_factor(spectra.T[None], orders)[0]
    expected = [_numpy_crest(orders, spectrum)[0] for spectrum in spectra]
    np.testing.assert_allclose(got, expected, rtol=1e-6)


def test_predicted_crest_factors_of_flat_and_double_peaked_waves_stay_close():
    # random odd-harmonic spectra give flat tops and twin peaks; reference: 40,000 points per period
    from labkit.core.crest import crest_factor

    rng = np.random.default_rng(12)
    orders = [1, 3, 5, 7, 9]
    spectra = (rng.normal(size=(300, 5)) + 1j * rng.normal(size=(300, 5))) * np.array([1, 0.3, 0.2, 0.1, 0.05])
    got = crest_factor(spectra.T[None], orders)[0]
    theta = np.linspace(0.0, 2 * np.pi, 40_000, endpoint=False)
    wave = np.sqrt(2) * np.real(spectra @ np.exp(1j * np.outer(orders, theta)))
    expected = np.max(np.abs(wave), axis=1) / np.sqrt(np.sum(np.abs(spectra) ** 2, axis=1))
    assert np.max(np.abs(got / expected - 1)) < 5e-4
    assert np.all(got <= expected * (1 + 1e-6))  # only values the waveform takes: never above its peak


@pytest.mark.parametrize("spread", [0.02, 0.1, 0.5])
def test_crest_factors_of_tolerance_samples_from_the_points_near_the_peak(spread, monkeypatch):
    # tolerance samples scattered around twin-peaked and flat-topped waves; the points kept near the
    # mean wave's peak must give what every point gives (reference: 40,000 points per period, numpy)
    from labkit.core import crest

    rng = np.random.default_rng(7)
    orders = [1, 3, 5, 7, 9]
    mean = (rng.normal(size=(6, 5, 1)) + 1j * rng.normal(size=(6, 5, 1))) * np.array([1, 0.3, 0.2, 0.1, 0.05])[:, None]
    jitter = rng.uniform(-1, 1, size=(2, 6, 5, 400))
    x = mean * (1 + spread * (jitter[0] + 1j * jitter[1]))
    points = max(crest.CREST_POINTS, crest.CREST_POINTS_PER_PERIOD * max(orders))
    theta = 2 * np.pi * np.arange(points) / points
    h = np.array(orders, dtype=float)[:, None]
    basis = np.sqrt(2) * np.concatenate([np.cos(h * theta), -np.sin(h * theta)])
    parts = np.concatenate([x.real, x.imag], axis=1).swapaxes(1, 2)
    kept = [crest.sampled_points(x[m], np.ascontiguousarray(parts[m]), basis).size for m in range(6)]
    got = crest.crest_factor(x, orders)
    monkeypatch.setattr(crest, "sampled_points", lambda x, parts, basis: np.arange(basis.shape[1]))
    every_point = crest.crest_factor(x, orders)
    np.testing.assert_allclose(got, every_point, rtol=1e-12)
    if spread <= 0.1:
        assert max(kept) < points  # the narrow spreads do skip points
    dense = np.linspace(0.0, 2 * np.pi, 40_000, endpoint=False)
    spectra = x.transpose(0, 2, 1).reshape(-1, 5)
    wave = np.sqrt(2) * np.real(spectra @ np.exp(1j * np.outer(orders, dense)))
    expected = (np.max(np.abs(wave), axis=1) / np.sqrt(np.sum(np.abs(spectra) ** 2, axis=1))).reshape(6, 400)
    assert np.max(np.abs(got / expected - 1)) < 5e-4
    assert np.all(got <= expected * (1 + 1e-6))


def test_places_with_the_same_waveform_share_one_crest_factor():
    # the current at both ends of a series switch is one waveform (sign aside): one computation serves both,
    # and gives what each place would give alone (reference: the place computed on its own)
    from labkit.core import crest

    rng = np.random.default_rng(5)
    orders = [1, 3, 5]
    x = (rng.normal(size=(4, 3, 50)) + 1j * rng.normal(size=(4, 3, 50))) * np.array([1, 0.3, 0.2])[:, None]
    x[2] = -x[0] * (1 + 1e-15)  # the far end of a series element, reversed
    x[3] = x[1] * 1.001  # proportional, not equal: a different place
    assert crest.same_waveform_as(x).tolist() == [0, 1, 0, 3]
    got = crest.crest_factor(x, orders)
    alone = np.concatenate([crest.crest_factor(x[m : m + 1], orders) for m in range(4)])
    np.testing.assert_allclose(got, alone, rtol=1e-12)
    x[0, 1, 7] = np.nan  # a singular member: its place no longer matches
    assert crest.same_waveform_as(x).tolist() == [0, 1, 2, 3]
