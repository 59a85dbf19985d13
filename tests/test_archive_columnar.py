"""The cold read path: worker processes give exactly the rows one process reads, in the documented order.

Reference: pandas' ``assert_frame_equal`` against a frame built row by row from plain :mod:`sqlite3`
(outside labkit's read path), sorted with pandas' own ``sort_values`` by session, seq and rowid.
"""

from __future__ import annotations

import sqlite3
from pathlib import Path

import pandas as pd
import pytest

from labkit.logbook import columnar
from labkit.logbook.frames import frame_from_rows
from labkit.logbook.layout import column_list
from labkit.logbook.schema import READING_COLUMNS
from labkit.logbook.sqlite import SQLiteArchive
from tests.reliability.factory import correction_of, reading_row, session_row


@pytest.fixture(scope="module")
def interleaved(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("columnar") / "lab.sqlite"
    with SQLiteArchive(path) as archive:
        sessions = [session_row() for _ in range(5)]
        for s in sessions:
            archive.create_session(s)
        batch = [reading_row(sessions[k % 5]["session_id"], k, note="x\x1fy" if k == 7 else "",
                             meter_range=None if k % 4 else 600.0) for k in range(900)]
        committed = archive.append_readings(batch)
        archive.append_reading(correction_of(committed[3], 1.0))
    return path


def _reference(path: Path) -> pd.DataFrame:
    with sqlite3.connect(path) as conn:
        rows = conn.execute(f"SELECT {column_list('readings')}, rowid FROM readings").fetchall()
    frame = frame_from_rows(READING_COLUMNS, [r[:-1] for r in rows])
    frame["__rowid__"] = [r[-1] for r in rows]
    frame = frame.sort_values(["session_id", "seq", "__rowid__"], kind="stable").drop(columns="__rowid__")
    return frame.reset_index(drop=True)


def test_one_process_matches_the_reference(interleaved: Path) -> None:
    with SQLiteArchive(interleaved, read_only=True) as archive:
        table = archive.reading_table(workers=1)
        pd.testing.assert_frame_equal(archive.readings(), _reference(interleaved))
    assert table.num_rows == 901


def test_workers_give_the_same_rows(interleaved: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(columnar, "PARALLEL_MIN_ROWS", 10)
    with SQLiteArchive(interleaved, read_only=True) as archive:
        parallel = archive.reading_table(workers=3)
        single = archive.reading_table(workers=1)
    columnar.shutdown_workers()
    assert parallel.equals(single)


def test_a_failing_pool_falls_back(interleaved: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    def broken(_: int) -> None:
        raise OSError("no processes allowed here")

    monkeypatch.setattr(columnar, "PARALLEL_MIN_ROWS", 10)
    monkeypatch.setattr(columnar, "_pool", broken)
    with SQLiteArchive(interleaved, read_only=True) as archive:
        pd.testing.assert_frame_equal(archive.readings(), _reference(interleaved))


def test_latest_only_and_one_session(interleaved: Path) -> None:
    reference = _reference(interleaved)
    with SQLiteArchive(interleaved, read_only=True) as archive:
        sid = reference["session_id"].iloc[0]
        pd.testing.assert_frame_equal(archive.readings(sid),
                                      reference[reference["session_id"] == sid].reset_index(drop=True))
        latest = archive.readings(latest_only=True)
    newest = reference.groupby("reading_id")["revision"].transform("max")
    pd.testing.assert_frame_equal(latest, reference[reference["revision"] == newest].reset_index(drop=True))
