"""A simulated bench: realistic captures synthesized from per-channel phasor spectra.

The input is what a network solution gives: for each channel, a list of
``(order, complex RMS phasor)`` (order 0 is the dc value, real), plus the channel's kind.
The synthesis adds what a real acquisition adds: an off-nominal frequency, white noise at a
stated SNR, sensor gain error, and ADC quantization over a range (with clipping at the
range ends). The RNG is seeded, so a capture is reproducible.
"""

from __future__ import annotations

from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np

from labkit.captures.capture import Capture
from labkit.core.errors import CaptureError

Spectrum = Sequence[tuple[int, complex]]
"""(harmonic order, complex RMS phasor) pairs; order 0 is dc (a real value)."""


@dataclass(frozen=True)
class ChannelSpec:
    """How one simulated channel is acquired."""

    spectrum: Spectrum
    kind: str = "voltage"  # "voltage" or "current"
    location: str = ""
    unit: str = ""  # default from the kind
    snr_db: float | None = None  # signal RMS over white-noise RMS, dB; None: no noise
    gain_error: float = 0.0  # relative, e.g. 0.005 for +0.5 %
    adc_bits: int | None = None  # None: no quantization
    adc_range: float = 0.0  # converter range +-adc_range in the channel's units (required with adc_bits)


@dataclass
class SimulatedBench:
    """Synthesizes successive, phase-continuous captures of the given channels.

    Parameters
    ----------
    channels
        Channel name -> :class:`ChannelSpec` (or a bare spectrum: a noiseless voltage channel).
    sample_rate
        Hz.
    frequency
        Fundamental frequency, Hz (off-nominal values welcome).
    samples
        Samples per capture.
    seed
        Seed of the noise generator.
    """

    channels: Mapping[str, ChannelSpec | Spectrum]
    sample_rate: float = 10_000.0
    frequency: float = 60.0
    samples: int = 20_000
    seed: int = 0
    _rng: np.random.Generator = field(init=False, repr=False)
    _next_sample: int = field(init=False, default=0, repr=False)

    def __post_init__(self) -> None:
        self._rng = np.random.default_rng(self.seed)
        self._specs = {name: spec if isinstance(spec, ChannelSpec) else ChannelSpec(tuple(spec))
                       for name, spec in self.channels.items()}
        for name, spec in self._specs.items():
            for order, _ in spec.spectrum:
                if order < 0 or order * self.frequency >= self.sample_rate / 2:
                    msg = (f"channel {name}: order {order} ({order * self.frequency:g} Hz) is negative or at/above "
                           f"the Nyquist frequency {self.sample_rate / 2:g} Hz")
                    raise CaptureError(msg)
            if spec.adc_bits is not None and spec.adc_range <= 0:
                msg = f"channel {name}: adc_bits needs a positive adc_range"
                raise CaptureError(msg)

    def capture(self) -> Capture:
        """The next capture (time continues from the previous one)."""
        n0 = self._next_sample
        t = (n0 + np.arange(self.samples)) / self.sample_rate
        rows = []
        for spec in self._specs.values():
            orders = np.array([o for o, _ in spec.spectrum], dtype=float)
            phasors = np.array([complex(p) for _, p in spec.spectrum])
            # x = sum_h sqrt(2) Re(X_h e^{j h w t}); dc is X_0 itself
            weights = np.where(orders == 0, 1.0, np.sqrt(2.0))
            arg = 2.0 * np.pi * self.frequency * np.outer(orders, t)
            x = (weights * phasors.real) @ np.cos(arg) - (weights * phasors.imag) @ np.sin(arg) \
                if orders.size else np.zeros(self.samples)
            x = x * (1.0 + spec.gain_error)
            if spec.snr_db is not None:
                signal_rms = float(np.sqrt(np.sum(np.abs(phasors[orders > 0]) ** 2) + np.sum(
                    phasors[orders == 0].real ** 2)))
                x = x + self._rng.normal(0.0, signal_rms / 10 ** (spec.snr_db / 20.0), self.samples)
            if spec.adc_bits is not None:
                step = 2.0 * spec.adc_range / 2**spec.adc_bits
                top = 2 ** (spec.adc_bits - 1)
                x = np.clip(np.round(x / step), -top, top - 1) * step
            rows.append(x)
        self._next_sample += self.samples
        specs = list(self._specs.values())
        full = None
        if all(s.adc_bits is not None for s in specs):
            full = tuple((-s.adc_range, s.adc_range * (1 - 2.0 / 2**s.adc_bits)) for s in specs)  # type: ignore[operator]
        return Capture(
            data=np.vstack(rows), sample_rate=self.sample_rate, channels=tuple(self._specs),
            units=tuple(s.unit or ("V" if s.kind == "voltage" else "A") for s in specs),
            t0=n0 / self.sample_rate, kinds=tuple(s.kind for s in specs),
            locations=tuple(s.location for s in specs), full_scale=full, source="simulated",
            notes=("simulated bench (invented demo data)",))

    def __iter__(self) -> Iterator[Capture]:
        while True:
            yield self.capture()
