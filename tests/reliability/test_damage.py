"""Damaged archives and bad imports, swept with a seeded random generator.

- Truncation at random byte offsets and scribbled pages: every damaged copy is either refused with an
  :class:`ArchiveError` naming the file, or reported by ``check()``, or reads back exactly the original
  rows (the damage hit unused space); never a raw sqlite3 exception and never silently different data.
  The reference for "sound" is SQLite's own ``PRAGMA integrity_check`` plus the rows as first read.
- Another archive open at the same time is untouched (same SHA-256 before and after, hashlib).
- A bad cell at a random row and column of an import file is reported at exactly that line and column,
  and nothing is recorded.
"""

from __future__ import annotations

import csv
import hashlib
import random
import sqlite3
from pathlib import Path

import pandas as pd
import pytest

from labkit.core.errors import FileValidationError
from labkit.logbook.exchange import import_readings
from labkit.logbook.sqlite import SQLiteArchive
from labkit.logbook.storage import ArchiveError
from tests.reliability.factory import reading_row, session_row


def _build(path: Path, n: int = 400) -> str:
    with SQLiteArchive(path) as archive:
        row = session_row()
        archive.create_session(row)
        archive.append_readings([reading_row(row["session_id"], k, note=f"demo {k} " * 8) for k in range(n)])
        archive._connection.execute("PRAGMA wal_checkpoint(TRUNCATE)")
    return row["session_id"]


def _outcome(path: Path) -> tuple[str, pd.DataFrame | None]:
    try:
        with SQLiteArchive(path) as archive:
            problems = archive.check()
            if problems:
                assert all(str(path) in p for p in problems)
                return "reported", None
            return "read", archive.readings()
    except ArchiveError as exc:
        message = str(exc)
    assert str(path) in message  # the error names the damaged file
    return "refused", None


def test_random_damage_is_never_silent(tmp_path: Path) -> None:
    original = tmp_path / "original.sqlite"
    bystander = tmp_path / "bystander.sqlite"
    _build(original)
    _build(bystander, 50)
    with SQLiteArchive(original) as archive:
        expected = archive.readings()
    data = original.read_bytes()
    page = int.from_bytes(data[16:18], "big")
    rng = random.Random(1459)
    bystander_archive = SQLiteArchive(bystander)
    before = hashlib.sha256(bystander.read_bytes()).hexdigest()
    seen = set()
    for trial in range(24):
        damaged = tmp_path / f"damaged-{trial}.sqlite"
        if trial % 2:
            damaged.write_bytes(data[: rng.randrange(1, len(data))])
        else:
            buf = bytearray(data)
            for _ in range(rng.randint(1, 4)):
                start = rng.randrange(page, len(buf) - 64)  # keep the first page: header damage is tested apart
                buf[start: start + 64] = rng.randbytes(64)
            damaged.write_bytes(bytes(buf))
        outcome, frame = _outcome(damaged)
        seen.add(outcome)
        if outcome == "read":
            pd.testing.assert_frame_equal(frame, expected)
    assert "refused" in seen
    assert seen & {"reported", "refused"}
    assert len(bystander_archive.readings()) == 50
    bystander_archive.close()
    assert hashlib.sha256(bystander.read_bytes()).hexdigest() == before
    with sqlite3.connect(bystander) as conn:
        assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"


@pytest.mark.parametrize("seed", range(6))
def test_a_random_bad_cell_is_located_and_nothing_recorded(tmp_path: Path, seed: int) -> None:
    rng = random.Random(seed)
    archive = SQLiteArchive(tmp_path / "lab.sqlite")
    row = session_row()
    archive.create_session(row)
    rows = [reading_row(row["session_id"], k) for k in range(rng.randint(5, 40))]
    bad_index = rng.randrange(len(rows))
    column, value, expect = rng.choice([("measured", "12,5", "expected a number"),
                                        ("step_index", "two", "expected an integer"),
                                        ("verdict", "ok", "expected one of"),
                                        ("form", "", "required value missing"),
                                        ("revision", "-1", "must be 0 or more")])
    rows[bad_index][column] = value
    path = tmp_path / "typed.csv"
    with path.open("w", newline="") as handle:
        writer = csv.DictWriter(handle, fieldnames=list(rows[0]))
        writer.writeheader()
        writer.writerows(rows)
    with pytest.raises(FileValidationError) as info:
        import_readings(path, archive)
    problem = info.value.problems[0]
    assert (problem.file, problem.line) == (str(path), bad_index + 2)
    assert problem.path[0] in (column, "supersedes")
    assert any(expect in p.message for p in info.value.problems)
    assert len(archive.readings()) == 0
    archive.close()
