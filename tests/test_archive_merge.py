"""Hand-in files and merging them: self-contained, idempotent, refusals per file, competing corrections kept.

Reference for "self-contained": the hand-in is opened by plain :mod:`sqlite3` (outside labkit) with no
``-wal`` file beside it and passes SQLite's own ``PRAGMA integrity_check``. Content equality is checked
with hashlib's SHA-256 over a plain-sqlite3 dump of the log tables.
"""

from __future__ import annotations

import hashlib
import shutil
import sqlite3
from pathlib import Path

import pytest

from labkit.logbook.sqlite import SQLiteArchive
from labkit.logbook.storage import NotRecordedError
from tests.data.archives.make_v0_fixture import FIXTURE
from tests.reliability.factory import correction_of, reading_row, session_row

LOG_TABLES = ("sessions", "readings", "events", "roster", "captures", "competing_readings")


def _dump_hash(path: Path) -> str:
    conn = sqlite3.connect(f"file:{path}?mode=ro", uri=True)
    digest = hashlib.sha256()
    for table in LOG_TABLES:
        for row in conn.execute(f"SELECT * FROM {table} ORDER BY rowid"):
            digest.update(repr(row).encode())
    conn.close()
    return digest.hexdigest()


def _laptop(path: Path, section: str = "S01", n: int = 4) -> tuple[SQLiteArchive, str, list[dict]]:
    archive = SQLiteArchive(path)
    row = session_row(section=section)
    archive.create_session(row)
    readings = [archive.append_reading(reading_row(row["session_id"], k, section=section)) for k in range(n)]
    archive.append_event({"session_id": row["session_id"], "by": "ta01", "role": "ta", "event": "state:submitted"})
    return archive, row["session_id"], readings


def test_hand_in_is_one_self_contained_file(tmp_path: Path) -> None:
    laptop, sid, _ = _laptop(tmp_path / "laptop.sqlite")
    other = session_row(section="S02")
    laptop.create_session(other)
    laptop.append_reading(reading_row(other["session_id"], section="S02"))
    capture = laptop.store_capture(sid, "ch1.csv", b"t,v\n0,1.5\n1,-1.5\n")
    laptop.add_roster([{"participant_id": "p001", "name": "Demo One", "section": "S01", "role": "student"},
                       {"participant_id": "p009", "name": "Demo Nine", "section": "S02", "role": "student"}])
    out = laptop.hand_in(tmp_path / "handin.sqlite", [sid])
    laptop.close()
    assert not Path(f"{out}-wal").exists()
    with sqlite3.connect(f"file:{out}?mode=ro", uri=True) as conn:
        assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        assert conn.execute("PRAGMA journal_mode").fetchone()[0] == "delete"
        assert {r[0] for r in conn.execute("SELECT DISTINCT session_id FROM readings")} == {sid}
        assert [r[0] for r in conn.execute("SELECT participant_id FROM roster")] == ["p001"]
    moved = tmp_path / "elsewhere" / "collected.sqlite"
    moved.parent.mkdir()
    shutil.move(out, moved)
    with SQLiteArchive(moved) as copy:
        assert copy.check() == []
        assert len(copy.readings()) == 4
        assert copy.load_capture(capture)[1] == b"t,v\n0,1.5\n1,-1.5\n"


def test_unknown_session_cannot_be_handed_in(tmp_path: Path) -> None:
    from labkit.logbook.storage import ArchiveError

    laptop, _, _ = _laptop(tmp_path / "laptop.sqlite")
    with pytest.raises(ArchiveError, match="no session nope to hand in"):
        laptop.hand_in(tmp_path / "h.sqlite", ["nope"])
    assert not (tmp_path / "h.sqlite").exists()


def test_merge_collects_laptops_and_is_idempotent(tmp_path: Path) -> None:
    files = []
    sources = []
    for k in range(3):
        laptop, sid, _ = _laptop(tmp_path / f"laptop{k}.sqlite", n=3 + k)
        files.append(laptop.hand_in(tmp_path / f"handin{k}.sqlite"))
        sources.append((sid, laptop.readings(sid)))
        laptop.close()
    central = SQLiteArchive(tmp_path / "central.sqlite")
    report = central.merge(files)
    assert report.refused == []
    assert report.merged_rows == 3 + 4 + 5
    assert sorted(report.merged_sessions) == sorted(s for s, _ in sources)
    for sid, frame in sources:
        merged = central.readings(sid)
        assert merged.equals(frame)  # seq and recorded_at travel unchanged
    before = _dump_hash(central.path)
    again = central.merge(files + files[:1])  # the same files again, one of them twice
    assert (again.merged_rows, again.duplicates_skipped, again.refused) == (0, 12 + 3, [])
    assert _dump_hash(central.path) == before
    assert central.check() == []
    central.close()


def test_equal_id_with_different_content_refuses_that_file_only(tmp_path: Path) -> None:
    a, sid, _ = _laptop(tmp_path / "a.sqlite")
    good = a.hand_in(tmp_path / "good.sqlite")
    # the same session id with other content, plus a session the archive does not have
    b = SQLiteArchive(tmp_path / "b.sqlite")
    b.create_session(session_row(sid, group="G7"))
    extra = session_row()
    b.create_session(extra)
    b.append_reading(reading_row(extra["session_id"]))
    clash = b.hand_in(tmp_path / "clash.sqlite")
    third, sid3, _ = _laptop(tmp_path / "c.sqlite")
    fine = third.hand_in(tmp_path / "fine.sqlite")
    central = SQLiteArchive(tmp_path / "central.sqlite")
    report = central.merge([good, clash, fine])
    assert len(report.refused) == 1
    assert "clash.sqlite" in report.refused[0]
    assert f"session {sid} differs" in report.refused[0]
    assert "nothing of this file was merged" in report.refused[0]
    ids = set(central.sessions()["session_id"])
    assert ids == {sid, sid3}  # the clash file's other session did not come in either
    assert extra["session_id"] not in set(central.readings()["session_id"])
    for x in (a, b, third, central):
        x.close()


def test_revision_zero_with_different_content_is_refused(tmp_path: Path) -> None:
    a, _, readings = _laptop(tmp_path / "a.sqlite")
    handin = a.hand_in(tmp_path / "a-handin.sqlite")
    central = SQLiteArchive(tmp_path / "central.sqlite")
    central.merge([handin])
    # forge a hand-in whose revision 0 of one reading differs, hashes recomputed so it looks genuine
    forged = tmp_path / "forged.sqlite"
    shutil.copyfile(handin, forged)
    from labkit.logbook.rows import row_hash
    from labkit.logbook.schema import READING_COLUMNS

    with sqlite3.connect(forged) as conn:
        conn.execute("DROP TRIGGER readings_no_update")
        conn.execute("UPDATE readings SET measured = 250.0 WHERE reading_id = ?", (readings[0]["reading_id"],))
        names = ", ".join(f'"{c.name}"' for c in READING_COLUMNS)
        row = conn.execute(f"SELECT {names} FROM readings WHERE reading_id = ?",
                           (readings[0]["reading_id"],)).fetchone()
        conn.execute("UPDATE readings SET row_sha256 = ? WHERE reading_id = ?",
                     (row_hash("readings", tuple(row)), readings[0]["reading_id"]))
    before = _dump_hash(central.path)
    report = central.merge([forged])
    assert "revision 0 differs" in report.refused[0]
    assert _dump_hash(central.path) == before
    a.close()
    central.close()


def test_tampered_hand_in_is_refused(tmp_path: Path) -> None:
    a, _, _ = _laptop(tmp_path / "a.sqlite")
    handin = a.hand_in(tmp_path / "h.sqlite")
    with sqlite3.connect(handin) as conn:
        conn.execute("DROP TRIGGER readings_no_update")
        conn.execute("UPDATE readings SET measured = 1.0 WHERE rowid = 1")
    central = SQLiteArchive(tmp_path / "central.sqlite")
    report = central.merge([handin])
    assert "does not match its row hash" in report.refused[0]
    assert len(central.readings()) == 0
    a.close()
    central.close()


def test_corrupt_hand_in_is_refused_and_others_merge(tmp_path: Path) -> None:
    a, sid, _ = _laptop(tmp_path / "a.sqlite")
    good = a.hand_in(tmp_path / "good.sqlite")
    broken = tmp_path / "broken.sqlite"
    broken.write_bytes(good.read_bytes()[:1500])
    central = SQLiteArchive(tmp_path / "central.sqlite")
    report = central.merge([broken, good, tmp_path / "missing.sqlite"])
    assert len(report.refused) == 2
    assert any("broken.sqlite" in r and ("truncated" in r or "not a whole number" in r) for r in report.refused)
    assert any("missing.sqlite: no such file" in r for r in report.refused)
    assert set(central.sessions()["session_id"]) == {sid}
    a.close()
    central.close()


def test_competing_corrections_are_kept_and_flagged(tmp_path: Path) -> None:
    # laptop A records; laptop B gets a copy; each corrects the same reading differently
    a, sid, readings = _laptop(tmp_path / "a.sqlite")
    base = a.hand_in(tmp_path / "base.sqlite")
    b = SQLiteArchive(tmp_path / "b.sqlite")
    b.merge([base])
    target = readings[1]
    fix_a = a.append_reading(correction_of(target, 229.0, "TA A: parallax"))
    fix_b = b.append_reading(correction_of(target, 231.0, "TA B: wrong range"))
    fix_b2 = b.append_reading(correction_of(fix_b, 231.5, "TA B: second look"))
    hand_a, hand_b = a.hand_in(tmp_path / "ha.sqlite"), b.hand_in(tmp_path / "hb.sqlite")
    central = SQLiteArchive(tmp_path / "central.sqlite")
    report = central.merge([hand_a, hand_b])
    assert report.refused == []
    assert len(report.competing_corrections) == 2  # B's revision 1 and the revision 2 built on it
    assert all("hb.sqlite" in c and target["reading_id"] in c for c in report.competing_corrections)
    latest = central.readings(sid, latest_only=True)
    assert latest["reading_id"].is_unique  # well-defined: one row per reading
    mine = latest[latest["reading_id"] == target["reading_id"]].iloc[0]
    assert (mine["revision"], mine["measured"], mine["reason"]) == (1, fix_a["measured"], "TA A: parallax")
    competing = central.competing_readings(sid)
    assert sorted(competing["revision"]) == [1, 2]
    assert set(competing["measured"]) == {fix_b["measured"], fix_b2["measured"]}
    assert set(competing["source_file"]) == {"hb.sqlite"}
    conflicts = central.events(sid).query("event == 'merge:conflict'")
    assert len(conflicts) == 2
    assert target["reading_id"] in conflicts["detail"].iloc[0]
    before = _dump_hash(central.path)
    assert central.merge([hand_a, hand_b]).competing_corrections == []  # nothing new the second time
    assert _dump_hash(central.path) == before
    # the TA settles it with a new correction of the authoritative chain
    settled = central.append_reading(correction_of(
        {**fix_a, "recorded_at": fix_a["recorded_at"]}, 230.5, "TA: re-measured at the bench"))
    assert settled["revision"] == 2
    for x in (a, b, central):
        x.close()


def test_merge_is_one_transaction(tmp_path: Path) -> None:
    files = []
    for k in range(4):
        laptop, _, _ = _laptop(tmp_path / f"l{k}.sqlite", n=40)
        files.append(laptop.hand_in(tmp_path / f"h{k}.sqlite"))
        laptop.close()
    path = tmp_path / "central.sqlite"
    SQLiteArchive(path).close()
    pages = sqlite3.connect(path).execute("PRAGMA page_count").fetchone()[0]
    central = SQLiteArchive(path, max_page_count=pages + 12)  # room for some files, not all
    before = _dump_hash(path)
    with pytest.raises(NotRecordedError, match="full"):
        central.merge(files)
    assert _dump_hash(path) == before
    central.close()


def test_old_format_hand_in_is_migrated_in_a_copy(tmp_path: Path) -> None:
    collected = tmp_path / "old-handin.sqlite"
    shutil.copyfile(FIXTURE, collected)
    before = collected.read_bytes()
    central = SQLiteArchive(tmp_path / "central.sqlite")
    report = central.merge([collected])
    assert report.refused == []
    assert report.merged_rows == 12
    assert collected.read_bytes() == before
    assert central.check() == []
    central.close()
