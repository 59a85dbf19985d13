"""Opening a format-version-0 archive migrates it to the current layout and keeps every row.

The fixture ``tests/data/archives/archive-v0.sqlite`` is built by ``make_v0_fixture.py`` beside it
(invented demo data). The check reads the old file with plain :mod:`sqlite3` (the reference, outside
labkit's code) and compares every value with what the migrated archive returns; ISO 8601 times are
parsed with :meth:`datetime.fromisoformat` (stdlib).
"""

from __future__ import annotations

import math
import shutil
import sqlite3
from datetime import datetime
from pathlib import Path

import pandas as pd
import pytest

from labkit.logbook.migrations import MIGRATIONS, V0_MISSING
from labkit.logbook.schema import FORMAT_VERSION, READING_COLUMNS
from labkit.logbook.sqlite import SQLiteArchive
from labkit.logbook.storage import ArchiveError
from tests.data.archives.make_v0_fixture import FIXTURE, build

V0_TABLES = ("sessions", "readings", "events", "roster")


def _v0_rows(path: Path, table: str) -> list[dict]:
    conn = sqlite3.connect(f"file:{path}?mode=ro", uri=True)
    conn.row_factory = sqlite3.Row
    rows = [dict(r) for r in conn.execute(f"SELECT * FROM {table} ORDER BY rowid")]
    conn.close()
    return rows


@pytest.fixture
def migrated(tmp_path: Path) -> SQLiteArchive:
    copy = tmp_path / "old.sqlite"
    shutil.copyfile(FIXTURE, copy)
    archive = SQLiteArchive(copy)
    yield archive
    archive.close()


def test_fixture_is_what_the_script_builds(tmp_path: Path) -> None:
    rebuilt = tmp_path / "rebuilt.sqlite"
    build(rebuilt)
    for table in (*V0_TABLES, "meta"):
        assert _v0_rows(rebuilt, table) == _v0_rows(FIXTURE, table), table


def test_migrations_are_ordered_and_reach_the_current_version() -> None:
    versions = [v for v, _ in MIGRATIONS]
    assert versions == sorted(versions) == list(range(FORMAT_VERSION))


def test_opening_migrates_and_records_the_version(migrated: SQLiteArchive) -> None:
    assert migrated.format_version == FORMAT_VERSION
    with sqlite3.connect(migrated.path) as conn:
        assert conn.execute("SELECT value FROM meta WHERE key = 'format_version'").fetchone()[0] == "1"
        tables = {r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}
    assert not {t for t in tables if t.startswith("v0_")}
    assert migrated.check() == []
    assert _v0_rows(FIXTURE, "meta")[0]["value"] == "0"  # the committed fixture itself is untouched


def _same(old: object, new: object, dtype: str) -> bool:
    if dtype == "datetime64[ns, UTC]":
        return pd.Timestamp(datetime.fromisoformat(str(old))) == new
    if dtype == "float64":
        return (old is None and math.isnan(new)) or old == new
    if dtype == "string":
        return (old or "") == new
    return old == new


def test_every_row_and_value_is_kept(migrated: SQLiteArchive) -> None:
    frames = {"sessions": migrated.sessions(), "readings": migrated.readings(), "events": migrated.events(),
              "roster": migrated.roster()}
    from labkit.logbook.rows import TABLES

    for table in V0_TABLES:
        old_rows = _v0_rows(FIXTURE, table)
        frame = frames[table]
        assert len(frame) == len(old_rows), table
        key = {"sessions": ["session_id"], "readings": ["reading_id", "revision"], "events": ["session_id", "at"],
               "roster": ["participant_id"]}[table]
        for old in old_rows:
            match = frame
            for k in key:
                want = pd.Timestamp(datetime.fromisoformat(old[k])) if k == "at" else old[k]
                match = match[match[k] == want]
            assert len(match) == 1, (table, old)
            new = match.iloc[0]
            for column in TABLES[table]:
                if column.name in V0_MISSING[table]:
                    continue
                if table == "sessions" and column.name == "state":
                    continue  # the latest state event wins (checked below)
                assert _same(old[column.name], new[column.name], column.dtype), (table, column.name)


def test_new_columns_are_filled(migrated: SQLiteArchive) -> None:
    readings = migrated.readings()
    assert set(readings["anchor"]) == {"nominal"}
    assert set(readings["capture_id"]) == {""}
    assert [c.name for c in READING_COLUMNS] == list(readings.columns)
    # seq numbers readings and events of each session together in recording (UTC) order, without gaps
    events = migrated.events()
    for session_id in readings["session_id"].unique():
        r = readings[readings["session_id"] == session_id][["seq", "recorded_at"]]
        e = events[events["session_id"] == session_id][["seq", "at"]].rename(columns={"at": "recorded_at"})
        both = pd.concat([r, e]).sort_values("seq")
        assert both["seq"].tolist() == list(range(len(both)))
        assert both["recorded_at"].is_monotonic_increasing


def test_a_correction_recorded_with_an_offset_is_ordered_by_its_utc_instant(migrated: SQLiteArchive) -> None:
    # 10:40+02:00 is 08:40 UTC: before the 08:45 state:closed event of that session
    readings = migrated.readings()
    fix = readings[(readings["revision"] == 1) & (readings["reason"] == "misread the scale")].iloc[0]
    closed = migrated.events().query("event == 'state:closed'").iloc[0]
    assert fix["recorded_at"] == pd.Timestamp("2025-09-15T08:40:00Z")
    assert fix["seq"] < closed["seq"]
    assert migrated.sessions().set_index("session_id").loc[fix["session_id"], "state"] == "closed"


def test_migrated_archive_takes_new_readings_and_corrections(migrated: SQLiteArchive) -> None:
    from tests.reliability.factory import correction_of, reading_row

    first = migrated.readings().iloc[0]
    session_id = first["session_id"]
    n = len(migrated.readings(session_id))
    row = migrated.append_reading(reading_row(session_id))
    assert row["seq"] == int(pd.concat([migrated.readings(session_id)["seq"],
                                        migrated.events(session_id)["seq"]]).max())
    old = {k: (v if not isinstance(v, float) or not math.isnan(v) else None) for k, v in first.items()}
    old["recorded_at"] = first["recorded_at"].to_pydatetime()
    fixed = migrated.append_reading(correction_of(old, 230.0) | {"revision": 1, "supersedes": 0})
    assert fixed["revision"] == 1
    assert len(migrated.readings(session_id)) == n + 2


def test_a_failed_migration_leaves_the_old_layout(tmp_path: Path) -> None:
    bad = tmp_path / "bad-v0.sqlite"
    shutil.copyfile(FIXTURE, bad)
    with sqlite3.connect(bad) as conn:
        conn.execute("UPDATE readings SET recorded_at = '15/09/2025 08:20' WHERE rowid = 3")
    with pytest.raises(ArchiveError, match=r"cannot migrate v0 readings rowid 3: recorded_at: expected an ISO 8601"):
        SQLiteArchive(bad)
    assert _v0_rows(bad, "meta")[0]["value"] == "0"
    assert len(_v0_rows(bad, "readings")) == 12
    with sqlite3.connect(bad) as conn:
        tables = {r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}
    assert tables == {"meta", *V0_TABLES}


def test_read_only_open_of_an_old_archive_asks_for_migration(tmp_path: Path) -> None:
    copy = tmp_path / "old.sqlite"
    shutil.copyfile(FIXTURE, copy)
    with pytest.raises(ArchiveError, match="needs migrating to 1"):
        SQLiteArchive(copy, read_only=True)
