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


def _cmd_demo(args: argparse.Namespace) -> int:
    from labkit.core.errors import FileValidationError
    from labkit.demo_files import DEMO_BENCH, DEMO_CART, demo_path
    from labkit.files.loader import load_bench, load_template

    try:
        loaded = load_bench(demo_path(DEMO_BENCH), demo_path(DEMO_CART))
        template = load_template(demo_path(args.template), loaded.bench).template
    except FileValidationError as exc:
        print(exc, file=sys.stderr)
        return 1
    b = loaded.bench
    print(f"labkit {__version__} demo (invented demo data)")
    print(f"bench : {b.bench.title} [{b.bench.id} v{b.bench.version}], cart {b.cart.id if b.cart else '-'}")
    print(f"lab   : {template.template.title} [{template.template.id} v{template.template.version}]")
    print("caution: this lab uses mains voltage and rotating machinery; follow the lab's safety rules,")
    print("         local codes and your supervisor. labkit's predictions do not make a configuration safe.")
    for i, step in enumerate(template.steps):
        print(f"\n{i:2d}. [{step.id}] {step.kind}: {step.title}")
        for r in step.readings:
            print(f"      read {r.quantity} at {r.location} in {r.unit} (tolerance {r.tolerance})")
    return 0


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of the ``labkit`` command."""
    parser = argparse.ArgumentParser(prog="labkit", description="Plan, predict, check and record AC bench labs.")
    parser.add_argument("--version", action="version", version=f"labkit {__version__}")
    sub = parser.add_subparsers(dest="command", required=True)

    p = sub.add_parser("check", help="validate bench, cart and template files; exit 1 on any problem")
    p.add_argument("files", nargs="+", help="files or folders of .toml files")
    p.set_defaults(func=_cmd_check)

    p = sub.add_parser("demo", help="run the main job on the embedded demo bench and template")
    p.add_argument("--template", default="lab1-line-and-loads", help="demo template name or file")
    p.set_defaults(func=_cmd_demo)

    from labkit.cli.predict import add_predict_parsers

    add_predict_parsers(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``labkit`` console script."""
    args = build_parser().parse_args(argv)
    return int(args.func(args))


if __name__ == "__main__":
    raise SystemExit(main())
