"""Unit checks of labkit.session.diagnosis on the demo bench: each mistake's evidence, ties, bad input.

Outside references: the crest factor of a sine is sqrt 2 and its form factor (RMS / mean |x|) is
pi / (2 sqrt 2) = 1.1107 (textbook); the distorted waveform's factors are computed here with numpy
from the solved harmonic phasors, independently of the module.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from labkit.core.bench import Bench
from labkit.core.errors import ModelInputError, UnknownNameError
from labkit.core.predict import StepPrediction, predict_template
from labkit.core.results import end_current_phasors
from labkit.files.loader import load_template
from labkit.session.diagnosis import AVERAGE_METER_GAIN, CODES, NONE, Reading, diagnose
from tests.conftest import DEMO


@pytest.fixture(scope="module")
def lab1(demo_bench: Bench) -> list[StepPrediction]:
    template = load_template(DEMO / "lab1-line-and-loads.toml", demo_bench).template
    return predict_template(demo_bench, template, n_samples=300)


@pytest.fixture(scope="module")
def lab3(demo_bench: Bench) -> list[StepPrediction]:
    template = load_template(DEMO / "lab3-harmonics.toml", demo_bench).template
    return predict_template(demo_bench, template, n_samples=300)


def _step(steps: list[StepPrediction], step_id: str) -> StepPrediction:
    return next(s for s in steps if s.step_id == step_id)


def _resistive(lab1: list[StepPrediction], **changes: float) -> tuple[StepPrediction, list[Reading]]:
    """The resistive-load step of lab 1 read correctly, with some readings replaced."""
    sp = _step(lab1, "resistive-load")
    pred = sp.prediction
    values = {"v_rms": pred.reading("B2", "v_rms")[0], "i_rms": pred.reading("L12@B1", "i_rms")[0],
              "p": pred.reading("L12@B1", "p")[0]}
    values.update(changes)
    return sp, [Reading("B2", "v_rms", values["v_rms"]), Reading("L12@B1", "i_rms", values["i_rms"]),
                Reading("L12@B1", "p", values["p"], tolerance=0.03 * abs(values["p"]))]


def test_sine_constants_are_the_textbook_ones() -> None:
    # textbook: a sine's form factor RMS / mean|x| = pi / (2 sqrt 2) = 1.1107 (computed here from samples)
    t = np.arange(4096) / 4096
    x = np.sqrt(2) * np.cos(2 * np.pi * t)
    assert pytest.approx(np.sqrt(np.mean(x**2)) / np.mean(np.abs(x)), rel=1e-6) == AVERAGE_METER_GAIN
    assert pytest.approx(1.1107, abs=1e-4) == AVERAGE_METER_GAIN


def test_correct_readings_get_no_diagnosis(demo_bench: Bench, lab1: list[StepPrediction]) -> None:
    sp, readings = _resistive(lab1)
    result = diagnose(demo_bench, sp.state, sp.prediction, readings)
    assert len(result) == len(readings) + 1
    assert all(d.code == NONE and d.text == "" for d in result)


def test_peak_read_as_rms_on_a_sine(demo_bench: Bench, lab1: list[StepPrediction]) -> None:
    sp, readings = _resistive(lab1)
    v = sp.prediction.reading("B2", "v_rms")[0]
    readings[0] = Reading("B2", "v_rms", round(v * math.sqrt(2), 1))  # textbook crest factor of a sine
    d = diagnose(demo_bench, sp.state, sp.prediction, readings)[0]
    assert d.code == "peak_as_rms"
    assert "1.414" in d.text
    assert "peak value was read as RMS" in d.text
    assert d.score > 0.9


def test_peak_read_as_rms_uses_the_predicted_crest_factor(demo_bench: Bench, lab3: list[StepPrediction]) -> None:
    sp = _step(lab3, "nonlinear-on")
    pred = sp.prediction
    # the NL current's waveform rebuilt here from the solved phasors (numpy, 8192 points per period)
    x = end_current_phasors(pred.solution, warn=False)[("NL", "B3")][0]
    t = np.arange(8192) / 8192
    wave = np.sqrt(2) * np.real(x[:, None] * np.exp(2j * np.pi * np.asarray(pred.solution.orders)[:, None] * t)).sum(0)
    crest = np.max(np.abs(wave)) / np.sqrt(np.mean(wave**2))
    assert abs(crest - math.sqrt(2)) > 0.2  # distorted: a sqrt 2 rule would miss it
    i = pred.reading("NL@B3", "i_rms")[0]
    readings = [Reading("NL@B3", "i_rms", i * crest, tolerance=0.02 * i)]
    d = diagnose(demo_bench, sp.state, pred, readings, budget_s=0.5)[0]
    assert d.code == "peak_as_rms"
    assert f"{crest:.3f}"[:4] in d.text


def test_reversed_sensor_against_its_arrow(demo_bench: Bench, lab1: list[StepPrediction]) -> None:
    sp, readings = _resistive(lab1)
    readings[2] = Reading("L12@B1", "p", -readings[2].measured, tolerance=readings[2].tolerance)
    d = diagnose(demo_bench, sp.state, sp.prediction, readings)[2]
    assert d.code == "reversed_current_sensor"
    assert "opposite sign" in d.text
    assert "B1 -> L12" in d.text


def test_real_reverse_flow_in_the_sensor_direction_is_not_a_reversed_sensor(
        demo_bench: Bench, lab1: list[StepPrediction]) -> None:
    # at L12@B2 the sensor points from L12 to B2: the power arrives positive in its direction
    sp = _step(lab1, "line-losses")
    pred = sp.prediction
    p1, p2 = pred.reading("L12@B1", "p")[0], pred.reading("L12@B2", "p")[0]
    assert p2 > 0  # the prediction is already in the sensor's direction
    readings = [Reading("L12@B1", "p", p1, tolerance=0.03 * p1), Reading("L12@B2", "p", p2, tolerance=0.03 * p2)]
    assert all(d.code == NONE for d in diagnose(demo_bench, sp.state, pred, readings))
    readings[1] = Reading("L12@B2", "p", -p2, tolerance=0.03 * p2)
    assert diagnose(demo_bench, sp.state, pred, readings)[1].code == "reversed_current_sensor"


@pytest.mark.parametrize(("k", "factor", "code"), [(1, 10.0, "probe_x10"), (1, 0.1, "probe_x10"),
                                                   (1, 1000.0, "unit_prefix_x1000"), (2, 1e-3, "unit_prefix_x1000")])
def test_scale_slips(demo_bench: Bench, lab1: list[StepPrediction], k: int, factor: float, code: str) -> None:
    sp, readings = _resistive(lab1)
    r = readings[k]
    readings[k] = Reading(r.location, r.quantity, r.measured * factor, tolerance=r.tolerance)
    d = diagnose(demo_bench, sp.state, sp.prediction, readings)[k]
    assert d.code == code, d.text


def test_a_thousandth_of_a_current_is_a_prefix_slip_not_dc_mode(demo_bench: Bench,
                                                                 lab1: list[StepPrediction]) -> None:
    # 0.53 mA entered for 0.53 A is near zero, as a DC-mode reading is, but its digits are the
    # prediction's: only the slip foretold them (likelihood density, common practice of Bayesian scoring)
    sp, readings = _resistive(lab1)
    readings[1] = Reading("L12@B1", "i_rms", readings[1].measured * 1e-3)
    d = diagnose(demo_bench, sp.state, sp.prediction, readings)[1]
    assert d.codes == ("unit_prefix_x1000",)
    assert "dc_mode_on_ac" in [h.code for h in d.hypotheses]  # still listed, lower


def test_zero_on_a_live_line_is_dc_mode_not_a_slip(demo_bench: Bench, lab1: list[StepPrediction]) -> None:
    sp, readings = _resistive(lab1)
    readings[1] = Reading("L12@B1", "i_rms", 0.0)
    d = diagnose(demo_bench, sp.state, sp.prediction, readings)[1]
    assert "dc_mode_on_ac" in d.codes
    assert "unit_prefix_x1000" not in d.codes


def test_channels_swapped_through_the_sensor_scales(demo_bench: Bench, lab1: list[StepPrediction]) -> None:
    sp, readings = _resistive(lab1)
    i = readings[1].measured
    readings[0] = Reading("B2", "v_rms", i * 0.5 / 0.01)  # IA 0.5 V/A shown through VA's 0.01 V/V
    d = diagnose(demo_bench, sp.state, sp.prediction, readings)[0]
    assert d.code == "channels_swapped"
    assert "50 V per A" in d.text


def test_switch_mismatch_names_the_item(demo_bench: Bench, lab1: list[StepPrediction]) -> None:
    sp = _step(lab1, "resistive-load")
    wrong = sp.state.with_changes(loads={"RB": 1})  # the student left the bank on step 1
    from labkit.core.predict import predict_state

    actual = predict_state(demo_bench, wrong, n_samples=0)
    readings = [Reading("B2", "v_rms", actual.reading("B2", "v_rms")[0]),
                Reading("L12@B1", "i_rms", actual.reading("L12@B1", "i_rms")[0]),
                Reading("L12@B1", "p", actual.reading("L12@B1", "p")[0], tolerance=1.8)]
    step = diagnose(demo_bench, sp.state, sp.prediction, readings)[-1]
    assert step.code == "switch_mismatch"
    assert "load RB at step 1" in step.text


def test_dc_mode_ties_with_a_dead_placement(demo_bench: Bench, lab1: list[StepPrediction]) -> None:
    # B3 is dead in lab 1: a sensor there reads 0 V just as a meter in DC mode does; both are reported
    sp, readings = _resistive(lab1)
    readings[0] = Reading("B2", "v_rms", 0.1)
    d = diagnose(demo_bench, sp.state, sp.prediction, readings)[0]
    assert set(d.codes) >= {"dc_mode_on_ac", "wrong_location"}
    assert len(d.tied) >= 2
    assert "equally well" in d.text


def test_codes_are_the_documented_ones() -> None:
    assert len(set(CODES)) == len(CODES) == 10


def test_bad_input_is_refused(demo_bench: Bench, lab1: list[StepPrediction]) -> None:
    sp = _step(lab1, "resistive-load")
    with pytest.raises(ModelInputError, match="form"):
        Reading("B2", "v_rms", 1.0, form="crest")
    with pytest.raises(ModelInputError, match="only v_rms and i_rms"):
        Reading("L12@B1", "p", 1.0, form="peak")
    with pytest.raises(ModelInputError, match="must be a number"):
        Reading("B2", "v_rms", math.nan)
    with pytest.raises(UnknownNameError, match="unknown quantity"):
        Reading("B2", "v_rsm", 1.0)
    with pytest.raises(ModelInputError, match="no prediction of v_rms at B9"):
        diagnose(demo_bench, sp.state, sp.prediction, [Reading("B9", "v_rms", 1.0)])
    with pytest.raises(UnknownNameError, match="no sensor"):
        diagnose(demo_bench, sp.state, sp.prediction, [Reading("B2", "v_rms", 1.0, sensor="VZ")])
    with pytest.raises(ModelInputError, match="at least one reading"):
        diagnose(demo_bench, sp.state, sp.prediction, [])
