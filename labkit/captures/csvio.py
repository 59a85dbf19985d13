"""CSV captures: one column per channel, a header row of names, and a time column or a rate header.

Layout read (and written by :func:`write_csv`)::

    # sample_rate = 10000 Hz        optional header lines "# key = value"
    # source = bench 2 scope
    time_s,v_bus,i_load             header row (names); a time column is optional
    0.0000,1.23,0.01
    ...

The sample rate comes from a time column (named ``t``, ``time``, ``time_s``, ``time_ms``
or ``time_us``; its steps are checked for dropped samples), else from a
``# sample_rate = ...`` header, else from the ``rate`` argument; two sources that
disagree by more than 0.1 % are refused.
"""

from __future__ import annotations

import io
import math
import re
from collections.abc import Sequence
from pathlib import Path

import numpy as np

from labkit.captures.capture import DEFAULT_MAX_BYTES, Capture, check_file_size
from labkit.core.errors import CaptureError, UnitError
from labkit.core.units import parse_quantity
from labkit.core.waveform import check_time_axis

_HEADER = re.compile(r"^#\s*([A-Za-z_][A-Za-z0-9_]*)\s*[=:]\s*(.*?)\s*$")
_TIME_SCALE = {"t": 1.0, "time": 1.0, "time_s": 1.0, "t_s": 1.0, "time_ms": 1e-3, "t_ms": 1e-3,
               "time_us": 1e-6, "t_us": 1e-6}


def _is_number(token: str) -> bool:
    try:
        float(token)
    except ValueError:
        return False
    return True


def parse_csv_text(text: str, *, rate: float | None = None, source: str = "<text>") -> Capture:
    """Parse CSV capture text (see the module docstring); ``source`` names it in messages."""
    lines = text.splitlines()
    header: dict[str, str] = {}
    first = 0
    while first < len(lines) and (lines[first].startswith("#") or not lines[first].strip()):
        match = _HEADER.match(lines[first])
        if match:
            header[match.group(1).lower()] = match.group(2)
        first += 1
    if first >= len(lines):
        msg = f"{source}: no data rows; expected a header row of channel names and rows of samples"
        raise CaptureError(msg)
    tokens = [t.strip() for t in lines[first].split(",")]
    if all(_is_number(t) for t in tokens):
        names = [f"ch{k}" for k in range(len(tokens))]
        data_start = first
    else:
        names = tokens
        data_start = first + 1
    if len(set(names)) != len(names):
        msg = f"{source}:{first + 1}: repeated column names in {names}"
        raise CaptureError(msg)
    import pandas as pd

    try:
        frame = pd.read_csv(io.StringIO("\n".join(lines[data_start:])), header=None, names=names,
                            dtype=np.float64, skip_blank_lines=True, comment="#")
    except (ValueError, pd.errors.ParserError) as exc:
        msg = f"{source}: rows must hold {len(names)} numbers separated by commas: {exc}"
        raise CaptureError(msg) from exc
    values = frame.to_numpy(dtype=np.float64).T
    if values.shape[1] == 0:
        msg = f"{source}: no data rows after the header"
        raise CaptureError(msg)
    bad = ~np.isfinite(values)
    if bad.any():
        col, row = np.argwhere(bad)[0]
        msg = (f"{source}: line {data_start + row + 1}, column {names[col]}: missing or non-finite sample "
               f"({int(bad.sum())} in all); expected a number")
        raise CaptureError(msg)
    time_col = next((k for k, n in enumerate(names) if n.lower() in _TIME_SCALE), None)
    rates: list[tuple[str, float]] = []
    if time_col is not None:
        t = values[time_col] * _TIME_SCALE[names[time_col].lower()]
        try:
            rates.append(("time column", check_time_axis(t)))
        except CaptureError as exc:
            msg = f"{source}: {exc}"
            raise CaptureError(msg) from exc
    if "sample_rate" in header:
        try:
            rates.append(("header", parse_quantity(header["sample_rate"], "frequency")))
        except UnitError as exc:
            msg = f'{source}: header "sample_rate = {header["sample_rate"]}": {exc}; expected e.g. "10000 Hz"'
            raise CaptureError(msg) from exc
    if rate is not None:
        rates.append(("argument", float(rate)))
    if not rates:
        msg = (f"{source}: no sample rate: add a time column, a header line '# sample_rate = 10000 Hz', "
               "or give the rate")
        raise CaptureError(msg)
    for label, value in rates[1:]:
        if not math.isclose(value, rates[0][1], rel_tol=1e-3):
            msg = (f"{source}: sample rate from the {label} ({value:g} Hz) disagrees with the "
                   f"{rates[0][0]} ({rates[0][1]:g} Hz)")
            raise CaptureError(msg)
    keep = [k for k in range(len(names)) if k != time_col]
    t0 = float(values[time_col, 0] * _TIME_SCALE[names[time_col].lower()]) if time_col is not None else 0.0
    ac = header.get("ac_coupled", "").lower() in ("1", "true", "yes")
    return Capture(data=values[keep], sample_rate=rates[0][1], channels=tuple(names[k] for k in keep), t0=t0,
                   ac_coupled=ac, source=source)


def read_csv(path: str | Path, *, rate: float | None = None, max_bytes: int = DEFAULT_MAX_BYTES) -> Capture:
    """Read a CSV capture file (see the module docstring); files above ``max_bytes`` are refused."""
    p = Path(path)
    check_file_size(p, max_bytes)
    try:
        text = p.read_text(encoding="utf-8")
    except UnicodeDecodeError as exc:
        msg = f"{p}: not UTF-8 text ({exc}); expected a CSV capture"
        raise CaptureError(msg) from exc
    return parse_csv_text(text, rate=rate, source=str(p))


def format_csv(capture: Capture, *, time_column: bool = True, extra_header: Sequence[str] = ()) -> str:
    """CSV text of a capture: rate header, optional ``time_s`` column, one column per channel."""
    out = io.StringIO()
    out.write(f"# sample_rate = {float(capture.sample_rate)!r} Hz\n")
    for line in extra_header:
        out.write(f"# {line}\n")
    names = (["time_s"] if time_column else []) + list(capture.channels)
    out.write(",".join(names) + "\n")
    cols = capture.data
    if time_column:
        t = capture.t0 + np.arange(capture.samples) / capture.sample_rate
        cols = np.vstack([t, cols])
    np.savetxt(out, cols.T, delimiter=",", fmt="%.10g")
    return out.getvalue()


def write_csv(capture: Capture, path: str | Path, *, time_column: bool = True) -> Path:
    """Write a capture as CSV (see :func:`format_csv`)."""
    p = Path(path)
    p.write_text(format_csv(capture, time_column=time_column), encoding="utf-8")
    return p
