"""Calibration steps of a session (labkit.session.calibration through SessionRunner.calibrate).

Outside references, named at each check:
- the RMS of a sine is its peak over sqrt 2 (textbook): a channel that reads a sine of peak 1.02 sqrt2 x 120 V
  against a true-RMS reference of 120 V has gain error +2 %;
- the meter-accuracy rule of /work/shared/field-reference.md §4.2,
  ``tol = class x full scale + % of reading x |reading| + digits x LSB``, computed by hand for the reference meter
  (0.1 % of reading + 0.05 % of the 200 V range) and for the demo bench's sensor VA (0.5 % + 0.2 % of 200 V +
  2 x 0.1 V);
- a resistor's current is in phase with its voltage (textbook), which is what makes a resistive load's channel
  pair a known-phase reference for the skew;
- a sine delayed by d shifts its phase by -360 f d degrees (textbook).
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from labkit.captures.capture import Capture, analyze_capture
from labkit.core.errors import UnitError
from labkit.core.waveform import analyze
from labkit.files.loader import load_bench, load_template
from labkit.session.calibration import CalibrationError, SensorCalibration, corrected_capture, seeded_gain_error
from labkit.session.readings import channels_for
from labkit.session.runner import Actor, SessionError, SessionRunner
from labkit.session.verdict import verdict
from tests.conftest import DEMO
from tests.test_session_archive import MemoryArchive

STUDENT = Actor("p01", "student")
SAMPLES = 100
RATE = 10_000.0
F = 60.0
CYCLES = 12


@pytest.fixture(scope="module")
def loaded():
    bench = load_bench(DEMO / "demo-bench.toml", DEMO / "demo-cart-03.toml")
    return bench, load_template(DEMO / "lab3-harmonics.toml", bench.bench)


def _at_calibration(loaded, archive=None) -> SessionRunner:
    bench, template = loaded
    r = SessionRunner.create(archive or MemoryArchive(), bench, template, section="S1", group="G1",
                             people=["p01", "p02"], actor=STUDENT, n_samples=SAMPLES)
    r.open()
    r.set_as_found("118.0 V", "60.00 Hz")
    r.forward()
    assert r.view().step.kind == "calibration"
    return r


def _sine(rms: float, *, phase_deg: float = 0.0, dc: float = 0.0, delay_s: float = 0.0) -> np.ndarray:
    t = np.arange(round(CYCLES * RATE / F)) / RATE - delay_s
    return dc + math.sqrt(2.0) * rms * np.cos(2 * np.pi * F * t + np.radians(phase_deg))


def _capture(rows, kinds, locations, *, ac_coupled=False) -> Capture:
    names = tuple(f"{'v' if k == 'voltage' else 'i'}@{loc}" for k, loc in zip(kinds, locations, strict=True))
    return Capture(np.vstack(rows), RATE, names, units=tuple("V" if k == "voltage" else "A" for k in kinds),
                   kinds=tuple(kinds), locations=tuple(locations), ac_coupled=ac_coupled)


def _counts(r: SessionRunner) -> tuple[int, int]:
    return len(r.archive.events(r.session_id)), len(r.archive.readings(r.session_id))


def test_gain_and_offset_from_a_reference_meter_and_the_row_judged_against_it(loaded):
    r = _at_calibration(loaded)
    # the sensor reads 2 % high and has a 0.3 V zero offset; the reference meter reads the true 120.00 V
    cap = _capture([_sine(1.02 * 120.0, dc=0.3)], ["voltage"], ["B1"])
    row = r.calibrate(r.current, cap, "120.00 V")
    cal = r.calibrations["VA"]
    # RMS of a sine = peak / sqrt 2 (textbook): the ac part reads 1.02 x 120 V, so gain = 1 / 1.02
    assert cal.gain == pytest.approx(1.0 / 1.02, rel=1e-9)
    assert cal.offset == pytest.approx(0.3, abs=1e-9)
    assert cal.delay_s == 0.0
    # §4.2 rule by hand for the reference meter: 0.1 % x 120 + 0.05 % x 200 = 0.12 + 0.10 = 0.22 V
    assert cal.uncertainty == pytest.approx(0.22, rel=1e-12)
    assert cal.gain_uncertainty == pytest.approx(0.22 / 120.0, rel=1e-12)
    # the row: band = reference +- meter accuracy, NOT the model's prediction at B1
    model = r.view().prediction.value("B1", "v_rms")
    assert row["predicted"] == 120.0
    assert abs(model - 118.0) < 0.5  # the model follows the as-found 118 V, the row does not
    assert (row["band_low"], row["band_high"]) == (pytest.approx(119.78), pytest.approx(120.22))
    measured = math.sqrt((1.02 * 120.0) ** 2 + 0.3**2)  # true RMS includes the dc
    assert row["measured"] == pytest.approx(measured, rel=1e-9)
    # §4.2 by hand for sensor VA: 0.2 % x 200 + 0.5 % x reading + 2 x 0.1 V
    assert row["tolerance"] == pytest.approx(0.4 + 0.005 * measured + 0.2, rel=1e-12)
    # 122.40 V is 2.18 V above the band: beyond 1 x tol (1.21 V), within 3 x tol -> marginal (docs/verdicts.md rule)
    assert row["verdict"] == "marginal" == verdict(measured, 119.78, 120.22, 0.4 + 0.005 * measured + 0.2)
    assert row["sensor"] == "VA"
    assert "reference multimeter RM-2" in row["anchor"]
    assert row["diagnosis"] == ""
    ev = r.archive.events(r.session_id)
    ev = ev[ev["event"] == "calibration"]
    assert len(ev) == 1
    detail = json.loads(ev.iloc[0]["detail"])
    assert detail["sensor"] == "VA"
    assert detail["meter_id"] == "reference multimeter RM-2 (invented)"
    assert (detail["meter_accuracy_reading"], detail["meter_accuracy_full_scale"]) == (0.001, 0.0005)
    assert detail["meter_range"] == 200.0
    assert detail["reference_value"] == 120.0
    assert detail["reference_text"] == "120.00 V"
    assert detail["measured_value"] == pytest.approx(measured)
    assert detail["gain"] == pytest.approx(1 / 1.02)
    assert detail["uncertainty"] == pytest.approx(0.22)
    assert any("skew 0" in n for n in detail["notes"])  # no known-phase channel in this capture


def test_a_meter_other_than_the_templates_is_recorded_with_its_own_accuracy(loaded):
    r = _at_calibration(loaded)
    cap = _capture([_sine(120.0)], ["voltage"], ["B1"])
    row = r.calibrate(r.current, cap, "0.1200 kV", meter_id="bench meter BM-7 (invented)",
                      accuracy_reading="0.5 %", accuracy_full_scale=0.0, meter_range="600 V")
    cal = r.calibrations["VA"]
    assert cal.meter_id == "bench meter BM-7 (invented)"
    assert cal.uncertainty == pytest.approx(0.6)  # §4.2 by hand: 0.5 % x 120 V + 0 % x 600 V
    assert row["band_low"] == pytest.approx(119.4)
    assert row["verdict"] == "accept"


def test_an_absurd_gain_is_refused_and_nothing_is_recorded(loaded):
    r = _at_calibration(loaded)
    before = _counts(r)
    stored = len(r.archive._captures)  # the test archive keeps its captures in a dict
    for factor in (1.3, 0.8):  # gains 0.77 and 1.25: a wrong scale setting or the wrong signal, not an error to fit
        cap = _capture([_sine(factor * 120.0)], ["voltage"], ["B1"])
        with pytest.raises(CalibrationError, match="check the sensor, its scale setting and the wiring"):
            r.calibrate(r.current, cap, "120.0 V")
    assert _counts(r) == before
    assert r.calibrations == {}
    assert len(r.archive._captures) == stored
    # just inside the limit is accepted (19 % off)
    r.calibrate(r.current, _capture([_sine(1.19 * 120.0)], ["voltage"], ["B1"]), "120.0 V")
    assert r.calibrations["VA"].gain == pytest.approx(1 / 1.19, rel=1e-9)


def test_bad_reference_input_and_wrong_steps_are_refused(loaded):
    r = _at_calibration(loaded)
    cap = _capture([_sine(120.0)], ["voltage"], ["B1"])
    before = _counts(r)
    with pytest.raises(UnitError):
        r.calibrate(r.current, cap, "120.0 A")  # a current for a voltage sensor
    with pytest.raises(UnitError, match="decimal comma"):
        r.calibrate(r.current, cap, "120,0 V")
    with pytest.raises(CalibrationError, match="positive"):
        r.calibrate(r.current, cap, "-120 V")
    with pytest.raises(SessionError, match="current step"):
        r.calibrate(0, cap, "120 V")
    assert _counts(r) == before
    r.forward()
    with pytest.raises(SessionError, match="calibration step"):
        r.calibrate(r.current, cap, "120 V")


def test_ac_coupled_capture_gives_no_offset_and_says_so(loaded):
    r = _at_calibration(loaded)
    x = _sine(1.01 * 120.0)
    cap = _capture([x - x.mean()], ["voltage"], ["B1"], ac_coupled=True)
    r.calibrate(r.current, cap, "120.0 V")
    cal = r.calibrations["VA"]
    assert cal.offset == 0.0
    assert cal.gain == pytest.approx(1 / 1.01, rel=1e-9)
    assert any("ac-coupled" in n for n in cal.notes)


def test_calibration_from_an_analysis(loaded):
    r = _at_calibration(loaded)
    x = _sine(0.98 * 120.0, dc=0.5)
    analysis = analyze(x[np.newaxis, :], RATE, [(0, 0)], names=["v@B1"])
    r.calibrate(r.current, analysis, "120.0 V")
    cal = r.calibrations["VA"]
    assert cal.gain == pytest.approx(1 / 0.98, rel=1e-9)  # RMS of the ac part: peak / sqrt 2
    assert cal.offset == pytest.approx(0.5, abs=1e-9)


def test_skew_from_a_resistive_loads_channel_pair(loaded):
    r = _at_calibration(loaded)
    delay = 150e-6  # the voltage channel's samples lag true time by 150 us
    v = _sine(1.005 * 120.0, delay_s=delay)
    i = _sine(0.5)  # RB's current, in phase with its voltage (a resistor, textbook)
    cap = _capture([v, i], ["voltage", "current"], ["B2", "RB@B2"])
    before = analyze_capture(cap).pairs[0].phase
    # a sine delayed by d lags by 360 f d degrees (textbook): the current then appears to lead by +3.24 deg
    assert before == pytest.approx(360 * F * delay, abs=1e-6)
    r.calibrate(r.current, cap, "120.0 V")
    cal = r.calibrations["VA"]
    assert cal.delay_s == pytest.approx(delay, rel=1e-6)
    assert any("known phase 0 deg" in n for n in cal.notes)
    fixed, notes = corrected_capture(cap, [("v@B2", "voltage", "B2", "VA"), ("i@RB@B2", "current", "RB@B2", "IB")],
                                     r.calibrations)
    assert notes
    assert "sensor VA" in notes[0]
    after = analyze_capture(fixed).pairs[0]
    assert after.phase == pytest.approx(0.0, abs=1e-6)
    assert after.v_rms == pytest.approx(120.0, rel=1e-9)


def test_an_absurd_skew_is_refused(loaded):
    r = _at_calibration(loaded)
    cap = _capture([_sine(120.0), _sine(0.5, phase_deg=90.0)], ["voltage", "current"], ["B2", "RB@B2"])
    before = _counts(r)
    with pytest.raises(CalibrationError, match="which channel is which"):
        r.calibrate(r.current, cap, "120.0 V")
    assert _counts(r) == before


def _to_outage(r: SessionRunner) -> None:
    while r.view().step.id != "lose-l13":
        r.forward()


def test_later_captures_are_corrected_and_a_resumed_runner_reapplies_the_corrections(loaded):
    r = _at_calibration(loaded)
    r.calibrate(r.current, _capture([_sine(1.02 * 120.0, dc=0.3)], ["voltage"], ["B1"]), "120.00 V")
    _to_outage(r)
    spec = r.view().step.readings[0]
    assert (spec.quantity, spec.location) == ("v_rms", "B3")
    assert channels_for(r.bench, spec)[0][3] == "VA"
    later = _capture([_sine(1.02 * 127.0, dc=0.3)], ["voltage"], ["B3"])  # the same sensor error at B3
    parsed = r.from_capture(0, later)
    assert parsed.value == pytest.approx(127.0, rel=1e-9)  # (x - 0.3) / 1.02: RMS of the sine, peak / sqrt 2
    assert any("calibration of sensor VA" in n for n in parsed.notes)
    r.record(parsed)
    resumed = SessionRunner.resume(r.archive, r.session_id, STUDENT)
    assert resumed.calibrations.keys() == {"VA"}
    assert resumed.calibrations["VA"] == r.calibrations["VA"]
    assert resumed.from_capture(0, later, store=False).value == pytest.approx(127.0, rel=1e-9)
    row = resumed.readings_frame()
    cal_row = row[row["step_id"] == "calibrate-va"].iloc[0]
    assert cal_row["predicted"] == 120.0
    # a session without the calibration reads the raw 2 % error
    bench, template = loaded
    plain = SessionRunner.create(MemoryArchive(), bench, template, section="S1", group="G1", people=["p01"],
                                 actor=STUDENT, n_samples=SAMPLES)
    plain.open()
    _to_outage(plain)
    assert plain.from_capture(0, later, store=False).value == pytest.approx(math.hypot(1.02 * 127.0, 0.3), rel=1e-9)


def test_a_correction_of_the_calibration_reading_is_still_judged_against_the_reference(loaded):
    r = _at_calibration(loaded)
    row = r.calibrate(r.current, _capture([_sine(120.1)], ["voltage"], ["B1"]), "120.00 V")
    resumed = SessionRunner.resume(r.archive, r.session_id, STUDENT)
    fixed = resumed.parse(0, "120.05 V")
    again = resumed.correct(row["reading_id"], fixed, reason="typed the sensor's display")
    assert again["predicted"] == 120.0
    assert again["band_high"] == pytest.approx(120.22)
    assert again["verdict"] == "accept"


def test_simulated_bench_finds_the_seeded_gain_error_and_corrects_later_readings(loaded):
    r = _at_calibration(loaded)
    error = seeded_gain_error(r.seed, "VA")
    assert 0.006 <= abs(error) <= 0.015  # invented demo data: a sensor that needs calibrating
    parsed = r.simulate(0)
    assert parsed.calibration is not None
    assert parsed.calibration.seq < 0
    row = r.record(parsed)
    cal = r.calibrations["VA"]
    assert cal.seq >= 0
    assert row["obtained"] == "simulated"
    # found within the reference meter's accuracy: gain x (1 + error) is 1 to within the gain's uncertainty
    assert abs(cal.gain * (1.0 + error) - 1.0) <= cal.gain_uncertainty
    assert row["band_low"] < cal.reference_value < row["band_high"]
    _to_outage(r)
    predicted = r.view().expected[0].predicted
    corrected = r.simulate(0)
    assert abs(corrected.value / predicted - 1.0) <= cal.gain_uncertainty + 1e-3  # 1e-3: 50 dB noise, common practice
    # the same bench without the calibration carries the sensor's error
    bench, template = loaded
    plain = SessionRunner.create(MemoryArchive(), bench, template, section="S1", group="G1", people=["p01"],
                                 actor=STUDENT, n_samples=SAMPLES)
    plain.open()
    plain.set_as_found("118.0 V", "60.00 Hz")
    plain.forward()
    plain.skip("no reference meter today")
    _to_outage(plain)
    raw = plain.simulate(0)
    assert raw.value / plain.view().expected[0].predicted - 1.0 == pytest.approx(error, abs=1e-3)


def test_sensor_calibration_survives_its_event_detail():
    cal = SensorCalibration("VA", "voltage", "v_rms", "V", 1, 0, "v@B1", "B1", 120.0, "120 V", 121.0, "m", 0.001,
                            0.0, math.nan, 0.12, 0.99, 0.01, 1e-5, 0.001, notes=("a",))
    back = SensorCalibration.from_detail(json.loads(json.dumps(cal.detail())), seq=7)
    assert math.isnan(back.meter_range)
    assert back.gain == cal.gain
    assert back.notes == ("a",)
    assert back.seq == 7
    with pytest.raises(CalibrationError, match="not a sensor calibration"):
        SensorCalibration.from_detail({"sensor": "VA"})
