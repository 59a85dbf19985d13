"""Evaluation of the reading diagnosis on a seeded simulated set: every mistake class x noise level x demo step.

The readings a student would enter are synthesized here from the core solution (a tolerance
sample of the demo bench stands for the real bench), independently of labkit.session.diagnosis:
waveforms are rebuilt from the solved harmonic phasors with numpy at 4096 points per period and a
random start phase, and the meter's view is computed from the samples (peak = max |x|,
peak-to-peak = max - min, average-responding = pi / (2 sqrt 2) x mean |x| (textbook: the form factor
of a sine, 1.1107), DC mode = mean x). Each case is kept only when the mistake makes a reading fail
the verdict rule (labkit.session.verdict), since an invisible mistake is not one to diagnose.

Targets (from the task): top-1 correct >= 90 % and false diagnoses on correct readings <= 2 %.
A tie that contains the true class counts as correct (the readings cannot tell the tied classes
apart; e.g. 0 V at a live bus fits a DC-mode meter, an open switch upstream and a sensor at a dead
bus alike); printed as well are the strict rate (the true class alone on top) and the shared rate
(a tie of k classes credited 1/k, as if the teaching assistant checked one of them at random).
"""

from __future__ import annotations

import math
import time
from collections import Counter, defaultdict
from dataclasses import dataclass

import numpy as np
import pytest

from labkit.core.bench import Bench
from labkit.core.network import NetworkError, compile_network
from labkit.core.predict import StepPrediction, predict_template
from labkit.core.quantities import quantity
from labkit.core.results import end_current_phasors, oriented, quantity_arrays, sensor_direction
from labkit.core.solve import Solution, sample_factors, solve_network
from labkit.core.switchspace import neighbours
from labkit.core.template import ReadingSpec
from labkit.files.loader import load_template
from labkit.session.diagnosis import CODES, NONE, Reading, diagnose
from labkit.session.verdict import template_tolerance, verdict
from tests.conftest import DEMO

TEMPLATES = ("lab1-line-and-loads", "lab2-synchronize", "lab3-harmonics")
NOISE_LEVELS = (0.002, 0.005, 0.01)  # of reading, plus rounding to the instrument's resolution
CASES_PER_CELL = 4  # cases per (class, noise level), drawn from every applicable reading of every step
SEED = 20240611
AVG_GAIN = math.pi / (2 * math.sqrt(2))  # textbook form factor of a sine, 1.1107
POINTS = 4096
# Readings added to the lab 3 steps for this evaluation (a 2 % bench meter on the distorted line currents):
# the template's own readings of distorted signals hide an average-responding meter's error inside
# their instrument tolerance, so without them that class would have no visible case.
EXTRA_CURRENTS = {("lab3-harmonics", "nonlinear-on"): ("L23@B2", "L13@B1"),
                  ("lab3-harmonics", "capacitor-on"): ("L23@B2", "L13@B1"),
                  ("lab3-harmonics", "lose-l13"): ("CB@B3",)}
DEBUG = False


@dataclass
class Site:
    """One step with its readings, a tolerance-sampled 'real bench' solution and its table."""

    template: str
    step: StepPrediction
    specs: list
    solution: Solution
    table: dict


def _true_table(sol: Solution) -> dict:
    labels, values = quantity_arrays(sol)
    return {(lab.location, lab.quantity): float(values[0, k]) for k, lab in enumerate(labels)}


def _true_value(bench: Bench, table: dict, location: str, qn: str) -> float:
    v = table.get((location, qn), 0.0 if quantity(qn).kind in ("voltage", "current", "active_power",
                                                                 "reactive_power", "apparent_power") else math.nan)
    direction = sensor_direction(bench, location) if "@" in location else 1
    return float(oriented(qn, np.array([v]), direction)[0])


def _wave(bench: Bench, sol: Solution, location: str, qn: str, rng: np.random.Generator) -> np.ndarray:
    """The signal a v_rms / i_rms reading sees, sampled over one period from a random start phase."""
    net = sol.network
    if qn == "v_rms":
        x = sol.v[0, :, net.bus_node[location]] if location in net.bus_node else np.zeros(len(sol.orders))
    else:
        element, _, bus = location.partition("@")
        x = end_current_phasors(sol, warn=False).get((element, bus), np.zeros((1, len(sol.orders))))[0]
        x = x * sensor_direction(bench, location)
    t = (np.arange(POINTS) / POINTS + rng.uniform()) % 1.0
    orders = np.asarray(sol.orders, dtype=float)
    return np.sqrt(2) * np.real(x[:, None] * np.exp(2j * np.pi * orders[:, None] * t[None, :])).sum(axis=0)


def _sensor(bench: Bench, location: str):
    kind = "current" if "@" in location else "voltage"
    return next((s for s in bench.sensors if s.kind == kind and any(p.location == location for p in s.placements)),
                None)


def _tolerance(bench: Bench, spec, predicted: float, value: float) -> float:
    tol = template_tolerance(spec.tolerance, spec.quantity, predicted)
    if tol is not None:
        return tol
    sensor = _sensor(bench, spec.location)
    q = quantity(spec.quantity)
    if sensor is None or q.kind != sensor.kind:
        return 0.0
    acc = sensor.accuracy
    return acc.reading * abs(value) + acc.full_scale * sensor.range + acc.digits * acc.resolution


def _noisy(bench: Bench, location: str, qn: str, value: float, level: float, rng: np.random.Generator) -> float:
    kind = quantity(qn).kind
    if kind == "frequency":  # a frequency counter: 5 mHz, whatever the amplitude noise (common practice)
        return round(value + 0.005 * rng.standard_normal(), 3)
    if kind == "angle":  # a phase reading: 0.3 deg (common practice)
        return round(value + 0.3 * rng.standard_normal(), 1)
    value = value * (1 + level * rng.standard_normal())
    sensor = _sensor(bench, location)
    if sensor is not None and quantity(qn).kind == sensor.kind:
        return round(value / sensor.accuracy.resolution) * sensor.accuracy.resolution
    return float(f"{value:.4g}")


def _sites(bench: Bench) -> list[Site]:
    sites = []
    for name in TEMPLATES:
        template = load_template(DEMO / f"{name}.toml", bench).template
        for k, (sp, step) in enumerate(zip(predict_template(bench, template, n_samples=400), template.steps,
                                           strict=True)):
            specs = [r for r in step.readings if not r.location.startswith("sensor:")]
            if sp.prediction is None or not specs:
                continue
            for loc in EXTRA_CURRENTS.get((name, step.id), ()):
                if any(lab.location == loc and lab.quantity == "i_rms" for lab in sp.prediction.labels):
                    specs.append(ReadingSpec(quantity="i_rms", location=loc, unit="A", tolerance="2 %"))
            net = sp.prediction.network
            sol = solve_network(net, sample_factors(net, 1, SEED + 17 * k + len(name)))
            sites.append(Site(name, sp, specs, sol, _true_table(sol)))
    return sites


def _readings(bench: Bench, site: Site, values: dict[int, float], level: float,
              rng: np.random.Generator) -> tuple[list[Reading], list[str]]:
    """Noisy readings (values given per spec index override the true ones) and their verdicts."""
    pred = site.step.prediction
    out, verdicts = [], []
    for k, spec in enumerate(site.specs):
        nom, lo, hi = pred.reading(spec.location, spec.quantity)
        true = values.get(k, _true_value(bench, site.table, spec.location, spec.quantity))
        slip = 1.0
        if isinstance(true, tuple):  # (true value, unit-prefix factor applied to the displayed digits)
            true, slip = true
        if not math.isfinite(true):  # a row of the moment before a switch closes (slip): as predicted
            true = nom
        m = _noisy(bench, spec.location, spec.quantity, true, level, rng) * slip
        tol = _tolerance(bench, spec, nom, m)
        out.append(Reading(spec.location, spec.quantity, m, tolerance=tol))
        verdicts.append(verdict(m, lo, hi, tol, predicted=nom, angle=quantity(spec.quantity).kind == "angle"))
    return out, verdicts


def _mistakes(bench: Bench, site: Site, code: str, rng: np.random.Generator) -> list[dict[int, float]]:
    """Every way this mistake can be made in this step: true values of the affected readings, per spec index."""
    sol, table, specs = site.solution, site.table, site.specs
    true = [_true_value(bench, table, s.location, s.quantity) for s in specs]
    out: list[dict[int, float]] = []
    for k, spec in enumerate(specs):
        qn, loc = spec.quantity, spec.location
        kind = quantity(qn).kind
        if code in ("peak_as_rms", "peak_to_peak_as_rms", "average_meter_distortion", "dc_mode_on_ac") \
                and qn in ("v_rms", "i_rms"):
            x = _wave(bench, sol, loc, qn, rng)
            rms = np.sqrt(np.mean(x**2))
            if code == "average_meter_distortion" and abs(AVG_GAIN * np.mean(np.abs(x)) / max(rms, 1e-300) - 1) < 0.01:
                continue  # on a (near) sine an average-responding meter is right: no mistake to find
            shown = {"peak_as_rms": np.max(np.abs(x)), "peak_to_peak_as_rms": np.max(x) - np.min(x),
                     "average_meter_distortion": AVG_GAIN * np.mean(np.abs(x)),
                     "dc_mode_on_ac": np.mean(x)}[code]
            out.append({k: float(shown)})
        elif code == "probe_x10" and qn in ("v_rms", "i_rms", "p", "q1"):
            out.append({k: true[k] * (10.0 if rng.uniform() < 0.5 else 0.1)})
        elif code == "unit_prefix_x1000" and kind in ("voltage", "current", "active_power", "reactive_power"):
            out.append({k: (true[k], 1000.0 if rng.uniform() < 0.5 else 1e-3)})
        elif code == "wrong_location" and all(s.location != loc for s in specs[:k]):
            sensor = _sensor(bench, loc)  # the sensor elsewhere: every reading it takes here moves with it
            if sensor is None:
                continue
            for p in sensor.placements:
                if p.location == loc:
                    continue
                d = sensor_direction(bench, p.location, sensor.id) if "@" in p.location else 1
                moved = {j: table.get((p.location, s.quantity), math.nan) for j, s in enumerate(specs)
                         if s.location == loc}
                if all(math.isfinite(v) for v in moved.values()):
                    out.append({j: float(oriented(specs[j].quantity, np.array([v]), d)[0]) for j, v in moved.items()})
        elif code == "channels_swapped" and qn == "v_rms":
            for j, other in enumerate(specs):  # the current channel of this step read as voltage
                if other.quantity == "i_rms":
                    i_sensor, v_sensor = _sensor(bench, other.location), _sensor(bench, loc)
                    out.append({k: true[j] * i_sensor.scale / v_sensor.scale})
        elif code == "channels_swapped" and qn == "i_rms":
            bus = loc.partition("@")[2]
            i_sensor, v_sensor = _sensor(bench, loc), _sensor(bench, bus)
            out.append({k: _true_value(bench, table, bus, "v_rms") * v_sensor.scale / i_sensor.scale})
        elif code == "channels_swapped" and qn in ("q1", "phase"):
            out.append({k: -true[k]})
    if code == "reversed_current_sensor":  # every signed reading the sensor at that place takes flips
        for loc in sorted({s.location for s in specs if "@" in s.location}):
            flip = {k: (true[k] + 180.0 if quantity(s.quantity).kind == "angle" else -true[k])
                    for k, s in enumerate(specs)
                    if s.location == loc and s.quantity in ("p", "q1", "pf", "p1", "pf1", "phase", "i_angle")}
            if flip:
                out.append(flip)
    if code == "switch_mismatch":  # the bench in a neighbouring configuration: every reading changes
        state = site.step.state
        for _changes, wrong in neighbours(bench, state, 1):
            try:
                wnet = compile_network(bench, wrong)
                wsol = solve_network(wnet, sample_factors(wnet, 1, SEED))
            except NetworkError:
                continue
            wtable = _true_table(wsol)
            notes = {(lab.location, lab.quantity): lab.note for lab in site.step.prediction.labels}
            values = {k: _true_value(bench, wtable, s.location, s.quantity) for k, s in enumerate(specs)
                      if notes.get((s.location, s.quantity)) != "before closing"}  # slip: before the switch
            if all(math.isfinite(v) for v in values.values()):  # a dead place gives no pf: not readable
                out.append(values)
    return out


@pytest.mark.slow
def test_diagnosis_evaluation(demo_bench: Bench) -> None:
    started = time.perf_counter()
    rng = np.random.default_rng(SEED)
    sites = _sites(demo_bench)
    pool = {code: [(site, m) for site in sites for m in _mistakes(demo_bench, site, code, rng)] for code in CODES}
    confusion: dict[str, Counter] = defaultdict(Counter)
    strict = Counter()
    shared: Counter = Counter()
    total = Counter()
    invisible = Counter()
    for code in CODES:
        for level in NOISE_LEVELS:
            order = rng.permutation(len(pool[code]))
            done = 0
            for idx in order:
                if done >= CASES_PER_CELL:
                    break
                site, values = pool[code][idx]
                readings, verdicts = _readings(demo_bench, site, values, level, rng)
                affected = [k for k in values if verdicts[k] == "outside"]
                if not affected:  # the mistake hides inside the band, or only makes a reading marginal
                    invisible[code] += 1
                    continue
                result = diagnose(demo_bench, site.step.state, site.step.prediction, readings)
                diag = result[-1] if code == "switch_mismatch" or len(values) > 1 else result[affected[0]]
                top = diag.codes
                if DEBUG and code not in top:
                    print("MISS", code, site.template, site.step.step_id, values,
                          [(r.location, r.quantity, r.measured) for r in readings], verdicts, diag.code, diag.text)
                label = code if code in top else diag.code.split(",")[0]
                confusion[code][label] += 1
                strict[code] += top == (code,)
                shared[code] += (code in top) / len(top)
                total[code] += 1
                done += 1
    mistakes_s = time.perf_counter() - started
    # correct readings: no diagnosis expected
    false, unexplained, n_correct = Counter(), Counter(), 0
    for level in NOISE_LEVELS:
        for site in sites:
            for _ in range(2):
                readings, _ = _readings(demo_bench, site, {}, level, rng)
                for d in diagnose(demo_bench, site.step.state, site.step.prediction, readings)[:-1]:
                    n_correct += 1
                    if any(c in CODES for c in d.codes):  # a mistake named that was not made
                        false[d.code] += 1
                    elif d.code != NONE:
                        unexplained[d.code] += 1

    print("\nDiagnosis evaluation (seed", SEED, "; noise", NOISE_LEVELS, "of reading + resolution)")
    print(f"{'true class':26s} {'cases':>5s} {'top-1':>6s} {'strict':>6s} {'shared':>6s} {'invisible':>9s}"
          "  diagnosed as")
    correct_all = strict_all = n_all = 0
    shared_all = 0.0
    for code in CODES:
        n = total[code]
        ok = confusion[code][code]
        correct_all, strict_all, n_all = correct_all + ok, strict_all + strict[code], n_all + n
        shared_all += shared[code]
        others = ", ".join(f"{c}: {v}" for c, v in confusion[code].most_common() if c != code)
        print(f"{code:26s} {n:5d} {100 * ok / max(n, 1):5.0f}% {100 * strict[code] / max(n, 1):5.0f}% "
              f"{100 * shared[code] / max(n, 1):5.0f}% {invisible[code]:9d}  {others}")
    print(f"{'all mistakes':26s} {n_all:5d} {100 * correct_all / n_all:5.1f}% {100 * strict_all / n_all:5.1f}% "
          f"{100 * shared_all / n_all:5.1f}%")
    rate = sum(false.values()) / n_correct
    print(f"time: {mistakes_s:.1f} s for the mistake cases (with set-up), "
          f"{time.perf_counter() - started - mistakes_s:.1f} s for the correct readings")
    print(f"correct readings: {n_correct}, false diagnoses {100 * rate:.2f} % {dict(false)}; "
          f"outside their band with no mistake named (the bench sample beyond band + tolerance): {dict(unexplained)}")
    assert all(total[c] > 0 for c in CODES), total
    assert correct_all / n_all >= 0.90
    assert rate <= 0.02
