"""Calibration of a capture channel against a reference meter: gain, offset and skew corrections.

A calibrated value is ``gain * (value - offset)`` and the channel's samples are taken
``delay_s`` later than true time (so angles gain ``+h * w * delay_s``). The corrections
are stored as JSON and applied to later captures through the channel map
(:meth:`labkit.captures.channelmap.ChannelMap.with_calibration`).
"""

from __future__ import annotations

import json
from dataclasses import asdict, dataclass
from typing import Literal

import numpy as np

from labkit.captures.capture import Capture
from labkit.core.conventions import wrap_deg
from labkit.core.errors import CaptureError
from labkit.core.waveform import analyze


@dataclass(frozen=True)
class MeterReading:
    """A reading of a reference meter on the same signal as the capture channel.

    ``quantity`` is ``rms`` (true RMS, V or A) or ``dc``; the accuracy is
    ``± (pct_reading % of the reading + pct_full_scale % of full_scale)``.
    """

    value: float
    meter_id: str
    quantity: Literal["rms", "dc"] = "rms"
    pct_reading: float = 0.0
    pct_full_scale: float = 0.0
    full_scale: float = 0.0

    @property
    def uncertainty(self) -> float:
        """The meter's accuracy bound on this reading, in the reading's unit."""
        return abs(self.value) * self.pct_reading / 100.0 + self.full_scale * self.pct_full_scale / 100.0


@dataclass(frozen=True)
class Calibration:
    """Corrections for one channel: ``gain * (value - offset)``, samples ``delay_s`` behind true time."""

    channel: str
    gain: float = 1.0
    offset: float = 0.0
    delay_s: float = 0.0
    gain_uncertainty: float = 0.0  # relative, from the meter's accuracy
    meter_id: str = ""
    note: str = ""

    def to_json(self) -> str:
        """The calibration as JSON text."""
        return json.dumps(asdict(self), indent=2, sort_keys=True)

    @classmethod
    def from_json(cls, text: str) -> Calibration:
        """A calibration from :meth:`to_json` text."""
        try:
            return cls(**json.loads(text))
        except (TypeError, json.JSONDecodeError) as exc:
            msg = f"calibration JSON is not valid: {exc}; expected the keys of labkit.captures.calibration.Calibration"
            raise CaptureError(msg) from exc

    def apply(self, values: np.ndarray) -> np.ndarray:
        """Corrected values (the delay is applied by the analysis, not here)."""
        return self.gain * (np.asarray(values, dtype=float) - self.offset)


def calibrate_channel(
    capture: Capture,
    channel: str | int,
    rms_reading: MeterReading,
    *,
    dc_reading: MeterReading | None = None,
    remove_dc: bool = True,
) -> Calibration:
    """Gain and offset of one channel from reference-meter readings.

    Parameters
    ----------
    capture
        The capture, channel in physical units (after the channel map).
    channel
        Name or index.
    rms_reading
        The reference meter's true-RMS reading of the same signal.
    dc_reading
        The meter's dc reading; without it the true dc is taken as 0 when ``remove_dc``
        (an ac source), so the channel's mean is its offset.
    remove_dc
        Estimate an offset (False: offset 0, the gain alone matches the RMS).

    Returns
    -------
    Calibration
        ``gain = reference RMS / RMS of (channel - offset)``; ``gain_uncertainty`` is the
        meter's relative accuracy on the reading.
    """
    k = capture.index(channel)
    x = capture.data[k]
    if rms_reading.quantity != "rms" or rms_reading.value <= 0:
        msg = f"expected a positive true-RMS meter reading for channel {capture.channels[k]}, found {rms_reading}"
        raise CaptureError(msg)
    # true RMS and dc over whole cycles of the channel's own fundamental (the analysis window)
    own = analyze(x[np.newaxis, :], capture.sample_rate, [(0, 0)], names=[capture.channels[k]]).pairs[0]
    offset = 0.0
    if remove_dc:
        true_dc = 0.0 if dc_reading is None else dc_reading.value
        offset = own.v_dc - true_dc
    measured = float(np.sqrt(max(own.v_rms**2 - 2.0 * offset * own.v_dc + offset**2, 0.0)))
    if measured <= 0:
        msg = f"channel {capture.channels[k]} is all zero after removing its offset: nothing to calibrate against"
        raise CaptureError(msg)
    gain = rms_reading.value / measured
    return Calibration(channel=capture.channels[k], gain=gain, offset=offset,
                       gain_uncertainty=rms_reading.uncertainty / abs(rms_reading.value),
                       meter_id=rms_reading.meter_id,
                       note=f"gain from a true-RMS reading of {rms_reading.value:g}")


def calibrate_skew(
    capture: Capture,
    reference: str | int,
    channel: str | int,
    *,
    expected_phase_deg: float = 0.0,
    base: Calibration | None = None,
) -> Calibration:
    """Delay of ``channel`` behind ``reference`` from a signal pair of known phase.

    With a resistive load the current is in phase with the voltage (``expected_phase_deg = 0``);
    with one signal wired to two channels, likewise. The measured fundamental angle of
    ``channel`` relative to ``reference`` minus the expected one is the skew:
    ``delay = -(measured - expected) / (360 * f)``.

    Returns ``base`` (or a neutral calibration of ``channel``) with ``delay_s`` set.
    """
    kr, kc = capture.index(reference), capture.index(channel)
    result = analyze(capture.data[[kr, kc]], capture.sample_rate, [(0, 1)],
                     names=[capture.channels[kr], capture.channels[kc]])
    measured = result.pairs[0].phase
    if not np.isfinite(measured):
        msg = f"no fundamental on {capture.channels[kr]} or {capture.channels[kc]}: cannot measure the skew"
        raise CaptureError(msg)
    error_deg = float(wrap_deg(measured - expected_phase_deg))
    delay = -error_deg / (360.0 * result.frequency)
    start = base if base is not None else Calibration(channel=capture.channels[kc])
    return Calibration(channel=start.channel, gain=start.gain, offset=start.offset, delay_s=delay,
                       gain_uncertainty=start.gain_uncertainty, meter_id=start.meter_id,
                       note=(start.note + "; " if start.note else "") +
                       f"skew from a known phase of {expected_phase_deg:g} deg against {capture.channels[kr]}")
