"""``labkit report``, ``labkit review`` and ``labkit prelab``: the pages a TA hands back and an instructor reads."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from labkit.core.errors import LabkitError


def _progress(done: int, total: int, what: str) -> None:
    print(f"[{done}/{total}] {what}", file=sys.stderr, flush=True)


def _open_archive(path: str) -> object:
    from labkit.logbook.sqlite import SQLiteArchive

    return SQLiteArchive(path, read_only=True, create=False)


def _write(report: object, args: argparse.Namespace, prefix: str) -> None:
    out = report.write(args.output)  # type: ignore[attr-defined]
    print(f"wrote {out}", file=sys.stderr)
    if getattr(args, "tables", None):
        from labkit.report.tables import write_tables

        for p in write_tables(report.tables, args.tables, args.table_format, prefix=prefix):  # type: ignore[attr-defined]
            print(f"wrote {p}", file=sys.stderr)
    if getattr(args, "pdf", None):
        from labkit.report.pdf import html_to_pdf

        print(f"wrote {html_to_pdf(out, args.pdf)}", file=sys.stderr)


def _cmd_report(args: argparse.Namespace) -> int:
    from labkit.report.session import report_from_archive

    try:
        archive = _open_archive(args.archive)
        try:
            report = report_from_archive(archive, args.session, with_names=args.names, progress=_progress)
        finally:
            archive.close()  # type: ignore[attr-defined]
        _write(report, args, "session-")
    except LabkitError as exc:
        print(f"labkit report: {exc}", file=sys.stderr)
        return 1
    return 0


def _cmd_review(args: argparse.Namespace) -> int:
    from labkit.report.review import ReviewFilter, review, review_report

    flt = ReviewFilter(section=args.section, date_from=args.date_from, date_to=args.date_to, template=args.template,
                       cart=args.cart, include_demo=args.include_demo)
    try:
        archive = _open_archive(args.archive)
        try:
            _progress(0, 1, "reading the archive")
            sessions, readings = archive.sessions(), archive.readings()  # type: ignore[attr-defined]
        finally:
            archive.close()  # type: ignore[attr-defined]
        result = review(sessions, readings, flt, progress=_progress)
        _write(review_report(result), args, "review-")
    except LabkitError as exc:
        print(f"labkit review: {exc}", file=sys.stderr)
        return 1
    return 0


def _cmd_prelab(args: argparse.Namespace) -> int:
    from labkit.files.loader import load_bench, load_template
    from labkit.report.prelab import prelab_sheet

    try:
        loaded = load_bench(args.bench, args.cart)
        tpl = load_template(args.template, loaded.bench)
        report = prelab_sheet(loaded.bench, tpl.template, n_samples=args.samples, seed=args.seed,
                              bench_text=loaded.type_source.text, template_text=tpl.source.text,
                              progress=_progress)
        _write(report, args, "prelab-")
    except LabkitError as exc:
        print(f"labkit prelab: {exc}", file=sys.stderr)
        return 1
    return 0


def _tables_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--tables", metavar="DIR", default=None, help="also write the report's tables into DIR")
    p.add_argument("--table-format", choices=["csv", "parquet", "xlsx"], default="csv",
                   help="format of the tables (CSV and Excel cells are guarded against formula injection)")


def add_report_parsers(sub: argparse._SubParsersAction) -> None:
    """Add ``report``, ``review`` and ``prelab`` to the ``labkit`` command."""
    from labkit.core.defaults import DEFAULT_SAMPLES, DEFAULT_SEED

    p = sub.add_parser("report", help="one session's report as a self-contained HTML page (optionally PDF)")
    p.add_argument("archive", help="logbook archive file")
    p.add_argument("--session", required=True, help="session id")
    p.add_argument("-o", "--output", required=True, type=Path, help="HTML file to write")
    p.add_argument("--pdf", default=None, type=Path, help="also print the page to this PDF (needs Chromium)")
    p.add_argument("--names", action="store_true", help="show roster names beside participant ids")
    _tables_options(p)
    p.set_defaults(func=_cmd_report)

    p = sub.add_parser("review", help="review across sessions: pass rates, errors, outliers, carts over time")
    p.add_argument("archive", help="logbook archive file")
    p.add_argument("--section", default=None, help="only this section")
    p.add_argument("--from", dest="date_from", default=None, metavar="DATE", help="first date (YYYY-MM-DD)")
    p.add_argument("--to", dest="date_to", default=None, metavar="DATE", help="last date, inclusive")
    p.add_argument("--template", default=None, help="only this template id")
    p.add_argument("--cart", default=None, help="only this cart")
    p.add_argument("--include-demo", action="store_true", help="include demo and practice sessions")
    p.add_argument("-o", "--output", required=True, type=Path, help="HTML file to write")
    _tables_options(p)
    p.set_defaults(func=_cmd_review)

    p = sub.add_parser("prelab", help="pre-lab sheet: every step's predictions, bands and cautions")
    p.add_argument("bench", help="bench type file (.toml)")
    p.add_argument("template", help="session template file (.toml)")
    p.add_argument("--cart", default=None, help="per-cart override file")
    p.add_argument("-o", "--output", required=True, type=Path, help="HTML file to write")
    p.add_argument("--samples", type=int, default=DEFAULT_SAMPLES, help="Monte Carlo samples for the bands")
    p.add_argument("--seed", type=int, default=DEFAULT_SEED, help="Monte Carlo seed")
    _tables_options(p)
    p.set_defaults(func=_cmd_prelab)
