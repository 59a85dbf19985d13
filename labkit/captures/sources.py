"""Live capture sources behind one small interface: anything that yields :class:`Capture` objects.

- :class:`FolderWatcher`: a DAQ program drops CSV files into a folder; a file is read once it
  is complete (its size and modification time stable across two polls, or its sentinel file
  ``NAME.done`` present) and only when it resolves (symlinks followed) inside the folder.
- :class:`SerialLineSource`: a microcontroller board prints lines of comma-separated samples;
  blocks of ``block_samples`` lines become captures (pyserial).
- :class:`labkit.captures.simulate.SimulatedBench`: synthesized captures.
"""

from __future__ import annotations

import time
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Protocol, runtime_checkable

import numpy as np

from labkit.captures.capture import DEFAULT_MAX_BYTES, Capture, read_capture
from labkit.core.errors import CaptureError


@runtime_checkable
class CaptureSource(Protocol):
    """A live source: iterating it yields captures as they arrive."""

    def __iter__(self) -> Iterator[Capture]: ...


@dataclass
class FolderWatcher:
    """Yields a capture for every complete new file in ``folder`` matching ``pattern``.

    Parameters
    ----------
    folder
        The folder the acquisition program writes to.
    pattern
        Glob of capture files.
    sentinel_suffix
        When set (e.g. ``".done"``), a file is complete once ``NAME + suffix`` exists;
        otherwise once its size and modification time are unchanged across two polls.
    rate
        Sample rate for files without one.
    poll_s
        Seconds between polls when iterating.
    """

    folder: str | Path
    pattern: str = "*.csv"
    sentinel_suffix: str | None = None
    rate: float | None = None
    poll_s: float = 0.5
    max_bytes: int = DEFAULT_MAX_BYTES
    errors: list[str] = field(default_factory=list)
    _seen: set[Path] = field(default_factory=set, repr=False)
    _sizes: dict[Path, tuple[int, int]] = field(default_factory=dict, repr=False)

    def __post_init__(self) -> None:
        self._root = Path(self.folder).resolve()
        if not self._root.is_dir():
            msg = f"{self.folder}: not a folder to watch"
            raise CaptureError(msg)

    def poll(self) -> list[Capture]:
        """One look at the folder: the captures of the files that became complete since the last poll.

        A file that fails to read is not retried; its error is appended to :attr:`errors`.
        """
        ready: list[Capture] = []
        for path in sorted(self._root.glob(self.pattern)):
            real = path.resolve()
            if real in self._seen or not real.is_file():
                continue
            if not real.is_relative_to(self._root):
                self._seen.add(real)
                self.errors.append(f"{path}: resolves to {real}, outside {self._root}; ignored")
                continue
            if self.sentinel_suffix is not None:
                if not path.with_name(path.name + self.sentinel_suffix).exists():
                    continue
            else:
                stat = real.stat()
                now = (stat.st_size, stat.st_mtime_ns)
                before = self._sizes.get(real)
                self._sizes[real] = now
                if before != now or stat.st_size == 0:
                    continue
            self._seen.add(real)
            try:
                ready.append(read_capture(real, rate=self.rate, max_bytes=self.max_bytes))
            except CaptureError as exc:
                self.errors.append(str(exc))
        return ready

    def __iter__(self) -> Iterator[Capture]:
        while True:
            yield from self.poll()
            time.sleep(self.poll_s)


@dataclass
class SerialLineSource:
    """Captures from lines of comma-separated samples on a serial line.

    Parameters
    ----------
    port
        A device path (opened with pyserial) or an already open object with ``readline()``.
    sample_rate
        The board's sample rate, Hz (lines carry no time).
    channels
        Channel names, one per field of a line.
    block_samples
        Lines per capture.
    baudrate, timeout_s
        Serial settings; ``timeout_s`` bounds each read (``None``: block).

    A malformed line (wrong field count, not numbers) breaks the sample sequence: the
    block in progress is dropped and counted in :attr:`dropped_blocks`, and the next
    capture's notes say so, so no capture ever spans a gap.
    """

    port: str | Any
    sample_rate: float
    channels: Sequence[str]
    block_samples: int = 1000
    baudrate: int = 115200
    timeout_s: float | None = 1.0
    dropped_blocks: int = 0
    _pending_note: str = field(default="", repr=False)

    def __post_init__(self) -> None:
        if isinstance(self.port, str):
            import serial

            self._line = serial.Serial(self.port, self.baudrate, timeout=self.timeout_s)
        else:
            self._line = self.port
        self._rows: list[list[float]] = []

    def close(self) -> None:
        """Close the serial port (when this source opened it)."""
        if isinstance(self.port, str):
            self._line.close()

    def read_capture(self) -> Capture | None:
        """Read lines until a block is complete; None when the line times out first."""
        width = len(self.channels)
        while len(self._rows) < self.block_samples:
            raw = self._line.readline()
            if not raw:
                return None
            text = raw.decode("ascii", errors="replace").strip() if isinstance(raw, bytes) else str(raw).strip()
            if not text:
                continue
            fields = text.split(",")
            try:
                values = [float(f) for f in fields]
            except ValueError:
                values = []
            if len(values) != width or not np.all(np.isfinite(values)):
                self.dropped_blocks += 1
                self._pending_note = (f"{self.dropped_blocks} block(s) dropped: malformed line {text[:40]!r} "
                                      f"(expected {width} numbers)")
                self._rows = []
                continue
            self._rows.append(values)
        data = np.asarray(self._rows, dtype=np.float64).T
        self._rows = []
        notes = (self._pending_note,) if self._pending_note else ()
        self._pending_note = ""
        return Capture(data=data, sample_rate=self.sample_rate, channels=tuple(self.channels),
                       source=f"serial {self.port if isinstance(self.port, str) else 'line'}", notes=notes)

    def __iter__(self) -> Iterator[Capture]:
        while True:
            cap = self.read_capture()
            if cap is None:
                return
            yield cap
