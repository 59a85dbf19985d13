"""The shared logbook archive on a PostgreSQL server (psycopg 3), with roles enforced by the database.

The same tables as the SQLite archive (columns and dtypes from :mod:`labkit.logbook.schema`) in
schema ``labkit``, created by the versioned SQL files in ``labkit/logbook/pg_migrations/`` and run
by the migration role, which owns the tables (:func:`migrate`). The guarantees of
:mod:`labkit.logbook.storage` hold, and the database enforces them whatever program connects:

- committed before return: every write is one transaction with ``synchronous_commit = on``;
- append-only: application roles hold SELECT and INSERT only; triggers refuse UPDATE, DELETE and
  TRUNCATE even to the owner; ``UNIQUE (reading_id, revision)``; a correction is a new revision;
- ``seq`` is assigned per session by a BEFORE INSERT trigger from a counter row updated in the same
  transaction, so concurrent writers never share a number and a rolled-back write leaves no gap;
- ``recorded_by``/``recorded_at`` (and ``by``/``at`` of events, ``created_by``/``created_at`` of
  sessions) are the login (``session_user``) and the server clock, whatever the client sent.

Who may do what is row-level security keyed on ``session_user`` (the login, which a client cannot
change), forced on the owner too, and looked up in ``labkit.members`` (login -> role, section,
group): a student reads its group and adds readings only to its group's open session; a TA reads
and corrects its sections; an instructor reads everything and alone may purge a whole session
(:meth:`PostgresArchive.purge_session`, logged in ``labkit.purge_log``). See ``docs/department.md``.

Credentials come from the URL, ``~/.pgpass`` or the ``PG*`` environment (libpq); every error
message shows the URL with its password replaced (:func:`redact_url`).
"""

from __future__ import annotations

import hashlib
import json
import threading
import zlib
from collections.abc import Callable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any, TypeVar
from urllib.parse import urlsplit, urlunsplit

from labkit.logbook.layout import q
from labkit.logbook.rows import CONFLICT_EVENT, TABLES, ns_to_datetime, public_row, row_hash, storage_row
from labkit.logbook.schema import FORMAT_VERSION, READING_COLUMNS, ROLES
from labkit.logbook.storage import ArchiveError, InvalidRowError, MergeReport, NotRecordedError

if TYPE_CHECKING:
    import pandas as pd
    import psycopg

T = TypeVar("T")
MIGRATIONS_DIR = Path(__file__).with_name("pg_migrations")
GROUP_ROLES = {"student": "labkit_student", "ta": "labkit_ta", "instructor": "labkit_instructor"}
"""The NOLOGIN role each kind of login is made a member of (table privileges); rows are policed by membership."""
CAPTURE_CODEC = "zlib"
_ASSIGNED = {"readings": ("seq", "recorded_at", "recorded_by"), "events": ("seq", "at", "by", "role"),
             "sessions": ("created_at", "created_by"), "roster": ()}


class AccessRefusedError(NotRecordedError):
    """The database refused the login this write (not its group, session not open, not an instructor)."""


class _Refused(Exception):
    """A hand-in file that must not be pushed (its transaction is rolled back)."""


# -- credentials and errors ----------------------------------------------------------------------------------------
def is_postgres_url(text: str | Path) -> bool:
    """Whether ``text`` is a ``postgresql://`` (or ``postgres://``) URL rather than a file path."""
    return isinstance(text, str) and text.startswith(("postgresql://", "postgres://"))


def _password_of(url: str) -> str:
    try:
        return urlsplit(url).password or ""
    except ValueError:
        return ""


def redact_url(url: str) -> str:
    """The URL with its password (and any ``password=`` parameter) replaced by ``***``."""
    try:
        parts = urlsplit(url)
    except ValueError:
        return "postgresql://***"
    netloc = parts.netloc
    if parts.password is not None:
        user, _, host = netloc.rpartition("@")
        netloc = user.split(":", 1)[0] + ":***@" + host
    query = "&".join("password=***" if p.lower().startswith("password=") else p for p in parts.query.split("&")) \
        if parts.query else ""
    return urlunsplit((parts.scheme, netloc, parts.path, query, parts.fragment))


def scrub(text: str, secrets: Sequence[str]) -> str:
    """``text`` with every secret in it replaced by ``***`` (error texts may echo a connection string)."""
    for secret in secrets:
        if secret:
            text = text.replace(secret, "***")
    return text


def _import_psycopg() -> Any:
    try:
        import psycopg
    except ImportError as exc:
        msg = "the shared PostgreSQL archive needs psycopg 3: pip install 'psycopg[binary]>=3.2,<4'"
        raise ArchiveError(msg) from exc
    return psycopg


def connect(url: str, *, autocommit: bool = True, connect_timeout: float = 10.0) -> psycopg.Connection:
    """A psycopg connection to ``url`` (credentials as libpq finds them); :class:`ArchiveError` with no password."""
    psycopg = _import_psycopg()
    secrets = [_password_of(url)]
    try:
        return psycopg.connect(url, autocommit=autocommit, connect_timeout=max(1, int(connect_timeout)),
                               options="-c synchronous_commit=on -c search_path=labkit")
    except psycopg.Error as exc:
        detail = scrub(str(exc).strip(), secrets)
        msg = f"{redact_url(url)}: cannot connect to the archive server: {detail}"
        raise ArchiveError(msg) from None  # the original error may hold the conninfo


# -- migrations ----------------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Migration:
    """One versioned SQL file of ``pg_migrations/``."""

    version: int
    name: str
    sql: str

    @property
    def sha256(self) -> str:
        """SHA-256 of the SQL text (an applied migration must never change)."""
        return hashlib.sha256(self.sql.encode("utf-8")).hexdigest()


def migrations(folder: Path = MIGRATIONS_DIR) -> list[Migration]:
    """The migrations in order of version (file names ``NNNN_name.sql``)."""
    out = []
    for path in sorted(folder.glob("*.sql")):
        head, _, rest = path.stem.partition("_")
        if not head.isdigit():
            msg = f"{path}: a migration file name starts with its version number (NNNN_name.sql)"
            raise ArchiveError(msg)
        out.append(Migration(int(head), rest, path.read_text(encoding="utf-8")))
    versions = [m.version for m in out]
    if versions != list(range(1, len(out) + 1)):
        msg = f"{folder}: migration versions {versions} are not 1, 2, 3, ... without gaps"
        raise ArchiveError(msg)
    return out


def migrate(url: str, *, folder: Path = MIGRATIONS_DIR) -> list[str]:
    """Apply the pending migrations as the login of ``url`` (the migration role); return their names.

    The first run creates schema ``labkit`` owned by that login; later runs must be made by the
    schema's owner. Each migration is one transaction, serialized by an advisory lock, and is
    recorded with its SHA-256; a changed applied migration is an :class:`ArchiveError`.
    """
    psycopg = _import_psycopg()
    conn = connect(url)
    secrets = [_password_of(url)]
    applied_now: list[str] = []
    try:
        with conn.transaction():
            conn.execute("SELECT pg_advisory_xact_lock(hashtext('labkit migrations'))")
            owner = conn.execute("SELECT nspowner::regrole::text FROM pg_namespace WHERE nspname = 'labkit'"
                                 ).fetchone()
            user = conn.execute("SELECT current_user").fetchone()[0]
            if owner is not None and owner[0].strip('"') != user:
                msg = (f"{redact_url(url)}: migrations must be run by the owner of schema labkit ({owner[0]}), "
                       f"not by {user}")
                raise ArchiveError(msg)
            conn.execute("CREATE SCHEMA IF NOT EXISTS labkit")
            conn.execute("CREATE TABLE IF NOT EXISTS labkit.schema_migrations (version integer PRIMARY KEY, "
                         "name text NOT NULL, sha256 text NOT NULL, applied_at timestamptz NOT NULL DEFAULT "
                         "clock_timestamp(), applied_by text NOT NULL DEFAULT session_user)")
            conn.execute("REVOKE ALL ON labkit.schema_migrations FROM PUBLIC")
            done = {int(v): s for v, s in conn.execute("SELECT version, sha256 FROM labkit.schema_migrations")}
            for m in migrations(folder):
                if m.version in done:
                    if done[m.version] != m.sha256:
                        msg = (f"{redact_url(url)}: migration {m.version:04d}_{m.name} was changed after it was "
                               "applied; write a new migration instead")
                        raise ArchiveError(msg)
                    continue
                conn.execute(m.sql)
                conn.execute("INSERT INTO labkit.schema_migrations (version, name, sha256) VALUES (%s, %s, %s)",
                             (m.version, m.name, m.sha256))
                applied_now.append(f"{m.version:04d}_{m.name}")
    except psycopg.Error as exc:
        msg = f"{redact_url(url)}: migration failed: {scrub(str(exc).strip(), secrets)}"
        raise ArchiveError(msg) from None
    finally:
        conn.close()
    return applied_now


def add_member(url: str, login: str, role: str, *, section: str = "", group: str = "",
               password: str | None = None, create_login: bool = True) -> None:
    """Map ``login`` to a role (and section, group); create the login role when missing.

    Run as the migration role (it needs CREATEROLE). ``password`` is set on a newly created
    login only; without one the login authenticates as the server's ``pg_hba.conf`` says.
    """
    if role not in ROLES:
        msg = f'role "{role}" of login {login}: expected one of {", ".join(ROLES)}'
        raise ArchiveError(msg)
    if role == "student" and not (section and group):
        msg = f"student login {login} needs a section and a group"
        raise ArchiveError(msg)
    if role == "ta" and not section:
        msg = f"ta login {login} needs a section"
        raise ArchiveError(msg)
    if not login or login.startswith("labkit_") or login in ("postgres", "public"):
        msg = f"login name {login!r} is reserved or empty"
        raise ArchiveError(msg)
    psycopg = _import_psycopg()
    from psycopg import sql

    conn = connect(url)
    try:
        with conn.transaction():
            exists = conn.execute("SELECT 1 FROM pg_roles WHERE rolname = %s", (login,)).fetchone()
            if exists is None:
                if not create_login:
                    msg = f"{redact_url(url)}: no login role {login!r} on the server"
                    raise ArchiveError(msg)
                if password is None:
                    conn.execute(sql.SQL("CREATE ROLE {} LOGIN").format(sql.Identifier(login)))
                else:
                    conn.execute(sql.SQL("CREATE ROLE {} LOGIN PASSWORD {}").format(
                        sql.Identifier(login), sql.Literal(password)))
            conn.execute(sql.SQL("GRANT {} TO {}").format(sql.Identifier(GROUP_ROLES[role]), sql.Identifier(login)))
            conn.execute("INSERT INTO labkit.members (login, role, section, \"group\") VALUES (%s, %s, %s, %s) "
                         "ON CONFLICT DO NOTHING", (login, role, section, group if role == "student" else ""))
    except psycopg.Error as exc:
        secrets = [_password_of(url), password or ""]
        msg = f"{redact_url(url)}: login {login} not added: {scrub(str(exc).strip(), secrets)}"
        raise ArchiveError(msg) from None
    finally:
        conn.close()


def members(url: str) -> list[tuple[str, str, str, str]]:
    """The membership rows the login of ``url`` may see: (login, role, section, group)."""
    conn = connect(url)
    try:
        return [tuple(r) for r in conn.execute(
            'SELECT login, role, section, "group" FROM labkit.members ORDER BY role, section, "group", login')]
    finally:
        conn.close()


# -- rows ----------------------------------------------------------------------------------------------------------
def content_hash(table: str, values: Mapping[str, Any] | Sequence[Any]) -> str:
    """SHA-256 of a storage row with the server-assigned columns blanked (what two copies must agree on)."""
    columns = TABLES[table]
    row = dict(values) if isinstance(values, Mapping) else dict(zip([c.name for c in columns], values, strict=True))
    for name in _ASSIGNED[table]:
        row[name] = 0 if name in ("seq", "recorded_at", "at", "created_at") else ""
    return row_hash(table, row)


def _select_list(table: str, prefix: str = "") -> str:
    """The schema columns of ``table`` as they are read back in storage form (datetimes as integer ns)."""
    out = []
    for c in TABLES[table]:
        name = prefix + q(c.name)
        if c.dtype == "datetime64[ns, UTC]":
            out.append(f"(extract(epoch FROM {name}) * 1000000)::bigint * 1000")
        elif c.dtype == "boolean":
            out.append(f"{name}::int")
        else:
            out.append(name)
    return ", ".join(out)


def _param(value: Any, dtype: str) -> Any:
    if dtype == "datetime64[ns, UTC]" and isinstance(value, int):
        return ns_to_datetime(value)
    if dtype == "boolean" and value is not None:
        return bool(value)
    return value


def _insert_sql(table: str, extra: Sequence[str] = (), skip: Sequence[str] = ()) -> tuple[str, list[str]]:
    names = [c.name for c in TABLES[table] if c.name not in skip] + list(extra)
    marks = ", ".join(["%s"] * len(names))
    return f"INSERT INTO labkit.{table} ({', '.join(q(n) for n in names)}) VALUES ({marks})", names


_DTYPES = {t: {c.name: c.dtype for c in cols} for t, cols in TABLES.items()}


@dataclass
class PushReport(MergeReport):
    """What one ``archive push`` of a hand-in file did."""

    file: str = ""
    file_sha256: str = ""
    pushed_by: str = ""
    already_pushed: bool = False
    sessions_added: list[str] = field(default_factory=list)


# -- the archive ---------------------------------------------------------------------------------------------------
class PostgresArchive:
    """The logbook archive on a PostgreSQL server (implements :class:`labkit.logbook.storage.Archive`).

    Parameters
    ----------
    url
        ``postgresql://login@host:port/db``; the password from the URL, ``~/.pgpass`` or ``PGPASSWORD``.
    connect_timeout
        Seconds to wait for the server when connecting.
    """

    def __init__(self, url: str, *, connect_timeout: float = 10.0) -> None:
        if not is_postgres_url(url):
            msg = f"{redact_url(str(url))}: not a postgresql:// URL"
            raise ArchiveError(msg)
        self.url = url
        self.display = redact_url(url)
        self._secrets = [_password_of(url)]
        self._timeout = connect_timeout
        self._lock = threading.RLock()  # one connection, shared by a widget and its refresh thread
        self._psycopg = _import_psycopg()
        self._conn: psycopg.Connection | None = connect(url, connect_timeout=connect_timeout)
        try:
            row = self._conn.execute("SELECT value FROM labkit.meta WHERE key = 'format_version'").fetchone()
            self.login = str(self._conn.execute("SELECT session_user").fetchone()[0])
        except self._psycopg.Error as exc:
            self.close()
            msg = (f"{self.display}: not a migrated labkit archive, or this login may not read it: "
                   f"{scrub(str(exc).strip(), self._secrets)} (run `labkit archive migrate URL` as the "
                   "migration role, and add the login with `labkit archive roles`)")
            raise ArchiveError(msg) from None
        if row is None:
            self.close()
            msg = f"{self.display}: labkit.meta holds no format_version: not a labkit archive"
            raise ArchiveError(msg)
        self.format_version = int(row[0])
        if self.format_version > FORMAT_VERSION:
            self.close()
            msg = (f"{self.display}: archive format version {self.format_version} is newer than this labkit's "
                   f"{FORMAT_VERSION}; update labkit")
            raise ArchiveError(msg)

    # -- connection and transactions -------------------------------------------------------------------------------
    @property
    def _connection(self) -> psycopg.Connection:
        if self._conn is None or self._conn.closed or self._conn.broken:
            if self._conn is not None and not self._conn.closed:
                self._conn.close()
            self._conn = connect(self.url, connect_timeout=self._timeout)
        return self._conn

    def _error(self, exc: Exception, what: str, *, writing: bool) -> ArchiveError:
        errors = self._psycopg.errors
        text = scrub(getattr(getattr(exc, "diag", None), "message_primary", None) or str(exc).strip(),
                     self._secrets)
        if not writing:
            return ArchiveError(f"{self.display}: cannot read the archive: {text}")
        if isinstance(exc, errors.InsufficientPrivilege):
            return AccessRefusedError(
                f"{self.display}: {what} NOT recorded: the server refused login {self.login}: {text}. "
                "Nothing was written (only your own group's open session takes your readings).")
        if isinstance(exc, errors.UniqueViolation):
            return InvalidRowError(f"{what} not recorded: that row is already recorded ({text}); "
                                   "a correction is a new revision")
        if isinstance(exc, errors.IntegrityError | errors.RaiseException | errors.DataError):
            return InvalidRowError(f"{what} not recorded: {text}")
        return NotRecordedError(f"{self.display}: {what} NOT recorded: {text}. Nothing was written; keep the "
                                "value and record it again once the server is reachable.")

    def _write(self, work: Callable[[psycopg.Connection], T], what: str) -> T:
        """Run ``work`` in one transaction; committed (synchronous_commit on) when this returns."""
        with self._lock:
            try:
                conn = self._connection
                with conn.transaction():
                    return work(conn)
            except ArchiveError:
                raise
            except self._psycopg.Error as exc:
                raise self._error(exc, what, writing=True) from None

    def _write_statement(self, sql: str, params: Sequence[Any], what: str) -> tuple[Any, ...]:
        """Run ONE statement as its own implicit transaction (autocommit); the row it returns.

        One round trip instead of BEGIN, statement, COMMIT: the server commits the implicit
        transaction (``synchronous_commit = on``: the WAL is flushed) before it reports the
        statement done, and psycopg returns only then, so the row returned here is committed.
        A failed statement (or commit) leaves nothing behind and raises, as :meth:`_write`.
        """
        with self._lock:
            try:
                conn = self._connection
                if not conn.autocommit or conn.info.transaction_status != self._psycopg.pq.TransactionStatus.IDLE:
                    with conn.transaction():  # inside someone's transaction: keep its all-or-nothing
                        return tuple(conn.execute(sql, params).fetchone())
                return tuple(conn.execute(sql, params).fetchone())
            except ArchiveError:
                raise
            except self._psycopg.Error as exc:
                raise self._error(exc, what, writing=True) from None

    def _read(self, sql: str, params: Sequence[Any] = ()) -> list[tuple[Any, ...]]:
        with self._lock:
            try:
                return [tuple(r) for r in self._connection.execute(sql, params or None).fetchall()]
            except ArchiveError:
                raise
            except self._psycopg.Error as exc:
                raise self._error(exc, "read", writing=False) from None

    @contextmanager
    def read_transaction(self) -> Iterator[psycopg.Connection]:
        """One consistent snapshot (REPEATABLE READ) over several queries."""
        with self._lock:
            conn = self._connection
            try:
                with conn.transaction():
                    conn.execute("SET TRANSACTION ISOLATION LEVEL REPEATABLE READ READ ONLY")
                    yield conn
            except self._psycopg.Error as exc:
                raise self._error(exc, "read", writing=False) from None

    # -- writing ---------------------------------------------------------------------------------------------------
    def create_session(self, session: Mapping[str, Any]) -> None:
        """Store a new session row; the very same session again is a no-op, another under its id an error.

        ``created_at`` and ``created_by`` are the server's clock and the login, whatever is given.
        """
        from labkit import __version__

        values = storage_row("sessions", session, defaults={"created_at": 0, "created_by": self.login,
                                                            "labkit_version": __version__})
        self._write(lambda conn: self._insert_session(conn, values, None, ""), f"session {values['session_id']}")

    def _insert_session(self, conn: psycopg.Connection, values: Mapping[str, Any], origin: dict[str, Any] | None,
                        pushed_from: str) -> bool:
        digest = content_hash("sessions", values)
        found = conn.execute("SELECT content_sha256 FROM labkit.sessions WHERE session_id = %s",
                             (values["session_id"],)).fetchone()
        if found is not None:
            if found[0] == digest:
                return False
            msg = f"session {values['session_id']} not recorded: another session with this id exists"
            raise InvalidRowError(msg)
        sql, names = _insert_sql("sessions", ("content_sha256", "origin", "pushed_from"),
                                 skip=("created_at", "created_by"))
        params = [_param(values[n], _DTYPES["sessions"][n]) for n in names[:-3]]
        conn.execute(sql, [*params, digest, _json(origin), pushed_from])
        return True

    def append_event(self, event: Mapping[str, Any]) -> dict[str, Any]:
        """Append an event; ``seq``, ``at`` and ``by`` (and ``role``, from the membership) are the server's."""
        values = storage_row("events", {"by": self.login, **event})
        sql, params = self._event_statement(values, None, "")
        row = self._write_statement(sql, params, f"event {values['event']}")
        return public_row("events", dict(zip([c.name for c in TABLES["events"]], row, strict=True)))

    @staticmethod
    def _event_statement(values: Mapping[str, Any], origin: dict[str, Any] | None,
                         pushed_from: str) -> tuple[str, list[Any]]:
        sql, names = _insert_sql("events", ("content_sha256", "origin", "pushed_from"), skip=("seq", "at", "by"))
        digest = origin["row_sha256"] if origin else content_hash("events", {**values, "seq": 0, "at": 0})
        params = [values[n] for n in names[:-3]]
        return sql + f" RETURNING {_select_list('events')}", [*params, digest, _json(origin), pushed_from]

    def _insert_event(self, conn: psycopg.Connection, values: Mapping[str, Any], origin: dict[str, Any] | None,
                      pushed_from: str) -> dict[str, Any]:
        sql, params = self._event_statement(values, origin, pushed_from)
        return dict(zip([c.name for c in TABLES["events"]], conn.execute(sql, params).fetchone(), strict=True))

    def append_reading(self, reading: Mapping[str, Any]) -> dict[str, Any]:
        """Append one reading; return the committed row (``seq``, ``recorded_at``, ``recorded_by`` the server's)."""
        return self.append_readings([reading])[0]

    def append_readings(self, readings: Sequence[Mapping[str, Any]]) -> list[dict[str, Any]]:
        """Append several readings in one transaction: all committed, or none."""
        checked, problems = [], []
        for k, reading in enumerate(readings):
            try:
                checked.append(storage_row("readings", {"recorded_by": self.login, **reading}))
            except InvalidRowError as exc:
                problems.append(f"row {k}: {exc}" if len(readings) > 1 else str(exc))
        if problems:
            raise InvalidRowError("; ".join(problems[:20]) + (f"; ... {len(problems) - 20} more"
                                                              if len(problems) > 20 else ""))
        if not checked:
            return []
        what = f"reading {checked[0]['reading_id']}" if len(checked) == 1 else f"{len(checked)} readings"
        if len(checked) == 1 and not checked[0]["capture_id"]:  # the common case: one statement, one round trip
            sql, params = self._reading_statement(checked[0], None, "")
            row = self._write_statement(sql, params, what)
            return [public_row("readings", dict(zip([c.name for c in READING_COLUMNS], row, strict=True)))]
        rows = self._write(lambda conn: [self._insert_reading(conn, v, None, "") for v in checked], what)
        return [public_row("readings", r) for r in rows]

    def _insert_reading(self, conn: psycopg.Connection, values: Mapping[str, Any], origin: dict[str, Any] | None,
                        pushed_from: str) -> dict[str, Any]:
        if values["capture_id"]:
            found = conn.execute("SELECT 1 FROM labkit.captures WHERE session_id = %s AND capture_id = %s",
                                 (values["session_id"], values["capture_id"])).fetchone()
            if found is None:
                msg = (f"reading {values['reading_id']} not recorded: capture_id {values['capture_id']!r} is not "
                       f"stored with session {values['session_id']}")
                raise InvalidRowError(msg)
        sql, params = self._reading_statement(values, origin, pushed_from)
        return dict(zip([c.name for c in READING_COLUMNS], conn.execute(sql, params).fetchone(), strict=True))

    @staticmethod
    def _reading_statement(values: Mapping[str, Any], origin: dict[str, Any] | None,
                           pushed_from: str) -> tuple[str, list[Any]]:
        """The INSERT ... RETURNING of one reading (seq, recorded_at and recorded_by left to the server's trigger)."""
        sql, names = _insert_sql("readings", ("content_sha256", "origin", "pushed_from"),
                                 skip=("seq", "recorded_at", "recorded_by"))
        params = [values[n] for n in names[:-3]]
        return (sql + f" RETURNING {_select_list('readings')}",
                [*params, content_hash("readings", values), _json(origin), pushed_from])

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
        self._write(lambda conn: self._insert_capture(conn, session_id, capture_id, name, CAPTURE_CODEC, len(raw),
                                                      packed), f"capture {name}")
        return capture_id

    @staticmethod
    def _insert_capture(conn: psycopg.Connection, session_id: str, capture_id: str, name: str, codec: str,
                        size: int, data: bytes) -> bool:
        found = conn.execute("SELECT 1 FROM labkit.sessions WHERE session_id = %s", (session_id,)).fetchone()
        if found is None:
            msg = f"capture {name} not recorded: session {session_id!r} does not exist in this archive"
            raise InvalidRowError(msg)
        cur = conn.execute("INSERT INTO labkit.captures (session_id, capture_id, name, codec, size, data) "
                           "VALUES (%s, %s, %s, %s, %s, %s) ON CONFLICT DO NOTHING",
                           (session_id, capture_id, name, codec, size, data))
        return cur.rowcount == 1

    def load_capture(self, capture_id: str) -> tuple[str, bytes]:
        """The name and bytes of a stored capture (checked against its id)."""
        rows = self._read("SELECT name, codec, data FROM labkit.captures WHERE capture_id = %s LIMIT 1",
                          (capture_id,))
        if not rows:
            msg = f"{self.display}: no capture {capture_id!r} that this login may read"
            raise ArchiveError(msg)
        name, codec, data = rows[0]
        raw = zlib.decompress(bytes(data)) if codec == "zlib" else _other_codec(codec, bytes(data))
        if hashlib.sha256(raw).hexdigest() != capture_id:
            msg = f"{self.display}: capture {capture_id} ({name}) does not match its hash: corrupt"
            raise ArchiveError(msg)
        return str(name), raw

    def add_roster(self, rows: Sequence[Mapping[str, Any]]) -> None:
        """Add participants to the roster (staff only); an identical entry again is a no-op."""
        checked = [storage_row("roster", r) for r in rows]
        names = [c.name for c in TABLES["roster"]]
        sql = (f"INSERT INTO labkit.roster ({', '.join(q(n) for n in names)}, content_sha256) "
               f"VALUES ({', '.join(['%s'] * (len(names) + 1))})")

        def work(conn: psycopg.Connection) -> None:
            for values in checked:
                digest = row_hash("roster", values)
                found = conn.execute("SELECT content_sha256 FROM labkit.roster WHERE participant_id = %s",
                                     (values["participant_id"],)).fetchone()
                if found is not None:
                    if found[0] != digest:
                        msg = (f"roster entry {values['participant_id']} not recorded: the id is already on the "
                               "roster with other details")
                        raise InvalidRowError(msg)
                    continue
                conn.execute(sql, [*(values[n] for n in names), digest])

        self._write(work, f"{len(checked)} roster entries")

    # -- reading ---------------------------------------------------------------------------------------------------
    def reading_rows(self, session_id: str | None = None, *, latest_only: bool = False) -> list[tuple[Any, ...]]:
        """Reading rows in storage form that this login may read, ordered by session, ``seq`` and arrival."""
        where, params = [], []
        if session_id is not None:
            where.append("r.session_id = %s")
            params.append(session_id)
        if latest_only:
            where.append("NOT EXISTS (SELECT 1 FROM labkit.readings r2 WHERE r2.reading_id = r.reading_id "
                         "AND r2.revision > r.revision)")
        sql = (f"SELECT {_select_list('readings', 'r.')} FROM labkit.readings r"
               + (" WHERE " + " AND ".join(where) if where else "") + " ORDER BY r.session_id, r.seq, r.id")
        return self._read(sql, params)

    def readings(self, session_id: str | None = None, *, latest_only: bool = False) -> pd.DataFrame:
        """Reading rows (``READING_COLUMNS`` dtypes), all revisions unless ``latest_only``."""
        from labkit.logbook.frames import frame_from_rows

        return frame_from_rows(READING_COLUMNS, self.reading_rows(session_id, latest_only=latest_only))

    def competing_readings(self, session_id: str | None = None) -> pd.DataFrame:
        """Corrections kept aside by a push (``READING_COLUMNS`` plus ``source_file``)."""
        import pandas as pd

        from labkit.logbook.frames import frame_from_rows

        sql = f"SELECT {_select_list('readings')}, source_file FROM labkit.competing_readings"
        rows = self._read(sql + (" WHERE session_id = %s" if session_id else "") + " ORDER BY id",
                          (session_id,) if session_id else ())
        frame = frame_from_rows(READING_COLUMNS, [r[:-1] for r in rows])
        frame["source_file"] = pd.array([r[-1] for r in rows], dtype=pd.StringDtype("pyarrow"))
        return frame

    def event_rows(self, session_id: str | None = None) -> list[tuple[Any, ...]]:
        """Event rows in storage form, ordered by session and ``seq``."""
        sql = f"SELECT {_select_list('events')} FROM labkit.events"
        return self._read(sql + (" WHERE session_id = %s" if session_id else "") + " ORDER BY session_id, seq",
                          (session_id,) if session_id else ())

    def events(self, session_id: str | None = None) -> pd.DataFrame:
        """Event rows (``EVENT_COLUMNS``), ordered by session and ``seq``."""
        from labkit.logbook.frames import frame_from_rows

        return frame_from_rows(TABLES["events"], self.event_rows(session_id))

    def session_rows(self) -> list[tuple[Any, ...]]:
        """Session rows in storage form, ``state`` replaced by the latest ``state:*`` event."""
        select = _select_list("sessions", "s.").replace('s."state"', "coalesce((SELECT substr(e.event, 7) FROM "
                                                        "labkit.events e WHERE e.session_id = s.session_id AND "
                                                        "e.event LIKE 'state:%' ORDER BY e.seq DESC LIMIT 1), "
                                                        's."state")')
        return self._read(f"SELECT {select} FROM labkit.sessions s ORDER BY s.created_at, s.session_id")

    def sessions(self) -> pd.DataFrame:
        """All sessions this login may read (``SESSION_COLUMNS``), with their latest state."""
        from labkit.logbook.frames import frame_from_rows

        return frame_from_rows(TABLES["sessions"], self.session_rows())

    def session_state(self, session_id: str) -> str:
        """The latest state of one session."""
        rows = self._read("SELECT labkit.session_state(%s) FROM labkit.sessions WHERE session_id = %s",
                          (session_id, session_id))
        if not rows:
            msg = f"{self.display}: no session {session_id!r} that this login may read"
            raise ArchiveError(msg)
        return str(rows[0][0])

    def roster(self) -> pd.DataFrame:
        """The roster rows this login may read (``ROSTER_COLUMNS``)."""
        from labkit.logbook.frames import frame_from_rows

        rows = self._read(f"SELECT {_select_list('roster')} FROM labkit.roster ORDER BY participant_id")
        return frame_from_rows(TABLES["roster"], rows)

    def pushes(self) -> list[dict[str, Any]]:
        """The hand-in files pushed so far: file hash and name, who pushed them and when, what they added."""
        rows = self._read("SELECT file_sha256, file_name, pushed_by, pushed_at, sessions, rows_added, duplicates "
                          "FROM labkit.pushes ORDER BY pushed_at")
        keys = ("file_sha256", "file_name", "pushed_by", "pushed_at", "sessions", "rows_added", "duplicates")
        return [dict(zip(keys, r, strict=True)) for r in rows]

    def purge_log(self) -> list[dict[str, Any]]:
        """The audit log of purges (instructors only)."""
        rows = self._read('SELECT session_id, section, "group", kind, reason, purged_by, purged_at, readings, '
                          "events, captures FROM labkit.purge_log ORDER BY id")
        keys = ("session_id", "section", "group", "kind", "reason", "purged_by", "purged_at", "readings", "events",
                "captures")
        return [dict(zip(keys, r, strict=True)) for r in rows]

    # -- hand-in, push, merge, purge, check ------------------------------------------------------------------------
    def hand_in(self, path: str | Path, session_ids: Sequence[str] | None = None) -> Path:
        """Write the given sessions (all this login may read by default) to one hand-in file (SQLite).

        The rows are read in one REPEATABLE READ snapshot, in the storage form of the SQLite layout
        (datetimes as integer ns), each with its ``row_sha256`` computed over the row as the server
        holds it (server ``seq``, time and recorder), so any SQLite archive can merge the file. Readings
        go in order of session, ``seq`` and arrival (a revision after the one it corrects); the roster
        entries are those of the sessions' sections that this login may read.
        """
        from labkit.logbook.handin import write_collected

        path = Path(path)
        with self.read_transaction() as conn:
            known = [r[0] for r in conn.execute("SELECT session_id FROM labkit.sessions "
                                                "ORDER BY created_at, session_id")]
            chosen = known if session_ids is None else list(dict.fromkeys(session_ids))
            missing = [s for s in chosen if s not in set(known)]
            if missing:
                msg = f"{self.display}: no session {', '.join(missing)} that login {self.login} may hand in"
                raise ArchiveError(msg)
            data = self._collect_hand_in(conn, chosen)
        return write_collected(path, data)

    @staticmethod
    def _collect_hand_in(conn: psycopg.Connection, session_ids: list[str]) -> dict[str, list[tuple[Any, ...]]]:
        def hashed(table: str, rows: list[Any]) -> list[tuple[Any, ...]]:
            return [(*r, row_hash(table, tuple(r))) for r in rows]

        ids = list(session_ids)
        data: dict[str, list[tuple[Any, ...]]] = {}
        data["sessions"] = hashed("sessions", conn.execute(
            f"SELECT {_select_list('sessions')} FROM labkit.sessions WHERE session_id = ANY(%s) "
            "ORDER BY created_at, session_id", (ids,)).fetchall())
        data["readings"] = hashed("readings", conn.execute(
            f"SELECT {_select_list('readings')} FROM labkit.readings WHERE session_id = ANY(%s) "
            "ORDER BY session_id, seq, id", (ids,)).fetchall())
        data["events"] = hashed("events", conn.execute(
            f"SELECT {_select_list('events')} FROM labkit.events WHERE session_id = ANY(%s) "
            "ORDER BY session_id, seq", (ids,)).fetchall())
        section_at = [c.name for c in TABLES["sessions"]].index("section")
        sections = sorted({r[section_at] for r in data["sessions"]})
        data["roster"] = hashed("roster", conn.execute(
            f"SELECT {_select_list('roster')} FROM labkit.roster WHERE section = ANY(%s) ORDER BY participant_id",
            (sections,)).fetchall())
        data["captures"] = [(sid, cid, name, codec, int(size), bytes(blob)) for sid, cid, name, codec, size, blob
                            in conn.execute("SELECT session_id, capture_id, name, codec, size, data FROM "
                                            "labkit.captures WHERE session_id = ANY(%s) ORDER BY session_id, "
                                            "capture_id", (ids,))]
        n = len(READING_COLUMNS)
        data["competing_readings"] = [
            (*r[:n], row_hash("readings", tuple(r[:n])), r[n], r[n + 1]) for r in conn.execute(
                f"SELECT {_select_list('readings')}, source_file, "
                "(extract(epoch FROM merged_at) * 1000000)::bigint * 1000 FROM labkit.competing_readings "
                "WHERE session_id = ANY(%s) ORDER BY id", (ids,))]
        return data

    def merge(self, paths: Sequence[str | Path]) -> MergeReport:
        """Push several hand-in files (each in its own transaction); one combined report."""
        total = MergeReport()
        for path in paths:
            rep = self.push(path)
            total.merged_sessions += [s for s in rep.merged_sessions if s not in total.merged_sessions]
            total.merged_rows += rep.merged_rows
            total.duplicates_skipped += rep.duplicates_skipped
            total.refused += rep.refused
            total.competing_corrections += rep.competing_corrections
        return total

    def push(self, path: str | Path) -> PushReport:
        """Upload one hand-in file (an SQLite archive written by ``hand_in``) without duplicates.

        Idempotent by content: a file whose SHA-256 was pushed before adds nothing. Otherwise its
        sessions, events, readings and captures go in one transaction, each session's rows in the
        order of their original ``seq``; rows already on the server (same reading and revision with
        the same content, same event hash) are skipped; a correction that differs from the server's
        row of the same revision is kept in ``competing_readings`` for the TA; a first record that
        differs is refused. The original ``seq``, time and recorder of every row are kept in its
        ``origin``; ``labkit.pushes`` records who pushed the file and when.
        """
        from labkit.logbook.handin import read_hand_in

        path = Path(path)
        try:
            data = path.read_bytes()
        except OSError as exc:
            msg = f"{path}: cannot read the hand-in file: {exc.strerror or exc}"
            raise ArchiveError(msg) from exc
        file_sha = hashlib.sha256(data).hexdigest()
        report = PushReport(file=str(path), file_sha256=file_sha, pushed_by=self.login)
        if self._write(lambda c: c.execute("SELECT 1 FROM labkit.pushes WHERE file_sha256 = %s",
                                           (file_sha,)).fetchone() is not None, f"hand-in {path.name}"):
            report.already_pushed = True
            return report
        handin = read_hand_in(path)  # hash-checked (and migrated in a copy if older)
        if handin.problem:
            report.refused.append(handin.problem)
            return report
        names = {t: [c.name for c in TABLES[t]] for t in TABLES}

        def work(conn: psycopg.Connection) -> None:
            for srow in handin.data["sessions"]:
                values = dict(zip(names["sessions"], srow[:-1], strict=True))
                origin = {"created_at": values["created_at"], "created_by": values["created_by"],
                          "row_sha256": srow[-1]}
                try:
                    added = self._insert_session(conn, values, origin, file_sha)
                except InvalidRowError as exc:
                    raise _Refused(str(exc)) from None
                report.merged_rows += added
                report.duplicates_skipped += not added
                if added:
                    report.sessions_added.append(values["session_id"])
                report.merged_sessions.append(values["session_id"])
            for rrow in handin.data["roster"]:
                values = dict(zip(names["roster"], rrow[:-1], strict=True))
                found = conn.execute("SELECT content_sha256 FROM labkit.roster WHERE participant_id = %s",
                                     (values["participant_id"],)).fetchone()
                if found is None:
                    conn.execute(f"INSERT INTO labkit.roster ({', '.join(q(n) for n in names['roster'])}, "
                                 f"content_sha256) VALUES ({', '.join(['%s'] * (len(names['roster']) + 1))})",
                                 [*values.values(), rrow[-1]])
                    report.merged_rows += 1
                elif found[0] == rrow[-1]:
                    report.duplicates_skipped += 1
                else:
                    msg = f"roster entry {values['participant_id']} differs from the server's"
                    raise _Refused(msg)
            for sid, cid, name, codec, size, blob in handin.data["captures"]:
                added = self._insert_capture(conn, sid, cid, name, codec, size, bytes(blob))
                report.merged_rows += added
                report.duplicates_skipped += not added
            # one stream per session in original seq order, so the server's seq keeps their order
            seq_at = names["readings"].index("seq")
            stream = [(r[3], int(r[seq_at]), 1, r) for r in handin.data["readings"]]
            stream += [(e[0], int(e[1]), 0, e) for e in handin.data["events"]]
            stream.sort(key=lambda item: (item[0], item[1], item[2]))
            for _sid, _seq, kind, row in stream:
                if kind == 0:
                    self._push_event(conn, dict(zip(names["events"], row[:-1], strict=True)), str(row[-1]),
                                     file_sha, report)
                else:
                    self._push_reading(conn, dict(zip(names["readings"], row[:-1], strict=True)), file_sha, path,
                                       report)
            for crow in handin.data.get("competing_readings", []):
                values = dict(zip(names["readings"], crow[:len(READING_COLUMNS)], strict=True))
                self._keep_competing(conn, values, file_sha, str(crow[len(READING_COLUMNS) + 1]))
            conn.execute("INSERT INTO labkit.pushes (file_sha256, file_name, sessions, rows_added, duplicates) "
                         "VALUES (%s, %s, %s, %s, %s) ON CONFLICT (file_sha256) DO NOTHING",
                         (file_sha, path.name, len(report.merged_sessions), report.merged_rows,
                          report.duplicates_skipped))

        try:
            self._write(work, f"hand-in {path.name}")
        except _Refused as exc:  # the transaction is rolled back: nothing of this file is on the server
            return PushReport(file=str(path), file_sha256=file_sha, pushed_by=self.login,
                              refused=[f"{path}: {exc}; the file is refused"])
        return report

    def _push_event(self, conn: psycopg.Connection, values: dict[str, Any], digest: str, file_sha: str,
                    report: PushReport) -> None:
        if conn.execute("SELECT 1 FROM labkit.events WHERE content_sha256 = %s AND origin IS NOT NULL",
                        (digest,)).fetchone():
            report.duplicates_skipped += 1
            return
        origin = {"seq": values["seq"], "at": values["at"], "by": values["by"], "role": values["role"],
                  "row_sha256": digest}
        self._insert_event(conn, values, origin, file_sha)
        report.merged_rows += 1

    def _push_reading(self, conn: psycopg.Connection, values: dict[str, Any], file_sha: str, path: Path,
                      report: PushReport) -> None:
        digest = content_hash("readings", values)
        ident = f"reading {values['reading_id']} revision {values['revision']}"
        if conn.execute("SELECT 1 FROM labkit.competing_readings WHERE reading_id = %s AND revision < %s "
                        "AND revision > 0", (values["reading_id"], values["revision"])).fetchone():
            if self._keep_competing(conn, values, file_sha, path.name):  # a later revision of a competing row
                self._conflict_event(conn, values, None, path.name)
                report.competing_corrections.append(
                    f"{path.name}: {ident}: follows a competing correction; kept aside")
            return
        found = conn.execute("SELECT content_sha256 FROM labkit.readings WHERE reading_id = %s AND revision = %s",
                             (values["reading_id"], values["revision"])).fetchone()
        if found is not None:
            if found[0] == digest:
                report.duplicates_skipped += 1
                return
            if values["revision"] == 0:
                msg = f"{ident} differs from the server's first record"
                raise _Refused(msg)
            if self._keep_competing(conn, values, file_sha, path.name):
                self._conflict_event(conn, values, found[0], path.name)
                report.competing_corrections.append(
                    f"{path.name}: {ident}: a competing correction, kept for the TA")
            return
        origin = {"seq": values["seq"], "recorded_at": values["recorded_at"], "recorded_by": values["recorded_by"]}
        try:
            self._insert_reading(conn, values, origin, file_sha)
        except InvalidRowError as exc:
            raise _Refused(str(exc)) from None
        report.merged_rows += 1

    def _conflict_event(self, conn: psycopg.Connection, values: Mapping[str, Any], kept: str | None,
                        file: str) -> None:
        """Flag a competing correction in its session's log (a ``merge:conflict`` event, as the SQLite merge)."""
        detail = json.dumps({"reading_id": values["reading_id"], "revision": int(values["revision"]),
                             "kept_sha256": kept, "competing_sha256": content_hash("readings", values),
                             "file": file}, sort_keys=True)
        event = storage_row("events", {"session_id": values["session_id"], "by": self.login, "role": "ta",
                                       "event": CONFLICT_EVENT, "step_id": values["step_id"], "detail": detail})
        self._insert_event(conn, event, None, "")

    @staticmethod
    def _keep_competing(conn: psycopg.Connection, values: Mapping[str, Any], file_sha: str, source: str) -> bool:
        names = [c.name for c in READING_COLUMNS] + ["content_sha256", "origin", "pushed_from", "source_file"]
        sql = (f"INSERT INTO labkit.competing_readings ({', '.join(q(n) for n in names)}) "
               f"VALUES ({', '.join(['%s'] * len(names))}) ON CONFLICT DO NOTHING")
        row = [_param(values[c.name], c.dtype) for c in READING_COLUMNS]
        origin = {"seq": values["seq"], "recorded_at": values["recorded_at"], "recorded_by": values["recorded_by"]}
        cur = conn.execute(sql, [*row, content_hash("readings", values), _json(origin), file_sha, source])
        return cur.rowcount == 1  # 0: kept aside by an earlier push already

    def purge_session(self, session_id: str, reason: str) -> int:
        """Remove a whole session (personal data) through the instructor-only purge function; the audit log id."""
        return int(self._write(lambda conn: conn.execute("SELECT labkit.purge_session(%s, %s)",
                                                         (session_id, reason)).fetchone()[0],
                               f"purge of session {session_id}"))

    def check(self) -> list[str]:
        """Integrity problems found among the rows this login may read (empty when sound)."""
        problems: list[str] = []
        checks = (("sessions", "session_id", "true"), ("readings", "id", "true"), ("events", "id", "origin IS NULL"))
        for table, id_col, where in checks:  # a pushed event keeps its hand-in row hash instead
            bad, first = 0, ""
            for row in self._read(f"SELECT {_select_list(table)}, content_sha256, {id_col} FROM labkit.{table} "
                                  f"WHERE {where}"):
                if content_hash(table, tuple(row[:-2])) != row[-2]:
                    bad += 1
                    first = first or f"{id_col} {row[-1]}"
            if bad:
                problems.append(f"{self.display}: {table}: {bad} rows do not match their content hash "
                                f"(first: {first})")
        for reading_id, revision in self._read(
                "SELECT r.reading_id, r.revision FROM labkit.readings r WHERE r.revision > 0 AND NOT EXISTS "
                "(SELECT 1 FROM labkit.readings p WHERE p.reading_id = r.reading_id AND p.revision = r.revision - 1)"):
            problems.append(f"{self.display}: reading {reading_id} revision {revision} has no revision "
                            f"{revision - 1}")
        return problems

    def close(self) -> None:
        """Release the connection."""
        with self._lock:
            if self._conn is not None:
                self._conn.close()
                self._conn = None

    def __enter__(self) -> PostgresArchive:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def __repr__(self) -> str:
        return f"PostgresArchive({self.display!r}, login={getattr(self, 'login', '?')!r})"


def _json(value: dict[str, Any] | None) -> Any:
    if value is None:
        return None
    from psycopg.types.json import Jsonb

    return Jsonb({k: (v.isoformat() if isinstance(v, datetime) else v) for k, v in value.items()})


def _other_codec(codec: str, data: bytes) -> bytes:
    if codec == "lzma":
        import lzma

        return lzma.decompress(data)
    msg = f"unknown capture codec {codec!r}"
    raise ArchiveError(msg)
