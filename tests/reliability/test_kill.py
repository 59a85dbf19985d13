"""SIGKILL a recording process at random moments: every acknowledged reading survives, the file stays sound.

The writer (``writer.py``) prints a reading's id only after ``append_reading`` returned. After each kill
the archive is checked with plain :mod:`sqlite3` (outside labkit): SQLite's own ``PRAGMA
integrity_check`` must say ``ok`` and every acknowledged ``(reading_id, revision)`` must be there.
Seeded (``random.Random(1459)``), 60 kills; ``seq`` must stay gapless because a killed transaction
leaves nothing behind (SQLite's WAL rollback, common practice).
"""

from __future__ import annotations

import os
import random
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

from labkit.logbook.sqlite import SQLiteArchive
from tests.reliability.factory import session_row

WRITER = Path(__file__).with_name("writer.py")
KILLS = 60


def kill_writer_at_random(argv: list[str], rng: random.Random, start_window_s: float) -> set[tuple[str, int]]:
    """Start a recording writer, SIGKILL it at a random moment, return the readings it acknowledged.

    One time in five the kill lands while the writer starts, opens the archive or writes its first reading
    (within ``start_window_s``); otherwise after its first acknowledgement, at a random moment mid-stream.
    """
    proc = subprocess.Popen([sys.executable, str(WRITER), *argv], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True)
    first = ""
    if rng.random() < 0.2:
        time.sleep(rng.uniform(0.0, start_window_s))
    else:
        first = proc.stdout.readline()
        time.sleep(rng.uniform(0.0, 0.12))
    os.kill(proc.pid, signal.SIGKILL)
    out, err = proc.communicate(timeout=30)
    assert proc.returncode == -signal.SIGKILL, err
    return _acks(first + out)


def _acks(text: str) -> set[tuple[str, int]]:
    acked = set()
    for line in text.splitlines(keepends=True):
        if not line.endswith("\n") or not line.startswith("ack "):
            continue  # a line cut by the kill was never fully acknowledged
        ident = line[4:].strip()
        reading_id, _, revision = ident.partition(":")
        acked.add((reading_id, int(revision or 0)))
    return acked


def test_sigkill_never_loses_an_acknowledged_reading(tmp_path: Path) -> None:
    path = tmp_path / "lab.sqlite"
    row = session_row()
    with SQLiteArchive(path) as archive:
        archive.create_session(row)
    rng = random.Random(1459)
    acknowledged: set[tuple[str, int]] = set()
    killed_with_acks = 0
    for _ in range(KILLS):
        new = kill_writer_at_random([str(path), row["session_id"], "100000", "9"], rng, 0.2)
        killed_with_acks += bool(new)
        acknowledged |= new
        conn = sqlite3.connect(f"file:{path}?mode=ro", uri=True)
        try:
            assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
            stored = set(conn.execute("SELECT reading_id, revision FROM readings").fetchall())
        finally:
            conn.close()
        missing = acknowledged - stored
        assert not missing, f"{len(missing)} acknowledged readings lost, e.g. {sorted(missing)[:3]}"
    assert killed_with_acks >= KILLS * 3 // 5  # most kills hit a process that was recording
    with SQLiteArchive(path) as archive:
        assert archive.check() == []
        readings, events = archive.readings(), archive.events()
        seqs = sorted([*readings["seq"], *events["seq"]])
        assert seqs == list(range(len(seqs)))
        latest = archive.readings(latest_only=True)
        assert latest["reading_id"].is_unique
    assert len(acknowledged) <= len(readings)
