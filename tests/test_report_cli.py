"""``labkit report``, ``labkit review`` and ``labkit prelab`` through their argument parsers (DEMO DATA).

Outside references: the written files are read back with pandas (CSV) and Python's HTML parser, and the
PDF by its ``%PDF-`` signature (ISO 32000-1, 7.5.2).
"""

from __future__ import annotations

import argparse
import os
from pathlib import Path

import pandas as pd
import pytest

from labkit.cli.report import add_report_parsers
from labkit.demo_files import demo_path
from labkit.logbook.sqlite import SQLiteArchive
from tests.test_report_data import T0, readings_for, session_row


def run(argv: list[str]) -> int:
    parser = argparse.ArgumentParser(prog="labkit")
    sub = parser.add_subparsers(dest="command", required=True)
    add_report_parsers(sub)
    args = parser.parse_args(argv)
    return int(args.func(args))


@pytest.fixture
def archive_path(tmp_path: Path) -> Path:
    path = tmp_path / "log.sqlite"
    arc = SQLiteArchive(path)
    for sid, section, kind, day in (("c1", "S01", "lab", 0), ("c2", "S02", "lab", 3), ("c3", "S01", "demo", 4)):
        s = session_row(sid, section=section, kind=kind, created_at=T0 + pd.Timedelta(days=day))
        arc.create_session(s)
        rows = readings_for(s, error=0.01 * day, note="=cmd|' /C calc'!A0")
        arc.append_readings([{k: v for k, v in r.items() if k not in ("seq", "recorded_at")}
                             for r in rows.to_dict("records")])
    arc.close()
    return path


def test_report_command_writes_page_tables_and_progress(archive_path: Path, tmp_path: Path,
                                                        capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "r.html"
    assert run(["report", str(archive_path), "--session", "c1", "-o", str(out), "--tables", str(tmp_path / "t"),
                "--table-format", "csv"]) == 0
    err = capsys.readouterr().err
    assert "[0/5] step start-ref" in err
    assert "[5/5] summary" in err
    assert out.read_text(encoding="utf-8").startswith("<!DOCTYPE html>")
    table = pd.read_csv(tmp_path / "t" / "session-readings.csv", keep_default_na=False)
    assert set(table["session_id"]) == {"c1"}
    assert all(n.startswith("'=") for n in table["note"])  # formula-injection guard


def test_report_command_unknown_session_fails_cleanly(archive_path: Path, tmp_path: Path,
                                                      capsys: pytest.CaptureFixture[str]) -> None:
    assert run(["report", str(archive_path), "--session", "nope", "-o", str(tmp_path / "x.html")]) == 1
    assert 'no session "nope"' in capsys.readouterr().err
    assert not (tmp_path / "x.html").exists()


def test_review_command_filters(archive_path: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "review.html"
    assert run(["review", str(archive_path), "-o", str(out), "--tables", str(tmp_path / "t"),
                "--table-format", "parquet"]) == 0
    sessions = pd.read_parquet(tmp_path / "t" / "review-sessions.parquet")
    assert set(sessions["session_id"]) == {"c1", "c2"}  # the demo session stays out by default
    assert "[6/6] done" in capsys.readouterr().err
    assert run(["review", str(archive_path), "-o", str(out), "--include-demo", "--section", "S01", "--tables",
                str(tmp_path / "u")]) == 0
    assert set(pd.read_csv(tmp_path / "u" / "review-sessions.csv")["session_id"]) == {"c1", "c3"}
    assert run(["review", str(archive_path), "-o", str(out), "--from", "2026-10-06", "--to", "2026-10-08",
                "--tables", str(tmp_path / "v")]) == 0
    assert set(pd.read_csv(tmp_path / "v" / "review-sessions.csv")["session_id"]) == {"c2"}
    assert run(["review", str(archive_path), "-o", str(out), "--from", "soon"]) == 1


def test_prelab_command(tmp_path: Path) -> None:
    out = tmp_path / "pre.html"
    assert run(["prelab", str(demo_path("demo-bench.toml")), str(demo_path("lab1-line-and-loads.toml")), "--cart",
                str(demo_path("demo-cart-03.toml")), "--samples", "100", "-o", str(out)]) == 0
    text = out.read_text(encoding="utf-8")
    assert "pre-lab sheet" in text
    assert "cart-03" in text
    assert run(["prelab", str(demo_path("demo-bench.toml")), str(tmp_path / "missing.toml"), "-o", str(out)]) == 1


def test_report_pdf_option(archive_path: Path, tmp_path: Path) -> None:
    from labkit.report.pdf import find_chromium

    if find_chromium() is None:
        if os.environ.get("CI"):
            pytest.fail("CI is set but no Chromium is installed")
        pytest.skip("no Chromium installed")
    pdf = tmp_path / "r.pdf"
    assert run(["report", str(archive_path), "--session", "c2", "-o", str(tmp_path / "r.html"), "--pdf",
                str(pdf)]) == 0
    assert pdf.read_bytes().startswith(b"%PDF-")
