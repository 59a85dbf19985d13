"""The logbook archive in one SQLite file (stdlib :mod:`sqlite3`): durable, append-only, shared by processes.

Durability: write-ahead log (``journal_mode=WAL``) with ``synchronous=FULL``, so the WAL is
synced to disk at every commit and a reading is on disk when :meth:`SQLiteArchive.append_reading`
returns. Every write is one ``BEGIN IMMEDIATE`` transaction, which takes the write lock first
and then assigns ``seq`` (per session, shared by readings and events) and ``recorded_at``, so
concurrent writers never hand out the same number. A locked archive is waited for
(``busy_timeout``) and retried with back-off for at most ``lock_wait`` seconds; after that the
write fails with :class:`NotRecordedError`, never with a raw lock error.

Failures (full disk, read-only file or folder, I/O error, corruption) roll the transaction back
and raise :class:`NotRecordedError` naming the file and the reason; nothing is half-written.
Opening checks the filesystem (network filesystems are refused), the SQLite header (a truncated
or foreign file is an :class:`ArchiveError`), the format version (older layouts are migrated in
order, see :mod:`labkit.logbook.migrations`).

Only :mod:`sqlite3` and :mod:`labkit.logbook.rows` are imported to write; pandas and pyarrow load
when a frame is asked for.
"""

from __future__ import annotations

import hashlib
import os
import sqlite3
import struct
import time
import warnings
import zlib
from collections.abc import Callable, Iterator, Mapping, Sequence
from contextlib import contextmanager, suppress
from pathlib import Path
from typing import TYPE_CHECKING, Any, TypeVar

from labkit.logbook import layout
from labkit.logbook.filesystems import refuse_network_filesystem
from labkit.logbook.rows import TABLES, now_ns, public_row, row_hash, storage_row
from labkit.logbook.schema import FORMAT_VERSION, READING_COLUMNS
from labkit.logbook.storage import ArchiveError, InvalidRowError, MergeReport, NotRecordedError

if TYPE_CHECKING:
    import pandas as pd
    import pyarrow as pa

T = TypeVar("T")
SQLITE_MAGIC = b"SQLite format 3\x00"
CAPTURE_CODEC = "zlib"
_SEQ = [c.name for c in READING_COLUMNS].index("seq")
_READABLE_PRAGMAS = ("journal_mode", "synchronous", "busy_timeout", "max_page_count", "page_size", "page_count",
                     "foreign_keys", "user_version")


def _errorname(exc: BaseException) -> str:
    return str(getattr(exc, "sqlite_errorname", "") or "")


def _is_busy(exc: BaseException) -> bool:
    name = _errorname(exc)
    if name:
        return name.startswith(("SQLITE_BUSY", "SQLITE_LOCKED"))
    text = str(exc).lower()
    return "locked" in text or "busy" in text


UNREADABLE = (sqlite3.DatabaseError, UnicodeDecodeError)
"""What reading a damaged file raises: SQLite's errors, or text in a damaged page that is not UTF-8."""


def _reason(exc: BaseException, lock_wait: float) -> str:
    """A sentence saying what went wrong, from the SQLite error code."""
    if isinstance(exc, UnicodeDecodeError) or "could not decode to utf-8" in str(exc).lower():
        return "the archive file is corrupt (stored text that is not UTF-8)"
    name = _errorname(exc)
    if name.startswith("SQLITE_FULL") or "full" in str(exc).lower():
        return "the disk (or the archive's size limit) is full"
    if name.startswith("SQLITE_READONLY") or "readonly" in str(exc).lower():
        return "the archive cannot be written (read-only file, folder or disk)"
    if _is_busy(exc):
        return f"another process kept the archive locked for more than {lock_wait:g} s"
    if name.startswith("SQLITE_IOERR") or "disk i/o" in str(exc).lower():
        return "the disk reported an input/output error (removed, full or failing)"
    if name.startswith(("SQLITE_CORRUPT", "SQLITE_NOTADB")) or "malformed" in str(exc).lower():
        return "the archive file is corrupt"
    if name.startswith("SQLITE_CANTOPEN"):
        return "a file of the archive (its journal) cannot be opened: is the folder writable?"
    if name.startswith("SQLITE_CONSTRAINT") or isinstance(exc, sqlite3.IntegrityError):
        return "a row with the same id is already recorded"
    return "SQLite refused the write"


def check_header(path: Path) -> None:
    """Raise :class:`ArchiveError` unless ``path`` starts like a complete SQLite database.

    Checks the magic string, the page size and, when the header's page count is valid
    (change counter equals version-valid-for) and no write-ahead log is pending, that the
    file holds that many whole pages.
    """
    try:
        size = path.stat().st_size
        with path.open("rb") as handle:
            head = handle.read(100)
    except OSError as exc:
        msg = f"{path}: cannot read the archive: {exc.strerror or exc}"
        raise ArchiveError(msg) from exc
    if size == 0:
        msg = (f"{path}: the archive file is empty (0 bytes): truncated, or not an archive; "
               "a new archive is created only where no file exists")
        raise ArchiveError(msg)
    if len(head) < 100 or not head.startswith(SQLITE_MAGIC):
        msg = f"{path}: not a labkit archive (no SQLite header; {size} bytes); is it the right file?"
        raise ArchiveError(msg)
    page_size = struct.unpack(">H", head[16:18])[0]
    page_size = 65536 if page_size == 1 else page_size
    if page_size < 512 or page_size & (page_size - 1):
        msg = f"{path}: corrupt archive header (page size {page_size})"
        raise ArchiveError(msg)
    change, pages, valid_for = struct.unpack(">I", head[24:28])[0], struct.unpack(">I", head[28:32])[0], \
        struct.unpack(">I", head[92:96])[0]
    if size % page_size:
        msg = f"{path}: truncated archive: {size} bytes is not a whole number of {page_size}-byte pages"
        raise ArchiveError(msg)
    wal = path.with_name(path.name + "-wal")
    wal_pending = wal.exists() and wal.stat().st_size > 0
    # with frames pending in the write-ahead log, a checkpoint cut short (a crash) may have written the new
    # page 1 before the pages that extend the file: the log holds them and is replayed on open
    if pages and change == valid_for and size < pages * page_size and not wal_pending:
        msg = (f"{path}: truncated archive: the header counts {pages} pages of {page_size} bytes "
               f"({pages * page_size} bytes) but the file has {size} bytes")
        raise ArchiveError(msg)


def _fsync_dir(folder: Path) -> None:
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


class SQLiteArchive:
    """A logbook archive in one SQLite file (implements :class:`labkit.logbook.storage.Archive`).

    Parameters
    ----------
    path
        The archive file; created (with its folder's existing parent) when it does not exist.
    read_only
        Open for reading only (review, export); every write raises :class:`NotRecordedError`.
    create
        Create the file when missing (otherwise a missing file is an :class:`ArchiveError`).
    allow_network_filesystem
        Skip the network-filesystem refusal (for an administrator who knows the share locks well).
    mountinfo
        mountinfo text used instead of ``/proc/self/mountinfo`` for the filesystem check (tests).
    max_page_count
        Cap the archive's size, in pages (a quota; tests use it to simulate a full disk).
    busy_timeout
        How long SQLite itself waits for a lock per attempt, s.
    lock_wait
        Total time a write keeps retrying a locked archive before :class:`NotRecordedError`, s.
    """

    def __init__(self, path: str | Path, *, read_only: bool = False, create: bool = True,
                 allow_network_filesystem: bool = False, mountinfo: str | None = None,
                 max_page_count: int | None = None, busy_timeout: float = 5.0, lock_wait: float = 60.0) -> None:
        self.path = Path(path)
        self.read_only = read_only
        self.lock_wait = float(lock_wait)
        self._conn: sqlite3.Connection | None = None
        if not self.path.parent.is_dir():
            msg = f"{self.path}: the archive's folder {self.path.parent} does not exist"
            raise ArchiveError(msg)
        if not allow_network_filesystem:
            refuse_network_filesystem(self.path.parent, mountinfo)
        exists = self.path.exists()
        if exists:
            check_header(self.path)
        elif read_only or not create:
            msg = f"{self.path}: no such archive"
            raise ArchiveError(msg)
        folder_writable = os.access(self.path.parent, os.W_OK)
        if not exists and not folder_writable:
            msg = f"{self.path}: cannot create the archive: the folder {self.path.parent} is read-only"
            raise ArchiveError(msg)
        self._read_only_reason = "the archive was opened read-only"
        if not read_only and not (folder_writable and (not exists or os.access(self.path, os.W_OK))):
            # a read-only disk, folder or file: open for reading, and refuse every write with the reason
            self.read_only = read_only = True
            self._read_only_reason = ("the archive cannot be written (read-only disk, folder or file); "
                                      "it was opened for reading only")
        options = ""
        if read_only:
            options = "?mode=ro"
            if not folder_writable:  # no -shm can be made: read it as immutable media, which ignores a WAL
                wal = Path(f"{self.path}-wal")
                if wal.exists() and wal.stat().st_size > 0:
                    msg = (f"{self.path}: the archive has unmerged write-ahead log {wal.name} on a read-only "
                           "folder; copy the archive with its -wal file to a writable disk and open it there")
                    raise ArchiveError(msg)
                options = "?mode=ro&immutable=1"
        uri = self.path.resolve().as_uri() + options
        self._uri_ro = self.path.resolve().as_uri() + (options if read_only else "?mode=ro")
        try:
            self._conn = sqlite3.connect(uri, uri=True, isolation_level=None, timeout=busy_timeout,
                                         check_same_thread=False)
            self._conn.execute(f"PRAGMA busy_timeout = {int(busy_timeout * 1000)}")
            if not read_only:
                mode = self._retry_read(lambda c: c.execute("PRAGMA journal_mode = WAL").fetchone()[0])
                if str(mode).lower() != "wal":
                    msg = f"{self.path}: the filesystem does not support SQLite's write-ahead log (mode {mode})"
                    raise ArchiveError(msg)
            self._conn.execute("PRAGMA synchronous = FULL")
            if max_page_count is not None:
                self._conn.execute(f"PRAGMA max_page_count = {int(max_page_count)}")
            self.format_version = self._open_layout()
        except UNREADABLE as exc:
            self.close()
            msg = f"{self.path}: cannot open the archive: {_reason(exc, self.lock_wait)} ({exc})"
            raise ArchiveError(msg) from exc
        except BaseException:
            self.close()
            raise

    # -- opening ---------------------------------------------------------------------------------------------------
    def _open_layout(self) -> int:
        conn = self._connection
        tables = {r[0] for r in self._retry_read(
            lambda c: c.execute("SELECT name FROM sqlite_master WHERE type = 'table'").fetchall())}
        if not tables:
            if self.read_only:
                msg = f"{self.path}: an empty SQLite file, not a labkit archive"
                raise ArchiveError(msg)
            self._write(self._create_if_empty, "the archive layout")
            tables = {"meta"}
        if "meta" not in tables:
            msg = f"{self.path}: an SQLite file without labkit's meta table: not a labkit archive"
            raise ArchiveError(msg)
        version = self._stored_version(conn)
        if version > FORMAT_VERSION:
            msg = (f"{self.path}: archive format version {version} was written by a newer labkit "
                   f"(this one reads up to {FORMAT_VERSION}); update labkit")
            raise ArchiveError(msg)
        if version < FORMAT_VERSION:
            if self.read_only:
                msg = (f"{self.path}: archive format version {version} needs migrating to {FORMAT_VERSION}; "
                       "open it once writable")
                raise ArchiveError(msg)
            from labkit.logbook.migrations import migrate

            self._write(lambda c: migrate(c, self._stored_version(c)), "the format migration")
            version = self._stored_version(conn)
        return version

    def _create_if_empty(self, conn: sqlite3.Connection) -> None:
        # another process may have created the layout between our look and our write lock
        if conn.execute("SELECT count(*) FROM sqlite_master WHERE name = 'meta'").fetchone()[0]:
            return
        layout.create_tables(conn)
        conn.execute("INSERT INTO meta (key, value) VALUES ('format_version', ?)", (str(FORMAT_VERSION),))
        conn.execute("INSERT INTO meta (key, value) VALUES ('created_at', ?)", (str(now_ns()),))

    def _stored_version(self, conn: sqlite3.Connection) -> int:
        row = conn.execute("SELECT value FROM meta WHERE key = 'format_version'").fetchone()
        if row is None:
            msg = f"{self.path}: the meta table holds no format_version: not a labkit archive"
            raise ArchiveError(msg)
        try:
            return int(row[0])
        except ValueError:
            msg = f"{self.path}: format_version {row[0]!r} is not a number"
            raise ArchiveError(msg) from None

    @property
    def _connection(self) -> sqlite3.Connection:
        if self._conn is None:
            msg = f"{self.path}: the archive is closed"
            raise ArchiveError(msg)
        return self._conn

    def pragma(self, name: str) -> Any:
        """The value of one PRAGMA on this archive's connection (journal_mode, synchronous, busy_timeout, ...)."""
        if name not in _READABLE_PRAGMAS:
            msg = f"pragma {name!r} is not one of {', '.join(_READABLE_PRAGMAS)}"
            raise ValueError(msg)
        return self._retry_read(lambda c: c.execute(f"PRAGMA {name}").fetchone()[0])

    # -- transactions ----------------------------------------------------------------------------------------------
    def _write(self, work: Callable[[sqlite3.Connection], T], what: str) -> T:
        """Run ``work`` in one BEGIN IMMEDIATE transaction, retrying locks; NotRecordedError on failure."""
        if self.read_only:
            msg = f"{self.path}: {what} NOT recorded: {self._read_only_reason}"
            raise NotRecordedError(msg)
        conn = self._connection
        deadline = time.monotonic() + self.lock_wait
        delay = 0.002
        while True:
            try:
                conn.execute("BEGIN IMMEDIATE")
                result = work(conn)
                conn.execute("COMMIT")
                return result
            except sqlite3.Error as exc:
                self._rollback()
                if _is_busy(exc) and time.monotonic() < deadline:
                    time.sleep(delay)
                    delay = min(delay * 2, 0.1)
                    continue
                msg = (f"{self.path}: {what} NOT recorded: {_reason(exc, self.lock_wait)} ({exc}). "
                       "Nothing was written; keep the value and record it again once the cause is fixed.")
                raise NotRecordedError(msg) from exc
            except BaseException:
                self._rollback()
                raise

    def _rollback(self) -> None:
        conn = self._conn
        if conn is not None and conn.in_transaction:
            with suppress(sqlite3.Error):  # SQLite rolls back by itself when the transaction is already gone
                conn.execute("ROLLBACK")

    def _retry_read(self, work: Callable[[sqlite3.Connection], T]) -> T:
        conn = self._connection
        deadline = time.monotonic() + self.lock_wait
        delay = 0.002
        while True:
            try:
                return work(conn)
            except sqlite3.Error as exc:
                if _is_busy(exc) and time.monotonic() < deadline:
                    time.sleep(delay)
                    delay = min(delay * 2, 0.1)
                    continue
                raise

    def _read(self, sql: str, params: Sequence[Any] = ()) -> list[tuple[Any, ...]]:
        try:
            return self._retry_read(lambda c: c.execute(sql, params).fetchall())
        except UNREADABLE as exc:
            msg = f"{self.path}: cannot read the archive: {_reason(exc, self.lock_wait)} ({exc})"
            raise ArchiveError(msg) from exc

    @contextmanager
    def read_transaction(self) -> Iterator[sqlite3.Connection]:
        """One consistent read snapshot over several queries (a deferred transaction)."""
        conn = self._connection
        try:
            self._retry_read(lambda c: c.execute("BEGIN DEFERRED"))
            yield conn
        except UNREADABLE as exc:
            msg = f"{self.path}: cannot read the archive: {_reason(exc, self.lock_wait)} ({exc})"
            raise ArchiveError(msg) from exc
        finally:
            self._rollback()

    # -- writing ---------------------------------------------------------------------------------------------------
    @staticmethod
    def _require_session(conn: sqlite3.Connection, session_id: str, what: str) -> None:
        if conn.execute("SELECT 1 FROM sessions WHERE session_id = ?", (session_id,)).fetchone() is None:
            msg = f"{what} not recorded: session {session_id!r} does not exist in this archive"
            raise InvalidRowError(msg)

    @staticmethod
    def _next_seq(conn: sqlite3.Connection, session_id: str) -> int:
        row = conn.execute("SELECT max(m) FROM (SELECT max(seq) AS m FROM readings WHERE session_id = ?1 "
                           "UNION ALL SELECT max(seq) FROM events WHERE session_id = ?1)", (session_id,)).fetchone()
        return 0 if row[0] is None else int(row[0]) + 1

    def create_session(self, session: Mapping[str, Any]) -> None:
        """Store a new session row (``SESSION_COLUMNS``).

        ``created_at`` defaults to now and ``labkit_version`` to this labkit's. Storing the very
        same session again is a no-op (a retry after a crash); another session under the same id
        raises :class:`NotRecordedError`.
        """
        from labkit import __version__

        values = storage_row("sessions", session, defaults={"created_at": now_ns(), "labkit_version": __version__})
        digest = row_hash("sessions", values)
        names = layout.column_list("sessions")

        def work(conn: sqlite3.Connection) -> None:
            found = conn.execute("SELECT row_sha256 FROM sessions WHERE session_id = ?",
                                 (values["session_id"],)).fetchone()
            if found is not None:
                if found[0] == digest:
                    return
                msg = f"session {values['session_id']} not recorded: another session with this id exists"
                raise InvalidRowError(msg)
            conn.execute(f"INSERT INTO sessions ({names}, row_sha256) VALUES ({_marks(len(values) + 1)})",
                         (*values.values(), digest))

        self._write(work, f"session {values['session_id']}")

    def append_event(self, event: Mapping[str, Any]) -> dict[str, Any]:
        """Append an event (``EVENT_COLUMNS`` less ``seq`` and ``at``); return the committed row."""
        values = storage_row("events", event)
        names = layout.column_list("events")

        def work(conn: sqlite3.Connection) -> dict[str, Any]:
            self._require_session(conn, values["session_id"], f"event {values['event']}")
            full = {"session_id": values["session_id"], "seq": self._next_seq(conn, values["session_id"]),
                    "at": now_ns(), **{k: v for k, v in values.items() if k != "session_id"}}
            full = {c.name: full[c.name] for c in TABLES["events"]}
            conn.execute(f"INSERT INTO events ({names}, row_sha256) VALUES ({_marks(len(full) + 1)})",
                         (*full.values(), row_hash("events", full)))
            return full

        return public_row("events", self._write(work, f"event {values['event']}"))

    def append_reading(self, reading: Mapping[str, Any]) -> dict[str, Any]:
        """Append one reading (``READING_COLUMNS`` less ``seq`` and ``recorded_at``); return the committed row.

        A correction (``revision`` > 0) must follow the reading's latest revision, in the same
        session, with ``supersedes = revision - 1`` and a ``reason``.
        """
        return self.append_readings([reading])[0]

    def append_readings(self, readings: Sequence[Mapping[str, Any]]) -> list[dict[str, Any]]:
        """Append several readings in one transaction: all committed, or none (:class:`NotRecordedError`)."""
        checked, problems = [], []
        for k, reading in enumerate(readings):
            try:
                checked.append(storage_row("readings", reading))
            except InvalidRowError as exc:
                problems.append(f"row {k}: {exc}" if len(readings) > 1 else str(exc))
        if problems:
            raise InvalidRowError("; ".join(problems[:20]) + (f"; ... {len(problems) - 20} more"
                                                              if len(problems) > 20 else ""))
        if not checked:
            return []
        names = layout.column_list("readings")
        insert = f"INSERT INTO readings ({names}, row_sha256) VALUES ({_marks(len(READING_COLUMNS) + 1)})"
        reading_names = [c.name for c in READING_COLUMNS]

        def work(conn: sqlite3.Connection) -> list[dict[str, Any]]:
            next_seq: dict[str, int] = {}
            captures: set[tuple[str, str]] = set()
            rows, out = [], []
            for values in checked:
                session_id = values["session_id"]
                if session_id not in next_seq:
                    self._require_session(conn, session_id, f"reading {values['reading_id']}")
                    next_seq[session_id] = self._next_seq(conn, session_id)
                if values["capture_id"] and (session_id, values["capture_id"]) not in captures:
                    if conn.execute("SELECT 1 FROM captures WHERE session_id = ? AND capture_id = ?",
                                    (session_id, values["capture_id"])).fetchone() is None:
                        msg = (f"reading {values['reading_id']} not recorded: capture_id {values['capture_id']!r} "
                               f"is not stored with session {session_id}")
                        raise InvalidRowError(msg)
                    captures.add((session_id, values["capture_id"]))
                if values["revision"] > 0:
                    self._check_chain(conn, values, rows)
                full = dict(values, seq=next_seq[session_id], recorded_at=now_ns())
                next_seq[session_id] += 1
                ordered = tuple(full[n] for n in reading_names)
                rows.append((*ordered, row_hash("readings", ordered)))
                out.append(full)
            try:
                conn.executemany(insert, rows)
            except sqlite3.IntegrityError as exc:
                self._rollback()  # the batch's earlier rows are gone: look for the clash in what was there before
                raise InvalidRowError(self._duplicate_message(conn, rows)) from exc
            return out

        what = f"reading {checked[0]['reading_id']}" if len(checked) == 1 else f"{len(checked)} readings"
        committed = self._write(work, what)
        corrected = {r["session_id"] for r in committed if r["revision"] > 0}
        if corrected:
            self._refresh_snapshots(corrected)
        return [public_row("readings", r) for r in committed]

    @staticmethod
    def _duplicate_message(conn: sqlite3.Connection, rows: list[tuple[Any, ...]]) -> str:
        seen: set[tuple[str, int]] = set()
        for row in rows:
            key = (row[0], row[1])
            if key in seen or conn.execute("SELECT 1 FROM readings WHERE reading_id = ? AND revision = ?",
                                           key).fetchone():
                return (f"reading {key[0]} revision {key[1]} not recorded: that reading and revision is already "
                        "recorded (a correction is a new revision)")
            seen.add(key)
        return "readings not recorded: a reading and revision is already recorded"

    @staticmethod
    def _check_chain(conn: sqlite3.Connection, values: dict[str, Any], pending: list[tuple[Any, ...]]) -> None:
        reading_id, revision = values["reading_id"], values["revision"]
        row = conn.execute("SELECT max(revision), min(session_id), max(session_id) FROM readings "
                           "WHERE reading_id = ?", (reading_id,)).fetchone()
        latest = -1 if row[0] is None else int(row[0])
        sessions = {row[1], row[2]} - {None}
        for p in pending:  # earlier rows of the same batch
            if p[0] == reading_id:
                latest = max(latest, int(p[1]))
                sessions.add(p[3])
        if latest == -1:
            msg = f"correction of reading {reading_id} not recorded: the reading has no revision 0 in this archive"
            raise InvalidRowError(msg)
        if revision != latest + 1:
            msg = (f"correction of reading {reading_id} not recorded: revision {revision} does not follow the "
                   f"latest recorded revision {latest} (someone else corrected it first?)")
            raise InvalidRowError(msg)
        if sessions != {values["session_id"]}:
            msg = (f"correction of reading {reading_id} not recorded: it belongs to session "
                   f"{', '.join(sorted(sessions))}, not {values['session_id']}")
            raise InvalidRowError(msg)

    def store_capture(self, session_id: str, name: str, data: bytes) -> str:
        """Store a capture file (zlib-compressed) with its session; return its id (SHA-256 of the bytes)."""
        if not isinstance(data, bytes | bytearray | memoryview):
            msg = f"capture {name!r} not stored: expected bytes, found {type(data).__name__}"
            raise InvalidRowError(msg)
        if not isinstance(name, str) or not name.strip():
            msg = f"capture of session {session_id} not stored: it needs a file name"
            raise InvalidRowError(msg)
        raw = bytes(data)
        capture_id = hashlib.sha256(raw).hexdigest()
        packed = zlib.compress(raw, 6)

        def work(conn: sqlite3.Connection) -> None:
            self._require_session(conn, session_id, f"capture {name}")
            if conn.execute("SELECT 1 FROM captures WHERE session_id = ? AND capture_id = ?",
                            (session_id, capture_id)).fetchone() is None:
                conn.execute("INSERT INTO captures (session_id, capture_id, name, codec, size, data) "
                             "VALUES (?, ?, ?, ?, ?, ?)", (session_id, capture_id, name, CAPTURE_CODEC, len(raw),
                                                           packed))

        self._write(work, f"capture {name}")
        return capture_id

    def load_capture(self, capture_id: str) -> tuple[str, bytes]:
        """The name and bytes of a stored capture (checked against its id)."""
        rows = self._read("SELECT name, codec, data FROM captures WHERE capture_id = ? LIMIT 1", (capture_id,))
        if not rows:
            msg = f"{self.path}: no capture {capture_id!r} in this archive"
            raise ArchiveError(msg)
        name, codec, data = rows[0]
        try:
            raw = _decompress(codec, data)
        except (zlib.error, ValueError) as exc:
            msg = f"{self.path}: capture {capture_id} ({name}) is corrupt: {exc}"
            raise ArchiveError(msg) from exc
        if hashlib.sha256(raw).hexdigest() != capture_id:
            msg = f"{self.path}: capture {capture_id} ({name}) does not match its hash: corrupt"
            raise ArchiveError(msg)
        return name, raw

    def add_roster(self, rows: Sequence[Mapping[str, Any]]) -> None:
        """Add participants to the roster (one transaction); re-adding an identical entry is a no-op."""
        checked = [storage_row("roster", r) for r in rows]
        names = layout.column_list("roster")

        def work(conn: sqlite3.Connection) -> None:
            for values in checked:
                digest = row_hash("roster", values)
                found = conn.execute("SELECT row_sha256 FROM roster WHERE participant_id = ?",
                                     (values["participant_id"],)).fetchone()
                if found is not None:
                    if found[0] != digest:
                        msg = (f"roster entry {values['participant_id']} not recorded: the id is already on the "
                               "roster with other details")
                        raise InvalidRowError(msg)
                    continue
                conn.execute(f"INSERT INTO roster ({names}, row_sha256) VALUES ({_marks(len(values) + 1)})",
                             (*values.values(), digest))

        self._write(work, f"{len(checked)} roster entries")

    # -- reading ---------------------------------------------------------------------------------------------------
    def reading_rows(self, session_id: str | None = None, *, latest_only: bool = False) -> list[tuple[Any, ...]]:
        """Reading rows in storage form, ordered by session, ``seq`` and arrival."""
        rows = self._reading_rows_with_rowid(session_id, latest_only)
        rows.sort(key=lambda r: (r[3], r[_SEQ], r[-1]))
        return [r[:-1] for r in rows]

    @staticmethod
    def _reading_filter(session_id: str | None, latest_only: bool) -> tuple[str, list[Any]]:
        where, params = [], []
        if session_id is not None:
            where.append("r.session_id = ?")
            params.append(session_id)
        if latest_only:
            where.append("NOT EXISTS (SELECT 1 FROM readings r2 WHERE r2.reading_id = r.reading_id "
                         "AND r2.revision > r.revision)")
        return " AND ".join(where), params

    def _reading_rows_with_rowid(self, session_id: str | None, latest_only: bool) -> list[tuple[Any, ...]]:
        """Reading rows plus their rowid, in storage order (a sequential scan, no index walk)."""
        where, params = self._reading_filter(session_id, latest_only)
        sql = (f"SELECT {layout.column_list('readings', 'r.')}, r.rowid FROM readings r"
               + (f" WHERE {where}" if where else "") + " ORDER BY r.rowid")
        return self._read(sql, params)

    def reading_table(self, session_id: str | None = None, *, latest_only: bool = False,
                      workers: int | None = None) -> pa.Table:
        """Reading rows as an Arrow table with the schema's types, ordered by session, ``seq`` and arrival.

        ``workers`` > 1 shares a big read of the whole archive between processes
        (:mod:`labkit.logbook.columnar`); the default reads in this process.
        """
        from labkit.logbook.columnar import fetch_readings, order_by_session

        where, params = self._reading_filter(session_id, latest_only)
        with self.read_transaction() as conn:
            table, rowids = fetch_readings(conn, self._uri_ro, where, params, workers, parallel=session_id is None)
        return order_by_session(table, rowids)

    def readings(self, session_id: str | None = None, *, latest_only: bool = False) -> pd.DataFrame:
        """Reading rows (``READING_COLUMNS`` dtypes), all revisions unless ``latest_only``.

        ``latest_only`` keeps the highest revision of each ``reading_id``. Corrections that lost a
        merge race are not here but in :meth:`competing_readings`, so every ``(reading_id,
        revision)`` appears once. Rows are ordered by session id, ``seq`` and arrival.
        """
        from labkit.logbook.frames import to_frame

        return to_frame(self.reading_table(session_id, latest_only=latest_only), READING_COLUMNS)

    def competing_readings(self, session_id: str | None = None) -> pd.DataFrame:
        """Corrections kept aside by a merge (``READING_COLUMNS`` plus ``source_file``, string)."""
        import pandas as pd

        from labkit.logbook.frames import frame_from_rows

        sql = f"SELECT {layout.column_list('readings')}, source_file FROM competing_readings"
        rows = self._read(sql + (" WHERE session_id = ?" if session_id else "") + " ORDER BY rowid",
                          (session_id,) if session_id else ())
        frame = frame_from_rows(READING_COLUMNS, [r[:-1] for r in rows])
        frame["source_file"] = pd.array([r[-1] for r in rows], dtype=pd.StringDtype("pyarrow"))
        return frame

    def events(self, session_id: str | None = None) -> pd.DataFrame:
        """Event rows (``EVENT_COLUMNS``), ordered by session and ``seq``."""
        from labkit.logbook.frames import frame_from_rows

        sql = f"SELECT {layout.column_list('events')} FROM events"
        rows = self._read(sql + (" WHERE session_id = ?" if session_id else "") + " ORDER BY session_id, seq, rowid",
                          (session_id,) if session_id else ())
        return frame_from_rows(TABLES["events"], rows)

    def session_rows(self) -> list[tuple[Any, ...]]:
        """Session rows in storage form, ``state`` replaced by the latest ``state:*`` event."""
        state_index = [c.name for c in TABLES["sessions"]].index("state")
        rows = self._read(
            f"SELECT {layout.column_list('sessions', 's.')}, (SELECT substr(e.event, 7) FROM events e "
            "WHERE e.session_id = s.session_id AND e.event LIKE 'state:%' ORDER BY e.seq DESC, e.rowid DESC LIMIT 1) "
            "FROM sessions s ORDER BY s.created_at, s.session_id")
        out = []
        for row in rows:
            values = list(row[:-1])
            if row[-1]:
                values[state_index] = row[-1]
            out.append(tuple(values))
        return out

    def sessions(self) -> pd.DataFrame:
        """All sessions (``SESSION_COLUMNS``), with their latest state."""
        from labkit.logbook.frames import frame_from_rows

        return frame_from_rows(TABLES["sessions"], self.session_rows())

    def session_state(self, session_id: str) -> str:
        """The latest state of one session."""
        rows = self._read("SELECT state FROM sessions WHERE session_id = ?", (session_id,))
        if not rows:
            msg = f"{self.path}: no session {session_id!r}"
            raise ArchiveError(msg)
        event = self._read("SELECT substr(event, 7) FROM events WHERE session_id = ? AND event LIKE 'state:%' "
                           "ORDER BY seq DESC, rowid DESC LIMIT 1", (session_id,))
        return str(event[0][0]) if event else str(rows[0][0])

    def roster(self) -> pd.DataFrame:
        """The roster (``ROSTER_COLUMNS``)."""
        from labkit.logbook.frames import frame_from_rows

        rows = self._read(f"SELECT {layout.column_list('roster')} FROM roster ORDER BY rowid")
        return frame_from_rows(TABLES["roster"], rows)

    # -- hand-in, merge, check -------------------------------------------------------------------------------------
    def hand_in(self, path: str | Path, session_ids: Sequence[str] | None = None) -> Path:
        """Write one self-contained file with the given sessions (all by default); see :mod:`labkit.logbook.handin`."""
        from labkit.logbook.handin import write_hand_in

        return write_hand_in(self, Path(path), session_ids)

    def merge(self, paths: Sequence[str | Path], *, merged_by: str = "merge") -> MergeReport:
        """Merge hand-in files in one transaction; see :mod:`labkit.logbook.handin` for the rules."""
        from labkit.logbook.handin import merge_hand_ins

        return merge_hand_ins(self, [Path(p) for p in paths], merged_by)

    def check(self) -> list[str]:
        """Integrity problems found (empty when the archive is sound).

        Runs ``PRAGMA integrity_check``, recomputes every row hash, checks revision chains,
        capture contents and the recorded hashes of snapshot files.
        """
        problems: list[str] = []
        try:
            result = [r[0] for r in self._read("PRAGMA integrity_check")]
        except ArchiveError as exc:
            return [str(exc)]
        if result != ["ok"]:
            problems += [f"{self.path}: integrity_check: {line}" for line in result[:20]]
            return problems
        for table in ("sessions", "readings", "events", "roster"):
            bad = 0
            first = ""
            for row in self._read(f"SELECT {layout.column_list(table)}, row_sha256, rowid FROM {table}"):
                if row_hash(table, tuple(row[:-2])) != row[-2]:
                    bad += 1
                    first = first or f"rowid {row[-1]}"
            if bad:
                problems.append(f"{self.path}: {table}: {bad} rows do not match their row hash (first: {first})")
        for reading_id, revision in self._read(
                "SELECT r.reading_id, r.revision FROM readings r WHERE r.revision > 0 AND NOT EXISTS "
                "(SELECT 1 FROM readings p WHERE p.reading_id = r.reading_id AND p.revision = r.revision - 1)"):
            problems.append(f"{self.path}: reading {reading_id} revision {revision} has no revision {revision - 1}")
        for (session_id,) in self._read("SELECT DISTINCT session_id FROM readings WHERE session_id NOT IN "
                                        "(SELECT session_id FROM sessions)"):
            problems.append(f"{self.path}: readings of session {session_id}, which is not in the sessions table")
        for capture_id, name, codec, data in self._read("SELECT capture_id, name, codec, data FROM captures"):
            try:
                ok = hashlib.sha256(_decompress(codec, data)).hexdigest() == capture_id
            except (zlib.error, ValueError):
                ok = False
            if not ok:
                problems.append(f"{self.path}: capture {capture_id} ({name}) is corrupt")
        from labkit.logbook.snapshots import snapshot_problems

        problems += snapshot_problems(self)
        return problems

    def _refresh_snapshots(self, session_ids: set[str]) -> None:
        """Rebuild the snapshots of sessions that just got a correction (a stale one is rebuilt on load anyway)."""
        have = {r[0] for r in self._read("SELECT DISTINCT session_id FROM snapshots")}
        todo = sorted(session_ids & have)
        if not todo:
            return
        from labkit.logbook.snapshots import build_snapshot

        for session_id in todo:
            try:
                build_snapshot(self, session_id)
            except (ArchiveError, OSError) as exc:  # the reading is recorded; the snapshot is only a cache
                warnings.warn(f"snapshot of session {session_id} not rebuilt: {exc}", stacklevel=3)

    def close(self) -> None:
        """Release the archive (the connection; the WAL is checkpointed by SQLite when the last one closes)."""
        if self._conn is not None:
            self._rollback()
            self._conn.close()
            self._conn = None

    def __enter__(self) -> SQLiteArchive:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def __repr__(self) -> str:
        return f"SQLiteArchive({str(self.path)!r}, format_version={getattr(self, 'format_version', '?')})"


def _marks(n: int) -> str:
    return ", ".join("?" * n)


def _decompress(codec: str, data: bytes) -> bytes:
    if codec == "zlib":
        return zlib.decompress(data)
    if codec == "lzma":
        import lzma

        return lzma.decompress(data)
    msg = f"unknown capture codec {codec!r}"
    raise ValueError(msg)
