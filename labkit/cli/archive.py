"""``labkit archive check|hand-in|merge``, ``labkit export`` and ``labkit import``: the logbook archive from a shell.

Exit codes: 0 done; 1 the archive or a file has a problem, a hand-in was refused or an import row
is bad (the reasons on stderr); 2 bad arguments (argparse).
"""

from __future__ import annotations

import argparse
import sys
from typing import Any


def add_archive_parsers(subparsers: Any) -> None:
    """Add the ``archive``, ``export`` and ``import`` sub-commands to ``subparsers``."""
    p = subparsers.add_parser("archive", help="check an archive, write a hand-in file, merge hand-ins",
                              description="Work on a logbook archive (one SQLite file).")
    sub = p.add_subparsers(dest="archive_command", required=True)

    c = sub.add_parser("check", help="integrity check; exit 1 on any problem")
    c.add_argument("archive", help="archive file")
    c.set_defaults(func=run_check)

    h = sub.add_parser("hand-in", help="write one self-contained file of some or all sessions for a TA")
    h.add_argument("archive", help="archive file")
    h.add_argument("-o", "--output", required=True, metavar="FILE", help="hand-in file to write")
    h.add_argument("--session", action="append", default=None, metavar="ID",
                   help="session id to include (repeatable; default: every session)")
    h.set_defaults(func=run_hand_in)

    m = sub.add_parser("merge", help="merge hand-in files into an archive (one transaction)")
    m.add_argument("archive", help="archive file (created if missing)")
    m.add_argument("handins", nargs="+", metavar="HANDIN", help="hand-in files")
    m.add_argument("--by", default="merge", metavar="ID", help="staff id recorded on conflict events")
    m.set_defaults(func=run_merge)

    e = subparsers.add_parser("export", help="export readings as CSV, Parquet or XLSX",
                              description="Export the readings of an archive (text cells neutralized against "
                                          "spreadsheet formulas in CSV and XLSX).")
    e.add_argument("archive", help="archive file")
    e.add_argument("--session", action="append", default=None, metavar="ID", help="session id (repeatable)")
    e.add_argument("--format", required=True, choices=("csv", "parquet", "xlsx"))
    e.add_argument("--latest", action="store_true", help="only the latest revision of each reading")
    e.add_argument("-o", "--output", required=True, metavar="FILE", help="file to write")
    e.set_defaults(func=run_export)

    i = subparsers.add_parser("import", help="record readings from a CSV, Parquet or XLSX file (all or nothing)",
                              description="Check every row (schema, registered quantity and unit) and record "
                                          "them all in one transaction, or none.")
    i.add_argument("archive", help="archive file")
    i.add_argument("file", help="CSV, Parquet or XLSX file")
    i.add_argument("--format", choices=("csv", "parquet", "xlsx"), default=None, help="default: from the suffix")
    i.set_defaults(func=run_import)

    # the shared-server commands (migrate, roles, push, purge) live beside these
    from labkit.cli.server import add_archive_server_commands

    add_archive_server_commands(sub)


def _fail(command: str, message: object) -> int:
    print(f"labkit {command}: {message}", file=sys.stderr)
    return 1


def run_check(args: argparse.Namespace) -> int:
    """``labkit archive check``."""
    from labkit.logbook.sqlite import SQLiteArchive
    from labkit.logbook.storage import ArchiveError

    try:
        with SQLiteArchive(args.archive, create=False) as archive:
            problems = archive.check()
            version = archive.format_version
    except ArchiveError as exc:
        return _fail("archive check", exc)
    if problems:
        for problem in problems:
            print(problem, file=sys.stderr)
        return _fail("archive check", f"{len(problems)} problem{'s' if len(problems) != 1 else ''}")
    print(f"{args.archive}: ok (format version {version})")
    return 0


def run_hand_in(args: argparse.Namespace) -> int:
    """``labkit archive hand-in``."""
    from labkit.logbook.sqlite import SQLiteArchive
    from labkit.logbook.storage import ArchiveError

    try:
        with SQLiteArchive(args.archive, create=False) as archive:
            path = archive.hand_in(args.output, args.session)
    except ArchiveError as exc:
        return _fail("archive hand-in", exc)
    print(f"hand-in written: {path}")
    return 0


def run_merge(args: argparse.Namespace) -> int:
    """``labkit archive merge``: exit 1 when any file was refused (the others are merged)."""
    from labkit.logbook.sqlite import SQLiteArchive
    from labkit.logbook.storage import ArchiveError

    try:
        with SQLiteArchive(args.archive) as archive:
            report = archive.merge(args.handins, merged_by=args.by)
    except ArchiveError as exc:
        return _fail("archive merge", exc)
    print(f"merged {report.merged_rows} readings into {len(report.merged_sessions)} sessions; "
          f"{report.duplicates_skipped} duplicates skipped")
    for item in report.competing_corrections:
        print(f"  competing correction (kept aside, for the TA): {item}")
    for item in report.refused:
        print(f"refused: {item}", file=sys.stderr)
    return 1 if report.refused else 0


def run_export(args: argparse.Namespace) -> int:
    """``labkit export``."""
    from labkit.logbook.exchange import export_frame
    from labkit.logbook.snapshots import load_readings
    from labkit.logbook.sqlite import SQLiteArchive
    from labkit.logbook.storage import ArchiveError

    try:
        with SQLiteArchive(args.archive, read_only=True) as archive:
            frame = load_readings(archive, args.session, latest_only=args.latest)
        path = export_frame(frame, args.output, args.format)
    except ArchiveError as exc:
        return _fail("export", exc)
    print(f"{len(frame)} readings written to {path}")
    return 0


def run_import(args: argparse.Namespace) -> int:
    """``labkit import``: the checks of typed readings (schema, quantity and unit, values); all rows or none."""
    from labkit.core.errors import FileValidationError
    from labkit.logbook.exchange import import_readings
    from labkit.logbook.sqlite import SQLiteArchive
    from labkit.logbook.storage import ArchiveError
    from labkit.session.importing import validate_imported

    try:
        with SQLiteArchive(args.archive, create=False) as archive:
            rows = import_readings(args.file, archive, validate=validate_imported, format=args.format)
    except FileValidationError as exc:
        return _fail("import", f"nothing recorded; {exc}")
    except ArchiveError as exc:
        return _fail("import", exc)
    print(f"{len(rows)} readings recorded from {args.file}")
    return 0
