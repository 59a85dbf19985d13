"""Cross-check of the phasor network solution against ngspice AC analysis (Debian package ``ngspice``).

Outside reference: ngspice (SPICE3-derived circuit simulator), batch-mode ``.ac``
at the system frequency. Two netlist sources are checked:

- netlists built here, independently of labkit's model construction, straight
  from the bench description (so the network builder is checked, not only the solver);
- the netlists labkit's own exporter writes (``labkit netlist``).

Agreement: bus voltages and branch currents to rtol 1e-6 plus an atol of 1e-9
times the largest value of the case.
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest

from labkit.core.bench import Bench, LinearLoad, MainsReference
from labkit.core.network import compile_network
from labkit.core.results import quantity_arrays
from labkit.core.solve import solve_network
from labkit.core.state import BenchState
from labkit.files.spice import spice_netlist
from tests.network_cases import random_bench

NGSPICE = shutil.which("ngspice")
pytestmark = pytest.mark.skipif(NGSPICE is None and not os.environ.get("CI"),
                                reason="ngspice not installed (CI installs it)")


def _run_ngspice(netlist: str, vectors: list[str], tmp: Path) -> dict[str, complex]:
    assert NGSPICE is not None, "ngspice must be installed in CI"
    out = tmp / "out.txt"
    body = netlist.replace(".end\n", "")
    body = "\n".join(line for line in body.splitlines() if not line.startswith((".ac", ".print")))
    freq = re.search(r"^\.ac lin 1 (\S+)", netlist, re.M)
    f = freq.group(1) if freq else "60"
    # noopac: the circuits are linear, so skip the DC operating point (loops of inductors and 0 V sources)
    control = ["", ".control", "set wr_singlescale", "set wr_vecnames", "option numdgt=15", "option noopac",
               f"ac lin 1 {f} {f}", f"wrdata {out} " + " ".join(vectors), ".endc", ".end", ""]
    cir = tmp / "case.cir"
    cir.write_text(body + "\n".join(control))
    run = subprocess.run([NGSPICE, "-b", str(cir)], capture_output=True, text=True, timeout=60, check=False)
    assert out.exists(), run.stdout + run.stderr
    header, values = out.read_text().splitlines()[:2]
    nums = [float(x) for x in values.split()]
    names = header.split()
    result = {}
    for k, name in enumerate(vectors):
        assert names[1 + 2 * k].lower() == name.lower()
        result[name] = complex(nums[1 + 2 * k], nums[2 + 2 * k])
    return result


def _independent_netlist(bench: Bench, state: BenchState, angles: dict[str, float]) -> tuple[str, list[str]]:
    """A netlist written straight from the bench description; ammeters at every branch end."""
    lines = ["* independent netlist"]
    for src in bench.sources:
        if src.id not in state.started:
            continue
        emf = (src.mains_voltage * src.transformer.ratio * src.transformer.tap_default
               if isinstance(src, MainsReference) else src.emf_rated)
        lines += [f"V{src.id} {src.id}_e 0 AC {emf:.15g} {angles[src.id]:.15g}",
                  f"R{src.id} {src.id}_e {src.id}_m {src.r_internal:.15g}",
                  f"L{src.id} {src.id}_m {src.bus} {src.l_internal:.15g}"]
    for sw in bench.switches:
        if state.switch_closed(sw.id):
            lines.append(f"V{sw.id} {sw.from_bus} {sw.to_bus} DC 0 AC 0")
    ammeters = []
    for br in bench.line_branches:
        pos_name = state.line_position(br.id)
        if pos_name == "open":
            continue
        pos = next(p for p in br.positions if p.name == pos_name)
        a_end, b_end = f"{br.id}_A", f"{br.id}_B"
        lines += [f"VAM{br.id}a {br.from_bus} {a_end} DC 0 AC 0", f"VAM{br.id}b {br.to_bus} {b_end} DC 0 AC 0"]
        ammeters += [f"i(VAM{br.id}a)", f"i(VAM{br.id}b)"]
        for k, path in enumerate(pos.paths):
            prev = a_end
            for m, sid in enumerate(path):
                sec = bench.section(sid)
                nxt = b_end if m == len(path) - 1 else f"{br.id}_p{k}_{m}"
                mid = f"{br.id}_p{k}_{m}_rl"
                lines += [f"R{br.id}_{k}_{m} {prev} {mid} {sec.r:.15g}", f"L{br.id}_{k}_{m} {mid} {nxt} {sec.l:.15g}"]
                if sec.c:
                    lines += [f"C{br.id}_{k}_{m}a {prev} 0 {sec.c / 2:.15g}",
                              f"C{br.id}_{k}_{m}b {nxt} 0 {sec.c / 2:.15g}"]
                prev = nxt
    for ld in bench.loads:
        if state.load_step(ld.id) == 0:
            continue
        assert isinstance(ld, LinearLoad)
        st = ld.steps[state.load_step(ld.id) - 1]
        parts = [(x, getattr(st, y)) for x, y in (("R", "r"), ("L", "l"), ("C", "c")) if getattr(st, y) is not None]
        if ld.combination == "parallel":
            lines += [f"{x}{ld.id} {ld.bus} 0 {v:.15g}" for x, v in parts]
        else:
            nodes = [ld.bus] + [f"{ld.id}_{m}" for m in range(len(parts) - 1)] + ["0"]
            lines += [f"{x}{ld.id}_{m} {nodes[m]} {nodes[m + 1]} {v:.15g}" for m, (x, v) in enumerate(parts)]
    lines += [".ac lin 1 60 60", ".end"]
    return "\n".join(lines) + "\n", ammeters


def _compare(ours: np.ndarray, ref: np.ndarray) -> None:
    atol = 1e-9 * np.max(np.abs(ref))
    np.testing.assert_allclose(ours, ref, rtol=1e-6, atol=atol)


@pytest.mark.parametrize("seed", range(24))
def test_random_networks_match_ngspice(seed: int, tmp_path: Path) -> None:
    bench, state, angles = random_bench(seed)
    net = compile_network(bench, state)
    sol = solve_network(net, given_angles_deg=angles, harmonics=False)
    energized = [b for b in bench.bus_names if b in net.bus_node]
    netlist, ammeters = _independent_netlist(bench, state, angles)
    vectors = [f"v({b})" for b in energized] + ammeters
    ref = _run_ngspice(netlist, vectors, tmp_path)
    v_ours = np.array([sol.v[0, 0, net.bus_node[b]] for b in energized])
    _compare(v_ours, np.array([ref[f"v({b})"] for b in energized]))

    labels, values = quantity_arrays(sol)
    table = {(lab.location, lab.quantity): values[0, k] for k, lab in enumerate(labels)}
    for br in bench.line_branches:
        if state.line_position(br.id) == "open" or br.from_bus not in net.bus_node:
            continue
        for end, bus in (("a", br.from_bus), ("b", br.to_bus)):
            i_ref = ref[f"i(VAM{br.id}{end})"]  # SPICE: current into the + node, i.e. from the bus into the branch
            i_rms, i_angle = table[(f"{br.id}@{bus}", "i_rms")], table[(f"{br.id}@{bus}", "i_angle")]
            i_ours = i_rms * np.exp(1j * np.radians(i_angle))
            atol = 1e-9 * max(abs(ref[a]) for a in ammeters) + 1e-12
            np.testing.assert_allclose(i_ours, i_ref, rtol=1e-6, atol=atol)


@pytest.mark.parametrize("seed", range(24, 32))
def test_exported_netlists_match_ngspice(seed: int, tmp_path: Path) -> None:
    bench, state, angles = random_bench(seed)
    net = compile_network(bench, state)
    sol = solve_network(net, given_angles_deg=angles, harmonics=False)
    energized = [b for b in bench.bus_names if b in net.bus_node]
    ref = _run_ngspice(spice_netlist(sol), [f"v({b})" for b in energized], tmp_path)
    _compare(np.array([sol.v[0, 0, net.bus_node[b]] for b in energized]),
             np.array([ref[f"v({b})"] for b in energized]))


def test_demo_step_netlist_with_droop_roles_matches_ngspice(tmp_path: Path) -> None:
    # the exporter writes solved EMF angles of droop sets; ngspice must reproduce the bus voltages
    from labkit.core.state import states_after_steps
    from labkit.files.loader import load_bench, load_template

    root = Path(__file__).resolve().parent.parent / "session_templates"
    bench = load_bench(root / "demo-bench.toml").bench
    template = load_template(root / "lab2-synchronize.toml", bench).template
    state = states_after_steps(bench, template)[template.index_of("share-load")]
    net = compile_network(bench, state)
    sol = solve_network(net, harmonics=False)
    energized = [b for b in bench.bus_names if b in net.bus_node]
    ref = _run_ngspice(spice_netlist(sol), [f"v({b})" for b in energized], tmp_path)
    _compare(np.array([sol.v[0, 0, net.bus_node[b]] for b in energized]),
             np.array([ref[f"v({b})"] for b in energized]))
