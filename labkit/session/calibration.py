"""Calibration steps of a session: a sensor's capture against a reference meter, corrections kept and applied.

At a template's ``calibration`` step the sensor named by the step takes a capture of a signal
that a reference meter reads at the same time. The meter's reading is entered with its unit,
the meter's id and its accuracy; the corrections come from the capture and THAT reading (never
from the model's prediction, which would fit away the very errors diagnosis looks for):

gain
    ``reference true RMS / RMS of (channel - offset)``
    (:func:`labkit.captures.calibration.calibrate_channel`).
offset
    the channel's dc over whole cycles, the signal's own dc taken as 0 (an ac source). On an
    ac-coupled acquisition (or an ``AC``-coupled sensor) the dc is removed before the samples
    are seen, so no offset can be observed: it is left 0 and a note says so.
skew
    from a channel pair of known phase in the same capture, e.g. a current into a resistive
    load and the voltage at its bus (0 deg) (:func:`labkit.captures.calibration.calibrate_skew`);
    without one the skew stays 0 and a note says so.

A correction that is absurd is refused (nothing is recorded): a gain more than
:data:`GAIN_LIMIT` off 1, an offset beyond :data:`OFFSET_LIMIT` of the sensor's range, or a
skew beyond :data:`SKEW_LIMIT_DEG` at the fundamental. These are a wrong scale setting, a
sensor on the wrong signal or a wiring fault, not something to calibrate away (common practice).

The calibration's own uncertainty is the reference meter's accuracy on the reading
(``% of reading x |reading| + % of full scale x range``, /work/shared/field-reference.md §4.2),
carried relative as the gain's uncertainty.

The stored corrections are applied to later captures of that sensor through the channel map
(:meth:`labkit.captures.channelmap.ChannelBinding.with_calibration`), see :func:`corrected_capture`.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass, field, replace
from typing import TYPE_CHECKING, Any

import numpy as np

from labkit.captures.calibration import Calibration as ChannelCalibration
from labkit.captures.calibration import MeterReading, calibrate_channel, calibrate_skew
from labkit.captures.capture import Capture
from labkit.captures.channelmap import ChannelBinding, ChannelMap
from labkit.core.errors import CaptureError, UnitError
from labkit.core.quantities import quantity
from labkit.core.units import parse_quantity
from labkit.session.readings import ReadingError

if TYPE_CHECKING:
    from labkit.core.bench import Bench, CurrentSensor, VoltageSensor
    from labkit.core.template import ReferenceMeter
    from labkit.core.waveform import WaveformAnalysis

GAIN_LIMIT = 0.20
"""Largest accepted relative gain correction, ``|gain - 1|`` (20 %)."""
OFFSET_LIMIT = 0.05
"""Largest accepted offset correction, as a fraction of the sensor's range."""
SKEW_LIMIT_DEG = 30.0
"""Largest accepted skew correction, degrees at the fundamental."""
QUANTITY_OF_KIND = {"voltage": "v_rms", "current": "i_rms"}


class CalibrationError(ReadingError):
    """A calibration that cannot be made or is refused (the message says what to check)."""


@dataclass(frozen=True)
class MeterUse:
    """The reference meter as used: id, accuracy (fractions) and range (registry unit, NaN when not known)."""

    meter_id: str
    accuracy_reading: float
    accuracy_full_scale: float
    range: float = math.nan

    def reading(self, value: float) -> MeterReading:
        """The meter's true-RMS reading of ``value`` (in percent terms, as the captures layer takes it)."""
        fs = self.range if math.isfinite(self.range) else 0.0
        return MeterReading(value, self.meter_id, "rms", 100.0 * self.accuracy_reading,
                            100.0 * self.accuracy_full_scale, fs)

    def uncertainty(self, value: float) -> float:
        """The meter's accuracy bound on a reading of ``value``, same unit (§4.2 rule, no digits term)."""
        return self.reading(value).uncertainty


@dataclass(frozen=True)
class SensorCalibration:
    """One sensor's calibration as recorded in a ``calibration`` event.

    Values are in the quantity's registry unit (V or A); ``gain`` and ``offset`` correct a
    value as ``gain * (value - offset)``; ``delay_s`` is how long the sensor's samples lag true
    time; ``gain_uncertainty`` is relative (the meter's accuracy over the reference value).
    """

    sensor: str
    kind: str
    quantity: str
    unit: str
    step_index: int
    spec_index: int
    channel: str
    location: str
    reference_value: float
    reference_text: str
    measured_value: float
    meter_id: str
    meter_accuracy_reading: float
    meter_accuracy_full_scale: float
    meter_range: float
    uncertainty: float
    gain: float
    offset: float
    delay_s: float
    gain_uncertainty: float
    obtained: str = "capture"
    capture_id: str = ""
    notes: tuple[str, ...] = field(default=())
    seq: int = -1

    @property
    def correction(self) -> ChannelCalibration:
        """The corrections as the captures layer applies them (channel name as calibrated)."""
        return ChannelCalibration(channel=self.channel, gain=self.gain, offset=self.offset, delay_s=self.delay_s,
                                  gain_uncertainty=self.gain_uncertainty, meter_id=self.meter_id,
                                  note="; ".join(self.notes))

    @property
    def label(self) -> str:
        """One line naming the reference the calibration reading is judged against."""
        return (f"reference meter {self.meter_id}: {self.reference_value:.6g} {self.unit} "
                f"+- {self.uncertainty:.3g} {self.unit}" + (f" (event {self.seq})" if self.seq >= 0 else ""))

    @property
    def summary(self) -> str:
        """The corrections in one line."""
        return (f"gain {self.gain:.5f} (+- {100 * self.gain_uncertainty:.3g} %), offset {self.offset:.4g} {self.unit}, "
                f"skew {1e6 * self.delay_s:.3g} us")

    def detail(self) -> dict[str, Any]:
        """The event's JSON detail (plain values; NaN range written as null)."""
        out = asdict(self)
        out.pop("seq")
        out["notes"] = list(self.notes)
        if not math.isfinite(self.meter_range):
            out["meter_range"] = None
        return out

    @classmethod
    def from_detail(cls, detail: Mapping[str, Any], seq: int = -1) -> SensorCalibration:
        """Back from :meth:`detail` (an archived event)."""
        data = dict(detail)
        data["meter_range"] = math.nan if data.get("meter_range") is None else float(data["meter_range"])
        data["notes"] = tuple(data.get("notes") or ())
        try:
            return cls(**data, seq=seq)
        except TypeError as exc:
            msg = f"calibration event {seq}: detail is not a sensor calibration ({exc})"
            raise CalibrationError(msg) from exc


def meter_use(template_meter: ReferenceMeter, quantity_name: str, *, meter_id: str | None = None,
              accuracy_reading: str | float | None = None, accuracy_full_scale: str | float | None = None,
              meter_range: str | float | None = None, decimal_comma: bool = False) -> MeterUse:
    """The reference meter as used: the template's meter, with anything given instead of it.

    Accuracies are text with ``%`` (``"0.1 %"``) or fractions (0.001); the range is text with the
    quantity's unit (``"200 V"``) or a number in its registry unit.
    """
    def fraction(value: str | float | None, default: float, what: str) -> float:
        if value is None:
            return float(default)
        out = float(value) if isinstance(value, int | float) else parse_quantity(value, "ratio",
                                                                                  decimal_comma=decimal_comma)
        if not (math.isfinite(out) and 0.0 <= out <= 0.1):
            msg = f"reference meter {what} accuracy {value!r}: expected 0 % to 10 %"
            raise UnitError(msg)
        return out

    q = quantity(quantity_name)
    rng_text = template_meter.range if meter_range is None else meter_range
    rng = math.nan
    if isinstance(rng_text, int | float):
        rng = float(rng_text)
    elif str(rng_text).strip():
        rng = parse_quantity(str(rng_text), q.kind, decimal_comma=decimal_comma) * q.scale
    if math.isfinite(rng) and rng <= 0:
        msg = f"reference meter range {rng_text!r}: expected a positive range in {q.unit}"
        raise UnitError(msg)
    mid = template_meter.id if meter_id is None else str(meter_id).strip()
    if not mid:
        msg = "a reference meter reading needs the meter's id"
        raise CalibrationError(msg)
    return MeterUse(mid, fraction(accuracy_reading, template_meter.accuracy_reading, "reading"),
                    fraction(accuracy_full_scale, template_meter.accuracy_full_scale, "full-scale"), rng)


def reference_value(text: str | float, quantity_name: str, *, decimal_comma: bool = False) -> float:
    """The reference meter's reading in the quantity's registry unit (text with its unit, ``"120.43 V"``)."""
    q = quantity(quantity_name)
    value = float(text) if isinstance(text, int | float) else parse_quantity(str(text), q.kind,
                                                                               decimal_comma=decimal_comma) * q.scale
    if not (math.isfinite(value) and value > 0):
        msg = f"reference meter reading {text!r}: expected a positive true-RMS {q.kind} in {q.unit}"
        raise CalibrationError(msg)
    return value


def sensor_channel(capture: Capture, sensor: VoltageSensor | CurrentSensor, channel: str | int | None = None) -> int:
    """The capture channel the sensor took: given, at ``sensor:ID``, the only one of its kind, or the only one."""
    if channel is not None:
        return capture.index(channel)
    at = [k for k, loc in enumerate(capture.locations) if loc == f"sensor:{sensor.id}"]
    if len(at) == 1:
        return at[0]
    same = [k for k, kind in enumerate(capture.kinds) if kind == sensor.kind]
    if len(same) == 1:
        return same[0]
    if len(capture.channels) == 1:
        return 0
    msg = (f"cannot tell which of the capture's channels {list(capture.channels)} sensor {sensor.id} took: "
           "give channel=...")
    raise CalibrationError(msg)


def skew_reference(bench: Bench, capture: Capture, k: int) -> tuple[int, float] | None:
    """A channel of known phase to ``k`` in the capture: (index, expected angle of k relative to it, deg).

    A current into a resistive load (``LOAD@BUS``) and the voltage at ``BUS`` are in phase (0 deg).
    """
    resistive = {ld.id for ld in bench.loads if ld.kind == "resistive"}

    def bus_of_resistive(loc: str) -> str | None:
        element, _, bus = loc.partition("@")
        return bus if bus and element in resistive else None

    kind, loc = capture.kinds[k], capture.locations[k]
    for j, (kind_j, loc_j) in enumerate(zip(capture.kinds, capture.locations, strict=True)):
        if j == k:
            continue
        if kind == "voltage" and kind_j == "current" and bus_of_resistive(loc_j) == loc:
            return j, 0.0
        if kind == "current" and kind_j == "voltage" and bus_of_resistive(loc) == loc_j:
            return j, 0.0
    return None


@dataclass(frozen=True)
class Corrections:
    """What a capture or analysis gave: the corrections, the sensor's own reading and notes."""

    channel: str
    location: str
    measured: float
    gain: float
    offset: float
    delay_s: float
    notes: tuple[str, ...]


def compute_corrections(data: Capture | WaveformAnalysis, bench: Bench, sensor: VoltageSensor | CurrentSensor,
                        meter: MeterReading, *, channel: str | int | None = None,
                        skew_channel: str | int | None = None, expected_phase_deg: float = 0.0) -> Corrections:
    """Gain, offset and skew of ``sensor`` from a capture (or its analysis) and a reference-meter reading.

    Raises
    ------
    CalibrationError
        No channel to calibrate, or an absurd correction (see the module docstring).
    """
    notes: list[str] = []
    if isinstance(data, Capture):
        k = sensor_channel(data, sensor, channel)
        name, location = data.channels[k], data.locations[k]
        ac = data.ac_coupled or sensor.coupling == "AC"
        try:
            own = calibrate_channel(data, k, meter, remove_dc=not ac)
            from labkit.core.waveform import analyze

            measured = float(analyze(data.data[[k]], data.sample_rate, [(0, 0)], names=[name]).rms[0])
        except CaptureError as exc:
            raise CalibrationError(str(exc)) from exc
        if ac:
            notes.append("ac-coupled: the dc is removed before sampling, so no offset is observable; offset left 0")
        else:
            notes.append("offset: the channel's dc over whole cycles, the signal's own dc taken as 0 (an ac source)")
        ref = skew_reference(bench, data, k) if skew_channel is None else (data.index(skew_channel),
                                                                           float(expected_phase_deg))
        delay = 0.0
        if ref is None:
            notes.append("skew 0: no channel of known phase in the capture (e.g. a resistive load's current)")
        else:
            try:
                delay = calibrate_skew(data, ref[0], k, expected_phase_deg=ref[1]).delay_s
            except CaptureError as exc:
                raise CalibrationError(str(exc)) from exc
            notes.append(f"skew against {data.channels[ref[0]]} of known phase {ref[1]:g} deg")
        gain, offset = own.gain, own.offset
        frequency = _frequency(data)
    else:
        names = list(data.channels)
        if channel is not None:
            k = names.index(channel) if isinstance(channel, str) and channel in names else int(channel)
        else:
            k = 0 if sensor.kind == "voltage" or len(names) == 1 else 1
        if not 0 <= k < len(names):
            msg = f"channel {channel!r} is not in the analysis's channels {names}"
            raise CalibrationError(msg)
        name, location = names[k], ""
        measured = float(data.rms[k])
        dc = float(data.dc[k]) if sensor.coupling == "DC" else 0.0
        ac_rms = math.sqrt(max(measured**2 - dc**2, 0.0))  # RMS of (x - dc): the ac part
        if not ac_rms > 0:
            msg = f"channel {name} is all zero after removing its dc: nothing to calibrate against"
            raise CalibrationError(msg)
        gain, offset, delay = meter.value / ac_rms, dc, 0.0
        notes.append("from an analysis: offset is its dc (the signal's own dc taken as 0); skew 0, no samples "
                     "to compare phases")
        frequency = float(data.frequency)
    _refuse_absurd(sensor, gain, offset, delay, frequency, measured, meter)
    return Corrections(name, location, measured, gain, offset, delay, tuple(notes))


def _frequency(capture: Capture) -> float:
    from labkit.core.waveform import analyze

    return float(analyze(capture.data[:1], capture.sample_rate, [(0, 0)]).frequency)


def _refuse_absurd(sensor: VoltageSensor | CurrentSensor, gain: float, offset: float, delay: float,
                   frequency: float, measured: float, meter: MeterReading) -> None:
    unit = "V" if sensor.kind == "voltage" else "A"
    if not (math.isfinite(gain) and abs(gain - 1.0) <= GAIN_LIMIT):
        msg = (f"calibration of sensor {sensor.id} refused: it reads {measured:.5g} {unit} against the reference "
               f"meter's {meter.value:.5g} {unit} (gain {gain:.4g}, {100 * (gain - 1):+.1f} %, more than "
               f"{100 * GAIN_LIMIT:.0f} %): check the sensor, its scale setting and the wiring; nothing was recorded")
        raise CalibrationError(msg)
    if abs(offset) > OFFSET_LIMIT * float(sensor.range):
        msg = (f"calibration of sensor {sensor.id} refused: an offset of {offset:.4g} {unit} is more than "
               f"{100 * OFFSET_LIMIT:.0f} % of its {float(sensor.range):g} {unit} range: check the sensor's zero and "
               "the wiring; nothing was recorded")
        raise CalibrationError(msg)
    skew_deg = 360.0 * frequency * delay
    if abs(skew_deg) > SKEW_LIMIT_DEG:
        msg = (f"calibration of sensor {sensor.id} refused: a skew of {skew_deg:.1f} deg at {frequency:.4g} Hz is more "
               f"than {SKEW_LIMIT_DEG:g} deg: check which channel is which and the sensor's reference direction; "
               "nothing was recorded")
        raise CalibrationError(msg)


def corrected_capture(capture: Capture, channels: Sequence[tuple[str, str, str, str]],
                      calibrations: Mapping[str, SensorCalibration]) -> tuple[Capture, list[str]]:
    """A capture with the stored corrections of its sensors applied through a channel map, and notes saying so.

    Parameters
    ----------
    capture
        Samples in physical units, laid out as ``channels`` (voltage first, then current).
    channels
        (channel name, kind, location, sensor id) per capture channel, as
        :func:`labkit.session.readings.channels_for` gives them; the capture's own kinds and
        locations take precedence where set.
    calibrations
        Sensor id -> its latest calibration.

    Returns
    -------
    capture, notes
        The capture unchanged (and no notes) when none of its sensors is calibrated.
    """
    sensors = [channels[k][3] if k < len(channels) else "" for k in range(len(capture.channels))]
    if not any(s in calibrations for s in sensors):
        return capture, []
    bindings = []
    for k, name in enumerate(capture.channels):
        kind = capture.kinds[k] or (channels[k][1] if k < len(channels) else "")
        location = capture.locations[k] or (channels[k][2] if k < len(channels) else "")
        if kind not in ("voltage", "current") or not location:
            msg = (f"capture channel {name}: no kind and location to bind it to sensor {sensors[k] or '?'} in the "
                   "channel map, so the stored calibration cannot be applied; give the capture a channel map")
            raise CalibrationError(msg)
        bindings.append(ChannelBinding(name, sensors[k] or f"channel_{name}", location, kind))  # type: ignore[arg-type]
    cmap = ChannelMap.of(bindings)
    notes = []
    for k, name in enumerate(capture.channels):
        cal = calibrations.get(sensors[k])
        if cal is None:
            continue
        cmap = cmap.with_calibration(replace(cal.correction, channel=name))
        notes.append(f"corrected by the calibration of sensor {cal.sensor}"
                     + (f" (event {cal.seq})" if cal.seq >= 0 else "") + f": {cal.summary}")
    return cmap.apply(capture).with_changes(notes=(*capture.notes, *notes)), notes


def seeded_gain_error(seed: int, sensor_id: str, *, low: float = 0.006, high: float = 0.015) -> float:
    """The simulated bench's gain error of a sensor, relative (invented demo data, reproducible from the seed).

    Its size is drawn uniformly in ``[low, high]`` and its sign at random, from the session's
    seed and the sensor's id.
    """
    import zlib

    rng = np.random.default_rng([int(seed) % 2**32, zlib.crc32(sensor_id.encode())])
    size = rng.uniform(low, high)
    return float(size if rng.random() < 0.5 else -size)
