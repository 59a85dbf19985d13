"""Readings as a student enters them: typed text with its unit and form, a capture analysis, or the simulated bench.

Typed readings
    ``"118.6 V"``, ``"850 mA"``: parsed by :func:`labkit.core.units.parse_quantity` with the
    quantity's kind (a decimal comma is refused unless configured; ``MA`` for mA is flagged by the
    units layer's case-slip check). The form the instrument gave is converted to RMS:

    * ``rms``: as read;
    * ``peak``: divided by the PREDICTED crest factor of that signal (computed from the solution's
      harmonic phasors at the location, the content the prediction's ``crest_i`` row also comes
      from), not by sqrt 2: on a distorted current the two differ by tens of percent;
    * ``peak_to_peak``: divided by twice the predicted crest factor;
    * ``average``: an average-responding meter calibrated to show the RMS of a sine
      (common practice): shown = pi / (2 sqrt 2) x mean |x|, so RMS = shown x FF / FF_sine with the
      PREDICTED form factor FF = RMS / mean |x| and FF_sine = pi / (2 sqrt 2).

    The parse result is a :class:`ParsedReading` (value, unit, echo text) that the UI shows before
    the reading counts.
Captures and the simulated bench
    :func:`simulated_capture` synthesizes a capture of the sensor channels a reading needs with
    :class:`labkit.captures.simulate.SimulatedBench`, each channel's spectrum taken from the
    prediction's solved harmonic phasors at the sensor's placement, in the sensor's reference
    direction; :func:`value_from_analysis` takes a reading's value from a
    :class:`labkit.core.waveform.WaveformAnalysis`.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import NDArray

from labkit.core.errors import LabkitError, UnitError
from labkit.core.quantities import quantity
from labkit.core.results import end_current_phasors, sensor_direction
from labkit.core.units import parse_quantity

if TYPE_CHECKING:
    from labkit.captures.capture import Capture
    from labkit.core.bench import Bench, CurrentSensor, VoltageSensor
    from labkit.core.predict import Prediction
    from labkit.core.template import ReadingSpec
    from labkit.core.waveform import WaveformAnalysis
    from labkit.session.calibration import SensorCalibration

FORMS = ("rms", "peak", "peak_to_peak", "average")
FORM_FACTOR_SINE = math.pi / (2.0 * math.sqrt(2.0))
"""RMS over rectified mean of a sine, 1.1107 (the scale of an average-responding, RMS-calibrated meter)."""
_WAVE_POINTS = 4096  # points per fundamental period when a waveform is rebuilt from its phasors
_FORM_QUANTITIES = {"v_rms": "v", "i_rms": "i"}
CAPTURE_QUANTITIES = frozenset({
    "v_rms", "v1_rms", "vh_rms", "i_rms", "i1_rms", "ih_rms", "phase", "p", "p1", "ph", "q1", "s", "s1", "sn",
    "di", "dv", "sh", "dh", "n", "pf", "pf1", "thd_v", "thd_i", "crest_v", "crest_i", "frequency"})
"""Quantities a voltage/current capture at one place gives (IEEE 1459-2010 single-phase set)."""


class ReadingError(LabkitError, ValueError):
    """A reading that cannot be taken as entered (wrong form, no such sensor, no spectrum to convert by)."""


@dataclass(frozen=True)
class WaveShape:
    """Crest and form factor of a periodic signal, and where they came from."""

    crest: float
    form_factor: float
    source: str


@dataclass
class ParsedReading:
    """A reading parsed and converted, to echo before it counts.

    Attributes
    ----------
    step_index, spec_index
        The template step and its reading.
    quantity, location
        What and where.
    value
        The measured value in ``unit``, RMS.
    unit
        The quantity's registry unit.
    entered
        The text as typed (or a capture summary).
    form
        What the instrument gave: rms, peak, peak_to_peak or average.
    factor
        The conversion factor applied to the entered value to make it RMS (1 for rms).
    meter_range
        The meter's range, in ``unit`` (NaN when not given).
    echo
        One line the UI shows: what was understood.
    obtained
        typed, capture or simulated.
    sensor
        The bench sensor that took it, or empty.
    capture_id
        Id of the stored capture it came from, or empty.
    notes
        Anything worth showing with the echo (a conversion by a distorted wave's crest factor).
    calibration
        At a calibration step: the sensor's calibration this reading comes with (recorded as a
        ``calibration`` event when the reading is recorded), see :mod:`labkit.session.calibration`.
    """

    step_index: int
    spec_index: int
    quantity: str
    location: str
    value: float
    unit: str
    entered: str
    form: str = "rms"
    factor: float = 1.0
    meter_range: float = math.nan
    echo: str = ""
    obtained: str = "typed"
    sensor: str = ""
    capture_id: str = ""
    notes: list[str] = field(default_factory=list)
    calibration: SensorCalibration | None = None


# -- waveform shape from a prediction -------------------------------------------------------------------
def wave_shape_from_phasors(orders: Sequence[int], phasors: NDArray[np.complex128]) -> WaveShape:
    """Crest factor (peak / RMS) and form factor (RMS / mean |x|) of ``sum sqrt2 Re(X_h e^{j h w t})``.

    Parameters
    ----------
    orders
        Harmonic orders (1 is the fundamental).
    phasors
        RMS phasors, one per order.
    """
    orders_arr = np.asarray(orders, dtype=float)
    x = np.asarray(phasors, dtype=complex)
    t = np.arange(_WAVE_POINTS) / _WAVE_POINTS
    wave = math.sqrt(2.0) * np.real(x[:, None] * np.exp(2j * np.pi * orders_arr[:, None] * t[None, :])).sum(axis=0)
    rms = float(np.sqrt(np.mean(wave**2)))
    if rms == 0.0:
        msg = "the predicted signal is zero: no crest factor to convert a peak reading by"
        raise ReadingError(msg)
    return WaveShape(float(np.max(np.abs(wave))) / rms, rms / float(np.mean(np.abs(wave))),
                     "computed from the predicted harmonic phasors")


def location_spectrum(pred: Prediction, location: str, signal: str, sensor_id: str | None = None
                      ) -> tuple[list[int], NDArray[np.complex128]]:
    """Nominal harmonic phasors of the voltage at a bus (``signal="v"``) or the current at ``ELEMENT@BUS``.

    The current is given in the reference direction of the sensor placed there (see
    :func:`labkit.core.results.sensor_direction`); a de-energized place gives zeros.
    """
    sol = pred.solution
    net = sol.network
    orders = list(sol.orders)
    if signal == "v":
        bus = location.partition("@")[2] if "@" in location else location
        if bus not in net.bus_node:
            return orders, np.zeros(len(orders), dtype=complex)
        return orders, np.asarray(sol.v[0, :, net.bus_node[bus]], dtype=complex)
    element, _, bus = location.partition("@")
    if not bus:
        msg = f'a current is measured at an element end like "L12@B1", found "{location}"'
        raise ReadingError(msg)
    currents = end_current_phasors(sol, warn=False)
    if (element, bus) not in currents:
        return orders, np.zeros(len(orders), dtype=complex)
    direction = sensor_direction(net.bench, location, sensor_id)
    return orders, direction * np.asarray(currents[(element, bus)][0], dtype=complex)


def predicted_wave_shape(pred: Prediction, location: str, quantity_name: str,
                         sensor_id: str | None = None) -> WaveShape:
    """The predicted crest and form factor of the signal a ``v_rms`` or ``i_rms`` reading measures."""
    signal = _FORM_QUANTITIES.get(quantity_name)
    if signal is None:
        msg = (f"only v_rms and i_rms readings can be given as peak, peak-to-peak or average; "
               f"{quantity_name} is read as rms")
        raise ReadingError(msg)
    orders, phasors = location_spectrum(pred, location, signal, sensor_id)
    # from the solved phasors on a fine grid: the prediction's crest_i row samples 256 points per period and can
    # miss the peak of a distorted wave by a few parts in 10^4
    return wave_shape_from_phasors(orders, phasors)


# -- typed readings -------------------------------------------------------------------------------------
def parse_typed(text: str, spec: ReadingSpec, *, step_index: int, spec_index: int, form: str = "rms",
                prediction: Prediction | None = None, meter_range: str | None = None,
                decimal_comma: bool = False) -> ParsedReading:
    """Parse a typed reading into a :class:`ParsedReading` in the quantity's registry unit, RMS.

    Parameters
    ----------
    text
        ``"118.6 V"``; for quantities in ``1`` or ``%`` a bare number is in the template's unit.
    spec
        The template's reading.
    form
        What the instrument gave (rms, peak, peak_to_peak, average).
    prediction
        The step's prediction; needed to convert a peak, peak-to-peak or average reading.
    meter_range
        The meter's range with its unit (``"200 V"``), or None.
    decimal_comma
        Accept ``"118,6 V"`` (a configured locale).

    Raises
    ------
    UnitError
        A unit that is missing, of the wrong kind, a decimal comma, or a likely case slip (``MA``).
    ReadingError
        A form that does not apply, or a conversion without a prediction.
    """
    if form not in FORMS:
        msg = f'form "{form}": expected one of {", ".join(FORMS)}'
        raise ReadingError(msg)
    q = quantity(spec.quantity)
    raw = str(text).strip()
    if not raw:
        msg = f"no value entered for {spec.quantity} at {spec.location}"
        raise UnitError(msg)
    entered_value = _parse_in_unit(raw, spec.quantity, spec.unit, decimal_comma)
    notes: list[str] = []
    factor = 1.0
    if form != "rms":
        if prediction is None:
            msg = f"a {form} reading of {spec.quantity} needs the step's prediction to convert it to RMS"
            raise ReadingError(msg)
        shape = predicted_wave_shape(prediction, spec.location, spec.quantity, spec.sensor)
        if form == "peak":
            factor = 1.0 / shape.crest
        elif form == "peak_to_peak":
            factor = 1.0 / (2.0 * shape.crest)
        else:
            factor = shape.form_factor / FORM_FACTOR_SINE
        what = {"peak": f"crest factor {shape.crest:.4g}", "peak_to_peak": f"crest factor {shape.crest:.4g} (x2)",
                "average": f"form factor {shape.form_factor:.4g} (sine {FORM_FACTOR_SINE:.4g})"}[form]
        notes.append(f"{form} converted to RMS by the predicted {what}, {shape.source}")
        if form in ("peak", "peak_to_peak") and abs(shape.crest - math.sqrt(2.0)) > 0.01:
            notes.append(f"distorted wave: sqrt 2 would be off by {100 * (math.sqrt(2) / shape.crest - 1):+.1f} %")
    range_value = math.nan
    if meter_range:
        range_value = _parse_in_unit(meter_range.strip(), spec.quantity, spec.unit, decimal_comma)
        if not range_value > 0:
            msg = f'meter range "{meter_range}" must be positive'
            raise UnitError(msg)
    value = entered_value * factor
    shown = value / _display_factor(spec.quantity, spec.unit)
    echo = f"{spec.quantity} at {spec.location}: {raw}"
    if form != "rms":
        echo += f" ({form}) -> {shown:.5g} {spec.unit} rms"
    else:
        echo += f" -> {shown:.5g} {spec.unit}"
    if q.unit != spec.unit:
        echo += f" = {value:.5g} {q.unit}"
    return ParsedReading(step_index, spec_index, spec.quantity, spec.location, float(value), q.unit, raw, form,
                         factor, range_value, echo, "typed", spec.sensor or "", "", notes)


def _display_factor(quantity_name: str, unit: str) -> float:
    """Value in the registry unit of one ``unit`` (``mA`` -> 0.001 for a current in A)."""
    q = quantity(quantity_name)
    if q.unit in ("1", "%"):  # a fraction written as 1 or as %
        per_unit = {"1": 1.0, "": 1.0, "%": 0.01}
        return per_unit.get(unit, 1.0) / per_unit[q.unit]
    return parse_quantity(f"1 {unit}", q.kind) * q.scale


def _parse_in_unit(text: str, quantity_name: str, default_unit: str, decimal_comma: bool) -> float:
    """A typed value in the quantity's registry unit."""
    q = quantity(quantity_name)
    if q.unit in ("1", "%"):
        if text.endswith("%"):
            return parse_quantity(text, "ratio", decimal_comma=decimal_comma) * q.scale
        number = text.replace(",", ".", 1) if decimal_comma else text
        if "," in number:
            fixed = number.replace(",", ".", 1)
            msg = f'"{text}" has a decimal comma; write "{fixed}" (or configure a decimal-comma locale)'
            raise UnitError(msg)
        try:
            bare = float(number)
        except ValueError as exc:
            msg = f'"{text}" is not a number for {quantity_name} (in {default_unit or q.unit})'
            raise UnitError(msg) from exc
        if not math.isfinite(bare):
            msg = f'"{text}" is not a finite number'
            raise UnitError(msg)
        return bare * _display_factor(quantity_name, default_unit or q.unit)
    return parse_quantity(text, q.kind, decimal_comma=decimal_comma) * q.scale


# -- sensors, captures and the simulated bench ----------------------------------------------------------
def sensor_at(bench: Bench, location: str, kind: str, sensor_id: str | None = None
              ) -> VoltageSensor | CurrentSensor | None:
    """The named sensor, or the first ``kind`` sensor with a placement at ``location``; None when none is."""
    if sensor_id:
        return bench.sensor(sensor_id)
    for s in bench.sensors:
        if s.kind == kind and any(p.location == location for p in s.placements):
            return s
    return None


def channels_for(bench: Bench, spec: ReadingSpec) -> list[tuple[str, str, str, str]]:
    """Channels a reading needs: (channel name, kind, location, sensor id), voltage first.

    A bus quantity needs the voltage at the bus; a quantity at ``ELEMENT@BUS`` needs the current
    there and (for powers, power factor and phase) the voltage at the bus.
    """
    loc = spec.location
    out: list[tuple[str, str, str, str]] = []
    if "@" in loc:
        bus = loc.partition("@")[2]
        vs = sensor_at(bench, bus, "voltage")
        cs = sensor_at(bench, loc, "current", spec.sensor)
        out.append((f"v@{bus}", "voltage", bus, vs.id if vs else ""))
        out.append((f"i@{loc}", "current", loc, cs.id if cs else ""))
    elif not loc.startswith("sensor:"):
        vs = sensor_at(bench, loc, "voltage", spec.sensor)
        out.append((f"v@{loc}", "voltage", loc, vs.id if vs else ""))
    return out


@dataclass(frozen=True)
class ChannelFault:
    """A deliberate acquisition fault of one simulated channel (for the demo and for diagnosis tests)."""

    gain: float = 1.0  # multiplies the channel (10 for a x10 probe setting, -1 for a reversed current sensor)


def simulated_capture(pred: Prediction, bench: Bench, spec: ReadingSpec, *, seed: int, snr_db: float = 50.0,
                      gain_error: float = 0.002, cycles: int = 12, sample_rate: float = 10_000.0,
                      faults: dict[str, ChannelFault] | None = None,
                      sensor_gain_errors: Mapping[str, float] | None = None) -> Capture:
    """A capture of the channels ``spec`` needs, synthesized from the prediction's nominal solution.

    Parameters
    ----------
    pred
        The step's prediction (its solution's harmonic phasors give each channel's spectrum).
    bench
        The bench (sensor placements and reference directions).
    spec
        The reading.
    seed
        Seed of the noise and of the sign of each channel's gain error.
    snr_db
        Signal RMS over white-noise RMS (dB).
    gain_error
        Magnitude of each channel's relative gain error (its sign drawn from the seed).
    cycles
        Fundamental cycles captured.
    sample_rate
        Hz.
    faults
        Channel name -> a deliberate fault (see :func:`channels_for` for the names).
    sensor_gain_errors
        Sensor id -> that sensor's own relative gain error, used instead of ``gain_error`` for
        its channels (a sensor that needs calibrating).
    """
    from labkit.captures.simulate import ChannelSpec, SimulatedBench

    place = spec.location.partition("@")[2] if "@" in spec.location else spec.location
    if spec.quantity not in CAPTURE_QUANTITIES or place not in bench.bus_names:
        msg = f"a capture of the bench's sensor channels does not give {spec.quantity} at {spec.location}"
        raise ReadingError(msg)
    channels = channels_for(bench, spec)
    if not channels:
        msg = f"no sensor channel measures {spec.quantity} at {spec.location}"
        raise ReadingError(msg)
    rng = np.random.default_rng(seed)
    sol = pred.solution
    bus = channels[0][2]
    node = sol.network.bus_node.get(bus)
    frequency = float(sol.island_frequency_hz[0, node]) if node is not None else float(sol.network.frequency_hz)
    specs: dict[str, ChannelSpec] = {}
    for name, kind, loc, sensor_id in channels:
        orders, phasors = location_spectrum(pred, loc, "v" if kind == "voltage" else "i", sensor_id or None)
        fault = (faults or {}).get(name, ChannelFault())
        sign = 1.0 if rng.random() < 0.5 else -1.0
        spectrum = tuple((int(h), complex(x) * fault.gain) for h, x in zip(orders, phasors, strict=True)
                         if h * frequency < 0.45 * sample_rate)
        own = (sensor_gain_errors or {}).get(sensor_id)
        specs[name] = ChannelSpec(spectrum, kind=kind, location=loc, snr_db=snr_db,
                                  gain_error=sign * gain_error if own is None else float(own))
    samples = round(cycles * sample_rate / frequency)
    return SimulatedBench(specs, sample_rate=sample_rate, frequency=frequency, samples=samples,
                          seed=int(rng.integers(0, 2**31))).capture()


def analyse_for(capture: Capture) -> WaveformAnalysis:
    """Analyse a capture of :func:`simulated_capture` (or one laid out the same: voltage first, then current)."""
    from labkit.core.waveform import Pair, analyze

    pairs = [Pair(0, 1, capture.locations[1])] if len(capture.channels) >= 2 else []
    # a calibrated sensor's skew (through the channel map) corrects the phasor angles
    delays = np.asarray(capture.delays_s, dtype=float) if any(capture.delays_s) else None
    return analyze(capture.data, capture.sample_rate, pairs, names=capture.channels, delays_s=delays)


def value_from_analysis(analysis: WaveformAnalysis, quantity_name: str, location: str) -> float:
    """A reading's value (registry unit) from a capture analysis: the pair at ``location`` or the first channel.

    Raises
    ------
    ReadingError
        A quantity the analysis does not give (sync quantities, loading, ...).
    """
    q = quantity(quantity_name)
    if quantity_name == "frequency":
        return float(analysis.frequency) * q.scale
    if analysis.pairs and "@" in location:
        values = analysis.pair(location).values() if any(p.location == location for p in analysis.pairs) \
            else analysis.pairs[0].values()
        if quantity_name in values:
            return float(values[quantity_name]) * q.scale
    if quantity_name in ("v_rms", "i_rms"):
        return float(analysis.rms[0]) * q.scale
    fundamental = abs(complex(analysis.phasors[0, 0]))
    if quantity_name in ("v1_rms", "i1_rms"):
        return fundamental * q.scale
    if quantity_name in ("thd_v", "thd_i") and fundamental > 0:
        rms = float(analysis.rms[0])
        return math.sqrt(max(rms**2 - fundamental**2, 0.0)) / fundamental * q.scale
    msg = f"a capture analysis does not give {quantity_name}"
    raise ReadingError(msg)
