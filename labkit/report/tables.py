"""Writing a report's tables as CSV, Parquet or Excel files, guarded against spreadsheet formula injection.

The logbook's exporter (:func:`labkit.logbook.exchange.export_frame`) does the writing and its guard:
text cells beginning with ``=``, ``+``, ``-``, ``@``, a tab or a carriage return get a leading ``'`` in
CSV and XLSX; Parquet keeps text as it is (spreadsheets do not evaluate it).
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from pathlib import Path

import pandas as pd

from labkit.report.common import ReportError

TABLE_FORMATS = ("csv", "parquet", "xlsx")
_SAFE_NAME = re.compile(r"^[A-Za-z0-9_\-]+$")


def write_tables(tables: Mapping[str, pd.DataFrame], folder: str | Path, table_format: str = "csv",
                 prefix: str = "") -> list[Path]:
    """Write each table to ``folder/{prefix}{name}.{format}``; return the paths written.

    Raises
    ------
    ReportError
        Unknown format, a folder that cannot be made, or a table name that is not a plain file name.
    """
    from labkit.logbook.exchange import export_frame

    if table_format not in TABLE_FORMATS:
        msg = f"--table-format: expected one of {', '.join(TABLE_FORMATS)}, found {table_format!r}"
        raise ReportError(msg)
    out_dir = Path(folder)
    try:
        out_dir.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        msg = f"{out_dir}: cannot create the tables folder: {exc.strerror or exc}"
        raise ReportError(msg) from exc
    paths = []
    for name, frame in tables.items():
        if not _SAFE_NAME.match(prefix + name):
            msg = f"table name {prefix + name!r}: expected letters, digits, '_' or '-' only"
            raise ReportError(msg)
        paths.append(export_frame(_plain(frame), out_dir / f"{prefix}{name}.{table_format}", table_format))
    return paths


def _plain(frame: pd.DataFrame) -> pd.DataFrame:
    """Columns the exporters can write: array-valued cells become text, bools stay bools."""
    out = frame.reset_index(drop=True).copy()
    for col in out.columns:
        if out[col].dtype == object and out[col].map(lambda v: hasattr(v, "shape")).any():
            out[col] = out[col].map(lambda v: " ".join(f"{x:.6g}" for x in v) if hasattr(v, "shape") else v)
    return out
