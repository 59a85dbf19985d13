"""``labkit archive ...``: the shared PostgreSQL archive from the command line.

::

    labkit archive migrate URL                      apply pending migrations (as the migration role)
    labkit archive roles URL [--add LOGIN --role R [--section S] [--group G] [--password-env VAR]]
                                                    map a login to a role (creating the login); list them
    labkit archive push HANDIN... URL               upload hand-in files, idempotent by content hash
    labkit archive purge URL SESSION --reason TEXT  remove a whole session (instructor; audited)

``URL`` may be omitted where the environment variable ``LABKIT_ARCHIVE`` holds it (push, purge).
Passwords come from ``~/.pgpass`` or ``PGPASSWORD`` (libpq), never from the command line; error
messages show URLs with the password replaced.
"""

from __future__ import annotations

import argparse
import os
import sys
from typing import Any

from labkit.logbook.storage import ArchiveError


def _url(value: str | None) -> str:
    from labkit.logbook.open import archive_target
    from labkit.logbook.postgres import is_postgres_url, redact_url

    target = str(archive_target(value))
    if not is_postgres_url(target):
        msg = f"{redact_url(target)}: expected a postgresql:// URL of the shared archive"
        raise ArchiveError(msg)
    return target


def _cmd_migrate(args: argparse.Namespace) -> int:
    from labkit.logbook.postgres import migrate

    applied = migrate(_url(args.url))
    print("\n".join(f"applied {name}" for name in applied) if applied else "archive is up to date")
    return 0


def _cmd_roles(args: argparse.Namespace) -> int:
    from labkit.logbook.postgres import add_member, members

    url = _url(args.url)
    if args.add:
        if not args.role:
            msg = "--add needs --role student|ta|instructor"
            raise ArchiveError(msg)
        password = None
        if args.password_env:
            password = os.environ.get(args.password_env)
            if not password:
                msg = f"--password-env {args.password_env}: that environment variable is empty or not set"
                raise ArchiveError(msg)
        add_member(url, args.add, args.role, section=args.section or "", group=args.group or "", password=password)
        print(f"{args.add}: {args.role}" + (f" of section {args.section}" if args.section else "")
              + (f", group {args.group}" if args.group else ""))
    for login, role, section, group in members(url):
        print(f"{login:<20} {role:<11} {section:<10} {group}")
    return 0


def _cmd_push(args: argparse.Namespace) -> int:
    from labkit.logbook.postgres import PostgresArchive

    files, url = (list(args.items), None) if args.url_from_env else (list(args.items[:-1]), args.items[-1])
    if not files:
        msg = "give at least one hand-in file before the URL"
        raise ArchiveError(msg)
    archive = PostgresArchive(_url(url))
    bad = 0
    try:
        for path in files:
            rep = archive.push(path)
            if rep.already_pushed:
                print(f"{path}: already pushed (same content, sha256 {rep.file_sha256[:12]}); nothing added")
                continue
            if rep.refused:
                bad += 1
                for line in rep.refused:
                    print(f"{path}: REFUSED: {line}")
                continue
            print(f"{path}: {rep.merged_rows} rows added, {rep.duplicates_skipped} already there, "
                  f"{len(rep.merged_sessions)} sessions; pushed by {rep.pushed_by}")
            for line in rep.competing_corrections:
                print(f"  competing correction kept for the TA: {line}")
    finally:
        archive.close()
    return 1 if bad else 0


def _cmd_purge(args: argparse.Namespace) -> int:
    from labkit.logbook.postgres import PostgresArchive

    archive = PostgresArchive(_url(args.url))
    try:
        log_id = archive.purge_session(args.session, args.reason)
    finally:
        archive.close()
    print(f"session {args.session} purged (audit log entry {log_id})")
    return 0


def _run(func: Any) -> Any:
    def wrapped(args: argparse.Namespace) -> int:
        try:
            return int(func(args))
        except ArchiveError as exc:
            print(f"labkit archive: {exc}", file=sys.stderr)
            return 2

    return wrapped


def add_archive_server_commands(archive_sub: Any) -> None:
    """Add migrate, roles, push and purge to an existing ``archive`` sub-command's subparsers."""
    p = archive_sub.add_parser("migrate", help="apply pending migrations to the shared archive (migration role)")
    p.add_argument("url", nargs="?", help="postgresql:// URL (default: $LABKIT_ARCHIVE)")
    p.set_defaults(func=_run(_cmd_migrate))

    p = archive_sub.add_parser("roles", help="map logins to student/ta/instructor and list the mapping")
    p.add_argument("url", nargs="?", help="postgresql:// URL of the migration role (default: $LABKIT_ARCHIVE)")
    p.add_argument("--add", metavar="LOGIN", help="login to add (created if it does not exist)")
    p.add_argument("--role", choices=("student", "ta", "instructor"))
    p.add_argument("--section", help="section id (students and TAs)")
    p.add_argument("--group", help="group id (students)")
    p.add_argument("--password-env", metavar="VAR", help="environment variable holding a new login's password")
    p.set_defaults(func=_run(_cmd_roles))

    p = archive_sub.add_parser("push", help="upload hand-in files to the shared archive without duplicates")
    p.add_argument("items", nargs="+", metavar="HANDIN... URL", help="hand-in files, then the postgresql:// URL")
    p.add_argument("--url-from-env", action="store_true", default=False,
                   help="take the URL from $LABKIT_ARCHIVE (then every argument is a hand-in file)")
    p.set_defaults(func=_run(_cmd_push))

    p = archive_sub.add_parser("purge", help="remove a whole session's personal data (instructor; audited)")
    p.add_argument("url", help="postgresql:// URL of an instructor login")
    p.add_argument("session", help="session id")
    p.add_argument("--reason", required=True, help="why (kept in the audit log)")
    p.set_defaults(func=_run(_cmd_purge))


def add_server_parsers(subparsers: Any) -> Any:
    """Add ``labkit archive`` with migrate, roles, push and purge; return the archive subparsers."""
    p = subparsers.add_parser("archive", help="the shared archive server: migrate, roles, push, purge")
    archive_sub = p.add_subparsers(dest="archive_command", required=True)
    add_archive_server_commands(archive_sub)
    return archive_sub
