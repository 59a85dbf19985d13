"""Hand-in files (a TA collects one per laptop) and merging them into an archive.

A hand-in is itself a complete archive (same layout, single file, rollback journal instead of
a WAL so it travels as one file) holding the chosen sessions with their readings (all
revisions), events, captures and competing readings, and the roster entries of their sections.

Merge rules, all applied in ONE write transaction:

- Rows are identified by their ids (session ``session_id``; reading ``(reading_id, revision)``;
  roster ``participant_id``; capture ``(session_id, capture_id)``; event its content) and
  compared by ``row_sha256``. An equal id with an equal hash is a duplicate and is skipped, so
  merging the same file twice changes nothing.
- An equal id with different content (a session, a roster entry, or a reading's revision 0) is a
  *refusal*: that file is rolled back as a whole (a savepoint per file) and listed in
  :attr:`MergeReport.refused` with the reason; the other files still merge. A refusal never
  aborts the whole merge, and nothing of a refused file is applied.
- A *competing correction* is a revision >= 1 of a reading whose archive row of that revision
  has other content (two TAs or laptops corrected the same reading). The row already in the
  archive (or merged from an earlier file of ``paths``) stays authoritative, so
  :meth:`~labkit.logbook.sqlite.SQLiteArchive.readings` keeps exactly one row per
  ``(reading_id, revision)`` and ``latest_only`` is well-defined; the competing row and its own
  later revisions go to ``competing_readings`` (see
  :meth:`~labkit.logbook.sqlite.SQLiteArchive.competing_readings`), a ``merge:conflict`` event is
  appended to the session, and :attr:`MergeReport.competing_corrections` lists it. The TA settles
  it by recording a new correction (revision + 1) with a reason.
- Every row's hash is recomputed on reading a hand-in; a mismatch refuses the file (damaged or
  edited by hand). A hand-in in an older format is migrated in a temporary copy, never in place.
"""

from __future__ import annotations

import json
import os
import shutil
import sqlite3
import tempfile
from collections import defaultdict
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

from labkit.logbook import layout
from labkit.logbook.rows import CONFLICT_EVENT, TABLES, now_ns, row_hash
from labkit.logbook.schema import FORMAT_VERSION, READING_COLUMNS
from labkit.logbook.storage import ArchiveError, MergeReport

if TYPE_CHECKING:
    from labkit.logbook.sqlite import SQLiteArchive

_SESSION_SECTION = [c.name for c in TABLES["sessions"]].index("section")


def write_hand_in(archive: SQLiteArchive, path: Path, session_ids: Sequence[str] | None = None) -> Path:
    """Write the hand-in file ``path`` (replaced atomically if it exists); return it."""
    own = getattr(archive, "path", None)  # other backends (a server database) have no file
    if own is not None and path.exists() and path.resolve() == Path(own).resolve():
        msg = f"{path}: the hand-in would replace the archive itself; choose another file name"
        raise ArchiveError(msg)
    with archive.read_transaction() as conn:
        known = [r[0] for r in conn.execute("SELECT session_id FROM sessions ORDER BY created_at, session_id")]
        chosen = known if session_ids is None else list(dict.fromkeys(session_ids))
        missing = [s for s in chosen if s not in set(known)]
        if missing:
            msg = f"{archive.path}: no session {', '.join(missing)} to hand in"
            raise ArchiveError(msg)
        data = _collect(conn, chosen)
    return write_collected(path, data)


def write_collected(path: Path, data: dict[str, list[tuple[Any, ...]]]) -> Path:
    """Write hand-in rows already collected (as :func:`_collect` gives them) to ``path``, atomically; return it.

    Other backends (the server archive) collect their rows themselves and write the file here.
    """
    from labkit.logbook.sqlite import SQLiteArchive

    if not path.parent.is_dir():
        msg = f"{path}: the folder {path.parent} does not exist"
        raise ArchiveError(msg)
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    for leftover in (tmp, Path(f"{tmp}-wal"), Path(f"{tmp}-shm")):
        leftover.unlink(missing_ok=True)
    target = SQLiteArchive(tmp)
    try:
        target._write(lambda c: _insert_all(c, data), f"hand-in {path.name}")
        target._connection.execute("PRAGMA journal_mode = DELETE")  # one file to carry
    finally:
        target.close()
    with tmp.open("rb+") as handle:
        os.fsync(handle.fileno())
    os.replace(tmp, path)
    from labkit.logbook.sqlite import _fsync_dir

    _fsync_dir(path.parent)
    return path


def _collect(conn: sqlite3.Connection, session_ids: list[str]) -> dict[str, list[tuple[Any, ...]]]:
    """Storage rows (with row_sha256) of the chosen sessions, read in one snapshot."""
    marks = ", ".join("?" * len(session_ids))
    data: dict[str, list[tuple[Any, ...]]] = {}
    for table in ("sessions", "readings", "events"):
        data[table] = conn.execute(f"SELECT {layout.column_list(table)}, row_sha256 FROM {table} "
                                   f"WHERE session_id IN ({marks}) ORDER BY rowid", session_ids).fetchall()
    sections = sorted({r[_SESSION_SECTION] for r in data["sessions"]})
    data["roster"] = conn.execute(f"SELECT {layout.column_list('roster')}, row_sha256 FROM roster WHERE section IN "
                                  f"({', '.join('?' * len(sections))}) ORDER BY rowid", sections).fetchall()
    data["captures"] = conn.execute(f"SELECT session_id, capture_id, name, codec, size, data FROM captures "
                                    f"WHERE session_id IN ({marks}) ORDER BY rowid", session_ids).fetchall()
    data["competing_readings"] = conn.execute(
        f"SELECT {layout.column_list('readings')}, row_sha256, source_file, merged_at FROM competing_readings "
        f"WHERE session_id IN ({marks}) ORDER BY rowid", session_ids).fetchall()
    return data


def _insert_sql(table: str) -> str:
    if table == "captures":
        return "INSERT INTO captures (session_id, capture_id, name, codec, size, data) VALUES (?, ?, ?, ?, ?, ?)"
    if table == "competing_readings":
        n = len(READING_COLUMNS) + 3
        return (f"INSERT INTO competing_readings ({layout.column_list('readings')}, row_sha256, source_file, "
                f"merged_at) VALUES ({', '.join('?' * n)})")
    n = len(TABLES[table]) + 1
    return f"INSERT INTO {table} ({layout.column_list(table)}, row_sha256) VALUES ({', '.join('?' * n)})"


def _insert_all(conn: sqlite3.Connection, data: dict[str, list[tuple[Any, ...]]]) -> None:
    for table, rows in data.items():
        if rows:
            conn.executemany(_insert_sql(table), rows)


@dataclass
class HandIn:
    """The content of one hand-in file, read and hash-checked before the merge transaction."""

    path: Path
    data: dict[str, list[tuple[Any, ...]]] = field(default_factory=dict)
    problem: str = ""


def read_hand_in(path: Path) -> HandIn:
    """Read a hand-in file (migrating a copy if it is older); a problem is reported, not raised."""
    from labkit.logbook.sqlite import SQLiteArchive

    if not path.is_file():
        return HandIn(path, problem=f"{path}: no such file")
    with tempfile.TemporaryDirectory(prefix="labkit-merge-") as folder:
        try:
            source = SQLiteArchive(path, read_only=True, allow_network_filesystem=True)
        except ArchiveError as exc:
            if "needs migrating" not in str(exc):
                return HandIn(path, problem=str(exc))
            copy = Path(folder) / path.name
            shutil.copyfile(path, copy)
            try:
                source = SQLiteArchive(copy, allow_network_filesystem=True)
            except ArchiveError as exc2:
                return HandIn(path, problem=str(exc2))
        try:
            integrity = [r[0] for r in source._read("PRAGMA integrity_check")]
            if integrity != ["ok"]:
                return HandIn(path, problem=f"{path}: integrity_check failed: {'; '.join(integrity[:3])}")
            with source.read_transaction() as conn:
                ids = [r[0] for r in conn.execute("SELECT session_id FROM sessions")]
                data = _collect(conn, ids)
        except ArchiveError as exc:
            return HandIn(path, problem=str(exc))
        finally:
            source.close()
    for table in ("sessions", "readings", "events", "roster"):
        for row in data[table]:
            if row_hash(table, tuple(row[:-1])) != row[-1]:
                return HandIn(path, problem=f"{path}: a {table} row does not match its row hash "
                                            "(damaged or edited by hand); the file is refused")
    if source.format_version != FORMAT_VERSION:
        return HandIn(path, problem=f"{path}: format version {source.format_version} after migration")
    return HandIn(path, data)


class _Refused(Exception):
    """A file that must not be merged (rolled back to its savepoint)."""


def merge_hand_ins(archive: SQLiteArchive, paths: Sequence[Path], merged_by: str) -> MergeReport:
    """Merge hand-in files into ``archive`` (the rules are in the module docstring)."""
    report = MergeReport()
    handins = [read_hand_in(p) for p in paths]
    for h in handins:
        if h.problem:
            report.refused.append(h.problem)
    good = [h for h in handins if not h.problem]
    if not good:
        return report

    def work(conn: sqlite3.Connection) -> MergeReport:
        for k, handin in enumerate(good):
            conn.execute(f"SAVEPOINT file_{k}")
            part = MergeReport()
            try:
                _merge_one(conn, handin, part, merged_by)
            except _Refused as exc:
                conn.execute(f"ROLLBACK TO file_{k}")
                conn.execute(f"RELEASE file_{k}")
                report.refused.append(f"{handin.path}: {exc}; nothing of this file was merged")
                continue
            except sqlite3.IntegrityError as exc:
                conn.execute(f"ROLLBACK TO file_{k}")
                conn.execute(f"RELEASE file_{k}")
                report.refused.append(f"{handin.path}: clashes with the archive ({exc}); nothing of this file "
                                      "was merged")
                continue
            conn.execute(f"RELEASE file_{k}")
            report.merged_sessions += [s for s in part.merged_sessions if s not in report.merged_sessions]
            report.merged_rows += part.merged_rows
            report.duplicates_skipped += part.duplicates_skipped
            report.competing_corrections += part.competing_corrections
        return report

    return archive._write(work, f"merge of {len(good)} hand-in files")


def _merge_one(conn: sqlite3.Connection, handin: HandIn, report: MergeReport, merged_by: str) -> None:
    data = handin.data
    touched: set[str] = set()
    for row in data["sessions"]:
        found = conn.execute("SELECT row_sha256 FROM sessions WHERE session_id = ?", (row[0],)).fetchone()
        if found is None:
            conn.execute(_insert_sql("sessions"), row)
            touched.add(row[0])
        elif found[0] != row[-1]:
            msg = f"session {row[0]} differs from the archive's session of that id"
            raise _Refused(msg)
    for row in data["roster"]:
        found = conn.execute("SELECT row_sha256 FROM roster WHERE participant_id = ?", (row[0],)).fetchone()
        if found is None:
            conn.execute(_insert_sql("roster"), row)
        elif found[0] != row[-1]:
            msg = f"roster entry {row[0]} differs from the archive's entry of that id"
            raise _Refused(msg)
    for row in data["captures"]:
        if conn.execute("SELECT 1 FROM captures WHERE session_id = ? AND capture_id = ?", row[:2]).fetchone() is None:
            conn.execute(_insert_sql("captures"), row)
    _merge_readings(conn, handin, report, touched, merged_by)
    event_hashes: dict[str, set[str]] = {}
    for row in data["events"]:
        session_id = row[0]
        if session_id not in event_hashes:
            event_hashes[session_id] = {r[0] for r in conn.execute(
                "SELECT row_sha256 FROM events WHERE session_id = ?", (session_id,))}
        if row[-1] not in event_hashes[session_id]:
            conn.execute(_insert_sql("events"), row)
            event_hashes[session_id].add(row[-1])
            touched.add(session_id)
    for row in data["competing_readings"]:  # competing rows another merge kept aside travel along
        if conn.execute("SELECT 1 FROM competing_readings WHERE row_sha256 = ?", (row[-3],)).fetchone() is None:
            conn.execute(_insert_sql("competing_readings"), row)
    report.merged_sessions = sorted(touched)


def _merge_readings(conn: sqlite3.Connection, handin: HandIn, report: MergeReport, touched: set[str],
                    merged_by: str) -> None:
    by_reading: dict[str, list[tuple[Any, ...]]] = defaultdict(list)
    for row in handin.data["readings"]:
        by_reading[row[0]].append(row)
    sessions = sorted({row[3] for row in handin.data["readings"]})
    existing: dict[tuple[str, int], str] = {}
    for session_id in sessions:
        for reading_id, revision, digest in conn.execute(
                "SELECT reading_id, revision, row_sha256 FROM readings WHERE session_id = ?", (session_id,)):
            existing[(reading_id, int(revision))] = digest
    insert, competing = _insert_sql("readings"), _insert_sql("competing_readings")
    for reading_id, rows in by_reading.items():
        rows.sort(key=lambda r: r[1])
        revisions = [int(r[1]) for r in rows]
        if revisions != list(range(len(rows))):
            msg = f"reading {reading_id} has revisions {revisions}, not 0, 1, 2, ... without gaps"
            raise _Refused(msg)
        diverged = False
        for row in rows:
            key = (reading_id, int(row[1]))
            mine = existing.get(key)
            if diverged or (mine is not None and mine != row[-1]):
                if key[1] == 0:
                    msg = f"reading {reading_id} revision 0 differs from the archive's reading of that id"
                    raise _Refused(msg)
                diverged = True
                if conn.execute("SELECT 1 FROM competing_readings WHERE row_sha256 = ?", (row[-1],)).fetchone():
                    continue  # kept aside by an earlier merge of the same correction
                conn.execute(competing, (*row, str(handin.path.name), now_ns()))
                _conflict_event(conn, row, mine, handin.path.name, merged_by)
                report.competing_corrections.append(
                    f"{handin.path}: reading {reading_id} revision {key[1]} (session {row[3]}, step {row[7]}, "
                    f"{row[10]} {row[11]}): a competing correction, kept aside for the TA; the archive keeps its own")
                touched.add(row[3])
            elif mine == row[-1]:
                report.duplicates_skipped += 1
            else:
                conn.execute(insert, row)
                existing[key] = row[-1]
                report.merged_rows += 1
                touched.add(row[3])


def _conflict_event(conn: sqlite3.Connection, row: tuple[Any, ...], kept: str | None, file: str,
                    merged_by: str) -> None:
    from labkit.logbook.sqlite import SQLiteArchive

    session_id = row[3]
    detail = json.dumps({"reading_id": row[0], "revision": int(row[1]), "kept_sha256": kept,
                         "competing_sha256": row[-1], "file": file}, sort_keys=True)
    values = {"session_id": session_id, "seq": SQLiteArchive._next_seq(conn, session_id), "at": now_ns(),
              "by": merged_by, "role": "ta", "event": CONFLICT_EVENT, "step_id": row[7], "detail": detail}
    ordered = tuple(values[c.name] for c in TABLES["events"])
    conn.execute(_insert_sql("events"), (*ordered, row_hash("events", ordered)))
