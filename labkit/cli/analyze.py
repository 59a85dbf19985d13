"""``labkit analyze FILE``: readings of one voltage/current pair from a capture file.

Exit codes: 0 readings printed (warnings, if any, included in the output); 1 the capture
cannot give trustworthy readings (the reason on stderr); 2 bad arguments.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from typing import Any

_KEYS = {  # JSON key -> (registry name, factor from the SI value)
    "frequency_hz": ("frequency", 1.0),
    "v_rms": ("v_rms", 1.0),
    "i_rms": ("i_rms", 1.0),
    "phase_deg": ("phase", 1.0),
    "p_w": ("p", 1.0),
    "q1_var": ("q1", 1.0),
    "s_va": ("s", 1.0),
    "pf": ("pf", 1.0),
    "dpf": ("pf1", 1.0),
    "thd_v_pct": ("thd_v", 100.0),
    "thd_i_pct": ("thd_i", 100.0),
}


def add_analyze_parser(subparsers: Any) -> argparse.ArgumentParser:
    """Add the ``analyze`` sub-command to ``subparsers``; sets ``func`` to :func:`run_analyze`."""
    p = subparsers.add_parser("analyze", help="readings (frequency, RMS, IEEE 1459 powers, THD) from a capture file",
                              description="Analyse one voltage/current pair of a capture file "
                                          "(.csv, .npz, .wav, COMTRADE .cfg).")
    p.add_argument("file", help="capture file")
    p.add_argument("--rate", type=float, default=None, metavar="HZ",
                   help="sample rate, Hz, for CSV files without a time column or rate header")
    p.add_argument("--voltage", required=True, metavar="COL", help="voltage channel: column name or 0-based index")
    p.add_argument("--current", required=True, metavar="COL", help="current channel: column name or 0-based index")
    p.add_argument("--v-scale", type=float, default=1.0, metavar="K",
                   help="voltage sensor output per volt, V/V (samples are divided by K; 0.01 for a 100:1 divider)")
    p.add_argument("--i-scale", type=float, default=1.0, metavar="K",
                   help="current sensor output per ampere, V/A (samples are divided by K; 0.1 for 100 mV/A)")
    p.add_argument("--section", type=int, default=None, help="COMTRADE sampling-rate section (1-based)")
    p.add_argument("--strict", action="store_true", help="exit 1 on any warning")
    p.add_argument("--format", choices=("table", "json"), default="table")
    p.set_defaults(func=run_analyze)
    return p


add_parser = add_analyze_parser


def _json_value(value: float) -> float | None:
    return None if not math.isfinite(value) else value


def run_analyze(args: argparse.Namespace) -> int:
    """Run ``labkit analyze``; returns the exit code."""
    from pathlib import Path

    from labkit.captures.capture import analyze_capture, read_capture
    from labkit.captures.channelmap import simple_map
    from labkit.core.errors import LabkitError
    from labkit.core.quantities import quantity

    try:
        path = Path(args.file)
        if path.suffix.lower() == ".cfg" and args.section is not None:
            from labkit.captures.comtrade import read_comtrade

            capture = read_comtrade(path).capture(args.section)
        else:
            capture = read_capture(path, rate=args.rate)
        v_name = capture.channels[capture.index(args.voltage)]
        i_name = capture.channels[capture.index(args.current)]
        if v_name == i_name:
            print("labkit analyze: --voltage and --current name the same channel", file=sys.stderr)
            return 2
        mapped = simple_map(v_name, i_name, v_scale=args.v_scale, i_scale=args.i_scale).apply(capture)
        result = analyze_capture(mapped, strict=args.strict)
    except (LabkitError, OSError) as exc:
        print(f"labkit analyze: {args.file}: {exc}", file=sys.stderr)
        return 1
    pair = result.pairs[0]
    values = pair.values()
    warnings = [{"code": w.code, "channel": w.channel, "message": w.message} for w in result.warnings]
    if args.format == "json":
        out: dict[str, Any] = {"file": str(args.file), "voltage": v_name, "current": i_name,
                               "cycles": result.cycles, "sample_rate_hz": result.sample_rate}
        for key, (name, factor) in _KEYS.items():
            out[key] = _json_value(values[name] * factor)
        out["ieee1459"] = {quantity(name).symbol or name: _json_value(values[name])
                           for name in ("p", "p1", "ph", "q1", "s", "s1", "sn", "di", "dv", "sh", "dh", "n",
                                        "pf", "pf1")}
        out["quantities"] = {name: _json_value(v) for name, v in values.items()}
        out["harmonics"] = {
            ch: [{"order": int(o), "rms": _json_value(float(result.harmonics.magnitude[k, j])),
                  "angle_deg": _json_value(float(result.harmonics.angle_deg[k, j]))}
                 for j, o in enumerate(result.harmonics.orders)]
            for ch, k in ((v_name, 0), (i_name, 1))}
        out["dc_available"] = result.dc_available
        out["warnings"] = warnings
        print(json.dumps(out, indent=2))
        return 0
    frame = result.to_frame()
    main_rows = frame[~frame["quantity"].str.contains(r"_h\d", regex=True)]
    print(f"{args.file}: {v_name} / {i_name}, {result.cycles} cycles at {result.frequency:.4f} Hz")
    for row in main_rows.itertuples():
        symbol = f"{row.symbol:>5}" if row.symbol else "     "
        clause = f"  ({row.clause})" if row.clause else ""
        print(f"  {row.quantity:<12} {symbol} {row.value:>14.6g} {row.unit:<4}{clause}")
    for w in result.warnings:
        print(f"warning: {w}")
    return 0
