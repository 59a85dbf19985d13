"""Invented demo rows for the archive tests (demo data: no real bench, section or person).

``session_row`` and ``reading_row`` give complete, valid rows that tests vary one field at a time.
"""

from __future__ import annotations

import hashlib
import uuid
from datetime import UTC, datetime
from typing import Any

BENCH_TEXT = '[bench]\nid = "demo-bench"\nversion = "1"\ntitle = "Invented demo bench"\n'
TEMPLATE_TEXT = '[template]\nid = "demo-lab"\nversion = "1"\ntitle = "Invented demo lab"\n'


def sha(text: str) -> str:
    """SHA-256 hex of a text (UTF-8)."""
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def session_row(session_id: str | None = None, **changes: Any) -> dict[str, Any]:
    """A valid session row (invented demo data)."""
    row: dict[str, Any] = {
        "session_id": session_id or uuid.uuid4().hex, "kind": "lab", "state": "open", "section": "S01",
        "group": "G1", "cart": "cart-01", "people": '["p001", "p002"]', "template_id": "demo-lab",
        "template_version": "1", "template_sha256": sha(TEMPLATE_TEXT), "template_text": TEMPLATE_TEXT,
        "bench_id": "demo-bench", "bench_version": "1", "bench_sha256": sha(BENCH_TEXT), "bench_text": BENCH_TEXT,
        "cart_sha256": "", "cart_text": "", "labkit_version": "0.1.0", "mc_seed": 1459, "mc_samples": 2000,
        "created_at": datetime(2026, 3, 2, 8, 30, tzinfo=UTC), "created_by": "ta01",
    }
    row.update(changes)
    return row


def reading_row(session_id: str, k: int = 0, **changes: Any) -> dict[str, Any]:
    """A valid first-record reading row (invented demo data: 230 V bus voltage, measured 228.5 V)."""
    row: dict[str, Any] = {
        "reading_id": uuid.uuid4().hex, "revision": 0, "supersedes": -1, "session_id": session_id,
        "section": "S01", "group": "G1", "cart": "cart-01", "step_id": f"step-{k % 7}", "step_index": k % 7,
        "step_kind": "load_step", "location": "B2", "quantity": "v_rms", "unit": "V", "predicted": 230.0,
        "band_low": 226.0, "band_high": 233.5, "tolerance": 2.0, "measured": 228.5 + 0.001 * k,
        "entered": f"{228.5 + 0.001 * k:.3f}", "form": "rms", "meter_range": 600.0, "obtained": "typed",
        "sensor": "", "verdict": "accept", "diagnosis": "", "diagnosis_code": "", "anchor": "nominal",
        "capture_id": "", "recorded_by": "p001", "reason": "", "note": "",
    }
    row.update(changes)
    return row


def correction_of(row: dict[str, Any], measured: float, reason: str = "misread the meter scale") -> dict[str, Any]:
    """The next revision of a committed reading row (seq and recorded_at left to the archive)."""
    new = {k: v for k, v in row.items() if k not in ("seq", "recorded_at")}
    new.update(revision=row["revision"] + 1, supersedes=row["revision"], measured=measured,
               entered=f"{measured:g}", reason=reason)
    return new


def try_mount_tmpfs(folder: Any, size: str = "2m") -> bool:
    """Mount a small tmpfs on ``folder`` (a real disk that can fill up or go read-only); False if not allowed."""
    import shutil
    import subprocess

    if shutil.which("mount") is None:
        return False
    done = subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size}", "tmpfs", str(folder)],
                          capture_output=True, text=True, check=False)
    return done.returncode == 0


def remount(folder: Any, mode: str) -> None:
    """Remount a tmpfs mounted by :func:`try_mount_tmpfs` read-only (``ro``) or writable (``rw``)."""
    import subprocess

    subprocess.run(["mount", "-o", f"remount,{mode}", str(folder)], check=True, capture_output=True)


def unmount(folder: Any) -> None:
    """Undo :func:`try_mount_tmpfs`."""
    import subprocess

    subprocess.run(["umount", str(folder)], check=False, capture_output=True)
