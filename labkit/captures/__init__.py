"""Waveform captures: the Capture object, file import/export, channel maps, calibration and live sources.

The numeric analysis is in :mod:`labkit.core.waveform`; this package adds everything
that needs files, devices or time: readers and writers (CSV, NumPy ``.npz``, WAV,
IEEE C37.111 COMTRADE), the channel map that turns raw samples into volts and amperes
at bench locations, checks that need the file's context (time column, size), and
live sources (a folder watcher, a serial line, a simulated bench).
"""

from __future__ import annotations

from labkit.captures.capture import DEFAULT_MAX_BYTES, Capture, analyze_capture, read_capture
from labkit.captures.channelmap import ChannelBinding, ChannelMap

__all__ = ["DEFAULT_MAX_BYTES", "Capture", "ChannelBinding", "ChannelMap", "analyze_capture", "read_capture"]
