"""The channel map: which bench sensor and location each capture channel measures, and how to scale it.

A binding turns raw samples (converter volts) into physical units::

    physical = sign * (raw - offset) / scale           # then, when calibrated,
    physical = gain * (physical - cal_offset)

``scale`` is the sensor's output per measured unit: V/V for voltage sensors (0.01 for a
100:1 divider), V/A for current sensors (0.1 for a 100 mV/A clamp). ``delay_s`` is how
long the channel's samples lag true time (sensor and converter skew); it corrects the
phasor angles in the analysis. ``sign`` is -1 for a current sensor mounted against its
reference direction.
"""

from __future__ import annotations

import json
from collections.abc import Iterable, Sequence
from dataclasses import asdict, dataclass, field, replace
from typing import TYPE_CHECKING, Literal

import numpy as np

from labkit.core.errors import CaptureError
from labkit.core.locations import parse_location
from labkit.core.waveform import Pair

if TYPE_CHECKING:
    from labkit.captures.calibration import Calibration
    from labkit.captures.capture import Capture

SensorKind = Literal["voltage", "current"]


@dataclass(frozen=True)
class ChannelBinding:
    """One capture channel bound to a bench sensor and location."""

    channel: str
    sensor_id: str
    location: str
    kind: SensorKind
    scale: float = 1.0  # sensor output per measured unit: V/V or V/A
    offset: float = 0.0  # raw units
    delay_s: float = 0.0
    sign: int = 1
    gain: float = 1.0  # calibration gain on the physical value
    cal_offset: float = 0.0  # calibration offset, physical units
    voltage_channel: str = ""  # current sensors: the voltage channel to pair with (default: the one at its bus)

    def __post_init__(self) -> None:
        if self.kind not in ("voltage", "current"):
            msg = f'channel {self.channel}: kind must be "voltage" or "current", found "{self.kind}"'
            raise CaptureError(msg)
        if not (np.isfinite(self.scale) and self.scale != 0):
            unit = "V/V" if self.kind == "voltage" else "V/A"
            msg = f"channel {self.channel}: scale must be a non-zero sensor output in {unit}, found {self.scale}"
            raise CaptureError(msg)
        if self.sign not in (1, -1):
            msg = f"channel {self.channel}: sign must be 1 or -1, found {self.sign}"
            raise CaptureError(msg)
        parse_location(self.location)

    @property
    def unit(self) -> str:
        """The physical unit of the channel: V or A."""
        return "V" if self.kind == "voltage" else "A"

    def convert(self, raw: np.ndarray) -> np.ndarray:
        """Raw samples to physical units (see the module docstring)."""
        physical = self.sign * (raw - self.offset) / self.scale
        return self.gain * (physical - self.cal_offset)

    def with_calibration(self, calibration: Calibration) -> ChannelBinding:
        """This binding with a calibration's gain, offset and skew applied on top."""
        return replace(self, gain=self.gain * calibration.gain,
                       cal_offset=self.cal_offset + calibration.offset / self.gain,
                       delay_s=self.delay_s + calibration.delay_s)


@dataclass(frozen=True)
class ChannelMap:
    """Bindings of capture channels; channels not bound are dropped by :meth:`apply`."""

    bindings: tuple[ChannelBinding, ...] = field(default=())

    @classmethod
    def of(cls, bindings: Iterable[ChannelBinding]) -> ChannelMap:
        """A map from bindings, refusing a channel bound twice."""
        items = tuple(bindings)
        names = [b.channel for b in items]
        dup = sorted({n for n in names if names.count(n) > 1})
        if dup:
            msg = f"channel(s) {dup} bound more than once in the channel map"
            raise CaptureError(msg)
        return cls(items)

    def binding(self, channel: str) -> ChannelBinding:
        """The binding of ``channel``."""
        for b in self.bindings:
            if b.channel == channel:
                return b
        msg = f'channel "{channel}" is not in the channel map ({[b.channel for b in self.bindings]})'
        raise CaptureError(msg)

    def with_calibration(self, calibration: Calibration) -> ChannelMap:
        """The map with ``calibration`` applied to its channel."""
        return ChannelMap(tuple(b.with_calibration(calibration) if b.channel == calibration.channel else b
                                for b in self.bindings))

    def apply(self, capture: Capture) -> Capture:
        """Scale, offset, sign and calibrate the bound channels; carry kinds, locations and delays."""
        rows = []
        for b in self.bindings:
            k = capture.index(b.channel)
            rows.append(b.convert(capture.data[k]))
        full_scale = None
        if capture.full_scale is not None:
            limits = []
            for b in self.bindings:
                lo, hi = capture.full_scale[capture.index(b.channel)]
                ends = sorted((float(b.convert(np.array(lo))), float(b.convert(np.array(hi)))))
                limits.append((ends[0], ends[1]))
            full_scale = tuple(limits)
        return capture.with_changes(
            data=np.vstack(rows) if rows else np.empty((0, capture.samples)),
            channels=tuple(b.channel for b in self.bindings), units=tuple(b.unit for b in self.bindings),
            kinds=tuple(b.kind for b in self.bindings), locations=tuple(b.location for b in self.bindings),
            delays_s=tuple(b.delay_s + capture.delays_s[capture.index(b.channel)] for b in self.bindings),
            full_scale=full_scale)

    def to_json(self) -> str:
        """The map as JSON text."""
        return json.dumps({"bindings": [asdict(b) for b in self.bindings]}, indent=2)

    @classmethod
    def from_json(cls, text: str) -> ChannelMap:
        """A map from :meth:`to_json` text."""
        try:
            raw = json.loads(text)
            return cls.of(ChannelBinding(**item) for item in raw["bindings"])
        except (KeyError, TypeError, json.JSONDecodeError) as exc:
            msg = f"channel map JSON is not valid: {exc}; expected {{\"bindings\": [{{channel, sensor_id, ...}}]}}"
            raise CaptureError(msg) from exc


def pairs_from_capture(capture: Capture) -> list[Pair]:
    """Pair each current channel with its voltage channel.

    A current at ``L12@B1`` pairs with the voltage at ``B1``; a current at ``B1`` or
    ``sensor:X`` pairs with a voltage at the same location. The pair's location is the
    current's.
    """
    voltages = {loc: k for k, (kind, loc) in enumerate(zip(capture.kinds, capture.locations, strict=True))
                if kind == "voltage"}
    pairs: list[Pair] = []
    for k, (kind, loc) in enumerate(zip(capture.kinds, capture.locations, strict=True)):
        if kind != "current":
            continue
        where = parse_location(loc)
        bus = where.bus if where.kind == "end" else loc
        if bus in voltages:
            pairs.append(Pair(voltages[bus], k, loc))
        elif len(voltages) == 1:
            pairs.append(Pair(next(iter(voltages.values())), k, loc))
        else:
            msg = f'current channel {capture.channels[k]} at "{loc}" has no voltage channel at "{bus}"'
            raise CaptureError(msg)
    return pairs


def simple_map(voltage: str, current: str, *, v_scale: float = 1.0, i_scale: float = 1.0,
               location: str = "B1") -> ChannelMap:
    """A map of one voltage/current pair at ``location`` (for the command line and quick checks)."""
    return ChannelMap.of([
        ChannelBinding(voltage, f"sensor_{voltage}", location, "voltage", v_scale),
        ChannelBinding(current, f"sensor_{current}", location, "current", i_scale),
    ])


def names_of(bindings: Sequence[ChannelBinding]) -> list[str]:
    """Channel names of bindings, in order."""
    return [b.channel for b in bindings]
