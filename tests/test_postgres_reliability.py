"""The SQLite reliability and merge harnesses, run against the shared PostgreSQL archive on loopback.

- SIGKILL the recording process (``tests/reliability/writer.py``, which opens the archive by URL with
  :func:`labkit.logbook.open.open_archive`) at seeded random moments, 50 kills: every acknowledged
  reading is on the server, ``seq`` stays gapless (a killed client's open transaction is rolled back by
  the server; PostgreSQL documentation, "Transactions", recalled from memory), and the B-tree indexes pass
  PostgreSQL's own ``amcheck`` (``bt_index_check``; PostgreSQL 15 documentation, "amcheck", recalled from
  memory).
- Eight writer processes x 500 readings, four per session: none lost, none duplicated, no error reaches
  the writer, per-session ``seq`` gapless and increasing in each writer's commit order.
- Push of hand-in files mirroring ``tests/test_archive_merge.py``: equal ids with equal content merge
  once, different content is refused with a report, competing corrections are kept and flagged.
- A hand-in written from the server opens with plain :mod:`sqlite3` (outside labkit), passes SQLite's
  ``PRAGMA integrity_check`` and merges into an SQLite archive with the very same rows.
Every check reads the server over a raw psycopg connection, not through labkit, unless it says otherwise.
"""

from __future__ import annotations

import hashlib
import random
import shutil
import sqlite3
import subprocess
import sys
import time
import uuid
from collections import defaultdict
from itertools import pairwise
from pathlib import Path

import pytest

from labkit.logbook.sqlite import SQLiteArchive
from tests.pg_support import pg_server  # noqa: F401  (the session fixture)
from tests.reliability.factory import correction_of, reading_row, session_row
from tests.reliability.test_kill import WRITER, _acks, kill_writer_at_random

psycopg = pytest.importorskip("psycopg")
from labkit.logbook.postgres import PostgresArchive, add_member  # noqa: E402
from labkit.logbook.storage import ArchiveError  # noqa: E402

KILLS = 50
WRITERS, PER_WRITER = 8, 500
STUDENTS = [f"rw{k}" for k in range(WRITERS)]


@pytest.fixture(scope="module")
def db(pg_server):  # noqa: F811
    """A fresh migrated database: students rw0..rw7 and rk (S01 G1), a TA of S01, an instructor; their URLs."""
    name = f"rel_{uuid.uuid4().hex[:8]}"
    owner = pg_server.fresh_database(name)
    urls = {"owner": owner}
    logins = [(s, "student", "S01", "G1") for s in [*STUDENTS, "rk"]]
    logins += [("rel_ta", "ta", "S01", ""), ("rel_ta2", "ta", "S01", ""), ("rel_prof", "instructor", "", "")]
    for login, role, section, group in logins:
        password = pg_server.passwords.get(login) or f"pw-{login}-5Kq"
        add_member(owner, login, role, section=section, group=group, password=password)
        pg_server.passwords[login] = password
        urls[login] = pg_server.url(login, database=name)
    urls["name"] = name
    return urls


def _open_session(db, **changes) -> str:
    sid = uuid.uuid4().hex
    with PostgresArchive(db["rel_ta"]) as ta:
        ta.create_session(session_row(sid, state="planned", **changes))
        ta.append_event({"session_id": sid, "by": "x", "role": "ta", "event": "state:open"})
    return sid


def _raw(db):
    return psycopg.connect(db["owner"], autocommit=True)


# -- SIGKILL -------------------------------------------------------------------------------------------------------
def test_sigkill_never_loses_an_acknowledged_reading_on_the_server(db, pg_server):  # noqa: F811
    sid = _open_session(db)
    rng = random.Random(1459)
    acknowledged: set[tuple[str, int]] = set()
    killed_with_acks = 0
    started = time.monotonic()
    for _ in range(KILLS):
        new = kill_writer_at_random([db["rk"], sid, "100000", "9", "rk"], rng, 0.3)
        killed_with_acks += bool(new)
        acknowledged |= new
        with _raw(db) as conn:
            stored = {(r, int(v)) for r, v in conn.execute(
                "SELECT reading_id, revision FROM labkit.readings WHERE session_id = %s", (sid,))}
        missing = acknowledged - stored
        assert not missing, f"{len(missing)} acknowledged readings lost, e.g. {sorted(missing)[:3]}"
    elapsed = time.monotonic() - started
    assert killed_with_acks >= KILLS * 3 // 5  # most kills hit a process that was recording
    time.sleep(0.5)  # let the server finish rolling back the killed clients' transactions
    with _raw(db) as conn:
        seqs = sorted(r[0] for r in conn.execute(
            "SELECT seq FROM labkit.readings WHERE session_id = %s UNION ALL "
            "SELECT seq FROM labkit.events WHERE session_id = %s", (sid, sid)))
        n_readings = conn.execute("SELECT count(*) FROM labkit.readings WHERE session_id = %s",
                                  (sid,)).fetchone()[0]
    assert seqs == list(range(len(seqs)))  # seq 0 is the state:open event
    assert len(acknowledged) <= n_readings
    with PostgresArchive(db["rel_ta"]) as ta:
        assert ta.check() == []
        assert ta.readings(sid, latest_only=True)["reading_id"].is_unique
    # PostgreSQL's own structural check of every B-tree index of the labkit schema (amcheck, contrib)
    pg_server.superuser_sql("CREATE EXTENSION IF NOT EXISTS amcheck", database=db["name"])
    checked = pg_server.superuser_sql(
        "SELECT count(bt_index_check(c.oid, true)) FROM pg_index i JOIN pg_class c ON c.oid = i.indexrelid "
        "JOIN pg_namespace n ON n.oid = c.relnamespace JOIN pg_am a ON a.oid = c.relam "
        "WHERE n.nspname = 'labkit' AND a.amname = 'btree'", database=db["name"])
    assert int(checked.strip()) >= 5
    print(f"\nSIGKILL harness (PostgreSQL): {KILLS} kills, {len(acknowledged)} acknowledged, "
          f"{n_readings} stored, {elapsed:.1f} s")


# -- concurrency ---------------------------------------------------------------------------------------------------
def _ack_order(text: str) -> list[tuple[str, int]]:
    """The acknowledged (reading_id, revision) in the order the writer printed them."""
    order = []
    for line in text.splitlines():
        if line.startswith("ack "):
            reading_id, _, revision = line[4:].strip().partition(":")
            order.append((reading_id, int(revision or 0)))
    return order


def test_eight_concurrent_writer_processes_on_the_server(db):
    sessions = [_open_session(db), _open_session(db)]
    started = time.monotonic()
    procs = [subprocess.Popen([sys.executable, str(WRITER), db[STUDENTS[k]], sessions[k % 2], str(PER_WRITER),
                               "50", STUDENTS[k]], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
             for k in range(WRITERS)]
    acknowledged: set[tuple[str, int]] = set()
    orders = []
    for proc in procs:
        out, err = proc.communicate(timeout=300)
        assert proc.returncode == 0, f"writer failed: {err}"
        assert err == ""  # no lock, serialization or any other error reached the user
        acknowledged |= _acks(out)
        orders.append(_ack_order(out))
    elapsed = time.monotonic() - started
    corrections = WRITERS * len([k for k in range(1, PER_WRITER) if k % 7 == 0])
    assert len(acknowledged) == WRITERS * PER_WRITER + corrections
    with _raw(db) as conn:
        rows = conn.execute("SELECT reading_id, revision, session_id, seq FROM labkit.readings "
                            "WHERE session_id = ANY(%s)", (sessions,)).fetchall()
        events = conn.execute("SELECT session_id, seq FROM labkit.events WHERE session_id = ANY(%s)",
                              (sessions,)).fetchall()
        per_writer = dict(conn.execute("SELECT recorded_by, count(*) FROM labkit.readings WHERE revision = 0 "
                                       "AND session_id = ANY(%s) GROUP BY recorded_by", (sessions,)).fetchall())
    stored = [(r[0], int(r[1])) for r in rows]
    assert len(stored) == len(set(stored))  # nothing duplicated
    assert set(stored) == acknowledged  # nothing lost, nothing unacknowledged
    assert per_writer == dict.fromkeys(STUDENTS, PER_WRITER)  # recorded_by is each process's login
    by_session: dict[str, list[int]] = defaultdict(list)
    for _, _, session_id, seq in rows:
        by_session[session_id].append(seq)
    for session_id, seq in events:
        by_session[session_id].append(seq)
    for session_id, seqs in by_session.items():
        assert sorted(seqs) == list(range(len(seqs))), f"session {session_id}: seq has gaps or repeats"
    seq_of = {(r[0], int(r[1])): r[3] for r in rows}
    for order in orders:  # each writer commits one row after another: its seqs must increase
        assert all(seq_of[a] < seq_of[b] for a, b in pairwise(order)), "seq does not follow commit order"
    print(f"\n8 writer processes x {PER_WRITER} readings (PostgreSQL): {len(stored)} rows in {elapsed:.1f} s")


# -- push of hand-in files (mirrors tests/test_archive_merge.py) -----------------------------------------------------
def _laptop(path: Path, n: int = 4) -> tuple[SQLiteArchive, str, list[dict]]:
    archive = SQLiteArchive(path)
    row = session_row()
    archive.create_session(row)
    readings = [archive.append_reading(reading_row(row["session_id"], k)) for k in range(n)]
    archive.append_event({"session_id": row["session_id"], "by": "ta01", "role": "ta", "event": "state:submitted"})
    return archive, row["session_id"], readings


def _server_dump(db, session_ids: list[str]) -> str:
    """SHA-256 (hashlib) over the server's log rows of the sessions, read as the owner."""
    digest = hashlib.sha256()
    with _raw(db) as conn:
        for table, order in (("sessions", "session_id"), ("readings", "id"), ("events", "id"),
                             ("competing_readings", "id"), ("captures", "capture_id")):
            for row in conn.execute(f"SELECT * FROM labkit.{table} WHERE session_id = ANY(%s) ORDER BY {order}",
                                    (session_ids,)):
                digest.update(repr(row).encode())
    return digest.hexdigest()


def test_equal_ids_with_equal_content_merge_once(db, tmp_path: Path):
    files, sources = [], []
    for k in range(3):
        laptop, sid, _ = _laptop(tmp_path / f"laptop{k}.sqlite", n=3 + k)
        files.append(laptop.hand_in(tmp_path / f"handin{k}.sqlite"))
        sources.append((sid, laptop.readings(sid)))
        laptop.close()
    ids = [s for s, _ in sources]
    with PostgresArchive(db["rel_ta"]) as ta:
        report = ta.merge(files)
        assert report.refused == []
        assert report.merged_rows == 3 + 3 + (3 + 4 + 5)  # sessions, state events, readings
        assert sorted(report.merged_sessions) == sorted(ids)
        for sid, frame in sources:
            merged = ta.readings(sid)  # server seq keeps the laptop's order; the values are the laptop's
            assert list(merged["reading_id"]) == list(frame["reading_id"])
            assert list(merged["measured"]) == list(frame["measured"])
        before = _server_dump(db, ids)
        again = ta.merge(files + files[:1])  # the same files again, one of them twice
        assert (again.merged_rows, again.duplicates_skipped, again.refused) == (0, 0, [])
        # one combined file (other bytes, the same rows): every row is a duplicate
        central = SQLiteArchive(tmp_path / "central.sqlite")
        central.merge(files)
        combined = central.hand_in(tmp_path / "combined.sqlite")
        central.close()
        rep = ta.push(combined)
        assert not rep.already_pushed
        assert (rep.merged_rows, rep.duplicates_skipped, rep.refused) == (0, 18, [])
        assert _server_dump(db, ids) == before
        assert ta.check() == []


def test_equal_id_with_different_content_refuses_that_file_only(db, tmp_path: Path):
    a, sid, _ = _laptop(tmp_path / "a.sqlite")
    good = a.hand_in(tmp_path / "good.sqlite")
    b = SQLiteArchive(tmp_path / "b.sqlite")
    b.create_session(session_row(sid, cart="cart-07"))  # the same session id with other content
    extra = session_row()
    b.create_session(extra)
    b.append_reading(reading_row(extra["session_id"]))
    clash = b.hand_in(tmp_path / "clash.sqlite")
    third, sid3, _ = _laptop(tmp_path / "c.sqlite")
    fine = third.hand_in(tmp_path / "fine.sqlite")
    with PostgresArchive(db["rel_ta"]) as ta:
        report = ta.merge([good, clash, fine])
        assert len(report.refused) == 1
        assert "clash.sqlite" in report.refused[0]
        assert f"session {sid}" in report.refused[0]
        assert "the file is refused" in report.refused[0]
        ids = set(ta.sessions()["session_id"])
        assert {sid, sid3} <= ids
    with _raw(db) as conn:  # nothing of the refused file, not even its other session
        assert conn.execute("SELECT count(*) FROM labkit.sessions WHERE session_id = %s",
                            (extra["session_id"],)).fetchone()[0] == 0
        assert conn.execute("SELECT count(*) FROM labkit.pushes WHERE file_name = 'clash.sqlite'").fetchone()[0] == 0
    for x in (a, b, third):
        x.close()


def test_revision_zero_with_different_content_is_refused(db, tmp_path: Path):
    from labkit.logbook.rows import row_hash
    from labkit.logbook.schema import READING_COLUMNS

    a, sid, readings = _laptop(tmp_path / "a.sqlite")
    handin = a.hand_in(tmp_path / "a-handin.sqlite")
    a.close()
    with PostgresArchive(db["rel_ta"]) as ta:
        ta.push(handin)
        forged = tmp_path / "forged.sqlite"  # revision 0 changed, hashes recomputed so it looks genuine
        shutil.copyfile(handin, forged)
        with sqlite3.connect(forged) as conn:
            conn.execute("DROP TRIGGER readings_no_update")
            conn.execute("UPDATE readings SET measured = 250.0 WHERE reading_id = ?", (readings[0]["reading_id"],))
            names = ", ".join(f'"{c.name}"' for c in READING_COLUMNS)
            row = conn.execute(f"SELECT {names} FROM readings WHERE reading_id = ?",
                               (readings[0]["reading_id"],)).fetchone()
            conn.execute("UPDATE readings SET row_sha256 = ? WHERE reading_id = ?",
                         (row_hash("readings", tuple(row)), readings[0]["reading_id"]))
        conn.close()
        before = _server_dump(db, [sid])
        report = ta.push(forged)
        assert "differs from the server's first record" in report.refused[0]
        assert _server_dump(db, [sid]) == before


def _competing(db, tmp_path: Path):
    """Laptops A and B correct the same reading differently (B twice); both hand-ins pushed. Their rows."""
    a, sid, readings = _laptop(tmp_path / "a.sqlite")
    base = a.hand_in(tmp_path / "base.sqlite")
    b = SQLiteArchive(tmp_path / "b.sqlite")
    b.merge([base])
    target = readings[1]
    fix_a = a.append_reading(correction_of(target, 229.0, "TA A: parallax"))
    fix_b = b.append_reading(correction_of(target, 231.0, "TA B: wrong range"))
    fix_b2 = b.append_reading(correction_of(fix_b, 231.5, "TA B: second look"))
    hand_a, hand_b = a.hand_in(tmp_path / "ha.sqlite"), b.hand_in(tmp_path / "hb.sqlite")
    a.close()
    b.close()
    return sid, target, fix_a, fix_b, fix_b2, hand_a, hand_b


def test_competing_corrections_are_kept_and_flagged(db, tmp_path: Path):
    sid, target, fix_a, fix_b, fix_b2, hand_a, hand_b = _competing(db, tmp_path)
    with PostgresArchive(db["rel_ta"]) as ta:
        report = ta.merge([hand_a, hand_b])
        assert report.refused == []
        assert len(report.competing_corrections) == 2  # B's revision 1 and the revision 2 built on it
        assert all("hb.sqlite" in c and target["reading_id"] in c for c in report.competing_corrections)
        latest = ta.readings(sid, latest_only=True)
        assert latest["reading_id"].is_unique
        mine = latest[latest["reading_id"] == target["reading_id"]].iloc[0]
        assert (mine["revision"], mine["measured"], mine["reason"]) == (1, fix_a["measured"], "TA A: parallax")
        competing = ta.competing_readings(sid)
        assert sorted(competing["revision"]) == [1, 2]
        assert set(competing["measured"]) == {fix_b["measured"], fix_b2["measured"]}
        assert set(competing["source_file"]) == {"hb.sqlite"}
        conflicts = ta.events(sid).query("event == 'merge:conflict'")
        assert len(conflicts) == 2
        assert set(conflicts["by"]) == {"rel_ta"}
        assert target["reading_id"] in conflicts["detail"].iloc[0]
        before = _server_dump(db, [sid])
        rep = ta.merge([hand_a, hand_b])  # the same files: nothing new
        assert rep.competing_corrections == []
        # a second TA pushes B's file rewritten (other bytes): the competing rows are not flagged again
        b = SQLiteArchive(tmp_path / "b.sqlite")
        b.append_event({"session_id": sid, "by": "ta02", "role": "ta", "event": "note", "detail": "{}"})
        later = b.hand_in(tmp_path / "hb-later.sqlite")
        b.close()
        with PostgresArchive(db["rel_ta2"]) as ta2:
            rep2 = ta2.push(later)
        assert rep2.refused == []
        assert rep2.competing_corrections == []
        assert rep2.merged_rows == 1  # the note only
        assert len(ta.events(sid).query("event == 'merge:conflict'")) == 2
        assert _server_dump(db, [sid]) != before  # the note came in
        settled = ta.append_reading(correction_of(fix_a, 230.5, "TA: re-measured at the bench"))
        assert settled["revision"] == 2
        assert ta.check() == []


# -- hand-in written from the server -------------------------------------------------------------------------------
def test_hand_in_from_the_server_round_trips_through_sqlite_merge(db, tmp_path: Path):
    sid = _open_session(db)
    with PostgresArchive(db["rk"]) as stu:
        capture = stu.store_capture(sid, "ch1.csv", b"t,v\n0,1.5\n1,-1.5\n")
        first = stu.append_reading(reading_row(sid, 0, capture_id=capture))
        for k in range(1, 5):
            stu.append_reading(reading_row(sid, k))
        stu.append_reading(correction_of(first, 229.25))
        stu.append_event({"session_id": sid, "by": "x", "role": "student", "event": "state:submitted"})
    (tmp_path / "laptops").mkdir()
    competing_sid, *_rest, hand_a, hand_b = _competing(db, tmp_path / "laptops")
    other_group = _open_session(db, group="G2")
    with PostgresArchive(db["rel_ta"]) as ta:
        ta.add_roster([{"participant_id": "rel-p1", "name": "Demo Person", "section": "S01", "role": "student"}])
        ta.merge([hand_a, hand_b])
        out = ta.hand_in(tmp_path / "server.handin", [sid, competing_sid])
        server = {s: (ta.readings(s), ta.events(s), ta.competing_readings(s)) for s in (sid, competing_sid)}
        sessions = ta.sessions().set_index("session_id").loc[[sid, competing_sid]]
        roster = ta.roster()
        with pytest.raises(ArchiveError, match="no session nope"):
            ta.hand_in(tmp_path / "none.handin", ["nope"])
    with sqlite3.connect(f"file:{out}?mode=ro", uri=True) as conn:  # plain sqlite3, outside labkit
        assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        assert conn.execute("PRAGMA journal_mode").fetchone()[0] == "delete"
        assert {r[0] for r in conn.execute("SELECT DISTINCT session_id FROM readings")} == {sid, competing_sid}
    conn.close()
    assert not Path(f"{out}-wal").exists()
    central = SQLiteArchive(tmp_path / "central.sqlite")
    report = central.merge([out])
    assert report.refused == []
    assert report.competing_corrections == []  # the kept-aside rows travel as competing rows
    for s, (readings, events, competing) in server.items():
        assert central.readings(s).equals(readings)  # seq, recorded_at and recorded_by as on the server
        assert central.events(s).equals(events)
        assert central.competing_readings(s).drop(columns="source_file").equals(
            competing.drop(columns="source_file"))
    lite_sessions = central.sessions().set_index("session_id").loc[[sid, competing_sid]]
    assert lite_sessions.equals(sessions)
    assert lite_sessions.loc[sid, "state"] == "submitted"
    assert central.load_capture(capture)[1] == b"t,v\n0,1.5\n1,-1.5\n"
    assert set(central.roster()["participant_id"]) == set(roster["participant_id"])
    assert central.check() == []
    again = central.merge([out])
    assert again.merged_rows == 0
    central.close()
    with PostgresArchive(db["rk"]) as stu, pytest.raises(ArchiveError, match="may hand in"):
        stu.hand_in(tmp_path / "other.handin", [sid, other_group])  # another group's session: not readable
    assert not (tmp_path / "other.handin").exists()
