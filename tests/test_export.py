"""Exports (CSV, Parquet, XLSX) neutralize formula cells and keep numbers numeric; imports are all-or-nothing.

Outside references:
- OWASP "CSV Injection" guidance: cells beginning with ``=``, ``+``, ``-``, ``@``, tab (0x09) or carriage
  return (0x0D) may be evaluated; prefix them with a single quote (recalled from memory).
- The files are read back by independent readers: the stdlib :mod:`csv` module, openpyxl (cell
  ``data_type``: ``n`` number, ``s`` string, ``f`` formula) and pyarrow's Parquet reader.
"""

from __future__ import annotations

import csv
import math
from pathlib import Path

import pandas as pd
import pyarrow.parquet as pq
import pytest
from openpyxl import load_workbook

from labkit.core.errors import FileValidationError
from labkit.logbook.exchange import check_quantity, export_frame, import_readings, neutralize_text, restore_text
from labkit.logbook.schema import READING_COLUMNS
from labkit.logbook.sqlite import SQLiteArchive
from tests.reliability.factory import reading_row, session_row

NASTY = ["=1+2", "+cmd|' /C calc'!A0", "-2+3", "@SUM(A1:A2)", "\tTAB", "\rCR", "'quoted", "plain 230 V", ""]


@pytest.fixture
def filled(tmp_path: Path) -> tuple[SQLiteArchive, str]:
    archive = SQLiteArchive(tmp_path / "lab.sqlite")
    row = session_row()
    archive.create_session(row)
    sid = row["session_id"]
    rows = [reading_row(sid, k, note=text, measured=-1.5 * k, predicted=-230.0) for k, text in enumerate(NASTY)]
    rows[2]["measured"] = float("nan")
    rows[3]["meter_range"] = None
    archive.append_readings(rows)
    yield archive, sid
    archive.close()


@pytest.mark.parametrize("text", NASTY)
def test_neutralize_and_restore_are_inverse(text: str) -> None:
    out = neutralize_text(text)
    assert restore_text(out) == text
    if text[:1] in ("=", "+", "-", "@", "\t", "\r"):  # OWASP list
        assert out == "'" + text


def test_csv_cells_are_neutralized_and_numbers_stay_numbers(filled: tuple, tmp_path: Path) -> None:
    archive, _ = filled
    path = export_frame(archive.readings(), tmp_path / "out.csv", "csv")
    with path.open(newline="", encoding="utf-8") as handle:
        rows = list(csv.DictReader(handle))
    notes = [r["note"] for r in rows]
    for note in notes:
        assert note[:1] not in ("=", "+", "-", "@", "\t", "\r")
    assert notes[0] == "'=1+2"
    assert rows[1]["measured"] == "-1.5"  # numeric column: a negative number, not quoted
    assert rows[0]["predicted"] == "-230.0"
    assert rows[2]["measured"] == ""
    assert pd.Timestamp(rows[0]["recorded_at"]).tzinfo is not None


def test_xlsx_has_no_formula_cells_and_numeric_numbers(filled: tuple, tmp_path: Path) -> None:
    archive, _ = filled
    path = export_frame(archive.readings(), tmp_path / "out.xlsx")
    sheet = load_workbook(path).worksheets[0]
    header = [c.value for c in sheet[1]]
    kinds = {c.data_type for row in sheet.iter_rows(min_row=2) for c in row if c.value is not None}
    assert "f" not in kinds
    note = header.index("note") + 1
    measured = header.index("measured") + 1
    assert sheet.cell(row=2, column=note).value == "'=1+2"
    assert sheet.cell(row=3, column=measured).data_type == "n"
    assert sheet.cell(row=3, column=measured).value == -1.5


def test_parquet_keeps_types_and_text(filled: tuple, tmp_path: Path) -> None:
    archive, _ = filled
    frame = archive.readings()
    path = export_frame(frame, tmp_path / "out.parquet")
    table = pq.read_table(path)
    assert table.schema.field("measured").type == "double"
    assert table.schema.field("revision").type == "int64"
    assert table.column("note").to_pylist() == NASTY  # a typed format: text is not rewritten
    back = pd.read_parquet(path)
    assert str(back["recorded_at"].dtype) == "datetime64[ns, UTC]"


@pytest.mark.parametrize("fmt", ["csv", "xlsx", "parquet"])
def test_round_trip_through_import(filled: tuple, tmp_path: Path, fmt: str) -> None:
    archive, sid = filled
    frame = archive.readings()
    path = export_frame(frame, tmp_path / f"out.{fmt}")
    target = SQLiteArchive(tmp_path / f"target-{fmt}.sqlite")
    target.create_session(archive.sessions().iloc[0].to_dict() | {"created_at": session_row()["created_at"]})
    rows = import_readings(path, target)
    assert len(rows) == len(frame)
    back = target.readings(sid)
    assert set(back["obtained"]) == {"imported"}
    for column in READING_COLUMNS:
        if column.name in ("obtained", "seq", "recorded_at"):
            continue
        old, new = frame[column.name].tolist(), back[column.name].tolist()
        if column.dtype == "float64":
            assert all((math.isnan(a) and math.isnan(b)) or a == b for a, b in zip(old, new, strict=True)), \
                column.name
        elif fmt == "xlsx" and column.name == "note":  # XML turns CR into LF (documented)
            assert [o.replace("\r", "\n") for o in old] == new
        else:
            assert old == new, column.name
    target.close()


def _csv(path: Path, rows: list[dict]) -> Path:
    with path.open("w", newline="", encoding="utf-8") as handle:
        writer = csv.DictWriter(handle, fieldnames=list(rows[0]))
        writer.writeheader()
        writer.writerows(rows)
    return path


def test_bad_row_names_file_line_and_column_and_records_nothing(filled: tuple, tmp_path: Path) -> None:
    archive, sid = filled
    n = len(archive.readings())
    rows = [reading_row(sid, k) for k in range(4)]
    rows[2]["measured"] = "two hundred"
    path = _csv(tmp_path / "typed.csv", rows)
    with pytest.raises(FileValidationError) as info:
        import_readings(path, archive)
    (problem,) = info.value.problems
    assert (problem.file, problem.line, problem.path) == (str(path), 4, ("measured",))  # header is line 1
    assert "expected a number, found 'two hundred'" in str(problem)
    assert len(archive.readings()) == n


@pytest.mark.parametrize(("change", "column", "text"), [
    ({"verdict": "great"}, "verdict", "expected one of accept"),
    ({"revision": "x"}, "revision", "expected an integer"),
    ({"quantity": ""}, "quantity", "required value missing"),
    ({"session_id": "nope"}, "session_id", "is not in"),
])
def test_each_kind_of_bad_row(filled: tuple, tmp_path: Path, change: dict, column: str, text: str) -> None:
    archive, sid = filled
    rows = [reading_row(sid, k) for k in range(3)]
    rows[1].update(change)
    with pytest.raises(FileValidationError) as info:
        import_readings(_csv(tmp_path / "bad.csv", rows), archive)
    problem = info.value.problems[0]
    assert problem.line == 3
    assert problem.path == (column,)
    assert text in problem.message


def test_unknown_column_and_duplicate_reading(filled: tuple, tmp_path: Path) -> None:
    archive, sid = filled
    rows = [reading_row(sid) | {"temperature": "21"}]
    with pytest.raises(FileValidationError, match="unknown column 'temperature'"):
        import_readings(_csv(tmp_path / "extra.csv", rows), archive)
    existing = archive.readings().iloc[0]["reading_id"]
    rows = [reading_row(sid, reading_id=existing)]
    with pytest.raises(FileValidationError, match="revision 0 is already recorded"):
        import_readings(_csv(tmp_path / "dup.csv", rows), archive)


def test_the_callers_validator_runs_on_every_row(filled: tuple, tmp_path: Path) -> None:
    archive, sid = filled
    n = len(archive.readings())
    rows = [reading_row(sid, k) for k in range(3)]
    rows[2]["quantity"] = "v_rsm"
    path = _csv(tmp_path / "q.csv", rows)
    with pytest.raises(FileValidationError) as info:
        import_readings(path, archive, validate=check_quantity)
    problem = info.value.problems[0]
    assert (problem.line, problem.path) == (4, ("quantity",))
    assert 'did you mean "v_rms"' in problem.message
    assert len(archive.readings()) == n

    seen = []

    def mark(row: dict) -> dict:
        seen.append(row["reading_id"])
        return row | {"note": "checked by the session validator"}

    rows[2]["quantity"] = "v_rms"
    done = import_readings(_csv(tmp_path / "q2.csv", rows), archive, validate=mark)
    assert len(seen) == 3
    assert {r["note"] for r in done} == {"checked by the session validator"}


def test_unit_must_be_the_registry_unit(filled: tuple, tmp_path: Path) -> None:
    archive, sid = filled
    with pytest.raises(FileValidationError, match="unit 'kV' is not the registry unit 'V'"):
        import_readings(_csv(tmp_path / "u.csv", [reading_row(sid, unit="kV")]), archive, validate=check_quantity)


def test_missing_reading_id_gets_a_new_one(filled: tuple, tmp_path: Path) -> None:
    archive, sid = filled
    row = {k: v for k, v in reading_row(sid).items() if k not in ("reading_id", "revision", "supersedes")}
    (done,) = import_readings(_csv(tmp_path / "new.csv", [row]), archive)
    assert len(done["reading_id"]) == 32
    assert (done["revision"], done["supersedes"], done["obtained"]) == (0, -1, "imported")


def test_unknown_format_is_refused(tmp_path: Path) -> None:
    from labkit.logbook.storage import ArchiveError

    with pytest.raises(ArchiveError, match="unknown format 'ods'"):
        export_frame(pd.DataFrame({"a": [1]}), tmp_path / "x.ods")
