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
    from labkit.core.cautions import DEFER, step_cautions
    from labkit.core.errors import FileValidationError
    from labkit.core.predict import predict_template
    from labkit.demo_files import DEMO_BENCH, DEMO_CART, demo_path
    from labkit.files.loader import load_bench, load_template

    try:
        loaded = load_bench(demo_path(DEMO_BENCH), demo_path(DEMO_CART))
        template = load_template(demo_path(args.template), loaded.bench).template
    except FileValidationError as exc:
        print(exc, file=sys.stderr)
        return 1
    b = loaded.bench
    print(f"labkit {__version__}: demo session plan with predicted readings (invented demo data)")
    print(f"bench : {b.bench.title} [{b.bench.id} v{b.bench.version}], cart {b.cart.id if b.cart else '-'}")
    print(f"lab   : {template.template.title} [{template.template.id} v{template.template.version}]")
    print(f"note  : {DEFER}")
    steps = predict_template(b, template, n_samples=args.samples)
    for step, pred in zip(template.steps, steps, strict=True):
        print(f"\n{pred.index:2d}. [{step.id}] {step.kind}: {step.title}")
        if pred.prediction is None:
            print(f"    cannot be predicted: {pred.error}")
            continue
        for caution in step_cautions(b, step, pred.state, pred.prediction.rating_flags):
            print(f"    ! {caution}")
        for warning in pred.prediction.warnings:
            print(f"    warning: {warning}")
        for r in step.readings:
            try:
                value, low, high = pred.prediction.reading(r.location, r.quantity, r.sensor)
            except KeyError:
                print(f"    {r.quantity:>9} at {r.location:<10} (no prediction at this location)")
                continue
            print(f"    {r.quantity:>9} at {r.location:<10} predicted {value:10.4g} {_unit(r.quantity)}"
                  f"  band [{low:.4g}, {high:.4g}]  tolerance {r.tolerance}")
    return 0


def _unit(name: str) -> str:
    from labkit.core.quantities import quantity

    return quantity(name).unit


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
    p.add_argument("--samples", type=int, default=1000, help="Monte Carlo samples for the bands")
    p.set_defaults(func=_cmd_demo)

    from labkit.cli.predict import add_predict_parsers

    add_predict_parsers(sub)

    from labkit.cli.analyze import add_analyze_parser

    add_analyze_parser(sub)

    from labkit.cli.sync import add_sync_parser

    add_sync_parser(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``labkit`` console script."""
    args = build_parser().parse_args(argv)
    try:
        return int(args.func(args))
    except BrokenPipeError:  # output piped into a pager or head that closed early
        sys.stderr.close()
        return 0


if __name__ == "__main__":
    raise SystemExit(main())
