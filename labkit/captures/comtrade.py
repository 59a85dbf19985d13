"""IEEE C37.111 COMTRADE captures: read the 1999 and 2013 revisions, write either (ASCII or BINARY).

Supported when reading
    - configuration (.cfg) of revision 1999 or 2013 (and the 1991 layout, which lacks the
      revision year and the time multiplier);
    - data (.dat) of file type ``ASCII``, ``BINARY`` (16-bit), ``BINARY32`` (32-bit integer)
      and ``FLOAT32`` (32-bit IEEE float); digital (status) channels are read past and ignored;
    - one or more sampling-rate sections (``nrates`` lines ``samp,endsamp``): each section
      is a capture of its own (:meth:`ComtradeRecord.captures`); ``nrates = 0`` (time from the
      timestamps alone) is accepted when the timestamps are evenly spaced;
    - the time multiplier ``timemult`` on the timestamps, the ``a * x + b`` channel scaling,
      and the primary/secondary factors with the P/S flag (values are returned as primary
      by default);
    - missing samples (ASCII 99999 or an empty field, BINARY -32768, BINARY32 -2**31) are
      refused with the channel and sample number.

Written
    ``ASCII`` and ``BINARY`` data, revision 1999 or 2013, one sampling-rate section, analog
    channels only, primary values (P), integer codes with ``a * x + b`` scaling.
"""

from __future__ import annotations

import datetime as dt
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Literal

import numpy as np
from numpy.typing import NDArray

from labkit.captures.capture import DEFAULT_MAX_BYTES, Capture, check_file_size
from labkit.core.errors import CaptureError
from labkit.core.waveform import check_time_axis

_PREFIX = {"": 1.0, "m": 1e-3, "u": 1e-6, "k": 1e3, "M": 1e6}
_FILE_TYPES = ("ASCII", "BINARY", "BINARY32", "FLOAT32")


@dataclass(frozen=True)
class AnalogChannel:
    """One analog channel line of a .cfg file (clause: analog channel information)."""

    index: int
    name: str
    phase: str
    circuit: str
    unit: str
    a: float
    b: float
    skew_us: float
    min_code: float
    max_code: float
    primary: float
    secondary: float
    ps: str


@dataclass(frozen=True, eq=False)
class ComtradeRecord:
    """A COMTRADE record read from a .cfg/.dat pair."""

    station: str
    device: str
    revision: str
    line_frequency: float
    file_type: str
    timemult: float
    analog: tuple[AnalogChannel, ...]
    rates: tuple[tuple[float, int], ...]  # (samples per second, last sample number of the section)
    data: NDArray[np.float64]  # (analog channels, samples), SI units, primary or secondary as asked
    units: tuple[str, ...]
    time: NDArray[np.float64]  # s, from the rates (or the timestamps when nrates = 0)
    timestamps: NDArray[np.float64]  # s, from the data file times timemult
    start: str
    source: str

    def captures(self) -> list[Capture]:
        """One capture per sampling-rate section."""
        out = []
        first = 0
        for rate, last in self.rates:
            stop = min(last, self.data.shape[1])
            if stop - first < 2:
                first = stop
                continue
            out.append(Capture(
                data=self.data[:, first:stop], sample_rate=rate, channels=tuple(c.name for c in self.analog),
                units=self.units, t0=float(self.time[first]),
                delays_s=tuple(-c.skew_us * 1e-6 for c in self.analog),  # skew: sampled later -> leads
                source=f"{self.source} (rate section {len(out) + 1}: {rate:g} Hz)"))
            first = stop
        return out

    def capture(self, section: int | None = None) -> Capture:
        """The capture of one sampling-rate section (1-based); without ``section`` there must be one."""
        sections = self.captures()
        if section is None:
            if len(sections) != 1:
                listing = ", ".join(f"{k + 1}: {c.sample_rate:g} Hz x {c.samples}" for k, c in enumerate(sections))
                msg = f"{self.source}: {len(sections)} sampling-rate sections ({listing}); choose one"
                raise CaptureError(msg)
            return sections[0]
        if not 1 <= section <= len(sections):
            msg = f"{self.source}: section {section} does not exist; the record has {len(sections)}"
            raise CaptureError(msg)
        return sections[section - 1]


class _Lines:
    def __init__(self, text: str, source: str) -> None:
        self.lines = [ln.rstrip("\r") for ln in text.split("\n")]
        self.at = 0
        self.source = source

    def next(self, what: str, count: int | None = None) -> list[str]:
        while self.at < len(self.lines) and not self.lines[self.at].strip() and what != "lf":
            self.at += 1
        if self.at >= len(self.lines):
            msg = f"{self.source}: file ends before the {what} line"
            raise CaptureError(msg)
        fields = [f.strip() for f in self.lines[self.at].split(",")]
        self.at += 1
        if count is not None and len(fields) < count:
            msg = f"{self.source}:{self.at}: {what} line has {len(fields)} fields, expected {count}"
            raise CaptureError(msg)
        return fields

    def optional(self) -> list[str] | None:
        while self.at < len(self.lines) and not self.lines[self.at].strip():
            self.at += 1
        if self.at >= len(self.lines):
            return None
        self.at += 1
        return [f.strip() for f in self.lines[self.at - 1].split(",")]

    def error(self, message: str) -> CaptureError:
        return CaptureError(f"{self.source}:{self.at}: {message}")


def _number(text: str, what: str, lines: _Lines, default: float | None = None) -> float:
    if text == "" and default is not None:
        return default
    try:
        return float(text)
    except ValueError:
        msg = f"{what} must be a number, found {text!r}"
        raise lines.error(msg) from None


def _si_unit(unit: str) -> tuple[str, float]:
    """``kV`` -> (``V``, 1000): the SI unit and the factor to it."""
    u = unit.strip()
    for base in ("V", "A"):
        if u.endswith(base) and u[:-1] in _PREFIX:
            return base, _PREFIX[u[:-1]]
    return u, 1.0


def read_comtrade(
    cfg_path: str | Path,
    dat_path: str | Path | None = None,
    *,
    values: Literal["primary", "secondary", "as_recorded"] = "primary",
    max_bytes: int = DEFAULT_MAX_BYTES,
) -> ComtradeRecord:
    """Read a COMTRADE record (see the module docstring for what is supported).

    Parameters
    ----------
    cfg_path
        The .cfg file; the .dat file defaults to the same name with ``.dat``.
    values
        ``primary`` (default) or ``secondary`` values by the channel's primary/secondary
        factors and P/S flag, or the ``a * x + b`` values as recorded.
    max_bytes
        Largest .dat file read.
    """
    cfg = Path(cfg_path)
    dat = Path(dat_path) if dat_path is not None else cfg.with_suffix(".dat")
    if not dat.exists() and cfg.with_suffix(".DAT").exists():
        dat = cfg.with_suffix(".DAT")
    lines = _Lines(cfg.read_text(encoding="utf-8", errors="replace"), str(cfg))
    head = lines.next("station")
    station, device = head[0], head[1] if len(head) > 1 else ""
    revision = head[2] if len(head) > 2 and head[2] else "1991"
    if revision not in ("1991", "1999", "2013"):
        msg = f"revision year {revision!r} is not supported; expected 1999 or 2013"
        raise lines.error(msg)
    counts = lines.next("channel count", 3)
    total = int(_number(counts[0], "TT", lines))
    if not (counts[1].upper().endswith("A") and counts[2].upper().endswith("D")):
        msg = f"channel counts must read like '4,3A,1D', found {','.join(counts)}"
        raise lines.error(msg)
    n_analog, n_digital = int(counts[1][:-1]), int(counts[2][:-1])
    if n_analog + n_digital != total:
        msg = f"TT = {total} but {n_analog}A + {n_digital}D"
        raise lines.error(msg)
    analog = []
    width = 13 if revision != "1991" else 10
    for _ in range(n_analog):
        f = lines.next("analog channel", width)
        primary = _number(f[10], "primary", lines, 1.0) if width == 13 else 1.0
        secondary = _number(f[11], "secondary", lines, 1.0) if width == 13 else 1.0
        ps = (f[12].upper() if width == 13 else "P") or "P"
        if ps not in ("P", "S"):
            msg = f"PS flag must be P or S, found {f[12]!r}"
            raise lines.error(msg)
        analog.append(AnalogChannel(int(_number(f[0], "An", lines)), f[1], f[2], f[3], f[4],
                                    _number(f[5], "a", lines), _number(f[6], "b", lines, 0.0),
                                    _number(f[7], "skew", lines, 0.0), _number(f[8], "min", lines),
                                    _number(f[9], "max", lines), primary, secondary, ps))
    for _ in range(n_digital):
        lines.next("status channel", 3)
    lf = _number(lines.next("line frequency")[0], "lf", lines, 0.0)
    nrates = int(_number(lines.next("nrates")[0], "nrates", lines))
    rates = []
    for _ in range(max(nrates, 1)):
        f = lines.next("sampling rate", 2)
        rates.append((_number(f[0], "samp", lines), int(_number(f[1], "endsamp", lines))))
    start = ",".join(lines.next("start time", 2))
    lines.next("trigger time", 2)
    file_type = lines.next("file type")[0].upper()
    if file_type not in _FILE_TYPES:
        msg = f"file type {file_type!r} is not supported; expected one of {_FILE_TYPES}"
        raise lines.error(msg)
    timemult = 1.0
    if revision != "1991":
        f = lines.optional()
        if f is not None and f[0]:
            timemult = _number(f[0], "timemult", lines)
    time_unit = 1e-9 if len(start.rsplit(".", 1)[-1]) > 6 else 1e-6  # ns when the dates carry 9 digits

    if not dat.exists():
        msg = f"{dat}: data file of {cfg} not found"
        raise CaptureError(msg)
    check_file_size(dat, max_bytes)
    if file_type == "ASCII":
        codes, stamps, numbers = _read_ascii(dat, n_analog, n_digital)
    else:
        codes, stamps, numbers = _read_binary(dat, file_type, n_analog, n_digital)
    samples = codes.shape[1]
    for k, ch in enumerate(analog):
        bad = np.flatnonzero(np.isnan(codes[k]))
        if bad.size:
            msg = (f"{dat}: channel {ch.name} has {bad.size} missing sample(s), first at sample number "
                   f"{int(numbers[bad[0]])}; expected complete data")
            raise CaptureError(msg)
    a = np.array([c.a for c in analog])[:, None]
    b = np.array([c.b for c in analog])[:, None]
    data = a * codes + b
    factors = []
    units = []
    for ch in analog:
        unit, to_si = _si_unit(ch.unit)
        factor = to_si
        ratio = ch.primary / ch.secondary if ch.secondary else 1.0
        if values == "primary" and ch.ps == "S":
            factor *= ratio
        elif values == "secondary" and ch.ps == "P":
            factor /= ratio
        factors.append(factor)
        units.append(unit)
    data = data * np.array(factors)[:, None]
    timestamps = stamps * timemult * time_unit
    if nrates == 0 or rates[0][0] == 0:
        rate = check_time_axis(timestamps)
        rates = [(rate, samples)]
        time = timestamps - timestamps[0]
    else:
        steps = np.empty(samples)
        first = 0
        for rate, last in rates:
            if rate <= 0:
                msg = f"sampling rate {rate:g} must be positive"
                raise lines.error(msg)
            steps[first:last] = 1.0 / rate
            first = last
        if first < samples:
            msg = f"{cfg}: the rate sections end at sample {first} but the data holds {samples} samples"
            raise CaptureError(msg)
        # each sample is 1/samp after the previous one, samp being the rate of the section it belongs to
        time = np.concatenate([[0.0], np.cumsum(steps[1:])])
    return ComtradeRecord(station=station, device=device, revision=revision, line_frequency=lf,
                          file_type=file_type, timemult=timemult, analog=tuple(analog),
                          rates=tuple((float(r), int(e)) for r, e in rates), data=data, units=tuple(units),
                          time=time, timestamps=timestamps, start=start, source=str(cfg))


def _read_ascii(path: Path, n_analog: int, n_digital: int) -> tuple[NDArray[np.float64], NDArray[np.float64],
                                                                      NDArray[np.float64]]:
    rows = [ln for ln in path.read_text(encoding="utf-8", errors="replace").splitlines() if ln.strip()
            and ln.strip() != "\x1a"]
    width = 2 + n_analog + n_digital
    table = np.full((len(rows), width), np.nan)
    for r, line in enumerate(rows):
        fields = line.split(",")
        if len(fields) < width:
            msg = (f"{path}:{r + 1}: {len(fields)} fields, expected {width} "
                   f"(n, timestamp, {n_analog} analog, {n_digital} status)")
            raise CaptureError(msg)
        for c in range(width):
            text = fields[c].strip()
            if text:
                try:
                    table[r, c] = float(text)
                except ValueError:
                    msg = f"{path}:{r + 1}: field {c + 1} is {text!r}, expected a number"
                    raise CaptureError(msg) from None
    codes = table[:, 2:2 + n_analog].T.copy()
    codes[codes == 99999] = np.nan  # the 1999 ASCII missing-data value
    return codes, np.nan_to_num(table[:, 1]), table[:, 0]


def _read_binary(path: Path, file_type: str, n_analog: int, n_digital: int) -> tuple[
        NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    code_type = {"BINARY": "<i2", "BINARY32": "<i4", "FLOAT32": "<f4"}[file_type]
    words = math.ceil(n_digital / 16)
    record = np.dtype([("n", "<u4"), ("t", "<u4"), ("a", code_type, (n_analog,)), ("d", "<u2", (words,))])
    raw = path.read_bytes()
    if len(raw) % record.itemsize:
        msg = (f"{path}: {len(raw)} bytes is not a whole number of {record.itemsize}-byte records "
               f"({file_type}, {n_analog} analog, {n_digital} status channels)")
        raise CaptureError(msg)
    table = np.frombuffer(raw, dtype=record)
    codes = table["a"].T.astype(np.float64)
    if file_type == "BINARY":
        codes[table["a"].T == -32768] = np.nan
    elif file_type == "BINARY32":
        codes[table["a"].T == -(2**31)] = np.nan
    return codes, table["t"].astype(np.float64), table["n"].astype(np.float64)


def write_comtrade(
    capture: Capture,
    path: str | Path,
    *,
    revision: Literal["1999", "2013"] = "1999",
    file_type: Literal["ASCII", "BINARY"] = "BINARY",
    station: str = "labkit bench",
    device: str = "capture",
    line_frequency: float = 60.0,
    start: dt.datetime | None = None,
) -> tuple[Path, Path]:
    """Write a capture as a COMTRADE .cfg/.dat pair; returns the two paths.

    Samples are stored as integer codes with ``a * x + b`` scaling (16-bit for BINARY,
    +-99998 for ASCII, below the 99999 missing-data value), primary values, one sampling-rate
    section; channel skew from the capture's delays.
    """
    if revision not in ("1999", "2013"):
        msg = f"COMTRADE revision must be 1999 or 2013, found {revision!r}"
        raise CaptureError(msg)
    if file_type not in ("ASCII", "BINARY"):
        msg = f"COMTRADE file type for writing must be ASCII or BINARY, found {file_type!r}"
        raise CaptureError(msg)
    base = Path(path).with_suffix("")
    cfg, dat = base.with_suffix(".cfg"), base.with_suffix(".dat")
    top = 32767 if file_type == "BINARY" else 99998
    hi = capture.data.max(axis=1)
    lo = capture.data.min(axis=1)
    b = 0.5 * (hi + lo)
    a = np.where(hi > lo, (hi - lo) / (2.0 * top), 1.0)
    codes = np.clip(np.round((capture.data - b[:, None]) / a[:, None]), -top, top).astype(np.int64)
    n = capture.samples
    t_us = np.arange(n) / capture.sample_rate * 1e6
    timemult = max(1.0, math.ceil(t_us[-1] / 4.0e9)) if n else 1.0  # keep timestamps inside uint32
    stamps = np.round(t_us / timemult).astype(np.int64)
    when = start or dt.datetime(2000, 1, 1)
    stamp = when.strftime("%d/%m/%Y,%H:%M:%S.%f")
    lines = [f"{station},{device},{revision}", f"{capture.data.shape[0]},{capture.data.shape[0]}A,0D"]
    for k, name in enumerate(capture.channels):
        unit = capture.units[k] or ""
        skew_us = -capture.delays_s[k] * 1e6
        lines.append(f"{k + 1},{name},,,{unit},{float(a[k])!r},{float(b[k])!r},{skew_us:g},{-top},{top},1,1,P")
    lines += [f"{line_frequency:g}", "1", f"{float(capture.sample_rate)!r},{n}", stamp, stamp, file_type,
              f"{timemult:g}"]
    if revision == "2013":
        lines += ["0,0", "0,0"]  # time_code, local_code (UTC); tmq_code, leapsec
    cfg.write_text("\r\n".join(lines) + "\r\n", encoding="utf-8")
    if file_type == "ASCII":
        table = np.column_stack([np.arange(1, n + 1), stamps, codes.T])
        dat.write_text("\r\n".join(",".join(str(v) for v in row) for row in table.tolist()) + "\r\n",
                       encoding="utf-8")
    else:
        record = np.dtype([("n", "<u4"), ("t", "<u4"), ("a", "<i2", (capture.data.shape[0],))])
        out = np.zeros(n, dtype=record)
        out["n"] = np.arange(1, n + 1)
        out["t"] = stamps
        out["a"] = codes.T
        dat.write_bytes(out.tobytes())
    return cfg, dat
