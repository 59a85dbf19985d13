"""``labkit archive check|hand-in|merge``, ``labkit export`` and ``labkit import``: exit codes and reasons.

Files written by the commands are read back with independent readers (stdlib csv, pyarrow, plain sqlite3).
"""

from __future__ import annotations

import argparse
import csv
import sqlite3
from pathlib import Path

import pyarrow.parquet as pq
import pytest

from labkit.cli.archive import add_archive_parsers
from labkit.logbook.sqlite import SQLiteArchive
from tests.reliability.factory import reading_row, session_row


def run(*argv: str) -> int:
    parser = argparse.ArgumentParser(prog="labkit")
    add_archive_parsers(parser.add_subparsers(dest="command", required=True))
    args = parser.parse_args([str(a) for a in argv])
    return int(args.func(args))


@pytest.fixture
def laptop(tmp_path: Path) -> tuple[Path, str]:
    path = tmp_path / "laptop.sqlite"
    with SQLiteArchive(path) as archive:
        row = session_row()
        archive.create_session(row)
        archive.append_readings([reading_row(row["session_id"], k, note="=HYPERLINK(\"x\")" if k == 0 else "")
                                 for k in range(6)])
    return path, row["session_id"]


def test_check_ok_and_broken(laptop: tuple, tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    path, _ = laptop
    assert run("archive", "check", path) == 0
    assert "ok (format version 1)" in capsys.readouterr().out
    broken = tmp_path / "broken.sqlite"
    broken.write_bytes(path.read_bytes()[:4096 + 10])
    assert run("archive", "check", broken) == 1
    err = capsys.readouterr().err
    assert "broken.sqlite" in err
    assert "truncated" in err
    assert run("archive", "check", tmp_path / "none.sqlite") == 1
    assert "no such archive" in capsys.readouterr().err
    assert not (tmp_path / "none.sqlite").exists()


def test_hand_in_and_merge(laptop: tuple, tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    path, sid = laptop
    handin = tmp_path / "handin.sqlite"
    assert run("archive", "hand-in", path, "-o", handin, "--session", sid) == 0
    central = tmp_path / "central.sqlite"
    assert run("archive", "merge", central, handin) == 0
    assert "merged 6 readings into 1 sessions" in capsys.readouterr().out
    assert run("archive", "merge", central, handin) == 0
    assert "6 duplicates skipped" in capsys.readouterr().out
    junk = tmp_path / "junk.sqlite"
    junk.write_text("not an archive")
    assert run("archive", "merge", central, junk, handin) == 1
    assert "refused" in capsys.readouterr().err
    assert run("archive", "hand-in", path, "-o", tmp_path / "x.sqlite", "--session", "nope") == 1
    assert "no session nope" in capsys.readouterr().err
    with sqlite3.connect(central) as conn:
        assert conn.execute("SELECT count(*) FROM readings").fetchone()[0] == 6


def test_export_csv_and_parquet(laptop: tuple, tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    path, sid = laptop
    out = tmp_path / "out.csv"
    assert run("export", path, "--session", sid, "--format", "csv", "-o", out) == 0
    assert "6 readings written" in capsys.readouterr().out
    with out.open(newline="") as handle:
        rows = list(csv.DictReader(handle))
    assert rows[0]["note"].startswith("'=")
    assert run("export", path, "--format", "parquet", "-o", tmp_path / "out.parquet") == 0
    assert pq.read_table(tmp_path / "out.parquet").num_rows == 6
    assert run("export", tmp_path / "none.sqlite", "--format", "csv", "-o", out) == 1


def test_import_all_or_nothing(laptop: tuple, tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    path, sid = laptop
    good = tmp_path / "good.csv"
    rows = [reading_row(sid, k) for k in range(3)]
    with good.open("w", newline="") as handle:
        writer = csv.DictWriter(handle, fieldnames=list(rows[0]))
        writer.writeheader()
        writer.writerows(rows)
    bad = tmp_path / "bad.csv"
    rows[1]["quantity"] = "v_rsm"
    with bad.open("w", newline="") as handle:
        writer = csv.DictWriter(handle, fieldnames=list(rows[0]))
        writer.writeheader()
        writer.writerows(rows)
    assert run("import", path, bad) == 1
    err = capsys.readouterr().err
    assert "nothing recorded" in err
    assert "bad.csv:3: quantity" in err
    assert run("import", path, good) == 0
    assert "3 readings recorded" in capsys.readouterr().out
    with SQLiteArchive(path, read_only=True) as archive:
        assert len(archive.readings()) == 9


def test_import_applies_the_typed_reading_checks(laptop: tuple, tmp_path: Path,
                                                 capsys: pytest.CaptureFixture) -> None:
    # the unit rules of typed entry (labkit.core.units): a prefix case slip and a decimal comma are refused on
    # import too, and an entered text that does not read as the recorded value is caught
    path, sid = laptop
    cases = {"slip": {"entered": "228.5 MV", "measured": 228.5},
             "comma": {"entered": "228,5 V", "measured": 228.5},
             "mismatch": {"entered": "228.5 V", "measured": 22.85},
             "absurd": {"entered": "", "measured": 1e30}}
    for name, change in cases.items():
        rows = [reading_row(sid, 0), reading_row(sid, 1, **change)]
        bad = tmp_path / f"{name}.csv"
        with bad.open("w", newline="") as handle:
            writer = csv.DictWriter(handle, fieldnames=list(rows[0]))
            writer.writeheader()
            writer.writerows(rows)
        assert run("import", path, bad) == 1, name
        err = capsys.readouterr().err
        assert "nothing recorded" in err
        assert f"{name}.csv:3:" in err, err
    with SQLiteArchive(path, read_only=True) as archive:
        assert len(archive.readings()) == 6  # the laptop fixture's rows only
