"""Eight writer processes x 500 readings into one archive: none lost or duplicated, no lock error, seq gapless.

Each writer is a separate OS process (``writer.py``) with its own SQLite connection; four write to
each of two sessions, with events every 50 readings and a correction every 7th reading, so the
per-session ``seq`` (shared by readings and events) is contended. The result is read back with plain
:mod:`sqlite3` (outside labkit) and SQLite's own ``PRAGMA integrity_check``.
"""

from __future__ import annotations

import sqlite3
import subprocess
import sys
from collections import defaultdict
from itertools import pairwise
from pathlib import Path

from labkit.logbook.sqlite import SQLiteArchive
from tests.reliability.factory import session_row
from tests.reliability.test_kill import WRITER, _acks

WRITERS, PER_WRITER = 8, 500


def test_eight_concurrent_writers(tmp_path: Path) -> None:
    path = tmp_path / "shared.sqlite"
    sessions = [session_row(), session_row()]
    with SQLiteArchive(path) as archive:
        for s in sessions:
            archive.create_session(s)
    procs = [subprocess.Popen([sys.executable, str(WRITER), str(path), sessions[k % 2]["session_id"],
                               str(PER_WRITER), "50", f"w{k}"],
                              stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
             for k in range(WRITERS)]
    acknowledged: set[tuple[str, int]] = set()
    for proc in procs:
        out, err = proc.communicate(timeout=300)
        assert proc.returncode == 0, f"writer failed: {err}"
        assert err == ""  # no lock error (or any other) reached the user
        acknowledged |= _acks(out)
    corrections = WRITERS * len([k for k in range(1, PER_WRITER) if k % 7 == 0])
    assert len(acknowledged) == WRITERS * PER_WRITER + corrections
    conn = sqlite3.connect(f"file:{path}?mode=ro", uri=True)
    try:
        assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        rows = conn.execute("SELECT reading_id, revision, session_id, seq, rowid FROM readings").fetchall()
        events = conn.execute("SELECT session_id, seq, rowid FROM events").fetchall()
        per_writer = dict(conn.execute("SELECT recorded_by, count(*) FROM readings WHERE revision = 0 "
                                       "GROUP BY recorded_by").fetchall())
    finally:
        conn.close()
    stored = [(r[0], r[1]) for r in rows]
    assert len(stored) == len(set(stored))  # nothing duplicated
    assert set(stored) == acknowledged  # nothing lost, nothing unacknowledged
    assert per_writer == {f"w{k}": PER_WRITER for k in range(WRITERS)}
    by_session: dict[str, list[tuple[int, int]]] = defaultdict(list)
    for _, _, session_id, seq, rowid in rows:
        by_session[session_id].append((rowid, seq))
    for session_id, seq, rowid in events:
        by_session[session_id].append((1_000_000_000 + rowid, seq))  # events: checked for gaps below
    for session_id, pairs in by_session.items():
        seqs = sorted(seq for _, seq in pairs)
        assert seqs == list(range(len(seqs))), f"session {session_id}: seq has gaps or repeats"
        reading_order = [seq for rowid, seq in sorted(pairs) if rowid < 1_000_000_000]
        assert all(a < b for a, b in pairwise(reading_order)), \
            "seq does not increase with commit order"
