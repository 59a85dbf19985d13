"""``labkit demo``: a complete lab session run headlessly on the simulated demo bench, every reading recorded.

The session uses the embedded demo bench, its cart and a demo template (invented demo data);
readings come from the simulated bench (captures synthesized from the predictions, seeded noise
and gain error) or are typed as a student would, and a few seeded mistakes are injected so that
the verdicts (and the diagnoses, where the diagnosis module is present) have something to show.
Demo sessions have kind ``demo`` and stay out of review statistics by default.
"""

from __future__ import annotations

import argparse
import math
import sys
from collections import Counter
from pathlib import Path
from typing import Any

DEFAULT_ARCHIVE = "labkit-demo.sqlite"
MISTAKES = ("peak read as RMS", "reversed current sensor", "x10 probe setting")


def add_session_parsers(subparsers: Any) -> None:
    """Add ``demo`` to the ``labkit`` command's sub-parsers."""
    p = subparsers.add_parser("demo", help="run a whole demo session on the simulated bench and record it",
                              description="Run a complete session of a demo template on the simulated demo bench "
                                          "(invented demo data), record every reading in a local archive and "
                                          "print the steps, predictions, cautions, verdicts and a summary.")
    p.add_argument("--template", default="lab1-line-and-loads", help="demo template name or file")
    p.add_argument("--archive", default=DEFAULT_ARCHIVE,
                   help=f"SQLite archive to record in (default ./{DEFAULT_ARCHIVE})")
    p.add_argument("--samples", type=int, default=1000, help="Monte Carlo samples for the bands")
    p.add_argument("--seed", type=int, default=7, help="seed of the simulated bench and of the injected mistakes")
    p.set_defaults(func=cmd_demo)


def _load(template: str) -> tuple[Any, Any]:
    from labkit.demo_files import DEMO_BENCH, DEMO_CART, demo_path
    from labkit.files.loader import load_bench, load_template

    loaded = load_bench(demo_path(DEMO_BENCH), demo_path(DEMO_CART))
    path = Path(template)
    tpl_path = path if path.suffix == ".toml" and path.is_file() else demo_path(template)
    return loaded, load_template(tpl_path, loaded.bench)


def _plan_mistakes(runner: Any, rng: Any) -> dict[tuple[int, int], str]:
    """Pick, with the seed, one reading of the template for each kind of mistake it can happen to."""
    eligible: dict[str, list[tuple[int, int]]] = {m: [] for m in MISTAKES}
    for i, step in enumerate(runner.template.steps):
        if step.kind in ("source_start", "calibration"):  # anchors and calibrations are taken carefully
            continue
        for j, spec in enumerate(step.readings):
            bus_like = spec.location in runner.bench.bus_names
            if spec.quantity in ("v_rms", "i_rms"):
                eligible["peak read as RMS"].append((i, j))
            if "@" in spec.location and spec.quantity in ("p", "q1", "pf", "phase"):
                eligible["reversed current sensor"].append((i, j))
            if bus_like and spec.quantity == "v_rms":
                eligible["x10 probe setting"].append((i, j))
    plan: dict[tuple[int, int], str] = {}
    for mistake in MISTAKES:
        free = [k for k in eligible[mistake] if k not in plan]
        if not free:
            continue
        i, j = free[int(rng.integers(len(free)))]
        plan[(i, j)] = mistake
        if mistake != "peak read as RMS":  # a sensor set up wrong spoils every reading it takes in that step
            where = runner.template.steps[i].readings[j].location
            plan |= {(i2, j2): mistake for i2, j2 in free if i2 == i and (i2, j2) not in plan
                     and runner.template.steps[i2].readings[j2].location == where}
    return plan


def cmd_demo(args: argparse.Namespace) -> int:
    """Run the demo session; 0 on success, 1 when the files or the archive cannot be used."""
    import numpy as np

    from labkit import __version__
    from labkit.core.cautions import DEFER
    from labkit.core.errors import FileValidationError, LabkitError
    from labkit.session.readings import ChannelFault, predicted_wave_shape
    from labkit.session.runner import Actor, SessionRunner

    try:
        loaded, template = _load(args.template)
    except FileValidationError as exc:
        print(exc, file=sys.stderr)
        return 1
    try:
        from labkit.logbook.sqlite import SQLiteArchive

        archive = SQLiteArchive(args.archive)
    except (ImportError, LabkitError, OSError) as exc:
        print(f"cannot open the archive {args.archive}: {exc}", file=sys.stderr)
        return 1
    b, t = loaded.bench, template.template
    rng = np.random.default_rng(args.seed)
    student, ta = Actor("demo-p01", "student"), Actor("demo-ta1", "ta")
    runner = SessionRunner.create(archive, loaded, template, section="demo-section", group="demo-group",
                                  people=[student.id, "demo-p02"], actor=student, kind="demo",
                                  n_samples=args.samples, seed=args.seed)
    print(f"labkit {__version__}: demo session on the simulated bench (invented demo data)")
    print(f"bench  : {b.bench.title} [{b.bench.id} v{b.bench.version}], cart {b.cart.id if b.cart else '-'}")
    print(f"lab    : {t.template.title} [{t.template.id} v{t.template.version}]")
    print(f"archive: {args.archive} (session {runner.session_id}, kind demo)")
    print(f"note   : {DEFER}")
    runner.open(student)
    plan = _plan_mistakes(runner, rng)
    found: dict[str, float] = {}
    summary: list[dict[str, Any]] = []
    for i, step in enumerate(t.steps):
        view = runner.view()
        print(f"\n{i:2d}. [{step.id}] {step.kind}: {step.title}")
        if view.prediction is None:
            print(f"    cannot be predicted: {view.error}")
        for caution in view.cautions:
            print(f"    ! {caution}")
        for warning in view.warnings:
            print(f"    warning: {warning}")
        print(f"    predicted from: {view.anchor}")
        if view.sync is not None:
            s = view.sync
            print(f"    sync: slip {s.slip_hz:+.3f} Hz, beat {s.beat_period_s:.3g} s, dV {100 * s.dv_running:+.2f} %; "
                  f"{s.verdict_if_closed_now.text}")
        if view.frequency is not None:
            for line in view.frequency.lines:
                print(f"    frequency: {line}")
        if step.kind == "source_start":
            found = _as_found(runner, view, rng)  # typed at this step as read
        for exp in view.expected:
            spec = exp.spec
            mistake = plan.get((i, exp.spec_index), "")
            try:
                parsed = _take(runner, view, exp, mistake, rng, found, ChannelFault, predicted_wave_shape)
                row = runner.record(parsed, actor=student)
            except LabkitError as exc:
                print(f"    {spec.quantity:>9} at {spec.location:<10} not taken: {exc}")
                continue
            pred_text = (f"predicted {exp.predicted:10.4g} {exp.unit} band [{exp.band_low:.4g}, {exp.band_high:.4g}]"
                         if math.isfinite(exp.predicted) else f"no prediction ({exp.missing})")
            print(f"    {spec.quantity:>9} at {spec.location:<10} {pred_text}  tolerance {spec.tolerance}")
            print(f"{'':>27}measured {row['measured']:10.4g} {exp.unit} ({row['obtained']}, entered "
                  f"\"{row['entered']}\"{', ' + row['form'] if row['form'] != 'rms' else ''})  -> {row['verdict']}"
                  + (f"  [injected: {mistake}]" if mistake else ""))
            if row.get("diagnosis"):
                print(f"{'':>27}diagnosis: {row['diagnosis']}")
            summary.append({"step": step.id, "quantity": spec.quantity, "location": spec.location,
                            "predicted": row["predicted"], "measured": row["measured"], "verdict": row["verdict"],
                            "diagnosis": row.get("diagnosis", ""), "mistake": mistake})
        if i < len(t.steps) - 1:
            runner.forward(student)
    runner.submit(student)
    runner.close(ta)
    counts = Counter(r["verdict"] for r in summary)
    print("\nsummary (per step: reading, predicted, measured, verdict, diagnosis)")
    for r in summary:
        pred = f"{r['predicted']:.4g}" if math.isfinite(r["predicted"]) else "-"
        print(f"  {r['step']:<16} {r['quantity']:>9} at {r['location']:<10} {pred:>10} {r['measured']:>10.4g}"
              f"  {r['verdict']:<9} {r['diagnosis'] or ''}")
    print("counts: " + ", ".join(f"{v} {counts.get(v, 0)}" for v in ("accept", "marginal", "outside", "unchecked"))
          + f"; {len(summary)} readings recorded, {sum(1 for r in summary if r['mistake'])} mistakes injected;"
          f" session {runner.state_name}")
    archive.close()
    return 0


def _as_found(runner: Any, view: Any, rng: Any) -> dict[str, float]:
    """Record the source's as-found voltage and frequency: the mains drifts off nominal, a set is read."""
    from labkit.core.bench import MainsReference

    src = runner.bench.source(view.step.source)
    if isinstance(src, MainsReference):
        v = round(float(src.mains_voltage * (1.0 + 0.01 * rng.standard_normal())), 1)
        f = round(float(src.mains_frequency + 0.015 * rng.standard_normal()), 2)
    else:
        loc = next((r.location for r in view.step.readings if r.quantity == "v_rms"), src.bus)
        v = round(float(view.prediction.value(loc, "v_rms") * (1.0 + 0.005 * rng.standard_normal())), 1)
        f = round(float(view.prediction.value(loc, "frequency") + 0.01 * rng.standard_normal()), 2)
    af = runner.set_as_found(f"{v} V", f"{f} Hz")
    print(f"    as found: {af.source} {af.v_rms:.1f} V at {af.location}, {af.frequency_hz:.2f} Hz "
          "(later steps are predicted from these)")
    return {"v_rms": v, "frequency": f}


def _take(runner: Any, view: Any, exp: Any, mistake: str, rng: Any, found: dict[str, float], fault_cls: Any,
          shape_of: Any) -> Any:
    """One reading of the demo: typed as found, simulated, or with its injected mistake."""
    from labkit.session.readings import ReadingError

    spec = exp.spec
    j = exp.spec_index
    if view.step.kind == "source_start" and spec.quantity in found:
        unit = "V" if spec.quantity == "v_rms" else "Hz"
        return runner.parse(j, f"{found[spec.quantity]} {unit}")
    if mistake == "peak read as RMS":
        shape = shape_of(view.prediction, spec.location, spec.quantity, spec.sensor)
        peak = exp.predicted * shape.crest * (1.0 + 0.003 * rng.standard_normal())
        return runner.parse(j, f"{peak:.4g} {exp.unit}")  # the peak, entered as if it were the RMS
    if mistake == "reversed current sensor":
        return runner.simulate(j, faults={f"i@{spec.location}": fault_cls(gain=-1.0)})
    if mistake == "x10 probe setting":
        return runner.simulate(j, faults={f"v@{spec.location}": fault_cls(gain=10.0)})
    if spec.quantity == "i_rms" and rng.random() < 0.5 and math.isfinite(exp.predicted):
        # a scope's peak reading, entered as a peak: converted by the predicted crest factor
        shape = shape_of(view.prediction, spec.location, spec.quantity, spec.sensor)
        peak = exp.predicted * shape.crest * (1.0 + 0.003 * rng.standard_normal())
        return runner.parse(j, f"{peak * 1000:.4g} mA", form="peak")
    try:
        return runner.simulate(j)
    except ReadingError:
        if spec.quantity != "v_rms" or "v_rms" not in found:
            raise
        # nothing predicted here (a calibration against a reference meter): the student types the meter's value
        return runner.parse(j, f"{found['v_rms'] * (1.0 + 0.002 * rng.standard_normal()):.2f} V")
