"""Exporting logbook tables (CSV, Parquet, XLSX) and importing readings back through the validators.

Spreadsheet formula injection: a text cell that begins with ``=``, ``+``, ``-``, ``@``, a tab or a
carriage return can be run as a formula by a spreadsheet program. CSV and XLSX exports prefix
such cells with a single quote ``'`` (and also cells that already begin with one, so that the
prefix can be undone exactly); numeric columns are written as numbers, so a negative reading
stays a number. Parquet is a typed columnar format that spreadsheets do not evaluate: it keeps
text as it is. Importing a CSV or XLSX file removes one leading quote from each text cell.

Datetimes are written as ISO 8601 text with their UTC offset in CSV and XLSX (spreadsheet
date cells have no time zone and round to milliseconds). CSV follows RFC 4180 (CRLF line ends,
cells holding a delimiter, quote, CR or LF are quoted). XLSX text is XML, whose parsers turn a
carriage return into a line feed: a CR inside a text cell reads back as LF.

Import is all-or-nothing: every row is checked (schema dtypes and rules, then the caller's
``validate(row) -> row``) before anything is recorded; any bad row raises
:class:`~labkit.core.errors.FileValidationError` naming the file, the row's line and the column.
Imported rows get ``obtained = "imported"``; ``seq`` and ``recorded_at`` in the file are ignored
(the archive assigns them); a missing ``reading_id`` is a new id, missing ``revision`` 0.
"""

from __future__ import annotations

import csv
import math
import re
import uuid
from collections.abc import Callable, Iterator, Mapping
from pathlib import Path
from typing import TYPE_CHECKING, Any, Literal

from labkit.core.errors import FileValidationError, LabkitError, Problem
from labkit.logbook.rows import ASSIGNED, TABLES, CellProblem, check_row, public_row
from labkit.logbook.schema import READING_COLUMNS
from labkit.logbook.storage import ArchiveError

if TYPE_CHECKING:
    import pandas as pd

    from labkit.logbook.sqlite import SQLiteArchive

ExportFormat = Literal["csv", "parquet", "xlsx"]
FORMATS: tuple[ExportFormat, ...] = ("csv", "parquet", "xlsx")
FORMULA_TRIGGERS = ("=", "+", "-", "@", "\t", "\r")
_NEEDS_QUOTE = re.compile(r"^[=+\-@\t\r']")
Validator = Callable[[dict[str, Any]], Mapping[str, Any]]


def format_of(path: str | Path, fmt: str | None = None) -> ExportFormat:
    """The export format named, or implied by the file's suffix."""
    name = (fmt or Path(path).suffix.lstrip(".")).lower()
    if name not in FORMATS:
        msg = f"{path}: unknown format {name!r}; expected one of {', '.join(FORMATS)}"
        raise ArchiveError(msg)
    return name  # type: ignore[return-value]


def neutralize_text(value: str) -> str:
    """A text cell made inert for spreadsheets (a ``'`` before a formula trigger or a leading quote)."""
    return "'" + value if _NEEDS_QUOTE.match(value) else value


def restore_text(value: str) -> str:
    """Undo :func:`neutralize_text` (one leading quote removed)."""
    return value[1:] if value.startswith("'") else value


def _text_columns(frame: pd.DataFrame) -> list[str]:
    import pandas as pd

    return [c for c in frame.columns
            if pd.api.types.is_string_dtype(frame[c].dtype) or frame[c].dtype == object]


def neutralize_frame(frame: pd.DataFrame) -> pd.DataFrame:
    """A copy of ``frame`` with every text cell neutralized; numeric and datetime columns are untouched."""
    out = frame.copy()
    for name in _text_columns(out):
        col = out[name]
        if col.dtype == object:
            out[name] = col.map(lambda v: neutralize_text(v) if isinstance(v, str) else v)
        else:
            mask = col.str.match(_NEEDS_QUOTE.pattern).fillna(False).astype(bool)
            if mask.any():
                out[name] = col.where(~mask, "'" + col)
    return out


def _iso_datetimes(frame: pd.DataFrame) -> pd.DataFrame:
    import pandas as pd

    out = frame.copy()
    for name in out.columns:
        if isinstance(out[name].dtype, pd.DatetimeTZDtype) or pd.api.types.is_datetime64_any_dtype(out[name]):
            out[name] = out[name].map(lambda v: None if pd.isna(v) else v.isoformat()).astype(object)
    return out


def export_frame(frame: pd.DataFrame, path: str | Path, format: str | None = None) -> Path:
    """Write ``frame`` as CSV, Parquet or XLSX (format from ``format`` or the suffix); return the path.

    CSV and XLSX text cells are neutralized against formula injection (module docstring).
    """
    path = Path(path)
    fmt = format_of(path, format)
    try:
        if fmt == "parquet":
            frame.to_parquet(path, index=False)
        elif fmt == "csv":
            _write_csv(_iso_datetimes(neutralize_frame(frame)), path)
        else:
            _write_xlsx(_iso_datetimes(neutralize_frame(frame)), path)
    except OSError as exc:
        msg = f"{path}: cannot write the export: {exc.strerror or exc}"
        raise ArchiveError(msg) from exc
    return path


def _cells(frame: pd.DataFrame) -> Iterator[list[Any]]:
    """Rows of plain Python cells: None for NA/NaN, numpy scalars unboxed."""
    import pandas as pd

    columns = [frame[c].tolist() for c in frame.columns]
    for row in zip(*columns, strict=True):
        yield [None if (v is pd.NA or v is None or (isinstance(v, float) and math.isnan(v))) else
               (v.item() if hasattr(v, "item") else v) for v in row]


def _write_csv(frame: pd.DataFrame, path: Path) -> None:
    # RFC 4180 line ends (CRLF); the stdlib writer then quotes every cell holding a CR or LF
    with path.open("w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle, lineterminator="\r\n")
        writer.writerow([str(c) for c in frame.columns])
        writer.writerows(["" if v is None else v for v in row] for row in _cells(frame))


def _write_xlsx(frame: pd.DataFrame, path: Path) -> None:
    from openpyxl import Workbook
    from openpyxl.utils.exceptions import IllegalCharacterError

    book = Workbook(write_only=True)
    sheet = book.create_sheet("readings")
    sheet.append([str(c) for c in frame.columns])
    for k, cells in enumerate(_cells(frame)):
        try:
            sheet.append(cells)
        except IllegalCharacterError as exc:
            msg = f"{path}: row {k + 2} holds a control character XLSX cannot store; export as CSV or Parquet"
            raise ArchiveError(msg) from exc
    book.save(path)


# -- import ----------------------------------------------------------------------------------------------------------
def _read_rows(path: Path, fmt: ExportFormat) -> tuple[list[str], Iterator[tuple[int, dict[str, Any]]]]:
    """The header and (line number, raw row) pairs of a file; text cells already un-neutralized."""
    if fmt == "csv":
        handle = path.open(newline="", encoding="utf-8-sig")
        reader = csv.reader(handle)
        try:
            header = next(reader)
        except StopIteration:
            handle.close()
            return [], iter(())

        def rows_csv() -> Iterator[tuple[int, dict[str, Any]]]:
            with handle:
                for cells in reader:
                    if not any(c.strip() for c in cells):
                        continue
                    if len(cells) != len(header):
                        yield reader.line_num, {"__width__": len(cells)}
                        continue
                    yield reader.line_num, {h: restore_text(c) for h, c in zip(header, cells, strict=True)}

        return header, rows_csv()
    if fmt == "xlsx":
        from openpyxl import load_workbook

        book = load_workbook(path, read_only=True, data_only=True)
        sheet = book.worksheets[0]
        all_rows = sheet.iter_rows(values_only=True)
        first = next(all_rows, None)
        header = [str(h) if h is not None else "" for h in (first or ())]

        def rows_xlsx() -> Iterator[tuple[int, dict[str, Any]]]:
            try:
                for line, cells in enumerate(all_rows, start=2):
                    if all(c is None or (isinstance(c, str) and not c.strip()) for c in cells):
                        continue
                    yield line, {h: (restore_text(c) if isinstance(c, str) else c)
                                 for h, c in zip(header, cells, strict=False)}
            finally:
                book.close()

        return header, rows_xlsx()
    import pyarrow.parquet as pq

    table = pq.read_table(path)
    header = list(table.column_names)

    def rows_parquet() -> Iterator[tuple[int, dict[str, Any]]]:
        yield from enumerate(table.to_pylist(), start=1)

    return header, rows_parquet()


def _native(value: Any) -> Any:
    """Parquet and spreadsheet cells to the values :func:`check_row` takes (floats that are whole for ints...)."""
    if isinstance(value, float) and math.isnan(value):
        return None
    return value


def check_quantity(row: dict[str, Any]) -> dict[str, Any]:
    """A validator: the quantity is registered and ``unit`` is its registry unit (labkit.core.quantities)."""
    from labkit.core.errors import UnknownNameError
    from labkit.core.quantities import quantity

    try:
        q = quantity(str(row.get("quantity", "")))
    except UnknownNameError as exc:
        msg = "quantity"
        raise CellProblem(msg, str(exc)) from None
    if row.get("unit") != q.unit:
        msg = f"unit {row.get('unit')!r} is not the registry unit {q.unit!r} of {q.name}"
        msg_0 = "unit"
        raise CellProblem(msg_0, msg)
    return row


def import_readings(path: str | Path, archive: SQLiteArchive | None = None, *, validate: Validator | None = None,
                    format: str | None = None, max_problems: int = 50) -> list[dict[str, Any]]:
    """Check every reading row of a CSV, XLSX or Parquet file and, if ``archive`` is given, record them all.

    Parameters
    ----------
    path
        The file (format from ``format`` or the suffix).
    archive
        Where to record the rows, in one transaction; None only checks them.
    validate
        ``validate(row) -> row`` applied after the schema checks (the session layer passes its reading
        validator); raising :class:`~labkit.core.errors.LabkitError` or ``ValueError`` marks the row bad.
    max_problems
        Stop collecting problems after this many (the error says so).

    Returns
    -------
    list of dict
        The rows as recorded (with ``seq`` and ``recorded_at``) or, without an archive, as checked.

    Raises
    ------
    FileValidationError
        Any bad row (file, line, column and what was expected); nothing was recorded.
    """
    path = Path(path)
    fmt = format_of(path, format)
    name = str(path)
    if not path.is_file():
        raise FileValidationError([Problem(name, 0, (), "no such file")])
    try:
        header, rows = _read_rows(path, fmt)
    except (OSError, ValueError, KeyError) as exc:  # unreadable, not a workbook, not Parquet
        raise FileValidationError([Problem(name, 0, (), f"cannot read the {fmt} file: {exc}")]) from exc
    problems: list[Problem] = []
    known = {c.name for c in READING_COLUMNS}
    for col in header:
        if col not in known:
            problems.append(Problem(name, 1, (col,), f"unknown column {col!r}",
                                    expected="a column of the readings table (docs/logbook.md)"))
    assigned = ASSIGNED["readings"]
    checked: list[dict[str, Any]] = []
    for line, raw in rows:
        if len(problems) >= max_problems:
            break
        if "__width__" in raw:
            problems.append(Problem(name, line, (), f"{raw['__width__']} cells, the header has {len(header)}"))
            continue
        row = {k: _native(v) for k, v in raw.items() if k in known and k not in assigned}
        if not row.get("reading_id"):
            row["reading_id"] = uuid.uuid4().hex
        row.setdefault("revision", 0)
        if row.get("supersedes") in (None, ""):
            row["supersedes"] = int(row["revision"]) - 1 if str(row["revision"]).strip().lstrip("-").isdigit() \
                else -1
        row["obtained"] = "imported"
        values, cell_problems = check_row("readings", row, from_text=True)
        if cell_problems:
            problems += [Problem(name, line, (p.column,), p.message) for p in cell_problems]
            continue
        if validate is not None:
            public = {k: v for k, v in public_row("readings", {**values, "seq": 0, "recorded_at": 0}).items()
                      if k not in assigned}
            try:
                result = dict(validate(public))
            except CellProblem as exc:
                problems.append(Problem(name, line, (exc.column,), exc.message))
                continue
            except (LabkitError, ValueError, KeyError, TypeError) as exc:
                problems.append(Problem(name, line, (str(getattr(exc, "column", "")) or "row",), str(exc)))
                continue
            values, cell_problems = check_row("readings", result)
            if cell_problems:
                problems += [Problem(name, line, (p.column,), f"after validation: {p.message}")
                             for p in cell_problems]
                continue
        values["__line__"] = line
        checked.append(values)
    if archive is not None and not problems:
        problems += _archive_problems(archive, name, checked)
    if problems:
        if len(problems) >= max_problems:
            problems.append(Problem(name, 0, (), f"stopped after {max_problems} problems"))
        raise FileValidationError(problems)
    for values in checked:
        del values["__line__"]
    ready = [{k: v for k, v in public_row("readings", {**values, "seq": 0, "recorded_at": 0}).items()
              if k not in assigned} for values in checked]
    return ready if archive is None else archive.append_readings(ready)


def _archive_problems(archive: SQLiteArchive, name: str, checked: list[dict[str, Any]]) -> list[Problem]:
    """Rows that the archive would refuse: unknown session, an id and revision already recorded."""
    problems = []
    sessions: dict[str, bool] = {}
    seen: set[tuple[str, int]] = set()
    for values in checked:
        line, session_id = values["__line__"], values["session_id"]
        if session_id not in sessions:
            sessions[session_id] = bool(archive._read("SELECT 1 FROM sessions WHERE session_id = ?", (session_id,)))
        if not sessions[session_id]:
            problems.append(Problem(name, line, ("session_id",), f"session {session_id!r} is not in {archive.path}"))
        key = (values["reading_id"], values["revision"])
        if key in seen or archive._read("SELECT 1 FROM readings WHERE reading_id = ? AND revision = ?", key):
            problems.append(Problem(name, line, ("reading_id",),
                                    f"reading {key[0]} revision {key[1]} is already recorded"))
        seen.add(key)
    return problems


__all__ = ["FORMATS", "TABLES", "check_quantity", "export_frame", "import_readings", "neutralize_frame",
           "neutralize_text", "restore_text"]
