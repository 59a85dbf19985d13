"""``labkit predict`` and ``labkit netlist``: the predictions of a template's steps, and a step as SPICE."""

from __future__ import annotations

import argparse
import sys

from labkit.core.errors import LabkitError


def _load(args: argparse.Namespace) -> tuple[object, object]:
    from labkit.files.loader import load_bench, load_template

    bench = load_bench(args.bench, args.cart).bench
    template = load_template(args.template, bench).template
    return bench, template


def _cmd_predict(args: argparse.Namespace) -> int:
    from labkit.core.lines import branch_full_scale_note
    from labkit.core.predict import predict_template
    from labkit.core.tables import template_frame

    try:
        bench, template = _load(args)
        steps = predict_template(bench, template, n_samples=args.samples, seed=args.seed)  # type: ignore[arg-type]
        if args.step is not None:
            wanted = template.step(args.step).id  # type: ignore[attr-defined]
            steps = [s for s in steps if s.step_id == wanted]
    except LabkitError as exc:
        print(f"labkit predict: {exc}", file=sys.stderr)
        return 1
    frame = template_frame(steps)
    if args.format == "csv":
        frame.to_csv(sys.stdout, index=False)
    elif args.format == "json":
        sys.stdout.write(frame.to_json(orient="records", indent=1))
        sys.stdout.write("\n")
    else:
        for s in steps:
            print(f"\nstep {s.index} [{s.step_id}] {s.kind}")
            if s.prediction is None:
                print(f"  cannot be predicted: {s.error}")
                continue
            for w in s.prediction.warnings:
                print(f"  WARNING: {w}")
            for branch_id, position in s.state.lines:
                note = branch_full_scale_note(bench, branch_id, position)  # type: ignore[arg-type]
                if note:
                    print(f"  line: {note}")
            for flag in s.prediction.rating_flags:
                print(f"  RATING: {flag}")
            part = frame[frame["step"] == s.step_id]
            print(part[["location", "quantity", "unit", "predicted", "band_low", "band_high", "status", "note"]]
                  .to_string(index=False, float_format=lambda x: f"{x:.6g}"))
    for s in steps:
        if s.prediction is not None and s.prediction.rating_flags and args.format != "table":
            for flag in s.prediction.rating_flags:
                print(f"RATING [{s.step_id}]: {flag}", file=sys.stderr)
    return 0


def _cmd_netlist(args: argparse.Namespace) -> int:
    from labkit.core.predict import predict_state
    from labkit.core.state import states_after_steps
    from labkit.files.spice import spice_netlist

    try:
        bench, template = _load(args)
        step = template.step(args.step)  # type: ignore[attr-defined]
        index = template.index_of(step.id)  # type: ignore[attr-defined]
        state = states_after_steps(bench, template)[index]  # type: ignore[arg-type]
        pred = predict_state(bench, state, n_samples=0, harmonics=False)  # type: ignore[arg-type]
    except LabkitError as exc:
        print(f"labkit netlist: {exc}", file=sys.stderr)
        return 1
    sys.stdout.write(spice_netlist(pred.solution, f"{template.template.id} step {index} [{step.id}]"))  # type: ignore[attr-defined]
    return 0


def _common(p: argparse.ArgumentParser) -> None:
    p.add_argument("bench", help="bench type file (.toml)")
    p.add_argument("template", help="session template file (.toml)")
    p.add_argument("--cart", default=None, help="per-cart override file")


def add_predict_parsers(sub: argparse._SubParsersAction) -> None:
    """Add ``predict`` and ``netlist`` to the ``labkit`` command."""
    from labkit.core.defaults import DEFAULT_SAMPLES, DEFAULT_SEED

    p = sub.add_parser("predict", help="predicted readings with tolerance bands for every step")
    _common(p)
    p.add_argument("--step", default=None, help="step id or 0-based index")
    p.add_argument("--format", choices=["table", "csv", "json"], default="table")
    p.add_argument("--samples", type=int, default=DEFAULT_SAMPLES, help="Monte Carlo samples for the bands")
    p.add_argument("--seed", type=int, default=DEFAULT_SEED, help="Monte Carlo seed (recorded)")
    p.set_defaults(func=_cmd_predict)

    p = sub.add_parser("netlist", help="a step's configuration as a SPICE netlist (ngspice dialect)")
    _common(p)
    p.add_argument("--step", required=True, help="step id or 0-based index")
    p.set_defaults(func=_cmd_netlist)
