"""The ``labkit`` command: one sub-command per job, each importing what it needs when it runs."""

from __future__ import annotations

import argparse
import sys
from collections.abc import Sequence
from pathlib import Path

from labkit import __version__


def _cmd_check(args: argparse.Namespace) -> int:
    from labkit.files.loader import check_files

    files = [Path(f) for f in args.files]
    expanded: list[Path] = []
    for f in files:
        expanded += sorted(f.glob("*.toml")) if f.is_dir() else [f]
    results = check_files(expanded)
    bad = 0
    for r in results:
        if r.problems:
            bad += 1
            print(f"{r.file}: {len(r.problems)} problem{'s' if len(r.problems) != 1 else ''}")
            for p in r.problems:
                print(f"  {p}")
        else:
            print(f"{r.file}: ok ({r.kind})")
    return 1 if bad else 0


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of the ``labkit`` command."""
    parser = argparse.ArgumentParser(prog="labkit", description="Plan, predict, check and record AC bench labs.")
    parser.add_argument("--version", action="version", version=f"labkit {__version__}")
    sub = parser.add_subparsers(dest="command", required=True)

    p = sub.add_parser("check", help="validate bench, cart and template files; exit 1 on any problem")
    p.add_argument("files", nargs="+", help="files or folders of .toml files")
    p.set_defaults(func=_cmd_check)

    from labkit.cli.session import add_session_parsers

    add_session_parsers(sub)

    from labkit.cli.predict import add_predict_parsers

    add_predict_parsers(sub)

    from labkit.cli.analyze import add_analyze_parser

    add_analyze_parser(sub)

    from labkit.cli.sync import add_sync_parser

    add_sync_parser(sub)

    from labkit.cli.report import add_report_parsers

    add_report_parsers(sub)

    from labkit.cli.lab import add_lab_parsers

    add_lab_parsers(sub)

    from labkit.cli.archive import add_archive_parsers

    add_archive_parsers(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``labkit`` console script."""
    from labkit.lab.allocator import keep_freed_blocks

    keep_freed_blocks()  # tolerance bands reuse freed memory (see labkit.lab.allocator)
    args = build_parser().parse_args(argv)
    try:
        return int(args.func(args))
    except BrokenPipeError:  # output piped into a pager or head that closed early
        sys.stderr.close()
        return 0


if __name__ == "__main__":
    raise SystemExit(main())
