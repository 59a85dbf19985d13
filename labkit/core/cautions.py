"""Cautions a step implies, whatever its template says (common practice in teaching labs).

They never replace the lab's own safety procedure, local electrical codes or a
qualified supervisor; :data:`DEFER` says so wherever cautions are shown. A
template can add cautions but cannot remove these.
"""

from __future__ import annotations

from labkit.core.bench import AlternatorSet, Bench, LinearLoad, MainsReference
from labkit.core.state import BenchState

DEFER = ("These notes do not replace the lab's safety rules, local electrical codes or your supervisor; "
         "a prediction never makes a configuration safe.")

MAINS = ("Mains-derived source: the variable transformer does not isolate from the mains, so its output can sit at "
         "mains potential whatever the dial shows. Use differential probes or isolated sensor boards; never clip a "
         "scope ground to the circuit.")
MAINS_ISOLATED = ("Mains-derived source behind an isolation transformer: the circuit is still at hazardous voltage; "
                  "treat every terminal as live.")
ROTATING = ("Rotating machinery: guards closed before starting a set; keep hair, loose clothing and cables away from "
            "belts and shafts; stop and wait for rundown before touching.")
SYNC = ("Closing out of phase drives a large surge through both machines, their couplings and the line. Close only "
        "inside the window the limits allow and only when the supervisor says so; follow the lab's own procedure.")
CHARGE = ("Capacitor banks and line capacitance keep their charge after the supply is removed: discharge them or "
          "wait, and check with a meter, before touching.")
METERS = ("Distorted current: an average-responding meter misreads it; use a true-RMS meter or the sampled capture. "
          "An ammeter goes in series, never across a source; choose its range before connecting.")


def step_cautions(bench: Bench, step: object, state: BenchState, rating_flags: list[str] | None = None) -> list[str]:
    """The cautions the bench and this step imply, then the template's own, then rating flags."""
    out: list[str] = []
    started = [bench.source(s) for s in sorted(state.started)]
    for src in started:
        if isinstance(src, MainsReference):
            out.append(MAINS_ISOLATED if src.transformer.isolating else MAINS)
            break
    if any(isinstance(s, AlternatorSet) for s in started):
        out.append(ROTATING)
    if getattr(step, "kind", "") == "synchronize":
        out.append(SYNC)
    has_capacitance = any(isinstance(ld, LinearLoad) and ld.kind in ("capacitive", "combined")
                          and state.load_step(ld.id) > 0 for ld in bench.loads)
    has_capacitance |= any(state.line_position(b.id) != "open" for b in bench.line_branches)
    if has_capacitance:
        out.append(CHARGE)
    if any(ld.kind == "nonlinear" and state.load_step(ld.id) > 0 for ld in bench.loads):
        out.append(METERS)
    out += list(getattr(step, "cautions", []))
    out += [f"Rating: {flag}. Do not switch this in without the supervisor." for flag in rating_flags or []]
    return out
