"""WAV captures from sound-card acquisition: samples normalized to full scale, ac-coupled.

A sound card's input is ac-coupled, so the dc quantities of a WAV capture are reported
as unavailable (:attr:`Capture.ac_coupled`). Samples are scaled to the converter's full
scale (-1 .. +1) and the converter limits are kept for the clipping check; apply a channel
map to turn them into volts and amperes.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from labkit.captures.capture import DEFAULT_MAX_BYTES, Capture, check_file_size
from labkit.core.errors import CaptureError


def read_wav(path: str | Path, *, max_bytes: int = DEFAULT_MAX_BYTES) -> Capture:
    """Read a PCM (8, 16, 24, 32 bit) or float WAV file; one channel per WAV channel."""
    from scipy.io import wavfile

    p = Path(path)
    check_file_size(p, max_bytes)
    try:
        rate, raw = wavfile.read(p)
    except (ValueError, OSError) as exc:
        msg = f"{p}: not a readable WAV file ({exc})"
        raise CaptureError(msg) from exc
    samples = raw.T if raw.ndim == 2 else raw[np.newaxis, :]
    if samples.dtype == np.uint8:
        data = (samples.astype(np.float64) - 128.0) / 128.0
        limits = (-1.0, 127.0 / 128.0)
    elif samples.dtype.kind == "i":
        bits = samples.dtype.itemsize * 8
        if bits == 32 and samples.size and not np.any(samples & 0xFF):
            bits_used = 24  # 24-bit PCM is delivered left-justified in int32
            lsb = 2.0 ** -(bits_used - 1)
        else:
            lsb = 2.0 ** -(bits - 1)
        data = samples.astype(np.float64) / 2.0 ** (bits - 1)
        limits = (-1.0, 1.0 - lsb)
    elif samples.dtype.kind == "f":
        data = samples.astype(np.float64)
        limits = (-1.0, 1.0)
    else:
        msg = f"{p}: unsupported WAV sample type {samples.dtype}"
        raise CaptureError(msg)
    names = ("left", "right") if data.shape[0] == 2 else tuple(f"ch{k}" for k in range(data.shape[0]))
    return Capture(data=data, sample_rate=float(rate), channels=names, units=("",) * data.shape[0],
                   full_scale=(limits,) * data.shape[0], ac_coupled=True, source=str(p),
                   notes=("sound-card acquisition: ac-coupled, dc unavailable",))


def write_wav(capture: Capture, path: str | Path, *, bits: int = 16) -> Path:
    """Write a capture (samples in full-scale units, -1..1) as a PCM WAV of 16 or 32 bits."""
    from scipy.io import wavfile

    if bits not in (16, 32):
        msg = f"WAV bits must be 16 or 32, found {bits}"
        raise CaptureError(msg)
    top = 2 ** (bits - 1)
    codes = np.clip(np.round(capture.data * top), -top, top - 1).astype(np.int16 if bits == 16 else np.int32)
    p = Path(path)
    wavfile.write(p, round(capture.sample_rate), codes.T.copy())
    return p
