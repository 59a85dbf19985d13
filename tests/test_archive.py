"""The SQLite archive: durability settings, assigned seq/recorded_at, append-only corrections, dtypes, failures.

Outside references:
- SQLite documentation, "PRAGMA synchronous": FULL is 2; "PRAGMA journal_mode": WAL reports "wal"
  (recalled from memory).
- SQLite "Database File Format" §1.3: the header starts with "SQLite format 3\\0"; offset 16 page size,
  offset 28 page count (recalled from memory).
- proc(5) for the mountinfo line layout; its example line is used verbatim (recalled from memory).
- hashlib (the stdlib SHA-256) for capture ids and session text hashes; zlib for the capture codec.
"""

from __future__ import annotations

import hashlib
import random
import sqlite3
import zlib
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pandas as pd
import pytest

from labkit.logbook.filesystems import filesystem_of, is_network_filesystem, parse_mountinfo
from labkit.logbook.schema import EVENT_COLUMNS, FORMAT_VERSION, READING_COLUMNS, ROSTER_COLUMNS, SESSION_COLUMNS
from labkit.logbook.sqlite import SQLiteArchive
from labkit.logbook.storage import ArchiveError, InvalidRowError, NotRecordedError
from tests.reliability.factory import correction_of, reading_row, remount, session_row, try_mount_tmpfs, unmount


@pytest.fixture
def archive(tmp_path: Path) -> SQLiteArchive:
    a = SQLiteArchive(tmp_path / "lab.sqlite")
    yield a
    a.close()


@pytest.fixture
def session(archive: SQLiteArchive) -> str:
    row = session_row()
    archive.create_session(row)
    return row["session_id"]


def _raw_count(path: Path, table: str = "readings") -> int:
    with sqlite3.connect(path) as conn:
        return conn.execute(f"SELECT count(*) FROM {table}").fetchone()[0]


# -- durability settings ---------------------------------------------------------------------------------------------
def test_wal_and_synchronous_full(archive: SQLiteArchive) -> None:
    # SQLite docs: synchronous FULL == 2; journal_mode WAL persists in the file, so a second connection sees it
    assert archive.pragma("synchronous") == 2
    assert archive.pragma("journal_mode") == "wal"
    assert archive.pragma("busy_timeout") > 0
    with sqlite3.connect(archive.path) as other:
        assert other.execute("PRAGMA journal_mode").fetchone()[0] == "wal"


def test_format_version_is_stored_in_meta(archive: SQLiteArchive) -> None:
    assert archive.format_version == FORMAT_VERSION
    with sqlite3.connect(archive.path) as conn:
        assert conn.execute("SELECT value FROM meta WHERE key = 'format_version'").fetchone()[0] == str(FORMAT_VERSION)


def test_a_newer_format_is_refused(tmp_path: Path) -> None:
    path = tmp_path / "new.sqlite"
    SQLiteArchive(path).close()
    with sqlite3.connect(path) as conn:
        conn.execute("UPDATE meta SET value = ? WHERE key = 'format_version'", (str(FORMAT_VERSION + 1),))
    with pytest.raises(ArchiveError, match="newer labkit"):
        SQLiteArchive(path)


def test_header_is_sqlite_format_3(archive: SQLiteArchive) -> None:
    head = archive.path.read_bytes()[:100]
    assert head[:16] == b"SQLite format 3\x00"  # SQLite file format §1.3


# -- what the archive assigns ----------------------------------------------------------------------------------------
def test_seq_and_recorded_at_are_assigned(archive: SQLiteArchive, session: str) -> None:
    before = datetime.now(UTC)
    first = archive.append_reading(reading_row(session, 0))
    event = archive.append_event({"session_id": session, "by": "ta01", "role": "ta", "event": "step:forward"})
    second = archive.append_reading(reading_row(session, 1))
    after = datetime.now(UTC)
    assert (first["seq"], event["seq"], second["seq"]) == (0, 1, 2)  # shared by readings and events
    assert before - timedelta(seconds=1) <= first["recorded_at"] <= after + timedelta(seconds=1)
    assert first["recorded_at"].utcoffset() == timedelta(0)
    frame = archive.readings(session)
    assert frame["recorded_at"].tolist() == [pd.Timestamp(first["recorded_at"]), pd.Timestamp(second["recorded_at"])]


def test_seq_is_per_session(archive: SQLiteArchive) -> None:
    a, b = session_row(), session_row()
    archive.create_session(a)
    archive.create_session(b)
    seqs = [archive.append_reading(reading_row(s["session_id"], k))["seq"] for k, s in enumerate([a, b, a, a, b])]
    assert seqs == [0, 0, 1, 2, 1]


def test_caller_cannot_set_seq_or_recorded_at(archive: SQLiteArchive, session: str) -> None:
    with pytest.raises(InvalidRowError, match="seq: is assigned by the archive"):
        archive.append_reading(reading_row(session, seq=5))
    assert _raw_count(archive.path) == 0


def test_returned_row_is_what_is_stored(archive: SQLiteArchive, session: str) -> None:
    row = archive.append_reading(reading_row(session, 3, sensor="VS2", note="bench 3 fan noisy"))
    stored = archive.readings().iloc[0]
    for column in READING_COLUMNS:
        if column.dtype == "datetime64[ns, UTC]":
            assert stored[column.name] == pd.Timestamp(row[column.name])
        else:
            assert stored[column.name] == row[column.name], column.name


# -- append-only corrections -----------------------------------------------------------------------------------------
def test_correction_is_a_new_row_and_latest_only_picks_it(archive: SQLiteArchive, session: str) -> None:
    first = archive.append_reading(reading_row(session))
    other = archive.append_reading(reading_row(session, 1))
    fixed = archive.append_reading(correction_of(first, 229.4))
    again = archive.append_reading(correction_of(fixed, 229.5, "second look at the display"))
    everything = archive.readings(session)
    assert len(everything) == 4
    latest = archive.readings(session, latest_only=True)
    assert sorted(latest["reading_id"]) == sorted([first["reading_id"], other["reading_id"]])
    mine = latest[latest["reading_id"] == first["reading_id"]].iloc[0]
    assert (mine["revision"], mine["supersedes"], mine["measured"]) == (2, 1, 229.5)
    assert again["reason"] == "second look at the display"
    # the original is still there, untouched
    original = everything[(everything["reading_id"] == first["reading_id"]) & (everything["revision"] == 0)]
    assert original["measured"].iloc[0] == first["measured"]


@pytest.mark.parametrize(("change", "match"), [
    ({"reason": ""}, "needs a reason"),
    ({"supersedes": 0, "revision": 2}, "supersedes revision 1"),
    ({"revision": 2, "supersedes": 1}, "does not follow the latest recorded revision 0"),
])
def test_bad_corrections_are_refused(archive: SQLiteArchive, session: str, change: dict, match: str) -> None:
    first = archive.append_reading(reading_row(session))
    bad = correction_of(first, 229.0)
    bad.update(change)
    with pytest.raises(InvalidRowError, match=match):
        archive.append_reading(bad)
    assert _raw_count(archive.path) == 1


def test_a_correction_of_an_unknown_reading_is_refused(archive: SQLiteArchive, session: str) -> None:
    row = reading_row(session, revision=1, supersedes=0, reason="typo")
    with pytest.raises(InvalidRowError, match="has no revision 0"):
        archive.append_reading(row)


def test_the_same_revision_twice_is_refused(archive: SQLiteArchive, session: str) -> None:
    row = reading_row(session)
    archive.append_reading(row)
    with pytest.raises(InvalidRowError, match="already recorded"):
        archive.append_reading(row)
    assert _raw_count(archive.path) == 1


def test_no_update_or_delete_paths(archive: SQLiteArchive, session: str) -> None:
    archive.append_reading(reading_row(session))
    archive.append_event({"session_id": session, "by": "ta01", "role": "ta", "event": "step:forward"})
    assert not [name for name in dir(archive) if name.lower().startswith(("update", "delete", "remove", "edit"))]
    with sqlite3.connect(archive.path) as conn:  # even a program that bypasses the archive class
        for sql in ("UPDATE readings SET measured = 0", "DELETE FROM readings", "DELETE FROM sessions",
                    "UPDATE events SET event = 'x'"):
            with pytest.raises(sqlite3.IntegrityError, match="append-only"):
                conn.execute(sql)
    assert archive.readings()["measured"].iloc[0] == 228.5


def test_batch_is_all_or_nothing(archive: SQLiteArchive, session: str) -> None:
    good = [reading_row(session, k) for k in range(5)]
    with pytest.raises(InvalidRowError, match=r"row 3: .*verdict"):
        archive.append_readings([*good[:3], reading_row(session, verdict="passed"), good[4]])
    assert _raw_count(archive.path) == 0
    clash = [*good[:3], good[0]]  # the same reading twice in one batch
    with pytest.raises(InvalidRowError, match="already recorded"):
        archive.append_readings(clash)
    assert _raw_count(archive.path) == 0
    assert len(archive.append_readings(good)) == 5


# -- row checks ------------------------------------------------------------------------------------------------------
@pytest.mark.parametrize(("change", "match"), [
    ({"measured": "228.5"}, "measured: expected a number"),
    ({"revision": 0.5}, "revision: expected an integer"),
    ({"revision": True}, "revision: expected an integer"),
    ({"quantity": None}, "quantity: required value missing"),
    ({"form": "rsm"}, "form: expected one of rms"),
    ({"obtained": "guessed"}, "obtained: expected one of typed"),
    ({"temperature": 21.0}, "temperature: unknown column"),
    ({"reading_id": ""}, "reading_id: required value missing"),
])
def test_bad_reading_rows_are_refused(archive: SQLiteArchive, session: str, change: dict, match: str) -> None:
    with pytest.raises(InvalidRowError, match=match) as info:
        archive.append_reading(reading_row(session, **change))
    assert isinstance(info.value, NotRecordedError)  # the UI keeps the value marked "not recorded"
    assert _raw_count(archive.path) == 0


def test_a_missing_required_column_is_named(archive: SQLiteArchive, session: str) -> None:
    row = reading_row(session)
    del row["location"]
    with pytest.raises(InvalidRowError, match="location: required column missing"):
        archive.append_reading(row)


def test_reading_of_an_unknown_session_is_refused(archive: SQLiteArchive) -> None:
    with pytest.raises(InvalidRowError, match="session 'nope' does not exist"):
        archive.append_reading(reading_row("nope"))


def test_nan_measured_and_absent_meter_range_stay_nan(archive: SQLiteArchive, session: str) -> None:
    archive.append_reading(reading_row(session, measured=float("nan"), entered="OL", meter_range=None))
    frame = archive.readings()
    assert frame["measured"].isna().all()
    assert frame["meter_range"].isna().all()
    assert frame["entered"].iloc[0] == "OL"


# -- dtypes ----------------------------------------------------------------------------------------------------------
def _assert_dtypes(frame: pd.DataFrame, columns: tuple) -> None:
    assert list(frame.columns) == [c.name for c in columns]
    assert {c.name: str(frame[c.name].dtype) for c in columns} == {c.name: c.dtype for c in columns}


def test_frames_have_the_schema_dtypes(archive: SQLiteArchive, session: str) -> None:
    for frame, columns in ((archive.readings(), READING_COLUMNS), (archive.events(), EVENT_COLUMNS),
                           (archive.roster(), ROSTER_COLUMNS)):
        _assert_dtypes(frame, columns)  # empty tables too
        assert len(frame) == 0
    archive.append_reading(reading_row(session))
    archive.append_event({"session_id": session, "by": "ta01", "role": "ta", "event": "note",
                          "detail": '{"text": "invented demo note"}'})
    archive.add_roster([{"participant_id": "p001", "name": "Demo Student One", "section": "S01", "group": "G1",
                         "role": "student"}])
    _assert_dtypes(archive.readings(), READING_COLUMNS)
    _assert_dtypes(archive.readings(latest_only=True), READING_COLUMNS)
    _assert_dtypes(archive.events(), EVENT_COLUMNS)
    _assert_dtypes(archive.sessions(), SESSION_COLUMNS)
    _assert_dtypes(archive.roster(), ROSTER_COLUMNS)


# -- sessions, events, roster, captures ------------------------------------------------------------------------------
def test_session_keeps_texts_hashes_version_and_seed(archive: SQLiteArchive) -> None:
    cart = '[cart]\nid = "cart-07"\n'
    row = session_row(cart_text=cart, cart_sha256=hashlib.sha256(cart.encode()).hexdigest(), mc_seed=77)
    archive.create_session(row)
    stored = archive.sessions().iloc[0]
    for key in ("bench_text", "template_text", "cart_text", "bench_sha256", "template_sha256", "cart_sha256",
                "labkit_version"):
        assert stored[key] == row[key]
    assert stored["mc_seed"] == 77
    assert hashlib.sha256(stored["bench_text"].encode()).hexdigest() == stored["bench_sha256"]


def test_session_text_hash_must_match(archive: SQLiteArchive) -> None:
    with pytest.raises(InvalidRowError, match="bench_sha256: does not match"):
        archive.create_session(session_row(bench_sha256="0" * 64))


def test_session_id_must_be_new_unless_identical(archive: SQLiteArchive) -> None:
    row = session_row()
    archive.create_session(row)
    archive.create_session(row)  # a retry after a crash
    with pytest.raises(NotRecordedError, match="another session with this id"):
        archive.create_session({**row, "group": "G9"})
    assert len(archive.sessions()) == 1


def test_state_comes_from_the_latest_state_event(archive: SQLiteArchive, session: str) -> None:
    assert archive.session_state(session) == "open"
    for state in ("submitted", "closed"):
        archive.append_event({"session_id": session, "by": "ta01", "role": "ta", "event": f"state:{state}"})
    assert archive.sessions()["state"].tolist() == ["closed"]
    with pytest.raises(InvalidRowError, match="event: expected one of state:planned"):
        archive.append_event({"session_id": session, "by": "ta01", "role": "ta", "event": "state:done"})


def test_roster_is_append_only(archive: SQLiteArchive) -> None:
    entry = {"participant_id": "p001", "name": "Demo Student One", "section": "S01", "group": "G1",
             "role": "student"}
    archive.add_roster([entry])
    archive.add_roster([entry])
    with pytest.raises(InvalidRowError, match="already on the roster"):
        archive.add_roster([{**entry, "name": "Someone Else"}])
    assert archive.roster()["name"].tolist() == ["Demo Student One"]


def test_captures_are_compressed_and_keyed_by_hash(archive: SQLiteArchive, session: str) -> None:
    data = b"t,v,i\n" + b"".join(f"{k / 5000:.6f},{(k % 50) - 25},{(k % 7) * 0.1:.1f}\n".encode()
                                 for k in range(5000))
    capture_id = archive.store_capture(session, "scope-ch1-ch2.csv", data)
    assert capture_id == hashlib.sha256(data).hexdigest()
    assert archive.store_capture(session, "scope-ch1-ch2.csv", data) == capture_id
    assert archive.load_capture(capture_id) == ("scope-ch1-ch2.csv", data)
    with sqlite3.connect(archive.path) as conn:
        codec, blob = conn.execute("SELECT codec, data FROM captures").fetchone()
    assert codec == "zlib"
    assert zlib.decompress(blob) == data
    assert len(blob) < len(data) / 3
    row = archive.append_reading(reading_row(session, obtained="capture", capture_id=capture_id))
    assert row["capture_id"] == capture_id
    with pytest.raises(InvalidRowError, match="is not stored with session"):
        archive.append_reading(reading_row(session, capture_id="f" * 64))


def _fill_until_refused(archive: SQLiteArchive, session_id: str, batch: int, note: int) -> tuple[int, Exception]:
    """Append batches until the archive refuses one; the count recorded before, and the error."""
    recorded = 0
    for _ in range(2000):
        try:
            archive.append_readings([reading_row(session_id, note="n" * note) for _ in range(batch)])
        except NotRecordedError as exc:
            return recorded, exc
        recorded += batch
    raise AssertionError("the archive never filled up")


# -- failures --------------------------------------------------------------------------------------------------------
def test_size_limit_full_raises_not_recorded_and_writes_nothing(tmp_path: Path) -> None:
    path = tmp_path / "small.sqlite"
    SQLiteArchive(path).close()
    pages = sqlite3.connect(path).execute("PRAGMA page_count").fetchone()[0]
    archive = SQLiteArchive(path, max_page_count=pages + 6)
    row = session_row()
    archive.create_session(row)
    recorded, error = _fill_until_refused(archive, row["session_id"], 5, 1500)
    assert "full" in str(error)
    assert "NOT recorded" in str(error)
    assert str(path) in str(error)
    assert len(archive.readings()) == recorded  # the failed batch left nothing behind
    assert archive.check() == []
    archive.close()


def test_query_only_connection_raises_not_recorded(archive: SQLiteArchive, session: str) -> None:
    archive._connection.execute("PRAGMA query_only = ON")  # SQLite refuses writes as on a read-only file
    with pytest.raises(NotRecordedError, match="cannot be written"):
        archive.append_reading(reading_row(session))
    archive._connection.execute("PRAGMA query_only = OFF")
    assert len(archive.readings()) == 0


def test_read_only_open_refuses_writes(tmp_path: Path) -> None:
    path = tmp_path / "ro.sqlite"
    with SQLiteArchive(path) as a:
        row = session_row()
        a.create_session(row)
    with SQLiteArchive(path, read_only=True) as ro:
        assert len(ro.sessions()) == 1
        with pytest.raises(NotRecordedError, match="opened read-only"):
            ro.append_reading(reading_row(row["session_id"]))


@pytest.fixture
def small_disk(tmp_path: Path) -> Path:
    """A real 1 MiB disk (tmpfs) when this user may mount; otherwise a folder made read-only by mode bits."""
    folder = tmp_path / "disk"
    folder.mkdir()
    mounted = try_mount_tmpfs(folder, "1m")
    yield folder if mounted else None
    if mounted:
        unmount(folder)


def test_real_full_disk_raises_not_recorded(small_disk: Path | None) -> None:
    if small_disk is None:
        pytest.skip("mounting a small tmpfs needs root; the max_page_count test covers a full archive")
    archive = SQLiteArchive(small_disk / "lab.sqlite")
    row = session_row()
    archive.create_session(row)
    recorded, error = _fill_until_refused(archive, row["session_id"], 10, 2000)
    assert "the disk (or the archive's size limit) is full" in str(error)
    assert len(archive.readings()) == recorded
    assert archive.check() == []
    archive.close()


def test_read_only_disk_or_folder_raises_not_recorded(tmp_path: Path, small_disk: Path | None) -> None:
    folder = small_disk
    if folder is None:  # not root: make the folder and file read-only instead (root would ignore mode bits)
        folder = tmp_path / "ro"
        folder.mkdir()
    path = folder / "lab.sqlite"
    row = session_row()
    with SQLiteArchive(path) as a:
        a.create_session(row)
        a.append_reading(reading_row(row["session_id"]))
    before = path.read_bytes()
    if small_disk is not None:
        remount(folder, "ro")
    else:
        path.chmod(0o444)
        folder.chmod(0o555)
    try:
        with SQLiteArchive(path) as archive:
            assert len(archive.readings()) == 1
            with pytest.raises(NotRecordedError, match="read-only"):
                archive.append_reading(reading_row(row["session_id"], 1))
    finally:
        if small_disk is not None:
            remount(folder, "rw")
        else:
            folder.chmod(0o755)
            path.chmod(0o644)
    assert path.read_bytes() == before


# -- network filesystems ---------------------------------------------------------------------------------------------
PROC5_EXAMPLE = "36 35 98:0 /mnt1 /mnt2 rw,noatime master:1 - ext3 /dev/root rw,errors=continue"  # proc(5)
FAKE_MOUNTINFO = "\n".join([
    "22 1 8:1 / / rw,relatime shared:1 - ext4 /dev/sda1 rw",
    "40 22 0:50 / /home/ta/shared rw,relatime shared:20 - nfs4 fileserver:/export/labs rw,vers=4.2",
    "41 22 0:51 / /media/course\\040share rw,relatime - cifs //server/course rw",
    "42 22 0:52 / /mnt/remote rw,nosuid - fuse.sshfs ta@host:/labs rw,user_id=0",
    "43 22 0:53 / /mnt/vmshare rw - 9p hostshare rw,trans=virtio",
    "44 40 8:2 / /home/ta/shared/local rw - ext4 /dev/sdb1 rw",
])


def test_mountinfo_parsing_follows_proc5() -> None:
    (mount,) = parse_mountinfo(PROC5_EXAMPLE)
    assert (mount.mount_point, mount.fstype, mount.source) == ("/mnt2", "ext3", "/dev/root")


@pytest.mark.parametrize(("path", "fstype"), [
    ("/home/ta/shared/lab.sqlite", "nfs4"), ("/media/course share/x/lab.sqlite", "cifs"),
    ("/mnt/remote/lab.sqlite", "fuse.sshfs"), ("/mnt/vmshare/lab.sqlite", "9p"),
    ("/home/ta/shared/local/lab.sqlite", "ext4"), ("/home/ta/sharedness/lab.sqlite", "ext4"),
])
def test_filesystem_of_a_path(path: str, fstype: str) -> None:
    mount = filesystem_of(path, FAKE_MOUNTINFO)
    assert mount is not None
    assert mount.fstype == fstype


@pytest.mark.parametrize("fstype", ["nfs", "nfs4", "cifs", "smb3", "smbfs", "9p", "sshfs", "fuse.sshfs"])
def test_network_filesystems_are_named(fstype: str) -> None:
    assert is_network_filesystem(fstype)


def test_local_filesystems_pass() -> None:
    assert not any(is_network_filesystem(f) for f in ("ext4", "xfs", "btrfs", "tmpfs", "vfat", "overlay"))


def test_archive_on_a_network_filesystem_is_refused(tmp_path: Path) -> None:
    fake = f"22 1 8:1 / / rw - ext4 /dev/sda1 rw\n40 22 0:50 / {tmp_path} rw - nfs4 server:/labs rw"
    with pytest.raises(ArchiveError, match=r"network filesystem \(nfs4 from server:/labs"):
        SQLiteArchive(tmp_path / "lab.sqlite", mountinfo=fake)
    assert not (tmp_path / "lab.sqlite").exists()
    SQLiteArchive(tmp_path / "lab.sqlite", mountinfo=fake, allow_network_filesystem=True).close()


# -- corrupt and truncated archives ----------------------------------------------------------------------------------
def _filled(path: Path, n: int = 300) -> str:
    with SQLiteArchive(path) as a:
        row = session_row()
        a.create_session(row)
        a.append_readings([reading_row(row["session_id"], k, note="demo " * 20) for k in range(n)])
        a._connection.execute("PRAGMA wal_checkpoint(TRUNCATE)")
    return row["session_id"]


def test_truncated_archive_is_a_clear_error(tmp_path: Path) -> None:
    good, bad = tmp_path / "good.sqlite", tmp_path / "bad.sqlite"
    _filled(good)
    _filled(bad)
    good_bytes = good.read_bytes()
    data = bad.read_bytes()
    page = int.from_bytes(data[16:18], "big")
    bad.write_bytes(data[: page * 3])  # whole pages, but fewer than the header counts
    with pytest.raises(ArchiveError, match=r"bad\.sqlite: truncated archive: the header counts"):
        SQLiteArchive(bad)
    bad.write_bytes(data[: page * 3 + 100])
    with pytest.raises(ArchiveError, match="not a whole number"):
        SQLiteArchive(bad)
    bad.write_bytes(b"")
    with pytest.raises(ArchiveError, match="empty"):
        SQLiteArchive(bad)
    with SQLiteArchive(good) as other:  # other archives are untouched and still work
        assert len(other.readings()) == 300
    assert good.read_bytes()[:100] == good_bytes[:100]
    assert _raw_count(good) == 300


def test_a_checkpoint_cut_short_is_not_taken_for_truncation(tmp_path: Path) -> None:
    # A crash during a checkpoint can leave page 1 (with the new page count) written to the main file before
    # the pages that extend it; the write-ahead log still holds them and SQLite replays it on open (sqlite.org,
    # "Write-Ahead Logging": readers take the newest copy of a page from the log). Such an archive is sound.
    path, crashed = tmp_path / "lab.sqlite", tmp_path / "crashed.sqlite"
    session_id = _filled(path, 5)
    with SQLiteArchive(path) as a:
        a._connection.execute("PRAGMA wal_autocheckpoint = 0")  # the new readings stay in the log
        a.append_readings([reading_row(session_id, 100 + k, note="demo " * 20) for k in range(300)])
        crashed.write_bytes(path.read_bytes())  # the files as a crash would leave them
        (tmp_path / "crashed.sqlite-wal").write_bytes((tmp_path / "lab.sqlite-wal").read_bytes())
    data = bytearray(crashed.read_bytes())
    page = int.from_bytes(data[16:18], "big")
    data[28:32] = (len(data) // page + 50).to_bytes(4, "big")  # page 1 counts pages the file does not have yet
    crashed.write_bytes(bytes(data))
    with SQLiteArchive(crashed) as other:
        assert len(other.readings(session_id)) == 305
        assert other.check() == []


def test_foreign_file_is_a_clear_error(tmp_path: Path) -> None:
    path = tmp_path / "notes.sqlite"
    path.write_text("readings: 230 V, 1.2 A\n" * 50)
    with pytest.raises(ArchiveError, match="not a labkit archive"):
        SQLiteArchive(path)
    plain = tmp_path / "plain.sqlite"
    with sqlite3.connect(plain) as conn:
        conn.execute("CREATE TABLE t (x)")
    with pytest.raises(ArchiveError, match="without labkit's meta table"):
        SQLiteArchive(plain)


@pytest.mark.parametrize("seed", [1, 2, 3, 4])
def test_corrupt_pages_are_found(tmp_path: Path, seed: int) -> None:
    good, bad = tmp_path / "good.sqlite", tmp_path / "bad.sqlite"
    _filled(good)
    _filled(bad)
    before = hashlib.sha256(good.read_bytes()).hexdigest()
    data = bytearray(bad.read_bytes())
    page = int.from_bytes(data[16:18], "big")
    scribble = random.Random(seed)  # seeded: a failure can be replayed
    for k in range(page * 4, len(data) - page, page * 3):  # scribble over the middle of several pages
        data[k + 8: k + 200] = scribble.randbytes(192)
    bad.write_bytes(bytes(data))
    problems: list[str] = []
    try:
        with SQLiteArchive(bad) as archive:
            problems = archive.check()
            if not problems:
                archive.readings()
    except ArchiveError as exc:
        problems = [str(exc)]
    assert problems
    assert all("bad.sqlite" in p for p in problems)
    with SQLiteArchive(good) as other:
        assert other.check() == []
    assert hashlib.sha256(good.read_bytes()).hexdigest() == before or _raw_count(good) == 300


@pytest.mark.parametrize("table", ["meta", "readings", "sqlite_master"])
def test_stored_text_that_is_not_utf8_is_a_clear_error(tmp_path: Path, table: str) -> None:
    # damaged pages can hold bytes that are not UTF-8 where SQLite keeps text: Python's sqlite3 fails on
    # such a value, or (UnicodeDecodeError) on an error message quoting a garbled schema entry's name;
    # either must come out as the archive's own error naming the file
    path = tmp_path / "garbled.sqlite"
    _filled(path, 5)
    with sqlite3.connect(path) as conn:
        if table == "meta":
            conn.execute("UPDATE meta SET value = CAST(x'ff85' AS TEXT) WHERE key = 'format_version'")
        elif table == "sqlite_master":
            conn.execute("PRAGMA writable_schema = ON")
            conn.execute("UPDATE sqlite_master SET name = CAST(x'ff85' AS TEXT), sql = 'CREATE INDEX '"
                         " || CAST(x'ff85' AS TEXT) || ' ON nowhere (x) garbage' WHERE type = 'index'")
        else:
            conn.execute("DROP TRIGGER readings_no_update")
            conn.execute("UPDATE readings SET note = CAST(x'ff85' AS TEXT) WHERE rowid = 3")
    with pytest.raises(ArchiveError, match=r"garbled\.sqlite.*corrupt \(stored text that is not UTF-8\)"), \
            SQLiteArchive(path) as archive:
        archive.readings()


def test_check_finds_a_row_edited_behind_the_archive(tmp_path: Path) -> None:
    path = tmp_path / "edited.sqlite"
    _filled(path, 5)
    with sqlite3.connect(path) as conn:
        conn.execute("DROP TRIGGER readings_no_update")
        conn.execute("UPDATE readings SET measured = 240.0 WHERE rowid = 3")
    with SQLiteArchive(path) as archive:
        problems = archive.check()
    assert any("readings: 1 rows do not match their row hash" in p for p in problems)
