"""Open the archive a user names: a file path (SQLite) or a ``postgresql://`` URL (the shared server).

``open_archive(None)`` takes the environment variable ``LABKIT_ARCHIVE``; the command line's
``--archive`` passes its value here, so every front end opens archives the same way.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import TYPE_CHECKING, Any

from labkit.logbook.storage import ArchiveError

if TYPE_CHECKING:
    from labkit.logbook.postgres import PostgresArchive
    from labkit.logbook.sqlite import SQLiteArchive

ENV_VAR = "LABKIT_ARCHIVE"


def archive_target(url_or_path: str | Path | None = None) -> str | Path:
    """The archive named by the argument, else by ``LABKIT_ARCHIVE``; :class:`ArchiveError` when neither is set."""
    target = url_or_path if url_or_path not in (None, "") else os.environ.get(ENV_VAR, "")
    if target in (None, ""):
        msg = f"no archive given: pass --archive PATH_OR_URL or set the environment variable {ENV_VAR}"
        raise ArchiveError(msg)
    return target  # type: ignore[return-value]


def open_archive(url_or_path: str | Path | None = None, **options: Any) -> SQLiteArchive | PostgresArchive:
    """A :class:`~labkit.logbook.sqlite.SQLiteArchive` for a path, a :class:`PostgresArchive` for a URL.

    Parameters
    ----------
    url_or_path
        A file path, or ``postgresql://login@host:port/database`` (``postgres://`` too); ``None``
        reads ``LABKIT_ARCHIVE``. Other URL schemes are refused rather than taken for file names.
    **options
        Passed to the backend's constructor (``read_only=True`` for SQLite, ``connect_timeout`` for
        PostgreSQL, ...).
    """
    from labkit.logbook.postgres import is_postgres_url, redact_url

    target = archive_target(url_or_path)
    if isinstance(target, str) and is_postgres_url(target):
        from labkit.logbook.postgres import PostgresArchive

        return PostgresArchive(target, **options)
    if isinstance(target, str) and "://" in target:
        msg = (f"{redact_url(target)}: unknown archive URL scheme; expected a file path or a postgresql:// URL")
        raise ArchiveError(msg)
    from labkit.logbook.sqlite import SQLiteArchive

    return SQLiteArchive(Path(target), **options)
