"""``labkit sync``: slip, beat, voltage and phase differences, the permissive and advice from both sides' readings."""

from __future__ import annotations

import argparse
import json
import math
import sys
from pathlib import Path

from labkit.core.errors import LabkitError, ModelInputError

_LIMIT_CHOICES = ("bench", "ieee1547", "generator_practice")


def _side(text: str, option: str) -> tuple[float, float, float]:
    """Parse ``V,F[,PHASE_DEG]``."""
    parts = [p.strip() for p in text.split(",")]
    if len(parts) not in (2, 3):
        msg = f"{option}: expected V,F or V,F,PHASE_DEG (RMS volts, hertz, degrees), found {text!r}"
        raise argparse.ArgumentTypeError(msg)
    try:
        values = [float(p) for p in parts]
    except ValueError:
        msg = f"{option}: expected numbers V,F[,PHASE_DEG], found {text!r}"
        raise argparse.ArgumentTypeError(msg) from None
    if not all(math.isfinite(v) for v in values):
        msg = f"{option}: expected finite numbers, found {text!r}"
        raise argparse.ArgumentTypeError(msg)
    return values[0], values[1], values[2] if len(values) == 3 else 0.0


def add_sync_parser(subparsers: argparse._SubParsersAction) -> argparse.ArgumentParser:
    """Add the ``sync`` sub-command to the ``labkit`` parser; sets ``func`` to :func:`run_sync`."""
    p = subparsers.add_parser(
        "sync", help="synchronizing check: slip, beat, dV, dphi, permissive and advice (the supervisor decides)",
        description="Predict slip, beat period, voltage and phase differences (incoming minus running) and "
                    "whether a close commanded now would be within the chosen limits.")
    p.add_argument("--incoming", required=True, metavar="V,F[,PHASE_DEG]",
                   type=lambda s: _side(s, "--incoming"), help="incoming side: RMS volts, hertz, angle in degrees")
    p.add_argument("--running", required=True, metavar="V,F[,PHASE_DEG]",
                   type=lambda s: _side(s, "--running"), help="running side: RMS volts, hertz, angle in degrees")
    p.add_argument("--limits", choices=_LIMIT_CHOICES, default=None,
                   help="limit set (default: ieee1547 with --rating-kva, else bench)")
    p.add_argument("--rating-kva", type=float, default=None, help="aggregate rating for the IEEE 1547-2018 row")
    p.add_argument("--closing-time", type=float, default=None, metavar="S",
                   help="switch closing time in s (default: the bench switch's, else 0)")
    p.add_argument("--bench", type=Path, default=None, help="bench file (for the bench limits and nominal voltage)")
    p.add_argument("--cart", type=Path, default=None, help="cart override file for --bench")
    p.add_argument("--switch", default=None, help="synchronizing switch id on the bench (for its closing time)")
    p.add_argument("--nominal-voltage", type=float, default=None, metavar="V",
                   help="nominal voltage for limit sets on a nominal base (default: the bench's)")
    p.add_argument("--name", default="the incoming set", help="name of the incoming set used in the advice")
    p.add_argument("--format", choices=("table", "json"), default="table")
    p.set_defaults(func=run_sync)
    return p


def run_sync(args: argparse.Namespace) -> int:
    """Run ``labkit sync``; returns 0 when a result was printed, 2 on bad input."""
    from labkit.core import sync as core

    try:
        bench = None
        if args.bench is not None:
            from labkit.files.loader import load_bench

            bench = load_bench(args.bench, args.cart).bench
        elif args.cart is not None:
            msg = "--cart needs --bench"
            raise ModelInputError(msg)
        name = args.limits or ("ieee1547" if args.rating_kva is not None else "bench")
        if name == "bench" and bench is None:
            msg = ("the 'bench' limit set needs a bench file: give --bench FILE, or choose --limits ieee1547 "
                   "--rating-kva X, or --limits generator_practice")
            raise ModelInputError(msg)
        limits = core.limit_set(name, sync_limits=bench.bench.sync_limits if bench else None,
                                bench_id=bench.bench.id if bench else "this bench", rating_kva=args.rating_kva)
        v_nominal = args.nominal_voltage
        base_note = ""
        if v_nominal is None and bench is not None:
            v_nominal = float(bench.bench.nominal_voltage)
        if limits.voltage_base == "nominal" and v_nominal is None:
            v_nominal = args.running[0]
            base_note = "no nominal voltage given: the running-side voltage stands in for it"
        closing = args.closing_time
        if closing is None:
            closing = float(bench.switch(args.switch).closing_time) if (bench and args.switch) else 0.0
        incoming = core.SideState(*args.incoming)
        running = core.SideState(*args.running)
        pred = core.predict_sync(incoming, running, limits, closing_time_s=closing, v_nominal=v_nominal,
                                 incoming_name=args.name)
    except (LabkitError, argparse.ArgumentTypeError) as exc:
        print(f"labkit sync: {exc}", file=sys.stderr)
        print(f"caution: {core.CAUTION}", file=sys.stderr)
        return 2
    out = pred.as_dict()
    if base_note:
        out["limits"]["voltage_base_note"] = base_note  # type: ignore[index]
    if args.format == "json":
        print(json.dumps(out, indent=2))
        return 0
    beat = "inf (no slip)" if out["beat_period_s"] is None else f"{out['beat_period_s']:.3f} s"
    rows = [
        ("slip (incoming - running)", f"{pred.slip_hz:+.3f} Hz"),
        ("beat period", beat),
        ("voltage difference", f"{out['dv_pct']:+.2f} % of the running side"),
        ("  on the limit set's base", f"{out['dv_on_limit_base_pct']:+.2f} % of the {limits.voltage_base} voltage"),
        ("phase difference now", f"{pred.dphi_now_deg:+.1f} deg"),
        ("phase difference at touch", f"{pred.dphi_at_touch_deg:+.1f} deg (closing time {closing * 1000:.0f} ms)"),
        ("advance angle", f"{pred.advance_angle_deg:+.1f} deg"),
        ("voltage across the switch", f"{pred.v_across_now_v:.1f} V"),
        ("limits", limits.describe()),
        ("permissive now", "yes" if pred.permissive else "no"),
        ("verdict", pred.verdict_if_closed_now.text),
    ]
    width = max(len(r[0]) for r in rows)
    for label, value in rows:
        print(f"{label:<{width}}  {value}")
    if base_note:
        print(f"{'note':<{width}}  {base_note}")
    for i, w in enumerate(out["windows"][:3]):  # type: ignore[index]
        print(f"{'window ' + str(i + 1):<{width}}  command between {w['command_start_s']:.2f} and "
              f"{w['command_end_s']:.2f} s from now")
    for line in pred.advice:
        print(f"{'advice':<{width}}  {line}")
    print(f"caution: {core.CAUTION}")
    return 0
