"""Build ``archive-v0.sqlite``: an archive in format version 0 (the first prototype's layout), invented demo data.

Version 0 had no ``seq``, ``anchor`` or ``capture_id`` in readings, no ``seq`` in events, kept
datetimes as ISO 8601 text, no row hashes and no captures/competing/snapshot tables. The DDL is
written out here as it was, not generated from today's schema. Run from the repository root::

    python tests/data/archives/make_v0_fixture.py
"""

from __future__ import annotations

import hashlib
import sqlite3
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent
FIXTURE = HERE / "archive-v0.sqlite"

V0_DDL = [
    "CREATE TABLE meta (key TEXT PRIMARY KEY, value TEXT NOT NULL)",
    """CREATE TABLE sessions (session_id TEXT PRIMARY KEY, kind TEXT NOT NULL, state TEXT NOT NULL,
        section TEXT NOT NULL, "group" TEXT NOT NULL, cart TEXT NOT NULL, people TEXT NOT NULL,
        template_id TEXT NOT NULL, template_version TEXT NOT NULL, template_sha256 TEXT NOT NULL,
        template_text TEXT NOT NULL, bench_id TEXT NOT NULL, bench_version TEXT NOT NULL,
        bench_sha256 TEXT NOT NULL, bench_text TEXT NOT NULL, cart_sha256 TEXT, cart_text TEXT,
        labkit_version TEXT NOT NULL, mc_seed INTEGER NOT NULL, mc_samples INTEGER NOT NULL,
        created_at TEXT NOT NULL, created_by TEXT NOT NULL)""",
    """CREATE TABLE readings (reading_id TEXT NOT NULL, revision INTEGER NOT NULL, supersedes INTEGER NOT NULL,
        session_id TEXT NOT NULL, section TEXT NOT NULL, "group" TEXT NOT NULL, cart TEXT NOT NULL,
        step_id TEXT NOT NULL, step_index INTEGER NOT NULL, step_kind TEXT NOT NULL, location TEXT NOT NULL,
        quantity TEXT NOT NULL, unit TEXT NOT NULL, predicted REAL, band_low REAL, band_high REAL,
        tolerance REAL, measured REAL, entered TEXT NOT NULL, form TEXT NOT NULL, meter_range REAL,
        obtained TEXT NOT NULL, sensor TEXT, verdict TEXT NOT NULL, diagnosis TEXT, diagnosis_code TEXT,
        recorded_at TEXT NOT NULL, recorded_by TEXT NOT NULL, reason TEXT, note TEXT,
        PRIMARY KEY (reading_id, revision))""",
    """CREATE TABLE events (session_id TEXT NOT NULL, at TEXT NOT NULL, by TEXT NOT NULL, role TEXT NOT NULL,
        event TEXT NOT NULL, step_id TEXT, detail TEXT)""",
    """CREATE TABLE roster (participant_id TEXT PRIMARY KEY, name TEXT NOT NULL, section TEXT NOT NULL,
        "group" TEXT, role TEXT NOT NULL)""",
]

BENCH = '[bench]\nid = "demo-bench"\nversion = "0.9"\ntitle = "Invented demo bench (prototype)"\n'
TEMPLATE = '[template]\nid = "demo-lab-1"\nversion = "0.9"\ntitle = "Invented demo lab: line and loads"\n'


def _sha(text: str) -> str:
    return hashlib.sha256(text.encode()).hexdigest()


def _id(label: str) -> str:
    return hashlib.sha256(label.encode()).hexdigest()[:32]  # fixed, uuid4-hex-shaped ids


def build(path: Path) -> None:
    """Write the version-0 fixture to ``path`` (replaced)."""
    path.unlink(missing_ok=True)
    conn = sqlite3.connect(path)
    with conn:
        for ddl in V0_DDL:
            conn.execute(ddl)
        conn.execute("INSERT INTO meta VALUES ('format_version', '0')")
        sessions = [(_id("s-a"), "lab", "closed", "S01", "G1", "cart-01", '["p001", "p002"]', "08:10"),
                    (_id("s-b"), "practice", "open", "S02", "G3", "cart-04", '["p003"]', "10:05")]
        for sid, kind, state, section, group, cart, people, hhmm in sessions:
            conn.execute("INSERT INTO sessions VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?)",
                         (sid, kind, state, section, group, cart, people, "demo-lab-1", "0.9", _sha(TEMPLATE),
                          TEMPLATE, "demo-bench", "0.9", _sha(BENCH), BENCH, None, None, "0.0.3", 1459, 500,
                          f"2025-09-15T{hhmm}:00+00:00", "ta01"))
        rows = []
        for k in range(10):
            sid, section, group, cart = (sessions[0] if k < 6 else sessions[1])[:1] + \
                (sessions[0] if k < 6 else sessions[1])[3:6]
            hh = "08" if k < 6 else "10"
            measured = None if k == 4 else 228.0 + k * 0.7  # k == 4: "OL" on the meter, not a number
            rows.append((_id(f"r{k}"), 0, -1, sid, section, group, cart, f"step-{k % 3}", k % 3, "load_step",
                         "B2" if k % 2 else "LOAD1@B3", "v_rms" if k % 2 else "i_rms", "V" if k % 2 else "A",
                         230.0 if k % 2 else 1.25, 226.0 if k % 2 else 1.2, 233.0 if k % 2 else 1.3,
                         2.0 if k % 2 else 0.02, measured, "OL" if measured is None else f"{measured:.1f}", "rms",
                         600.0 if k % 3 else None, "typed", "" if k % 2 else "CS1",
                         "unchecked" if measured is None else "accept", None, None,
                         f"2025-09-15T{hh}:{20 + k * 2:02d}:{k * 3:02d}.{k * 111:06d}+00:00", "p001", None,
                         "invented demo reading"))
        # two corrections, later in time; one recorded with a non-UTC offset (still a UTC instant)
        rows.append((*rows[1][:1], 1, 0, *rows[1][3:17], 229.9, "229.9", *rows[1][19:26],
                     "2025-09-15T10:40:00.000000+02:00", "ta01", "misread the scale", None))
        rows.append((*rows[7][:1], 1, 0, *rows[7][3:17], 232.1, "232.1", *rows[7][19:26],
                     "2025-09-15T10:50:00.500000+00:00", "ta02", "digit transposed", ""))
        conn.executemany(f"INSERT INTO readings VALUES ({','.join('?' * 30)})", rows)
        events = [(sessions[0][0], "2025-09-15T08:15:00+00:00", "ta01", "ta", "state:open", None, None),
                  (sessions[0][0], "2025-09-15T08:21:00+00:00", "p001", "student", "step:forward", "step-1", ""),
                  (sessions[0][0], "2025-09-15T08:45:00+00:00", "ta01", "ta", "state:closed", None, None),
                  (sessions[1][0], "2025-09-15T10:06:00+00:00", "ta02", "ta", "state:open", None, None),
                  (sessions[1][0], "2025-09-15T10:30:00+00:00", "p003", "student", "step:skip", "step-2",
                   '{"reason": "load bank unavailable (invented)"}')]
        conn.executemany("INSERT INTO events VALUES (?,?,?,?,?,?,?)", events)
        conn.executemany("INSERT INTO roster VALUES (?,?,?,?,?)", [
            ("p001", "Demo Student One", "S01", "G1", "student"), ("p002", "Demo Student Two", "S01", "G1",
                                                                   "student"),
            ("p003", "Demo Student Three", "S02", "G3", "student"), ("ta01", "Demo TA One", "S01", None, "ta")])
    conn.execute("VACUUM")
    conn.close()


if __name__ == "__main__":
    build(Path(sys.argv[1]) if len(sys.argv) > 1 else FIXTURE)
    print(f"wrote {FIXTURE if len(sys.argv) == 1 else sys.argv[1]}")
