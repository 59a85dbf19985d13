"""Why is a reading outside its band? Test the common measurement mistakes and say which fits, with the evidence.

The call
    ``diagnose(bench, state, prediction, readings, *, budget_s=1.0) -> list[Diagnosis]``

    ``bench``       the :class:`~labkit.core.bench.Bench` (with the cart applied) the step ran on;
    ``state``       the step's intended :class:`~labkit.core.state.BenchState`;
    ``prediction``  the step's :class:`~labkit.core.predict.Prediction` (of ``state``);
    ``readings``    every reading of the step, as :class:`Reading` (several together: a mistake
                    such as a reversed sensor or a wrong switch shows in all of them);
    ``budget_s``    time allowed for the switch-space search (seconds).

    :class:`Reading` fields: ``location`` and ``quantity`` (registered name), ``measured`` (the
    logbook's ``measured`` column: the value in the quantity's registry unit, converted to RMS
    from the entered form with the prediction's own crest and form factors, as
    :mod:`labkit.session.readings` does), ``form`` as entered (rms, peak, peak_to_peak,
    average), ``sensor`` (bench sensor id or None: the sensor placed at the location is assumed),
    ``meter_range`` (registry unit, None if unknown) and ``tolerance`` (the verdict rule's
    tolerance in the registry unit; None: the sensor's instrument accuracy).

The result
    One :class:`Diagnosis` per reading, in input order, then one for the step as a whole
    (``reading=None``). Fields:

    ``reading``     index into ``readings`` (None for the step entry);
    ``location``, ``quantity``  of the reading ("" for the step entry);
    ``code``        what to store in the logbook's ``diagnosis_code``: ``none`` (inside its band or
                    indistinguishable from a correct reading), ``unexplained`` (outside, and no
                    common mistake fits), one of :data:`CODES`, or equally fitting codes joined
                    with ``,`` (a tie: the readings cannot tell them apart);
    ``text``        what to store in ``diagnosis``: the evidence in plain words ("" for ``none``);
    ``score``       likelihood of the top hypothesis among those tested (0..1; summed over a tie);
    ``tied``        the top hypotheses (more than one for a tie);
    ``hypotheses``  every hypothesis tested for this reading, best first (:class:`Hypothesis`:
                    ``code``, ``score``, ``expected`` value of the reading under it, ``detail``,
                    ``evidence``).

Scoring
    Each hypothesis predicts every reading of the step it touches as an interval: the
    prediction's band mapped through the mistake (x crest factor, x -1, x 1000, the band at
    another placement or in another switch configuration, ...). A reading's misfit is its
    distance outside that interval over ``sigma = sqrt((g tol / 2)^2 + floor^2)`` (``g`` the
    mistake's gain, ``floor`` the instrument's offset and last digits), capped so that one
    unrelated wrong reading cannot dominate. Likelihood = prior x exp(-sum misfit^2 / 2) / spread,
    the spread (interval width + sqrt(2 pi) sigma, relative to the prediction's own, its log
    capped at +-3) favouring the hypothesis that foretold the reading more sharply; normalized
    over the hypotheses of the reading. Hypotheses whose predicted readings lie within
    one sigma of the best one's (over all readings of the step) are reported as a tie.
    Priors are common practice (a correct reading is the likeliest; every mistake class is
    equally likely, its prior split over its variants, e.g. the placements of a sensor or the
    switch configurations searched).
"""

from __future__ import annotations

import math
import time
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from labkit.core.bench import Bench, CurrentSensor, VoltageSensor
from labkit.core.conventions import wrap_deg
from labkit.core.errors import LabkitError, ModelInputError
from labkit.core.network import NetworkError
from labkit.core.predict import Prediction, predict_state
from labkit.core.quantities import quantity
from labkit.core.results import _SIGNED, _TURNED, oriented, quantity_arrays, sensor_direction
from labkit.core.solve import solve_network
from labkit.core.state import BenchState
from labkit.core.switchspace import neighbours, search

CODES = ("peak_as_rms", "peak_to_peak_as_rms", "reversed_current_sensor", "probe_x10", "unit_prefix_x1000",
         "channels_swapped", "dc_mode_on_ac", "average_meter_distortion", "wrong_location", "switch_mismatch")
NONE, UNEXPLAINED = "none", "unexplained"
FORMS = ("rms", "peak", "peak_to_peak", "average")

AVERAGE_METER_GAIN = math.pi / (2.0 * math.sqrt(2.0))
"""An average-responding meter shows this x mean |x| (the form factor of a sine, textbook: 1.1107)."""

FORM_QUANTITIES = {"v_rms": "v", "i_rms": "i"}
PROBE_QUANTITIES = frozenset({"v_rms", "i_rms", "v1_rms", "i1_rms", "p", "p1", "q1", "s"})
PREFIX_KINDS = frozenset({"voltage", "current", "active_power", "reactive_power", "apparent_power", "frequency",
                          "time"})
SWAP_QUANTITIES = frozenset({"v_rms", "i_rms", "q1", "phase"})

CAP_Z = 6.0  # a reading's misfit counts at most CAP_Z sigma (one unrelated wrong reading cannot dominate)
UNEXPLAINED_Z = 4.0  # "something else is wrong with this reading" costs as much as a 4-sigma misfit
TIE_SEPARATION = 1.0  # hypotheses predicting the step's readings within 1 sigma of each other are a tie
TIE_COST = 1.0  # ... and fitting them about as well
PRIOR = {NONE: 5.0, UNEXPLAINED: 0.5}  # common practice; every mistake class has prior 1
SWITCH_SHARE = {1: 0.7, 2: 0.3}  # the switch class's prior, split over one- and two-item changes
MAX_SWITCH_CANDIDATES = 5  # best search candidates re-predicted with harmonics and scored
MAX_SHARPNESS = math.log(20.0)  # a hypothesis 20 x sharper than the prediction gains at most e^3
SQRT_2PI = math.sqrt(2 * math.pi)
MAX_RELATIVE_TOLERANCE = 0.3  # of the prediction: a wider tolerance says nothing about which mistake it was


@dataclass(frozen=True)
class Reading:
    """One reading of the step as the student entered it (see the module docstring)."""

    location: str
    quantity: str
    measured: float
    form: str = "rms"
    sensor: str | None = None
    meter_range: float | None = None
    tolerance: float | None = None

    def __post_init__(self) -> None:
        quantity(self.quantity)  # raises UnknownNameError with a did-you-mean hint
        if self.form not in FORMS:
            msg = f'reading of {self.quantity} at {self.location}: form "{self.form}", expected one of {FORMS}'
            raise ModelInputError(msg)
        if self.form != "rms" and self.quantity not in FORM_QUANTITIES:
            msg = f"reading of {self.quantity} at {self.location}: only v_rms and i_rms have a form, found {self.form}"
            raise ModelInputError(msg)
        if not math.isfinite(self.measured):
            msg = (f"reading of {self.quantity} at {self.location}: the measured value must be a number, "
                   f"found {self.measured}")
            raise ModelInputError(msg)
        for name in ("meter_range", "tolerance"):
            value = getattr(self, name)
            if value is not None and not (math.isfinite(value) and value >= 0):
                msg = f"reading of {self.quantity} at {self.location}: {name} must be >= 0, found {value}"
                raise ModelInputError(msg)


@dataclass(frozen=True)
class Hypothesis:
    """One tested explanation of a reading: its code, likelihood, the value it predicts, and why."""

    code: str
    score: float
    expected: float
    evidence: str
    detail: str = ""


@dataclass(frozen=True)
class Diagnosis:
    """The diagnosis of one reading (or of the step as a whole, ``reading=None``)."""

    reading: int | None
    location: str
    quantity: str
    code: str
    text: str
    score: float
    tied: tuple[Hypothesis, ...] = ()
    hypotheses: tuple[Hypothesis, ...] = ()

    @property
    def codes(self) -> tuple[str, ...]:
        """The top code(s): several for a tie."""
        return tuple(self.code.split(","))


# -- per-reading facts ------------------------------------------------------------------------------
@dataclass
class _Row:
    reading: Reading
    nominal: float
    low: float
    high: float
    sigma: float  # the reading-proportional half of the tolerance (at least a share of the band or value)
    floor: float  # half the absolute part: instrument offset and last digits
    angle: bool
    sensor: VoltageSensor | CurrentSensor | None
    unit: str
    tolerance: float  # the verdict's tolerance, registry unit
    crest: float = math.sqrt(2.0)
    form_factor: float = AVERAGE_METER_GAIN  # RMS / mean |x|
    thd: float = 0.0


@dataclass
class _Expl:
    """A hypothesis before scoring: the interval it predicts for each reading it touches."""

    code: str
    prior: float
    expect: dict[int, tuple[float, ...]]  # reading -> (nominal, low, high, gain[, floor gain])
    evidence: dict[int, str]  # reading -> plain words
    detail: str = ""
    key: tuple = field(default=())


def _resolve_sensor(bench: Bench, r: Reading) -> VoltageSensor | CurrentSensor | None:
    if r.sensor:
        return bench.sensor(r.sensor)
    kind = "current" if "@" in r.location else "voltage"
    for s in bench.sensors:
        if s.kind == kind and any(p.location == r.location for p in s.placements):
            return s
    return None


def _spectrum(prediction: Prediction, location: str, signal: str, sensor_id: str | None) -> tuple[list, np.ndarray]:
    from labkit.session.readings import location_spectrum

    return location_spectrum(prediction, location, signal, sensor_id)


def _shape(prediction: Prediction, location: str, quantity_name: str,
           sensor_id: str | None) -> tuple[float, float, float]:
    """(crest factor, form factor RMS / mean |x|, THD) of the predicted signal a v_rms / i_rms reading sees."""
    from labkit.session.readings import ReadingError, wave_shape_from_phasors

    orders, x = _spectrum(prediction, location, FORM_QUANTITIES[quantity_name], sensor_id)
    try:
        shape = wave_shape_from_phasors(orders, x)
    except ReadingError:  # a zero signal: no shape, the sine's is as good as any
        return math.sqrt(2.0), AVERAGE_METER_GAIN, 0.0
    mags = np.abs(x)
    thd = float(np.sqrt(np.sum(mags[1:] ** 2)) / mags[0]) if mags[0] > 0 else 0.0
    return shape.crest, shape.form_factor, thd


def _row(bench: Bench, prediction: Prediction, r: Reading) -> _Row:
    try:
        nominal, low, high = prediction.reading(r.location, r.quantity, r.sensor)
    except KeyError as exc:
        msg = f"no prediction of {r.quantity} at {r.location} to diagnose the reading against"
        raise ModelInputError(msg) from exc
    q = quantity(r.quantity)
    sensor = _resolve_sensor(bench, r)
    floor = 0.0  # the absolute part of the instrument's error: offset (class x range) and last digits
    tol = r.tolerance
    if sensor is not None and q.kind == sensor.kind:
        full_scale = r.meter_range if r.meter_range is not None else sensor.range
        acc = sensor.accuracy
        floor = acc.full_scale * full_scale + acc.digits * acc.resolution
        if tol is None:  # at the predicted value: a mistaken reading must not widen its own noise
            tol = acc.reading * abs(nominal) + floor
    tol = 0.0 if tol is None else tol
    if r.tolerance is not None:
        floor = min(floor, tol)  # the stated tolerance is the authority on the instrument used
    relative = tol - floor  # the part that grows with the reading
    if nominal and math.isfinite(nominal):
        # an instrument tolerance taken at a far-off reading (x1000) would hide the mistake: cap it
        relative = min(relative, MAX_RELATIVE_TOLERANCE * abs(nominal))
    angle = q.kind == "angle"
    half = 0.5 * (high - low)
    sigma = max(0.5 * relative, 0.5 * half, 1e-3 * abs(nominal), 0.05 if angle else 1e-9)
    row = _Row(r, nominal, low, high, sigma, max(0.5 * floor, 1e-3 * sigma), angle, sensor, q.unit, tol)
    if r.quantity in FORM_QUANTITIES:
        row.crest, row.form_factor, row.thd = _shape(prediction, r.location, r.quantity, r.sensor)
    return row


# -- misfits ------------------------------------------------------------------------------------------
def _distance(row: _Row, m: float, lo: float, hi: float) -> float:
    if row.angle:
        centre, half = 0.5 * (lo + hi), 0.5 * (hi - lo)
        return max(abs(float(wrap_deg(m - centre))) - half, 0.0)
    return max(lo - m, m - hi, 0.0)


def _sigma(row: _Row, interval: tuple[float, ...]) -> float:
    """The reading's noise under a hypothesis: the tolerance scales with its gain, the floor with its floor gain."""
    if row.angle:
        return row.sigma
    gain = abs(interval[3])
    floor_gain = abs(interval[4]) if len(interval) > 4 else 1.0
    return math.hypot(gain * row.sigma, floor_gain * row.floor)


def _z(row: _Row, m: float, interval: tuple[float, ...]) -> float:
    lo, hi = interval[1], interval[2]
    if not (math.isfinite(lo) and math.isfinite(hi)):
        return CAP_Z
    sigma = _sigma(row, interval)
    return min(_distance(row, m, lo, hi) / max(sigma, 1e-300), CAP_Z)


def _none_interval(row: _Row) -> tuple[float, ...]:
    return (row.nominal, row.low, row.high, 1.0, 1.0)


def _scaled(row: _Row, gain: float, floor_gain: float = 1.0) -> tuple[float, ...]:
    """The band through a mistake that scales the measured value; ``floor_gain`` scales the last digits too.

    A probe setting or a peak reading scales the signal, the instrument's offset and digits stay;
    a unit-prefix slip scales the digits as read.
    """
    lo, hi = sorted((gain * row.low, gain * row.high))
    return (gain * row.nominal, lo, hi, gain, floor_gain)


# -- formatting -----------------------------------------------------------------------------------------
def _fmt(value: float, unit: str) -> str:
    if not math.isfinite(value):
        return "no value"
    text = f"{value:.4g}"
    return text if unit == "1" else f"{text} {unit}" if unit != "%" else f"{text} %"


def _measured_words(row: _Row) -> str:
    return f"measured {_fmt(row.reading.measured, row.unit)}"


def _ratio(row: _Row) -> str:
    return f"{row.reading.measured / row.nominal:.3g}" if row.nominal else "inf"


# -- hypotheses of one reading ----------------------------------------------------------------------------
def _form_hypotheses(k: int, row: _Row) -> list[_Expl]:
    r = row.reading
    if r.quantity not in FORM_QUANTITIES:
        return []
    out = [_Expl("dc_mode_on_ac", 1.0, {k: (0.0, 0.0, 0.0, 0.0)}, {k: (
        f"{_measured_words(row)} where {_fmt(row.nominal, row.unit)} AC is predicted: a meter or scope channel in DC "
        "mode shows the mean of an AC waveform, which is about zero; switch it to AC (or AC+DC true RMS)")})]
    if r.form != "rms":
        return out
    pred = _fmt(row.nominal, row.unit)
    sine = abs(row.crest - math.sqrt(2.0)) < 0.02
    shape = ("1.414 for a sine" if sine
             else f"the predicted waveform's, with THD {100 * row.thd:.0f} %; a sine has 1.414")
    out.append(_Expl("peak_as_rms", 1.0, {k: _scaled(row, row.crest)}, {k: (
        f"{_measured_words(row)} is {_ratio(row)} x the predicted {pred} RMS, and the crest factor (peak / RMS) is "
        f"{row.crest:.3f} ({shape}): a peak value was read as RMS")}))
    out.append(_Expl("peak_to_peak_as_rms", 1.0, {k: _scaled(row, 2 * row.crest)}, {k: (
        f"{_measured_words(row)} is {_ratio(row)} x the predicted {pred} RMS, and peak-to-peak / RMS is "
        f"{2 * row.crest:.3f} (2 x the crest factor; 2.828 for a sine): a peak-to-peak value was read as RMS")}))
    gain = AVERAGE_METER_GAIN / row.form_factor
    if abs(gain - 1.0) > 1e-3:  # on a sine an average-responding meter is right: nothing to tell apart
        out.append(_Expl("average_meter_distortion", 1.0, {k: _scaled(row, gain)}, {k: (
            f"{_measured_words(row)} is {_ratio(row)} x the predicted true RMS {pred}; an average-responding meter "
            f"shows 1.1107 x the rectified mean (pi / (2 sqrt 2), right only for a sine), which on this distorted "
            f"waveform (THD {100 * row.thd:.0f} %) is {gain:.3f} x the true RMS: use a true-RMS meter")}))
    return out


def _scale_hypotheses(k: int, row: _Row) -> list[_Expl]:
    r = row.reading
    q = quantity(r.quantity)
    out = []
    pred = _fmt(row.nominal, row.unit)
    if r.quantity in PROBE_QUANTITIES:
        for gain, words in ((10.0, "10 x"), (0.1, "1/10 of")):
            out.append(_Expl("probe_x10", 0.5, {k: _scaled(row, gain)}, {k: (
                f"{_measured_words(row)} is {words} the predicted {pred}: the scope's probe attenuation setting "
                f"(x1 / x10) does not match the probe"
                + (" (or the current probe's mV/A setting)" if r.quantity.startswith("i") else ""))},
                "x10" if gain > 1 else "/10"))
    if q.kind in PREFIX_KINDS:
        slips = ((1000.0, "1000 x", f"m{row.unit} entered as {row.unit}"),
                 (1e-3, "1/1000 of", f"k{row.unit} entered as {row.unit}, or {row.unit} as m{row.unit}"))
        for gain, words, how in slips:
            out.append(_Expl("unit_prefix_x1000", 0.5, {k: _scaled(row, gain, gain)}, {k: (
                f"{_measured_words(row)} is {words} the predicted {pred}: a unit-prefix slip ({how})")},
                "x1000" if gain > 1 else "/1000"))
    return out


def _sensor_hypotheses(bench: Bench, prediction: Prediction, rows: list[_Row]) -> list[_Expl]:
    """Reversed current sensors and sensors at another placement: they move every reading the sensor takes."""
    out: list[_Expl] = []
    groups: dict[tuple[str, str], list[int]] = {}
    for k, row in enumerate(rows):
        if row.sensor is not None:
            groups.setdefault((row.sensor.id, row.reading.location), []).append(k)
    for (sensor_id, location), members in groups.items():
        sensor = bench.sensor(sensor_id)
        # reversed against its arrow
        flipped = [k for k in members if rows[k].reading.quantity in _SIGNED | _TURNED]
        if isinstance(sensor, CurrentSensor) and flipped:
            expect, words = {}, {}
            place = next(p for p in sensor.placements if p.location == location)
            for k in flipped:
                row = rows[k]
                if row.angle:
                    expect[k] = (row.nominal + 180.0, row.low + 180.0, row.high + 180.0, 1.0)
                    words[k] = (f"{_measured_words(row)} differs by about 180 deg from the predicted "
                                f"{_fmt(row.nominal, row.unit)}")
                else:
                    expect[k] = _scaled(row, -1.0)
                    words[k] = (f"{_measured_words(row)} has the predicted size ({_fmt(abs(row.nominal), row.unit)}) "
                                f"but the opposite sign")
            for k in members:
                if k not in expect and rows[k].reading.quantity in ("i_rms", "i1_rms", "s"):
                    expect[k] = _none_interval(rows[k])
            tail = (f"; the prediction is already in {sensor_id}'s arrow direction ({place.from_} -> {place.to}), so "
                    f"it is not real reverse power flow: the current sensor is clamped the wrong way round")
            out.append(_Expl("reversed_current_sensor", 1.0, expect, {k: w + tail for k, w in words.items()},
                             f"{sensor_id} at {location}", ("rev", sensor_id, location)))
        # at another placement
        others = [p.location for p in sensor.placements if p.location != location]
        alternatives = []
        for other in others:
            expect, words = {}, {}
            for k in members:
                row = rows[k]
                try:
                    nom, lo, hi = prediction.reading(other, row.reading.quantity, sensor_id)
                except KeyError:
                    nom = lo = hi = 0.0 if quantity(row.reading.quantity).kind in PREFIX_KINDS else math.nan
                gain = abs(nom / row.nominal) if row.nominal and math.isfinite(nom) else 1.0
                expect[k] = (nom, lo, hi, gain)
                words[k] = (f"{_measured_words(row)} matches the prediction at {other} ({_fmt(nom, row.unit)}) "
                            f"rather than at {location} ({_fmt(row.nominal, row.unit)}): {sensor_id} is probably "
                            f"placed at {other}")
            alternatives.append((other, expect, words))
        for other, expect, words in alternatives:
            out.append(_Expl("wrong_location", 1.0 / len(alternatives), expect, words, f"{sensor_id} at {other}",
                             ("loc", sensor_id, location, other)))
    return out


def _bus_of(location: str) -> str:
    return location.partition("@")[2] if "@" in location else location


def _swap_hypotheses(bench: Bench, prediction: Prediction, rows: list[_Row]) -> list[_Expl]:
    """Voltage and current channels interchanged (through the two sensors' scales)."""
    volt = [k for k, r in enumerate(rows) if r.reading.quantity == "v_rms" and "@" not in r.reading.location]
    curr_locs = sorted({r.reading.location for r in rows if "@" in r.reading.location
                        and r.reading.quantity in SWAP_QUANTITIES})
    if not curr_locs and volt:  # no current read in this step: the current channel is wherever a sensor sits
        curr_locs = sorted({p.location for s in bench.sensors if s.kind == "current" for p in s.placements})
    pairs = set()
    for lc in curr_locs:
        pairs.add((_bus_of(lc), lc))
        pairs |= {(rows[k].reading.location, lc) for k in volt}
    out = []
    for lv, lc in sorted(pairs):
        v_sensor = next((s for s in bench.sensors if s.kind == "voltage"
                         and any(p.location == lv for p in s.placements)), None)
        i_sensor = next((s for s in bench.sensors if s.kind == "current"
                         and any(p.location == lc for p in s.placements)), None)
        if v_sensor is None or i_sensor is None:
            continue
        ratio = i_sensor.scale / v_sensor.scale  # volts shown per ampere when the current channel is read as voltage
        expect, words = {}, {}
        for k, row in enumerate(rows):
            loc, qn = row.reading.location, row.reading.quantity
            try:
                if qn == "v_rms" and loc == lv:
                    nom, lo, hi = prediction.reading(lc, "i_rms", i_sensor.id)
                    expect[k] = (ratio * nom, ratio * lo, ratio * hi, ratio * nom / row.nominal if row.nominal else 1)
                    words[k] = (f"{_measured_words(row)} matches the current at {lc} ({_fmt(nom, 'A')}) through the "
                                f"sensor scales ({i_sensor.scale:g} V/A over {v_sensor.scale:g} V/V = {ratio:g} V per "
                                f"A): the voltage and current channels are swapped")
                elif qn == "i_rms" and loc == lc:
                    nom, lo, hi = prediction.reading(lv, "v_rms")
                    expect[k] = (nom / ratio, lo / ratio, hi / ratio, nom / ratio / row.nominal if row.nominal else 1)
                    words[k] = (f"{_measured_words(row)} matches the voltage at {lv} ({_fmt(nom, 'V')}) through the "
                                f"sensor scales ({v_sensor.scale:g} V/V over {i_sensor.scale:g} V/A): the voltage "
                                f"and current channels are swapped")
                elif qn in ("q1", "phase") and loc == lc:
                    expect[k] = _scaled(rows[k], -1.0)
                    words[k] = (f"{_measured_words(row)} has the predicted size but the opposite sign, while P is "
                                f"unchanged: with the voltage and current channels interchanged Q and the phase "
                                f"angle change sign but P does not")
                elif qn in ("p", "pf", "s") and loc == lc:
                    expect[k] = _none_interval(row)
            except KeyError:
                continue
        if not words:
            continue
        # every reading through the two channels, or only one of them (read with the channels swapped)
        out.append(_Expl("channels_swapped", 0.5 / len(pairs), expect, words, f"{lv} and {lc}", ("swap", lv, lc)))
        if len(words) > 1:
            for k in words:
                out.append(_Expl("channels_swapped", 0.5 / len(pairs) / len(words), {k: expect[k]}, {k: words[k]},
                                 f"{lv} and {lc}", ("swap", lv, lc, k)))
    return out


# -- switch space ---------------------------------------------------------------------------------------
def _describe_changes(state: BenchState, changes: Sequence[tuple[str, str, object]]) -> str:
    parts = []
    for table, key, value in changes:
        if table == "switches":
            parts.append(f"switch {key} {'closed' if value else 'open'} (the step has it "
                         f"{'closed' if state.switch_closed(key) else 'open'})")
        elif table == "lines":
            parts.append(f"line {key} at \"{value}\" (the step has \"{state.line_position(key)}\")")
        else:
            parts.append(f"load {key} at step {value} (the step has {state.load_step(key)})")
    return " and ".join(parts)


def _search_readings(prediction: Prediction, rows: list[_Row]) -> dict[tuple[str, str], tuple[float, float]]:
    """The readings in the search's terms: passive direction, fundamental-only solution."""
    fund_labels, fund_values = quantity_arrays(solve_network(prediction.network, harmonics=False))
    fund = {(lab.location, lab.quantity): float(fund_values[0, j]) for j, lab in enumerate(fund_labels)}
    out = {}
    for row in rows:
        r = row.reading
        key = (r.location, r.quantity)
        if key not in fund:
            continue
        direction = sensor_direction(prediction.network.bench, r.location, r.sensor) if "@" in r.location else 1
        m = float(oriented(r.quantity, np.array([r.measured]), direction)[0])
        harm = prediction.value(r.location, r.quantity)
        if row.angle:
            m += fund[key] - harm
        elif harm and math.isfinite(harm):
            m *= fund[key] / harm  # carry the reading over to the fundamental-only solution the search uses
        out[key] = (m, row.sigma)
    return out


def _switch_hypotheses(bench: Bench, state: BenchState, prediction: Prediction, rows: list[_Row],
                       max_changes: int, budget_s: float) -> list[_Expl]:
    wanted = _search_readings(prediction, rows)
    if not wanted or budget_s <= 0:
        return []
    candidates = search(bench, state, wanted, max_changes=max_changes, budget_s=budget_s,
                        confirm=MAX_SWITCH_CANDIDATES + 1)
    counts = {n: 0 for n in range(1, max_changes + 1)}
    for changes, _ in neighbours(bench, state, max_changes):
        counts[len(changes)] += 1
    # readings the fundamental-only search cannot see (THD, a harmonic row) need every candidate re-predicted
    blind = any(_outside(row) and (row.reading.location, row.reading.quantity) not in wanted for row in rows)
    pool = [c for c in candidates if c.changes]
    if not blind:
        pool = pool[:MAX_SWITCH_CANDIDATES]
    start = time.perf_counter()
    out = []
    for cand in pool:
        if blind and time.perf_counter() - start > budget_s:
            break
        try:
            cp = predict_state(bench, cand.state, n_samples=0)
        except (NetworkError, LabkitError):
            continue
        expect, words = {}, {}
        what = _describe_changes(state, cand.changes)
        for k, row in enumerate(rows):
            r = row.reading
            try:
                nom = cp.reading(r.location, r.quantity, r.sensor)[0]
            except KeyError:  # not energized there
                nom = 0.0 if quantity(r.quantity).kind in PREFIX_KINDS else math.nan
            if row.angle:
                lo, hi = nom + row.low - row.nominal, nom + row.high - row.nominal
                gain = 1.0
            elif row.nominal and math.isfinite(nom):
                lo, hi = sorted((nom * row.low / row.nominal, nom * row.high / row.nominal))
                gain = abs(nom / row.nominal)
            else:
                lo = hi = nom
                gain = 1.0
            expect[k] = (nom, lo, hi, gain)
            words[k] = f"{_measured_words(row)} fits the prediction with {what} ({_fmt(nom, row.unit)})"
        n = len(cand.changes)
        prior = SWITCH_SHARE.get(n, 0.1) / max(counts.get(n, 1), 1)
        out.append(_Expl("switch_mismatch", prior, expect, words, what, ("sw", cand.changes)))
    return out


# -- scoring ------------------------------------------------------------------------------------------
def _spread(row: _Row, interval: tuple[float, ...]) -> float:
    """Width of the reading's likelihood under an interval: band width + sqrt(2 pi) sigma."""
    lo, hi = interval[1], interval[2]
    if not (math.isfinite(lo) and math.isfinite(hi)):
        return math.nan
    return (hi - lo) + SQRT_2PI * _sigma(row, interval)


def _costs(rows: list[_Row], expl: _Expl | None, *, sharpness: bool = True) -> np.ndarray:
    """-log likelihood of every reading under a hypothesis, relative to "as predicted" (None).

    Misfit^2 / 2, plus (``sharpness``) the log of how much narrower or wider the hypothesis
    spreads the reading than the prediction does (a likelihood density is 1 / spread at its
    peak), capped at ``MAX_SHARPNESS``: a reading of 0.1203 V where 120.3 V is predicted fits
    both a unit-prefix slip (0.1203 +- 0.0002) and a DC-mode meter (0 +- the meter's offset),
    but only the slip foretold those digits.
    """
    out = np.empty(len(rows))
    for k, row in enumerate(rows):
        interval = expl.expect.get(k) if expl is not None else None
        out[k] = 0.5 * _z(row, row.reading.measured, interval or _none_interval(row)) ** 2
        if sharpness and interval is not None:
            ratio = _spread(row, interval) / _spread(row, _none_interval(row))
            if math.isfinite(ratio) and ratio > 0:
                out[k] += float(np.clip(math.log(ratio), -MAX_SHARPNESS, MAX_SHARPNESS))
    return out


def _separation(rows: list[_Row], a: _Expl | None, b: _Expl | None) -> float:
    """How far apart two hypotheses put the step's readings, in sigma (interval to interval)."""
    total = 0.0
    keys = set(a.expect if a else {}) | set(b.expect if b else {})
    for k in keys:
        row = rows[k]
        ia = (a.expect.get(k) if a else None) or _none_interval(row)
        ib = (b.expect.get(k) if b else None) or _none_interval(row)
        if not all(math.isfinite(v) for v in (*ia[1:3], *ib[1:3])):
            if any(math.isfinite(v) for v in (*ia[1:3], *ib[1:3])):
                return math.inf
            continue
        if row.angle:
            gap = max(abs(float(wrap_deg(0.5 * (ia[1] + ia[2]) - 0.5 * (ib[1] + ib[2]))))
                      - 0.5 * (ia[2] - ia[1]) - 0.5 * (ib[2] - ib[1]), 0.0)
            sigma = row.sigma
        else:
            gap = max(ia[1] - ib[2], ib[1] - ia[2], 0.0)
            sigma = max(_sigma(row, ia), _sigma(row, ib))
        total += (gap / sigma) ** 2
    return math.sqrt(total)


@dataclass
class _Scored:
    expl: _Expl | None  # None: the reading is right ("none"); code UNEXPLAINED: nothing fits
    code: str
    log_score: float
    costs: np.ndarray


def _rank(rows: list[_Row], base: np.ndarray, expls: list[_Expl], focus: list[int]) -> list[_Scored]:
    scored = [_Scored(None, NONE, math.log(PRIOR[NONE]) - float(base.sum()), base)]
    for e in expls:
        c = _costs(rows, e)
        scored.append(_Scored(e, e.code, math.log(e.prior) - float(c.sum()), c))
    for k in focus:  # "something else is wrong with this reading"
        c = base.copy()
        c[k] = 0.5 * UNEXPLAINED_Z**2
        scored.append(_Scored(_Expl(UNEXPLAINED, PRIOR[UNEXPLAINED], {}, {}), UNEXPLAINED,
                              math.log(PRIOR[UNEXPLAINED]) - float(c.sum()), c))
    scored.sort(key=lambda s: -s.log_score)
    return scored


def _hypothesis(rows: list[_Row], s: _Scored, k: int | None, weight: float) -> Hypothesis:
    if s.code == NONE:
        return Hypothesis(NONE, weight, rows[k].nominal if k is not None else math.nan,
                          "the reading agrees with the prediction within its band and tolerance")
    if s.code == UNEXPLAINED:
        return Hypothesis(UNEXPLAINED, weight, math.nan, "none of the common mistakes fits")
    e = s.expl
    assert e is not None
    if k is None:  # the step entry: the evidence of the first reading outside its band that it explains
        outside = [j for j in e.evidence if _outside(rows[j])]
        k = outside[0] if outside else next(iter(e.evidence), next(iter(e.expect), 0))
    expected = e.expect.get(k, _none_interval(rows[k]))[0]
    evidence = e.evidence.get(k) or next(iter(e.evidence.values()), "")
    return Hypothesis(e.code, weight, float(expected), evidence, e.detail)


def _diagnosis(rows: list[_Row], scored: list[_Scored], k: int | None) -> Diagnosis:
    logs = np.array([s.log_score for s in scored])
    weights = np.exp(logs - logs.max())
    weights /= weights.sum()
    best = scored[0]
    # a tie: fits as well (likelihood within e^TIE_COST, priors aside) and puts the readings where the best does
    top = [i for i, s in enumerate(scored) if i == 0 or (
        s.code != UNEXPLAINED and best.code != UNEXPLAINED
        and float(s.costs.sum() - best.costs.sum()) < TIE_COST
        and _separation(rows, best.expl, s.expl) < TIE_SEPARATION)]
    hyps = [_hypothesis(rows, s, k, float(w)) for s, w in zip(scored, weights, strict=True)]
    tied = tuple(hyps[i] for i in top)
    codes = list(dict.fromkeys(h.code for h in tied))
    location = rows[k].reading.location if k is not None else ""
    qn = rows[k].reading.quantity if k is not None else ""
    score = float(sum(weights[i] for i in top))
    if NONE in codes:
        return Diagnosis(k, location, qn, NONE, "", score, tied, tuple(hyps))
    if codes == [UNEXPLAINED]:
        text = _unexplained_text(rows, k, scored)
        return Diagnosis(k, location, qn, UNEXPLAINED, text, score, tied, tuple(hyps))
    if len(tied) == 1:
        text = f"{tied[0].evidence} (likelihood {100 * score:.0f} %)."
    else:
        options = "; or ".join(f"{h.evidence}" for h in tied)
        text = (f"These fit the readings equally well (likelihood {100 * score:.0f} % together), so check each: "
                f"{options}.")
    if k is None:
        explained = [j for j, c in enumerate(best.costs) if c < 0.5 * 9 and _outside(rows[j])]
        text = f"Whole step ({len(explained)} of {sum(_outside(r) for r in rows)} outside readings explained): " + text
    return Diagnosis(k, location, qn, ",".join(codes), text, score, tied, tuple(hyps))


def _outside(row: _Row) -> bool:
    """Beyond band + tolerance, as the verdict rule has it (with no tolerance: beyond two sigma)."""
    d = _distance(row, row.reading.measured, row.low, row.high)
    if row.tolerance > 0:
        return d > row.tolerance * (1 + 1e-9)
    return _z(row, row.reading.measured, _none_interval(row)) > 2.0


def _unexplained_text(rows: list[_Row], k: int | None, scored: list[_Scored]) -> str:
    if k is None:
        return "Whole step: no single common mistake explains the readings outside their bands; see each reading."
    row = rows[k]
    nearest = next((s for s in scored if s.code not in (NONE, UNEXPLAINED)), None)
    tail = ""
    if nearest is not None and nearest.expl is not None:
        tail = f" The nearest was {nearest.code}{f' ({nearest.expl.detail})' if nearest.expl.detail else ''}."
    return (f"{_measured_words(row)} is outside the predicted {_fmt(row.low, row.unit)} to "
            f"{_fmt(row.high, row.unit)} and none of the common mistakes fits it.{tail} Take the reading again and "
            f"check the bench against the step's instructions.")


# -- the call --------------------------------------------------------------------------------------------
def diagnose(bench: Bench, state: BenchState, prediction: Prediction, readings: Sequence[Reading], *,
             budget_s: float = 1.0) -> list[Diagnosis]:
    """Diagnose a step's readings: one :class:`Diagnosis` per reading, then one for the step (see module docstring).

    Parameters
    ----------
    bench
        The bench the step ran on.
    state
        The step's intended bench state.
    prediction
        The prediction of ``state`` (:func:`labkit.core.predict.predict_state`).
    readings
        All readings of the step, values in the registry unit, RMS (the logbook's ``measured``).
    budget_s
        Time allowed for the switch-space search, seconds (0 skips it).

    Raises
    ------
    ModelInputError
        A reading with no prediction to compare with, or a malformed reading.
    UnknownNameError
        A reading naming a sensor the bench does not have.
    """
    start = time.perf_counter()
    if not readings:
        msg = "diagnose needs at least one reading of the step"
        raise ModelInputError(msg)
    for r in readings:
        if not isinstance(r, Reading):
            msg = f"diagnose expects labkit.session.diagnosis.Reading items, found {type(r).__name__}"
            raise ModelInputError(msg)
    rows = [_row(bench, prediction, r) for r in readings]
    base = _costs(rows, None)
    outside = [k for k, row in enumerate(rows) if _outside(row)]
    if not outside:
        none = Hypothesis(NONE, 1.0, math.nan, "every reading agrees with the prediction")
        out = [Diagnosis(k, row.reading.location, row.reading.quantity, NONE, "", 1.0, (none,), (none,))
               for k, row in enumerate(rows)]
        return [*out, Diagnosis(None, "", "", NONE, "", 1.0, (none,), (none,))]

    expls: list[_Expl] = []
    for k, row in enumerate(rows):
        expls += _form_hypotheses(k, row) + _scale_hypotheses(k, row)
    expls += _sensor_hypotheses(bench, prediction, rows) + _swap_hypotheses(bench, prediction, rows)
    remaining = budget_s - (time.perf_counter() - start)
    switch = _switch_hypotheses(bench, state, prediction, rows, 1, remaining)
    # widen to two-item changes only when nothing found so far explains every outside reading
    explained = any(all(_costs(rows, e, sharpness=False)[k] < 4.5 for k in outside) for e in expls + switch)
    remaining = budget_s - (time.perf_counter() - start)
    if not explained and remaining > 0:
        seen = {e.key for e in switch}
        switch += [e for e in _switch_hypotheses(bench, state, prediction, rows, 2, remaining) if e.key not in seen]
    expls += switch

    out = []
    for k, row in enumerate(rows):
        if k not in outside:
            none = Hypothesis(NONE, 1.0, row.nominal, "the reading agrees with the prediction")
            out.append(Diagnosis(k, row.reading.location, row.reading.quantity, NONE, "", 1.0, (none,), (none,)))
            continue
        touching = [e for e in expls if k in e.expect]
        out.append(_diagnosis(rows, _rank(rows, base, touching, [k]), k))
    out.append(_diagnosis(rows, _rank(rows, base, expls, outside), None))
    return out


__all__ = ["AVERAGE_METER_GAIN", "CODES", "NONE", "UNEXPLAINED", "Diagnosis", "Hypothesis", "Reading", "diagnose"]
