"""The Capture object: sampled channels with their rate, names, units and acquisition facts."""

from __future__ import annotations

import os
from collections.abc import Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np
from numpy.typing import NDArray

from labkit.core.errors import CaptureError
from labkit.core.waveform import Pair, WaveformAnalysis, analyze

DEFAULT_MAX_BYTES = 256 * 1024 * 1024
"""Largest capture file (or decompressed .npz payload) read into memory, bytes."""


@dataclass(frozen=True, eq=False)
class Capture:
    """Sampled channels of one acquisition.

    Attributes
    ----------
    data
        Samples, (channels, samples), float64, in ``units``.
    sample_rate
        Hz.
    channels
        Channel names.
    units
        Unit of each channel's samples (``"V"``, ``"A"``, or ``""`` for raw converter units).
    t0
        Time of the first sample, s (relative to the file's own origin).
    kinds
        ``"voltage"``, ``"current"`` or ``""`` per channel (set by a channel map).
    locations
        Bench location of each channel (set by a channel map), ``""`` when unknown.
    delays_s
        Per-channel delay of the samples behind true time, s (sensor skew).
    full_scale
        Converter limits per channel as (low, high) in ``units``, or None when unknown.
    ac_coupled
        True when the acquisition removes dc (sound cards): dc readings are unavailable.
    source
        Where the capture came from (a path, a port, ``simulated``).
    notes
        Facts about the acquisition worth keeping with the readings (e.g. lines dropped).
    """

    data: NDArray[np.float64]
    sample_rate: float
    channels: tuple[str, ...]
    units: tuple[str, ...] = ()
    t0: float = 0.0
    kinds: tuple[str, ...] = ()
    locations: tuple[str, ...] = ()
    delays_s: tuple[float, ...] = ()
    full_scale: tuple[tuple[float, float], ...] | None = None
    ac_coupled: bool = False
    source: str = ""
    notes: tuple[str, ...] = field(default=())

    def __post_init__(self) -> None:
        data = np.asarray(self.data, dtype=np.float64)
        if data.ndim == 1:
            data = data[np.newaxis, :]
        if data.ndim != 2:
            msg = f"capture data must be (channels, samples), found {data.ndim} dimensions"
            raise CaptureError(msg)
        object.__setattr__(self, "data", data)
        count = data.shape[0]
        if len(self.channels) != count:
            msg = f"capture has {count} channels but {len(self.channels)} names"
            raise CaptureError(msg)
        if not (self.sample_rate > 0 and np.isfinite(self.sample_rate)):
            msg = f"capture sample rate must be a positive number of Hz, found {self.sample_rate}"
            raise CaptureError(msg)
        for name, default in (("units", ""), ("kinds", ""), ("locations", ""), ("delays_s", 0.0)):
            value = getattr(self, name)
            if not value:
                object.__setattr__(self, name, (default,) * count)
            elif len(value) != count:
                msg = f"capture has {count} channels but {len(value)} {name}"
                raise CaptureError(msg)

    @property
    def samples(self) -> int:
        """Samples per channel."""
        return int(self.data.shape[1])

    @property
    def duration(self) -> float:
        """Length of the capture, s (samples / sample rate)."""
        return self.samples / self.sample_rate

    def index(self, channel: str | int) -> int:
        """Index of a channel given by name or 0-based index (an all-digit string is an index)."""
        if isinstance(channel, int) or (isinstance(channel, str) and channel.strip().isdigit()
                                        and channel not in self.channels):
            k = int(channel)
            if not 0 <= k < len(self.channels):
                msg = f"channel index {k} is outside the capture's {len(self.channels)} channels {list(self.channels)}"
                raise CaptureError(msg)
            return k
        if channel in self.channels:
            return self.channels.index(channel)
        from labkit.core.errors import did_you_mean

        hint = did_you_mean(channel, self.channels)
        msg = f'no channel "{channel}" in the capture{hint}; it has {list(self.channels)}'
        raise CaptureError(msg)

    def with_changes(self, **changes: object) -> Capture:
        """A copy with some fields replaced."""
        return replace(self, **changes)  # type: ignore[arg-type]


def check_file_size(path: Path, max_bytes: int) -> int:
    """Refuse a file larger than ``max_bytes``; return its size in bytes."""
    size = os.stat(path).st_size
    if size > max_bytes:
        msg = (f"{path}: file is {size:,} bytes, above the limit of {max_bytes:,} bytes for reading a capture "
               "into memory; split the capture or raise max_bytes")
        raise CaptureError(msg)
    return size


def read_capture(path: str | os.PathLike[str], *, rate: float | None = None,
                 max_bytes: int = DEFAULT_MAX_BYTES) -> Capture:
    """Read a capture file by its extension: ``.csv``/``.txt``, ``.npz``, ``.wav``, ``.cfg`` (COMTRADE).

    Parameters
    ----------
    path
        The file.
    rate
        Sample rate, Hz, for CSV files that carry neither a time column nor a rate header.
    max_bytes
        Largest file (decompressed payload for ``.npz``) read into memory.
    """
    p = Path(path)
    suffix = p.suffix.lower()
    if not p.is_file():
        msg = f"{p}: no such capture file"
        raise CaptureError(msg)
    if suffix in (".csv", ".txt"):
        from labkit.captures.csvio import read_csv

        return read_csv(p, rate=rate, max_bytes=max_bytes)
    if suffix == ".npz":
        from labkit.captures.npzio import read_npz

        return read_npz(p, max_bytes=max_bytes)
    if suffix == ".wav":
        from labkit.captures.wavio import read_wav

        return read_wav(p, max_bytes=max_bytes)
    if suffix in (".cfg", ".dat"):
        from labkit.captures.comtrade import read_comtrade

        return read_comtrade(p.with_suffix(".cfg") if suffix == ".dat" else p, max_bytes=max_bytes).capture()
    msg = f"{p}: unknown capture file type {suffix!r}; expected .csv, .txt, .npz, .wav or .cfg"
    raise CaptureError(msg)


def analyze_capture(
    capture: Capture,
    pairs: Sequence[Pair | tuple[str | int, str | int]] | None = None,
    **options: object,
) -> WaveformAnalysis:
    """Analyse a capture with :func:`labkit.core.waveform.analyze`.

    Parameters
    ----------
    capture
        Samples in physical units (apply a :class:`~labkit.captures.channelmap.ChannelMap` first
        for raw captures).
    pairs
        (voltage, current) channels by name or index; default: pair every current channel with
        the voltage channel at its bus (from the capture's kinds and locations).
    options
        Passed on to :func:`labkit.core.waveform.analyze` (e.g. ``strict``, ``min_cycles``).
    """
    if pairs is None:
        from labkit.captures.channelmap import pairs_from_capture

        pair_list = pairs_from_capture(capture)
    else:
        pair_list = [p if isinstance(p, Pair) else Pair(capture.index(p[0]), capture.index(p[1])) for p in pairs]
    if not pair_list:
        msg = "no voltage/current pair to analyse: give pairs, or a channel map with voltage and current channels"
        raise CaptureError(msg)
    full_scale = None
    if capture.full_scale is not None:
        full_scale = np.asarray(capture.full_scale, dtype=float)
    return analyze(capture.data, capture.sample_rate, pair_list, names=capture.channels,
                   delays_s=np.asarray(capture.delays_s, dtype=float) if any(capture.delays_s) else None,
                   full_scale=full_scale, ac_coupled=capture.ac_coupled, **options)  # type: ignore[arg-type]
