"""Benchmark of the prediction engine (prints figures; no timed assertion).

Targets (issue: prediction engine): array-level solve of one configuration <= 50 us; batched
throughput >= 30 % of the bare stacked solve and >= 200,000 configurations/s on one core; a
10,000-sample band <= 50 ms; tidy output <= 1 ms. Peers measured in the same run: the bare
stacked ``np.linalg.solve`` on the same matrices, pandapower's ``runpp`` on the same network,
ngspice on the same netlist; for the band selection alone, numpy.percentile and numpy.partition
of the same samples.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from labkit.core.bench import Bench
from labkit.core.network import assemble, compile_network
from labkit.core.predict import predict_state
from labkit.core.solve import LinearSystem, solve_network
from labkit.core.state import BenchState, states_after_steps
from labkit.core.switchspace import make_batch, neighbours, search, solve_batch
from labkit.core.tables import prediction_frame
from labkit.files.loader import load_bench, load_template
from labkit.files.spice import spice_netlist

pytestmark = pytest.mark.benchmark
ROOT = Path(__file__).resolve().parents[2] / "session_templates"
CHAINS = {"L12": 4, "L23": 2, "L34": 3, "L45": 2, "L56": 2, "L61": 1}


def benchmark_bench() -> tuple[Bench, BenchState]:
    """Fixed benchmark network: 6 buses + 8 inner pi nodes, 13 switches (generated, not demo data)."""
    buses = [f"B{k}" for k in range(0, 7)]
    data = {
        "bench": {"labkit_bench": 1, "id": "benchmark", "version": "1", "title": "benchmark network",
                  "nominal_frequency": "60 Hz", "nominal_voltage": "120 V"},
        "buses": [{"name": b} for b in buses],
        "sources": [{"id": "REF", "kind": "mains_reference", "bus": "B0", "rating": "2 kVA", "r_internal": "0.3 ohm",
                     "l_internal": "0.5 mH", "mains_voltage": "120 V", "mains_frequency": "60 Hz"}],
        "switches": [], "line_sections": [], "line_branches": [], "loads": [],
    }
    ties = [("B0", "B1"), ("B1", "B3"), ("B2", "B4"), ("B3", "B5"), ("B4", "B6"), ("B1", "B4"), ("B2", "B5"),
            ("B3", "B6"), ("B1", "B5"), ("B2", "B6"), ("B1", "B6"), ("B2", "B3"), ("B4", "B5")]
    for k, (a, b) in enumerate(ties):
        data["switches"].append({"id": f"T{k}", "from_bus": a, "to_bus": b, "rated_current": "10 A"})
    n = 0
    for bid, count in CHAINS.items():
        ids = []
        for _ in range(count):
            n += 1
            ids.append(f"S{n}")
            data["line_sections"].append({"id": f"S{n}", "r": "0.5 ohm", "l": "5 mH", "c": "3 uF",
                                          "rated_current": "5 A", "tolerance": "5 %"})
        a, b = f"B{bid[1]}", f"B{bid[2]}"
        data["line_branches"].append({"id": bid, "from_bus": a, "to_bus": b,
                                      "positions": [{"name": "on", "paths": [ids]}]})
    for k, bus in enumerate(buses[1:], start=1):
        data["loads"].append({"id": f"R{k}", "kind": "resistive", "bus": bus, "rated_current": "3 A",
                              "steps": [{"r": f"{150 + 20 * k} ohm"}]})
        data["loads"].append({"id": f"X{k}", "kind": "inductive", "bus": bus, "combination": "series",
                              "rated_current": "3 A", "steps": [{"r": "3 ohm", "l": f"{0.3 + 0.05 * k} H"}]})
    bench = Bench.model_validate(data)
    state = BenchState(started=frozenset({"REF"}), switches=(("T0", True),),
                       lines=tuple((b, "on") for b in CHAINS), loads=tuple(
                           [(f"R{k}", 1) for k in range(1, 7)] + [(f"X{k}", 1) for k in range(1, 7)]))
    return bench, state


def _best(fn, repeat: int = 7, number: int = 1) -> float:
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        for _ in range(number):
            fn()
        times.append((time.perf_counter() - t0) / number)
    return min(times)


def _array_level(bench: Bench, state: BenchState) -> dict[str, float]:
    """The array-level solve of one configuration (prepared once), and the bare np.linalg.solve floor."""
    net = compile_network(bench, state)
    system = LinearSystem.from_network(net)
    omega = 2 * np.pi * net.frequency_hz
    ymat = np.eye(net.n_nodes, dtype=complex)
    rhs = np.ones(net.n_nodes, dtype=complex)
    return {"nodes": net.n_nodes, "array_solve_us": _best(lambda: system.solve(omega), number=500) * 1e6,
            "bare_single_solve_us": _best(lambda: np.linalg.solve(ymat, rhs), number=500) * 1e6}


def _report(name: str, figures: dict[str, float]) -> None:
    print(f"\nBENCH {name}: " + "; ".join(f"{k} = {v:.4g}" for k, v in figures.items()))


def test_benchmark_prediction_engine() -> None:
    bench, state = benchmark_bench()
    figures = _array_level(bench, state)
    net = compile_network(bench, state)
    figures["switches"] = len(bench.switches)

    # tidy output, on its own
    pred = predict_state(bench, state, n_samples=0)
    figures["tidy_frame_ms"] = _best(lambda: prediction_frame(pred, "s", 0, "free_reading"), number=20) * 1e3

    # batched configurations: every neighbour with up to 2 switch items changed
    states = [s for _, s in neighbours(bench, state, 2)][:4000]
    nets = [compile_network(bench, s) for s in states]
    batch = make_batch(nets)
    emf = np.zeros((len(nets), batch.src_node.shape[1]), dtype=complex)
    emf[:, 0] = 120.0
    t_batch = _best(lambda: solve_batch(batch, emf, 60.0), repeat=3)
    y_el = batch.admittances(2 * np.pi * 60)
    ymat = assemble(batch.n_nodes, batch.a, batch.b, y_el)
    rhs = np.ones((len(nets), batch.n_nodes, 1), dtype=complex)
    t_bare = _best(lambda: np.linalg.solve(ymat, rhs), repeat=3)
    figures["configs"] = len(nets)
    figures["batched_configs_per_s"] = len(nets) / t_batch
    figures["bare_solve_configs_per_s"] = len(nets) / t_bare
    figures["batched_over_bare_pct"] = 100 * t_bare / t_batch

    # the whole switch space search (2 changes, compile + stacked solve + ranking)
    t0 = time.perf_counter()
    search(bench, state, {("B3", "v_rms"): (110.0, 0.5)}, max_changes=2, budget_s=30.0)
    figures["switch_space_search_s"] = time.perf_counter() - t0

    # a 10,000-sample tolerance band of one configuration: every row, and the rows one step reads
    figures["band_10k_all_rows_ms"] = _best(lambda: predict_state(bench, state, n_samples=10_000), repeat=7) * 1e3
    step_locations = {"B3", "B6", "L12@B1", "L34@B3", "R3@B3", "X6@B6"}
    figures["band_10k_step_ms"] = _best(lambda: predict_state(bench, state, n_samples=10_000,
                                                              band_locations=step_locations), repeat=7) * 1e3
    figures.update(_selection_peers(net))
    figures["bare_10k_stacked_solve_ms"] = _best(lambda: np.linalg.solve(
        np.broadcast_to(ymat[:1], (10_000, *ymat.shape[1:])).copy(), np.ones((10_000, ymat.shape[1], 1))),
        repeat=3) * 1e3

    figures.update(_front_end_allocator_bands())
    # peers on the same network
    figures.update(_pandapower_peer(bench, state))
    figures.update(_ngspice_peer(net))
    figures["array_solve_vs_runpp"] = figures.get("pandapower_runpp_ms", np.nan) * 1e3 / figures["array_solve_us"]
    _report("network", figures)


def test_benchmark_demo_bench() -> None:
    bench = load_bench(ROOT / "demo-bench.toml").bench
    template = load_template(ROOT / "lab2-synchronize.toml", bench).template
    state = states_after_steps(bench, template)[-1]  # two sources in parallel, droop roles
    figures = _array_level(bench, state)
    net = compile_network(bench, state)
    figures["role_solve_ms"] = _best(lambda: solve_network(net, harmonics=False), repeat=5) * 1e3
    figures["band_10k_ms"] = _best(lambda: predict_state(bench, state, n_samples=10_000), repeat=3) * 1e3
    # a harmonic step: the nonlinear load's fixed point and its harmonic orders, crest factors included
    harmonic = states_after_steps(bench, load_template(ROOT / "lab3-harmonics.toml", bench).template)[-1]
    figures["band_10k_harmonic_step_ms"] = _best(lambda: predict_state(bench, harmonic, n_samples=10_000),
                                                 repeat=3) * 1e3
    _report("demo_bench", figures)


FRONT_END_BANDS = """
import json, sys, time
sys.path.insert(0, sys.argv[1])
from labkit.lab.allocator import keep_freed_blocks
from test_bench_network import ROOT, benchmark_bench
from labkit.core.predict import predict_state
from labkit.core.state import states_after_steps
from labkit.files.loader import load_bench, load_template
applied = keep_freed_blocks()
bench, state = benchmark_bench()
demo = load_bench(ROOT / "demo-bench.toml").bench
lab2 = states_after_steps(demo, load_template(ROOT / "lab2-synchronize.toml", demo).template)[-1]
lab3 = states_after_steps(demo, load_template(ROOT / "lab3-harmonics.toml", demo).template)[-1]
out = {"front_end_allocator_applied": int(applied)}
for name, (b, s) in {"network": (bench, state), "demo_lab2": (demo, lab2), "demo_lab3_harmonic": (demo, lab3)}.items():
    predict_state(b, s, n_samples=10_000)
    times = []
    for _ in range(5):
        t0 = time.perf_counter()
        predict_state(b, s, n_samples=10_000)
        times.append(time.perf_counter() - t0)
    out[f"band_10k_{name}_front_end_allocator_ms"] = min(times) * 1e3
print(json.dumps(out))
"""


def _front_end_allocator_bands() -> dict[str, float]:
    """The same 10,000-sample bands in a process set up as labkit's front ends set theirs (labkit.lab.allocator)."""
    env = {k: v for k, v in os.environ.items() if not k.startswith("MALLOC_")}
    env.pop("LABKIT_SYSTEM_MALLOC", None)
    out = subprocess.run([sys.executable, "-c", FRONT_END_BANDS, str(Path(__file__).parent)], capture_output=True,
                         text=True, check=True, env=env)
    return json.loads(out.stdout.strip().splitlines()[-1])


def _selection_peers(net) -> dict[str, float]:
    """The band selection alone, on every row's 10,000 samples, against numpy's own selections."""
    from labkit.core.bands import StreamingPercentiles, row_percentiles
    from labkit.core.predict import _block_samples, _sampled_rows
    from labkit.core.solve import sample_factors

    _, values = _sampled_rows(net, sample_factors(net, 10_000, 1), True, None)
    step = _block_samples(net)
    blocks = [np.ascontiguousarray(values[:, k : k + step]) for k in range(0, values.shape[1], step)]

    def streamed() -> None:
        selector = StreamingPercentiles(values.shape[0], values.shape[1])
        selector.start(blocks[0])
        for k, block in enumerate(blocks[1:], start=1):
            selector.add(block, k * step)
        assert selector.result() is not None

    return {"band_rows": values.shape[0],
            "band_selection_streamed_ms": _best(streamed, repeat=7) * 1e3,
            "numpy_partition_rows_ms": _best(lambda: row_percentiles(values.copy()), repeat=7) * 1e3,
            "numpy_percentile_ms": _best(lambda: _numpy_percentile(values), repeat=3) * 1e3}


def _numpy_percentile(values: np.ndarray) -> np.ndarray:
    with np.errstate(invalid="ignore"):  # rows that are inf throughout (a beat period of no slip)
        return np.percentile(values, [5.0, 95.0], axis=1)


def _pandapower_peer(bench: Bench, state: BenchState) -> dict[str, float]:
    try:
        import pandapower as pp
    except ImportError:
        return {}
    netpp = pp.create_empty_network(f_hz=60.0, sn_mva=0.001)
    idx = {b: pp.create_bus(netpp, vn_kv=0.12, name=b) for b in bench.bus_names}
    pp.create_ext_grid(netpp, idx["B0"], vm_pu=1.0)
    for sw in bench.switches:
        pp.create_switch(netpp, idx[sw.from_bus], idx[sw.to_bus], et="b", closed=state.switch_closed(sw.id))
    for br in bench.line_branches:
        for path in br.positions[0].paths:
            prev = idx[br.from_bus]
            for m, sid in enumerate(path):
                sec = bench.section(sid)
                nxt = idx[br.to_bus] if m == len(path) - 1 else pp.create_bus(netpp, vn_kv=0.12)
                pp.create_line_from_parameters(netpp, prev, nxt, 1.0, sec.r, 2 * np.pi * 60 * sec.l, sec.c * 1e9,
                                               5e-3)
                prev = nxt
    for ld in bench.loads:
        st = ld.steps[0]
        z = complex(st.r or 0, 2 * np.pi * 60 * (st.l or 0))
        s = 120.0**2 / np.conj(z)
        # constant-power loads sized at nominal voltage: a timing peer, not a numerical reference
        pp.create_load(netpp, idx[ld.bus], p_mw=s.real * 1e-6, q_mvar=s.imag * 1e-6)
    pp.runpp(netpp)
    return {"pandapower_runpp_ms": _best(lambda: pp.runpp(netpp), repeat=5) * 1e3}


def _ngspice_peer(net) -> dict[str, float]:
    exe = shutil.which("ngspice")
    if exe is None:
        return {}
    from labkit.core.solve import solve_network as solve

    text = spice_netlist(solve(net, harmonics=False)).replace(".print", "*.print")
    path = Path("/tmp/labkit-bench-netlist.cir")
    path.write_text(text)
    t = _best(lambda: subprocess.run([exe, "-b", str(path)], capture_output=True, check=False), repeat=3)
    return {"ngspice_process_ms": t * 1e3}
