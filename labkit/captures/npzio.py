"""NumPy ``.npz`` captures: arrays ``data`` (channels, samples), ``sample_rate``, ``channels``, optional ``units``.

Read with ``allow_pickle=False``; the decompressed size of every member is checked
against the limit from the zip directory before anything is loaded.
"""

from __future__ import annotations

import zipfile
from pathlib import Path

import numpy as np

from labkit.captures.capture import DEFAULT_MAX_BYTES, Capture
from labkit.core.errors import CaptureError


def read_npz(path: str | Path, *, max_bytes: int = DEFAULT_MAX_BYTES) -> Capture:
    """Read a ``.npz`` capture; refuse one whose decompressed members exceed ``max_bytes``."""
    p = Path(path)
    try:
        with zipfile.ZipFile(p) as archive:
            members = archive.infolist()
    except zipfile.BadZipFile as exc:
        msg = f"{p}: not a NumPy .npz archive ({exc})"
        raise CaptureError(msg) from exc
    total = sum(m.file_size for m in members)
    if total > max_bytes:
        msg = (f"{p}: decompressed size {total:,} bytes exceeds the limit of {max_bytes:,} bytes "
               f"({len(members)} members); refusing to load")
        raise CaptureError(msg)
    try:
        with np.load(p, allow_pickle=False) as archive:
            keys = set(archive.files)
            missing = {"data", "sample_rate"} - keys
            if missing:
                msg = f"{p}: missing array(s) {sorted(missing)}; expected data, sample_rate and channels"
                raise CaptureError(msg)
            data = np.asarray(archive["data"], dtype=np.float64)
            rate = float(np.asarray(archive["sample_rate"]).reshape(()))
            count = data.shape[0] if data.ndim == 2 else 1
            names = tuple(str(n) for n in archive["channels"]) if "channels" in keys else \
                tuple(f"ch{k}" for k in range(count))
            units = tuple(str(u) for u in archive["units"]) if "units" in keys else ()
            ac = bool(np.asarray(archive["ac_coupled"]).reshape(())) if "ac_coupled" in keys else False
    except ValueError as exc:  # object arrays need pickle: refused
        msg = f"{p}: cannot load without pickle ({exc}); store names as a unicode string array"
        raise CaptureError(msg) from exc
    return Capture(data=data, sample_rate=rate, channels=names, units=units, ac_coupled=ac, source=str(p))


def write_npz(capture: Capture, path: str | Path) -> Path:
    """Write a capture as a compressed ``.npz`` (no pickled objects)."""
    p = Path(path)
    np.savez_compressed(p, data=capture.data, sample_rate=np.float64(capture.sample_rate),
                        channels=np.array(capture.channels, dtype=str), units=np.array(capture.units, dtype=str),
                        ac_coupled=np.bool_(capture.ac_coupled))
    return p
