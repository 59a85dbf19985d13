"""Ordered migrations of the archive layout: ``MIGRATIONS[k] = (from_version, function)``.

Each function moves an archive from ``from_version`` to ``from_version + 1`` inside the
caller's write transaction (``BEGIN IMMEDIATE``), so a failed migration leaves the old layout
untouched. :func:`migrate` runs them in order and records the new ``format_version``.

Format version 0 (the first prototype's layout) differed from version 1 in that:

- readings had no ``seq``, ``anchor`` or ``capture_id`` column and events no ``seq``;
- datetimes (``recorded_at``, ``at``, ``created_at``) were ISO 8601 text with a UTC offset;
- rows carried no ``row_sha256``; there were no captures, competing-readings or snapshot tables,
  and no append-only triggers.

Moving to version 1 gives every reading ``anchor = "nominal"`` (version 0 predicted on nominal
source values only) and an empty ``capture_id``, and numbers readings and events of each session
with ``seq`` in the order they were recorded (time, then the order they were stored).
"""

from __future__ import annotations

import sqlite3
from collections.abc import Callable
from typing import Any

from labkit.logbook import layout
from labkit.logbook.rows import TABLES, CellProblem, coerce, row_hash
from labkit.logbook.schema import FORMAT_VERSION
from labkit.logbook.storage import ArchiveError

V0_MISSING = {"readings": {"seq", "anchor", "capture_id"}, "events": {"seq"}, "sessions": set(), "roster": set()}
"""Columns of the version-1 tables that version 0 did not have."""


def _v0_value(table: str, name: str, value: Any, where: str) -> Any:
    column = next(c for c in TABLES[table] if c.name == name)
    try:
        return coerce(value, column, from_text=column.dtype == "datetime64[ns, UTC]")
    except CellProblem as exc:
        msg = f"cannot migrate {where}: {exc}"
        raise ArchiveError(msg) from None


def _migrate_0_to_1(conn: sqlite3.Connection) -> None:
    """Version 0 -> 1 (see the module docstring)."""
    for table in ("sessions", "readings", "events", "roster"):
        conn.execute(f"ALTER TABLE {table} RENAME TO v0_{table}")
    layout.create_tables(conn, meta=False)
    converted: dict[str, list[dict[str, Any]]] = {}
    for table in ("sessions", "readings", "events", "roster"):
        names = [c.name for c in TABLES[table] if c.name not in V0_MISSING[table]]
        cursor = conn.execute(f"SELECT rowid, {', '.join(layout.q(n) for n in names)} FROM v0_{table} ORDER BY rowid")
        rows = []
        for raw in cursor:
            where = f"v0 {table} rowid {raw[0]}"
            values = {n: _v0_value(table, n, v, where) for n, v in zip(names, raw[1:], strict=True)}
            values["_order"] = raw[0]
            rows.append(values)
        converted[table] = rows
    for reading in converted["readings"]:
        reading["anchor"] = "nominal"
        reading["capture_id"] = ""
    # one seq per session over readings and events, in recording order
    timeline = sorted([(r["session_id"], r["recorded_at"], 0, r["_order"], r) for r in converted["readings"]]
                      + [(e["session_id"], e["at"], 1, e["_order"], e) for e in converted["events"]],
                      key=lambda t: t[:4])
    counters: dict[str, int] = {}
    for session_id, _, _, _, row in timeline:
        row["seq"] = counters.get(session_id, 0)
        counters[session_id] = row["seq"] + 1
    for table in ("sessions", "readings", "events", "roster"):
        names = [c.name for c in TABLES[table]]
        insert = (f"INSERT INTO {table} ({layout.column_list(table)}, row_sha256) "
                  f"VALUES ({', '.join('?' * (len(names) + 1))})")
        batch = []
        for row in converted[table]:
            ordered = tuple(row[n] for n in names)
            batch.append((*ordered, row_hash(table, ordered)))
        conn.executemany(insert, batch)
        conn.execute(f"DROP TABLE v0_{table}")


MIGRATIONS: list[tuple[int, Callable[[sqlite3.Connection], None]]] = [
    (0, _migrate_0_to_1),
]


def migrate(conn: sqlite3.Connection, version: int) -> None:
    """Run every migration from ``version`` up to ``FORMAT_VERSION``, in order, in the caller's transaction."""
    steps = dict(MIGRATIONS)
    while version < FORMAT_VERSION:
        if version not in steps:
            msg = f"no migration from archive format version {version}"
            raise ArchiveError(msg)
        steps[version](conn)
        version += 1
        conn.execute("UPDATE meta SET value = ? WHERE key = 'format_version'", (str(version),))
