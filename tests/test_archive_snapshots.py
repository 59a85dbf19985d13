"""Parquet snapshots of closed sessions: equal to the archive, hash-checked, rebuilt when missing, stale or changed.

References: the file hash is recomputed with hashlib's SHA-256; the Parquet files are read back with pyarrow
(outside labkit); the frames are compared with pandas' own ``assert_frame_equal``.
"""

from __future__ import annotations

import hashlib
import sqlite3
from pathlib import Path

import pandas as pd
import pyarrow.parquet as pq
import pytest

from labkit.logbook.snapshots import load_readings, snapshot_dir
from labkit.logbook.sqlite import SQLiteArchive
from tests.reliability.factory import correction_of, reading_row, session_row


def _close(archive: SQLiteArchive, session_id: str) -> None:
    archive.append_event({"session_id": session_id, "by": "ta01", "role": "ta", "event": "state:closed"})


@pytest.fixture
def lab(tmp_path: Path) -> tuple[SQLiteArchive, str, str, list[dict]]:
    archive = SQLiteArchive(tmp_path / "lab.sqlite")
    closed, still_open = session_row(), session_row(section="S02")
    archive.create_session(closed)
    archive.create_session(still_open)
    rows = archive.append_readings([reading_row(closed["session_id"], k) for k in range(30)])
    archive.append_readings([reading_row(still_open["session_id"], k, section="S02") for k in range(10)])
    _close(archive, closed["session_id"])
    yield archive, closed["session_id"], still_open["session_id"], rows
    archive.close()


def _records(archive: SQLiteArchive) -> list[tuple]:
    with sqlite3.connect(archive.path) as conn:
        return conn.execute("SELECT session_id, file, file_sha256, row_count FROM snapshots ORDER BY rowid").fetchall()


def test_snapshot_of_a_closed_session_equals_the_archive(lab: tuple) -> None:
    archive, closed, still_open, _ = lab
    frame = load_readings(archive)
    pd.testing.assert_frame_equal(frame, archive.readings())
    (record,) = _records(archive)
    assert record[0] == closed
    assert record[3] == 30
    path = snapshot_dir(archive) / record[1]
    assert hashlib.sha256(path.read_bytes()).hexdigest() == record[2]
    assert pq.read_table(path).num_rows == 30
    assert not (snapshot_dir(archive) / f"{still_open}.parquet").exists()  # open sessions read SQLite
    pd.testing.assert_frame_equal(load_readings(archive, latest_only=True), archive.readings(latest_only=True))


def test_a_current_snapshot_is_reused(lab: tuple) -> None:
    archive, closed, _, _ = lab
    load_readings(archive, [closed])
    path = snapshot_dir(archive) / f"{closed}.parquet"
    stamp = path.stat().st_mtime_ns
    pd.testing.assert_frame_equal(load_readings(archive, [closed]), archive.readings(closed))
    assert len(_records(archive)) == 1
    assert path.stat().st_mtime_ns == stamp


def test_a_correction_rebuilds_the_snapshot(lab: tuple) -> None:
    archive, closed, _, rows = lab
    load_readings(archive, [closed])
    archive.append_reading(correction_of(rows[4], 240.0, "late check by the TA"))
    assert len(_records(archive)) == 2  # rebuilt at once
    frame = load_readings(archive, [closed], latest_only=True)
    assert frame.loc[frame["reading_id"] == rows[4]["reading_id"], "measured"].tolist() == [240.0]
    pd.testing.assert_frame_equal(load_readings(archive, [closed]), archive.readings(closed))


def test_a_tampered_or_missing_snapshot_is_rebuilt(lab: tuple) -> None:
    archive, closed, _, _ = lab
    load_readings(archive, [closed])
    path = snapshot_dir(archive) / f"{closed}.parquet"
    data = bytearray(path.read_bytes())
    data[len(data) // 2] ^= 0xFF
    path.write_bytes(bytes(data))
    problems = archive.check()
    assert any("does not match its recorded hash" in p for p in problems)
    pd.testing.assert_frame_equal(load_readings(archive, [closed]), archive.readings(closed))
    assert archive.check() == []
    path.unlink()
    pd.testing.assert_frame_equal(load_readings(archive, [closed]), archive.readings(closed))
    assert path.exists()


def test_stale_after_a_merge_into_a_closed_session(lab: tuple, tmp_path: Path) -> None:
    archive, closed, _, _ = lab
    load_readings(archive, [closed])
    other = SQLiteArchive(tmp_path / "other.sqlite")
    other.merge([archive.hand_in(tmp_path / "h1.sqlite", [closed])])
    other.append_reading(reading_row(closed, 99, note="late reading from another laptop"))
    archive.merge([other.hand_in(tmp_path / "h2.sqlite", [closed])])
    frame = load_readings(archive, [closed])
    assert len(frame) == 31
    pd.testing.assert_frame_equal(frame, archive.readings(closed))
    other.close()


def test_read_only_archive_reads_sqlite_when_a_snapshot_is_stale(lab: tuple) -> None:
    archive, closed, _, _ = lab
    load_readings(archive, [closed])
    archive.append_reading(reading_row(closed, 50))
    with SQLiteArchive(archive.path, read_only=True) as ro:
        n = len(_records(archive))
        pd.testing.assert_frame_equal(load_readings(ro, [closed]), archive.readings(closed))
        assert len(_records(archive)) == n


def test_unknown_session_is_refused(lab: tuple) -> None:
    from labkit.logbook.storage import ArchiveError

    archive, *_ = lab
    with pytest.raises(ArchiveError, match="no session nope"):
        load_readings(archive, ["nope"])


def test_cold_and_snapshot_loads_agree_on_dtypes(lab: tuple) -> None:
    archive, *_ = lab
    cold = load_readings(archive, use_snapshots=False)
    warm = load_readings(archive)
    pd.testing.assert_frame_equal(cold, warm)
    assert {str(t) for t in warm.dtypes} <= {"string", "int64", "float64", "datetime64[ns, UTC]"}
