"""Columnar review snapshots: one Parquet file per closed session, hash-checked, rebuilt when needed.

Snapshots live in the folder ``ARCHIVE.snapshots/`` beside the archive and are a cache: the
archive stays the record. Each build is logged in the archive's ``snapshots`` table with the
file's SHA-256 and the session's reading count and highest rowid at build time. Since readings
are only ever appended, a session whose count and highest rowid still match has the same rows,
so the snapshot is current; otherwise (a correction, a merge) it is *stale*. A snapshot is
rebuilt when it is missing, stale, or its file no longer matches the recorded hash; a correction
of a session that has a snapshot rebuilds it at once.
"""

from __future__ import annotations

import hashlib
import os
from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

from labkit.logbook import layout
from labkit.logbook.frames import arrow_table, to_frame
from labkit.logbook.rows import TABLES, now_ns
from labkit.logbook.schema import READING_COLUMNS
from labkit.logbook.storage import ArchiveError

if TYPE_CHECKING:
    import pandas as pd
    import pyarrow as pa

    from labkit.logbook.sqlite import SQLiteArchive


def snapshot_dir(archive: SQLiteArchive) -> Path:
    """The folder holding an archive's snapshots."""
    return archive.path.with_name(archive.path.name + ".snapshots")


def _session_stats(archive: SQLiteArchive) -> dict[str, tuple[int, int]]:
    rows = archive._read("SELECT session_id, count(*), max(rowid) FROM readings GROUP BY session_id")
    return {r[0]: (int(r[1]), int(r[2])) for r in rows}


def _records(archive: SQLiteArchive) -> dict[str, tuple[str, str, int, int]]:
    """The latest snapshot record of each session: (file, sha256, row_count, max_rowid)."""
    rows = archive._read("SELECT session_id, file, file_sha256, row_count, max_rowid FROM snapshots ORDER BY rowid")
    return {r[0]: (r[1], r[2], int(r[3]), int(r[4])) for r in rows}


def _closed_sessions(archive: SQLiteArchive) -> set[str]:
    state = [c.name for c in TABLES["sessions"]].index("state")
    return {r[0] for r in archive.session_rows() if r[state] == "closed"}


def build_snapshot(archive: SQLiteArchive, session_id: str) -> Path:
    """Write (or rewrite) the Parquet snapshot of one session and record its hash; return the file."""
    import pyarrow.parquet as pq

    with archive.read_transaction() as conn:
        rows = conn.execute(f"SELECT {layout.column_list('readings')}, rowid FROM readings WHERE session_id = ? "
                            "ORDER BY seq, rowid", (session_id,)).fetchall()
    if not rows:
        msg = f"{archive.path}: session {session_id} has no readings to snapshot"
        raise ArchiveError(msg)
    max_rowid = max(r[-1] for r in rows)
    table = arrow_table(READING_COLUMNS, [r[:-1] for r in rows])
    folder = snapshot_dir(archive)
    folder.mkdir(exist_ok=True)
    name = f"{session_id}.parquet"
    target = folder / name
    tmp = folder / f".{name}.{os.getpid()}.tmp"
    pq.write_table(table, tmp, compression="zstd")
    with tmp.open("rb+") as handle:
        os.fsync(handle.fileno())
    digest = hashlib.sha256(tmp.read_bytes()).hexdigest()
    os.replace(tmp, target)

    def record(c: Any) -> None:
        c.execute("INSERT INTO snapshots (session_id, file, file_sha256, row_count, max_rowid, built_at) "
                  "VALUES (?, ?, ?, ?, ?, ?)", (session_id, name, digest, len(rows), max_rowid, now_ns()))

    archive._write(record, f"snapshot record of session {session_id}")
    return target


def _read_snapshot(archive: SQLiteArchive, record: tuple[str, str, int, int]) -> pa.Table | None:
    """The snapshot's table when its file exists and matches the recorded hash, else None."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    path = snapshot_dir(archive) / record[0]
    try:
        data = path.read_bytes()
    except OSError:
        return None
    if hashlib.sha256(data).hexdigest() != record[1]:
        return None
    return pq.read_table(pa.BufferReader(data))


def snapshot_table(archive: SQLiteArchive, session_id: str, stats: tuple[int, int] | None = None,
                   record: tuple[str, str, int, int] | None = None) -> pa.Table:
    """The session's readings as Arrow, from a valid snapshot, rebuilding it first when needed."""
    if stats is None:
        stats = _session_stats(archive).get(session_id, (0, 0))
    if record is None:
        record = _records(archive).get(session_id)
    if record is not None and (record[2], record[3]) == stats:
        table = _read_snapshot(archive, record)
        if table is not None:
            return table
    if archive.read_only:  # cannot record a rebuilt snapshot: read the archive itself
        return archive.reading_table(session_id)
    import pyarrow as pa
    import pyarrow.parquet as pq

    path = build_snapshot(archive, session_id)
    return pq.read_table(pa.BufferReader(path.read_bytes()))


def load_readings(archive: SQLiteArchive, sessions: Sequence[str] | None = None, use_snapshots: bool = True,
                  *, latest_only: bool = False) -> pd.DataFrame:
    """Readings of the given sessions (all by default) as one DataFrame with the schema's dtypes.

    Closed sessions come from their snapshots when ``use_snapshots`` (built or rebuilt as
    needed); other sessions, and everything when ``use_snapshots`` is false, come from SQLite.
    Rows are in the order of :meth:`SQLiteArchive.readings`: by session id, ``seq``, arrival.
    """
    import pyarrow as pa

    if sessions is None and not use_snapshots:
        return archive.readings(latest_only=latest_only)
    stats = _session_stats(archive)
    wanted = sorted(stats) if sessions is None else sorted(set(sessions))
    unknown = [s for s in wanted if s not in stats and not archive._read(
        "SELECT 1 FROM sessions WHERE session_id = ?", (s,))]
    if unknown:
        msg = f"{archive.path}: no session {', '.join(unknown)}"
        raise ArchiveError(msg)
    closed = _closed_sessions(archive) if use_snapshots else set()
    records = _records(archive) if closed else {}
    tables = []
    for session_id in wanted:
        if session_id not in stats:
            continue
        if session_id in closed:
            tables.append(snapshot_table(archive, session_id, stats[session_id], records.get(session_id)))
        else:
            tables.append(archive.reading_table(session_id))
    if not tables:
        tables = [arrow_table(READING_COLUMNS, [])]
    frame = to_frame(pa.concat_tables(tables), READING_COLUMNS)
    if latest_only and len(frame):
        newest = frame.groupby("reading_id", sort=False)["revision"].transform("max")
        frame = frame[frame["revision"] == newest].reset_index(drop=True)
    return frame


def snapshot_problems(archive: SQLiteArchive) -> list[str]:
    """Snapshot files that no longer match their recorded hash (they are rebuilt on the next load)."""
    problems = []
    folder = snapshot_dir(archive)
    for session_id, (name, digest, _, _) in _records(archive).items():
        path = folder / name
        if path.exists() and hashlib.sha256(path.read_bytes()).hexdigest() != digest:
            problems.append(f"{path}: snapshot of session {session_id} does not match its recorded hash "
                            "(rebuilt on the next load)")
    return problems
