"""The SQLite layout of an archive (format version 1), generated from ``schema.py``.

Tables: ``meta`` (``format_version``), ``sessions``, ``readings``, ``events``, ``roster``
(the schema's columns plus ``row_sha256``), ``captures`` (zlib-compressed capture files, keyed by
session and content hash), ``competing_readings`` (corrections that lost a merge race, kept for
the TA) and ``snapshots`` (the columnar review files and their hashes). Datetimes are stored as
integer nanoseconds since the epoch (UTC); absent floats as NULL.

Triggers refuse every UPDATE and DELETE on the log tables, so append-only holds even for a
program that bypasses :class:`~labkit.logbook.sqlite.SQLiteArchive`.
"""

from __future__ import annotations

import sqlite3

from labkit.logbook.rows import TABLES
from labkit.logbook.schema import READING_COLUMNS, Column

SQL_TYPES = {"string": "TEXT", "int64": "INTEGER", "float64": "REAL", "boolean": "INTEGER",
             "datetime64[ns, UTC]": "INTEGER"}
LOG_TABLES = ("sessions", "readings", "events", "roster", "captures", "competing_readings")
_KEYS = {
    "sessions": "PRIMARY KEY (session_id)",
    "readings": "UNIQUE (reading_id, revision)",
    "events": "UNIQUE (row_sha256)",
    "roster": "PRIMARY KEY (participant_id)",
}


def q(name: str) -> str:
    """A quoted SQL identifier (``group`` is an SQL keyword)."""
    return '"' + name.replace('"', '""') + '"'


def column_list(table: str, prefix: str = "") -> str:
    """The table's schema columns, quoted and comma-separated, optionally prefixed by a table alias."""
    return ", ".join(prefix + q(c.name) for c in TABLES[table])


def _column_sql(column: Column) -> str:
    not_null = " NOT NULL" if column.required and column.dtype != "float64" else ""
    return f"{q(column.name)} {SQL_TYPES[column.dtype]}{not_null}"


def table_sql(table: str, name: str | None = None) -> str:
    """CREATE TABLE statement of one schema table."""
    cols = [_column_sql(c) for c in TABLES[table]] + ["row_sha256 TEXT NOT NULL", _KEYS[table]]
    return f"CREATE TABLE {q(name or table)} (\n  " + ",\n  ".join(cols) + "\n)"


def create_tables(conn: sqlite3.Connection, *, meta: bool = True) -> None:
    """Create every table, index and trigger of the current layout (inside the caller's transaction)."""
    if meta:
        conn.execute("CREATE TABLE meta (key TEXT PRIMARY KEY, value TEXT NOT NULL)")
    for table in ("sessions", "readings", "events", "roster"):
        conn.execute(table_sql(table))
    competing = [_column_sql(c) for c in READING_COLUMNS] + [
        "row_sha256 TEXT NOT NULL UNIQUE", "source_file TEXT NOT NULL", "merged_at INTEGER NOT NULL"]
    conn.execute("CREATE TABLE competing_readings (\n  " + ",\n  ".join(competing) + "\n)")
    conn.execute("CREATE TABLE captures (session_id TEXT NOT NULL, capture_id TEXT NOT NULL, name TEXT NOT NULL, "
                 "codec TEXT NOT NULL, size INTEGER NOT NULL, data BLOB NOT NULL, "
                 "PRIMARY KEY (session_id, capture_id))")
    conn.execute("CREATE TABLE snapshots (session_id TEXT NOT NULL, file TEXT NOT NULL, file_sha256 TEXT NOT NULL, "
                 "row_count INTEGER NOT NULL, max_rowid INTEGER NOT NULL, built_at INTEGER NOT NULL)")
    create_indexes_and_triggers(conn)


def create_indexes_and_triggers(conn: sqlite3.Connection) -> None:
    """Indexes (per-session order, snapshot lookup) and the append-only triggers."""
    conn.execute("CREATE INDEX readings_by_session ON readings (session_id, seq)")
    conn.execute("CREATE INDEX events_by_session ON events (session_id, seq)")
    conn.execute("CREATE INDEX competing_by_reading ON competing_readings (reading_id, revision)")
    conn.execute("CREATE INDEX snapshots_by_session ON snapshots (session_id)")
    for table in LOG_TABLES:
        for action in ("UPDATE", "DELETE"):
            conn.execute(f"CREATE TRIGGER {table}_no_{action.lower()} BEFORE {action} ON {table} "
                         f"BEGIN SELECT RAISE(ABORT, 'the logbook is append-only: {table} rows are never "
                         f"changed or removed; a correction is a new revision'); END")
