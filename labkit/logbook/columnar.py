"""Reading many readings out of SQLite into Arrow (the cold path of a review load), optionally on several cores.

Python's :mod:`sqlite3` makes one Python object per value; for a million readings of 33 columns
that object traffic is most of the time, and it holds the interpreter lock. With ``workers`` > 1 a
big read is split into rowid ranges: the calling process reads one range while worker processes
(spawned once, then reused) read the others on their own read-only connections and send back
Arrow tables. This pays on an idle multi-core machine; on a busy two-core machine it was measured
slower than one process (spawning and shipping the tables cost more than the shared cores give),
so one process is the default. Readings are append-only and rowids only grow, so the rows of each range up to the
highest rowid seen at the start are the same whichever connection reads them. Any failure of
the workers falls back to reading everything in the calling process.

Two things keep the single-process read fast: rows are fetched and converted to Arrow in chunks,
so the Python rows of one chunk are freed before the next, and the cyclic garbage collector is
paused meanwhile (the rows are tuples of plain values that cannot form cycles, yet each collection
walks all of them: with it running, a million-row read was measured 1.5 times slower).

Rows are then ordered by ``session_id``, ``seq`` and rowid with one numpy lexsort on integer keys.
"""

from __future__ import annotations

import gc
import os
import sqlite3
from collections.abc import Iterator, Sequence
from concurrent.futures import Executor
from contextlib import contextmanager
from typing import TYPE_CHECKING, Any

from labkit.logbook.layout import column_list
from labkit.logbook.schema import READING_COLUMNS

if TYPE_CHECKING:
    import pyarrow as pa

PARALLEL_MIN_ROWS = 150_000
"""Below this many rows one process is faster than starting or feeding workers."""

FETCH_CHUNK_ROWS = 20_000
"""Rows converted to Arrow at a time (bounds the Python objects alive at once)."""

_POOL: Executor | None = None


def _rows_sql(where: str, ranged: bool = True) -> str:
    conditions = (["r.rowid BETWEEN ? AND ?"] if ranged else []) + ([f"({where})"] if where else [])
    return (f"SELECT {column_list('readings', 'r.')}, r.rowid FROM readings r"
            + (" WHERE " + " AND ".join(conditions) if conditions else "") + " ORDER BY r.rowid")


def _table_of(rows: list[tuple[Any, ...]]) -> tuple[pa.Table, Any]:
    import numpy as np

    from labkit.logbook.frames import arrow_table

    rowids = np.fromiter((r[-1] for r in rows), dtype=np.int64, count=len(rows))
    return arrow_table(READING_COLUMNS, rows), rowids


@contextmanager
def _collector_paused() -> Iterator[None]:
    """Pause the cyclic garbage collector (restored as it was, also on error)."""
    was_enabled = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if was_enabled:
            gc.enable()


def _read(conn: sqlite3.Connection, sql: str, params: Sequence[Any]) -> tuple[pa.Table, Any]:
    """Run a reading query (rowid last) and convert its rows to Arrow chunk by chunk."""
    import numpy as np
    import pyarrow as pa

    with _collector_paused():
        cursor = conn.execute(sql, tuple(params))
        tables, ids = [], []
        while rows := cursor.fetchmany(FETCH_CHUNK_ROWS):
            table, rowids = _table_of(rows)
            tables.append(table)
            ids.append(rowids)
        del rows
    if not tables:
        return _table_of([])
    return pa.concat_tables(tables), np.concatenate(ids)


def read_range(uri: str, where: str, params: Sequence[Any], lo: int, hi: int) -> bytes:
    """Worker: the readings with rowid in [lo, hi] matching ``where``, as Arrow IPC bytes (rowid column last)."""
    import pyarrow as pa

    conn = sqlite3.connect(uri, uri=True)
    try:
        table, rowids = _read(conn, _rows_sql(where), (lo, hi, *params))
    finally:
        conn.close()
    table = table.append_column("__rowid__", pa.array(rowids, type=pa.int64()))
    sink = pa.BufferOutputStream()
    with pa.ipc.new_stream(sink, table.schema) as writer:
        writer.write_table(table)
    return sink.getvalue().to_pybytes()


def _pool(workers: int) -> Executor:
    global _POOL
    if _POOL is None:
        import multiprocessing
        from concurrent.futures import ProcessPoolExecutor

        # spawn, not fork: the caller may hold SQLite connections and Arrow threads
        _POOL = ProcessPoolExecutor(max_workers=workers, mp_context=multiprocessing.get_context("spawn"))
    return _POOL


def fetch_readings(conn: sqlite3.Connection, uri: str, where: str, params: Sequence[Any],
                   workers: int | None = None, *, parallel: bool = True) -> tuple[pa.Table, Any]:
    """The readings matching ``where`` (SQL over alias ``r``) as an Arrow table, and their rowids (numpy).

    Parameters
    ----------
    conn
        The archive's connection (reads one range; gives the rowid bounds).
    uri
        A read-only SQLite URI of the same file, for the workers.
    workers
        Processes to use in all (default 1: this process only; see the module docstring).
    parallel
        False for selective queries (one session), which an index answers faster than range scans.
    """
    import numpy as np
    import pyarrow as pa

    if not parallel:
        return _read(conn, _rows_sql(where, ranged=False), params)
    bounds = conn.execute("SELECT min(rowid), max(rowid), count(*) FROM readings").fetchone()
    if bounds[2] == 0:
        return _table_of([])
    lo, hi, count = int(bounds[0]), int(bounds[1]), int(bounds[2])
    workers = 1 if workers is None else min(workers, os.cpu_count() or 1, 8)
    if workers < 2 or count < PARALLEL_MIN_ROWS:
        return _read(conn, _rows_sql(where), (lo, hi, *params))
    edges = np.linspace(lo, hi + 1, workers + 1).astype(np.int64)
    ranges = [(int(edges[k]), int(edges[k + 1]) - 1) for k in range(workers)]
    try:
        pool = _pool(workers - 1)
        futures = [pool.submit(read_range, uri, where, tuple(params), a, b) for a, b in ranges[1:]]
    except (OSError, RuntimeError):
        return _read(conn, _rows_sql(where), (lo, hi, *params))
    own, own_ids = _read(conn, _rows_sql(where), (*ranges[0], *params))
    tables, ids = [own], [own_ids]
    try:
        for future in futures:
            part = pa.ipc.open_stream(future.result()).read_all()
            ids.append(part.column("__rowid__").to_numpy())
            tables.append(part.drop_columns(["__rowid__"]).cast(own.schema))
    except Exception:  # a worker died or could not start: read the rest here
        shutdown_workers()
        return _read(conn, _rows_sql(where), (lo, hi, *params))
    return pa.concat_tables(tables), np.concatenate(ids)


def shutdown_workers() -> None:
    """Stop the worker processes (they are restarted on the next big read)."""
    global _POOL
    if _POOL is not None:
        _POOL.shutdown(wait=False, cancel_futures=True)
        _POOL = None


def order_by_session(table: pa.Table, rowids: Any) -> pa.Table:
    """The table's rows ordered by ``session_id``, ``seq``, then rowid (numpy lexsort on integer keys)."""
    import numpy as np
    import pyarrow.compute as pc

    if table.num_rows == 0:
        return table
    encoded = pc.dictionary_encode(table.column("session_id")).combine_chunks()
    dictionary = encoded.dictionary.to_numpy(zero_copy_only=False)
    rank = np.empty(len(dictionary), dtype=np.int64)
    rank[np.argsort(dictionary, kind="stable")] = np.arange(len(dictionary))
    session_key = rank[encoded.indices.to_numpy()]
    seq = table.column("seq").to_numpy()
    order = np.lexsort((rowids, seq, session_key))
    if np.array_equal(order, np.arange(len(order))):
        return table
    return table.take(order)
