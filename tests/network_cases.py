"""Random bench networks for the solver's cross-checks (generated test inputs, not demo data)."""

from __future__ import annotations

import numpy as np

from labkit.core.bench import Bench
from labkit.core.state import BenchState


def random_bench(seed: int) -> tuple[Bench, BenchState, dict[str, float]]:
    """A random bench (2-6 buses, 1-3 sources, meshes, parallel sections, mixed loads, open switches).

    Returns the bench, a state with every source started, and given EMF angles (degrees).
    """
    rng = np.random.default_rng(seed)
    n_bus = int(rng.integers(2, 7))
    buses = [f"N{k}" for k in range(1, n_bus + 1)]
    data: dict = {
        "bench": {"labkit_bench": 1, "id": f"random-{seed}", "version": "t", "title": "generated test network",
                  "nominal_frequency": "60 Hz", "nominal_voltage": "120 V"},
        "buses": [{"name": b} for b in buses],
        "sources": [], "switches": [], "line_sections": [], "line_branches": [], "loads": [],
    }
    n_src = int(rng.integers(1, 4))
    for k in range(n_src):
        common = {"id": f"SRC{k}", "bus": str(rng.choice(buses)), "rating": "1 kVA",
                  "r_internal": f"{rng.uniform(0.1, 2):.6f} ohm", "l_internal": f"{rng.uniform(0.5, 8):.6f} mH"}
        if k == 0:
            data["sources"].append({**common, "kind": "mains_reference",
                                    "mains_voltage": f"{rng.uniform(100, 130):.4f} V", "mains_frequency": "60 Hz"})
        else:
            data["sources"].append({**common, "kind": "alternator_set", "emf_rated": f"{rng.uniform(100, 130):.4f} V",
                                    "rated_frequency": "60 Hz", "x_subtransient": "0.5 ohm", "pole_pairs": 2,
                                    "inertia": "0.05 kg*m^2",
                                    "speed_control": {"mode": "droop", "droop": "5 %", "kp": "0.4 N*m*s",
                                                      "ki": "4 N*m", "torque_limit": "6 N*m", "setpoint_min": "57 Hz",
                                                      "setpoint_max": "63 Hz", "setpoint_default": "60 Hz"}})
    # a spanning tree plus extra edges for meshes
    edges = [(buses[int(rng.integers(0, k))], buses[k]) for k in range(1, n_bus)]
    for _ in range(int(rng.integers(0, 3))):
        a, b = rng.choice(n_bus, size=2, replace=False)
        edges.append((buses[a], buses[b]))
    lines: dict[str, str] = {}
    sec_count = 0
    for k, (a, b) in enumerate(edges):
        n_sec = int(rng.integers(1, 4))
        ids = []
        for _ in range(n_sec):
            sec_count += 1
            sid = f"S{sec_count}"
            ids.append(sid)
            data["line_sections"].append({"id": sid, "r": f"{rng.uniform(0.05, 2):.6f} ohm",
                                          "l": f"{rng.uniform(0.5, 10):.6f} mH", "c": f"{rng.uniform(0, 20):.6f} uF",
                                          "rated_current": "5 A"})
        positions = [{"name": "chain", "paths": [ids]}]
        if n_sec >= 2:
            half = n_sec // 2
            positions.append({"name": "split", "paths": [ids[:half], ids[half:]]})
        bid = f"L{k}"
        data["line_branches"].append({"id": bid, "from_bus": a, "to_bus": b, "positions": positions})
        lines[bid] = str(rng.choice([p["name"] for p in positions]))
    # switches between random bus pairs; some open
    switches: dict[str, bool] = {}
    pairs: set[tuple[int, int]] = set()
    for k in range(int(rng.integers(0, 3))):
        a, b = sorted(rng.choice(n_bus, size=2, replace=False))
        if (a, b) in pairs:  # two closed switches in parallel split their current arbitrarily
            continue
        pairs.add((a, b))
        sid = f"SW{k}"
        data["switches"].append({"id": sid, "from_bus": buses[a], "to_bus": buses[b], "rated_current": "10 A"})
        switches[sid] = bool(rng.random() < 0.5)
    if edges and rng.random() < 0.3:
        lines[f"L{int(rng.integers(0, len(edges)))}"] = "open"
    loads: dict[str, int] = {}
    for k, bus in enumerate(buses):
        kind = rng.choice(["resistive", "inductive", "capacitive", "combined_parallel", "combined_series", "none"])
        lid = f"LD{k}"
        if kind == "none":
            continue
        if kind == "resistive":
            step = {"r": f"{rng.uniform(50, 500):.6f} ohm"}
            entry = {"kind": "resistive"}
        elif kind == "inductive":
            step = {"r": f"{rng.uniform(1, 10):.6f} ohm", "l": f"{rng.uniform(0.1, 1):.6f} H"}
            entry = {"kind": "inductive", "combination": "series"}
        elif kind == "capacitive":
            step = {"c": f"{rng.uniform(2, 30):.6f} uF"}
            entry = {"kind": "capacitive"}
        elif kind == "combined_parallel":
            step = {"r": f"{rng.uniform(50, 500):.6f} ohm", "l": f"{rng.uniform(0.2, 2):.6f} H",
                    "c": f"{rng.uniform(1, 10):.6f} uF"}
            entry = {"kind": "combined", "combination": "parallel"}
        else:
            step = {"r": f"{rng.uniform(20, 200):.6f} ohm", "l": f"{rng.uniform(0.1, 0.5):.6f} H",
                    "c": f"{rng.uniform(20, 80):.6f} uF"}
            entry = {"kind": "combined", "combination": "series"}
        data["loads"].append({"id": lid, "bus": bus, "rated_current": "3 A", "steps": [step], **entry})
        loads[lid] = 1
    bench = Bench.model_validate(data)
    state = BenchState(started=frozenset(s["id"] for s in data["sources"]),
                       switches=tuple(sorted(switches.items())), lines=tuple(sorted(lines.items())),
                       loads=tuple(sorted(loads.items())))
    angles = {s["id"]: float(rng.uniform(-20, 20)) if k else 0.0 for k, s in enumerate(data["sources"])}
    return bench, state, angles
