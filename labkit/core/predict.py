"""Predict every reading of a configuration or a whole template, with Monte Carlo tolerance bands.

Bands are the 5th to 95th percentiles over ``n_samples`` component-tolerance
samples (uniform within each component's tolerance; fixed, recorded seed).
Ratings are checked on true RMS current (harmonics included) at the upper edge
of the band, for the step's final state and for every intermediate state its
switch changes pass through.
"""

from __future__ import annotations

import functools
from concurrent.futures import ThreadPoolExecutor
from contextlib import AbstractContextManager
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import NDArray
from threadpoolctl import ThreadpoolController

from labkit.core.bands import THRESHOLD_SUBSAMPLE, StreamingPercentiles, row_percentiles
from labkit.core.bench import Bench
from labkit.core.defaults import BAND_PERCENTILES, DEFAULT_SAMPLES, DEFAULT_SEED
from labkit.core.errors import LabkitError
from labkit.core.network import Network, NetworkError, compile_network
from labkit.core.results import RowLabel, collect_quantity_rows, quantity_arrays
from labkit.core.solve import Solution, ToleranceDraws, sample_factors, solve_network, thevenin_impedance
from labkit.core.state import BenchState, apply_step, initial_state, intermediate_states
from labkit.core.template import SessionTemplate


@dataclass
class Prediction:
    """Predicted values of one configuration: nominal, band, and what was flagged."""

    labels: list[RowLabel]
    nominal: NDArray[np.float64]
    band_low: NDArray[np.float64]
    band_high: NDArray[np.float64]
    network: Network
    solution: Solution
    warnings: list[str] = field(default_factory=list)
    rating_flags: list[str] = field(default_factory=list)
    seed: int = DEFAULT_SEED
    n_samples: int = 0

    def index(self, location: str, quantity: str) -> int:
        """Row of one location and quantity; KeyError when not predicted."""
        for k, lab in enumerate(self.labels):
            if lab.location == location and lab.quantity == quantity:
                return k
        msg = f"no prediction of {quantity} at {location}"
        raise KeyError(msg)

    def value(self, location: str, quantity: str) -> float:
        """The nominal prediction of one location and quantity."""
        return float(self.nominal[self.index(location, quantity)])

    def reading(self, location: str, quantity: str, sensor: str | None = None) -> tuple[float, float, float]:
        """(predicted, band_low, band_high) as a sensor at ``location`` reads it (its reference direction)."""
        from labkit.core.results import oriented, sensor_direction

        k = self.index(location, quantity)
        direction = sensor_direction(self.network.bench, location, sensor) if "@" in location else 1
        trio = oriented(quantity, np.array([self.nominal[k], self.band_low[k], self.band_high[k]]), direction)
        lo, hi = sorted((float(trio[1]), float(trio[2])))
        return float(trio[0]), lo, hi

    def merge_rows(self, other: Prediction, locations: set[str], note: str) -> None:
        """Append another prediction's rows at ``locations`` (e.g. an open switch before closing)."""
        for k, lab in enumerate(other.labels):
            if lab.location in locations and not any(
                    (x.location, x.quantity) == (lab.location, lab.quantity) for x in self.labels):
                self.labels.append(RowLabel(lab.location, lab.quantity, lab.status, note))
                self.nominal = np.append(self.nominal, other.nominal[k])
                self.band_low = np.append(self.band_low, other.band_low[k])
                self.band_high = np.append(self.band_high, other.band_high[k])


@dataclass
class StepPrediction:
    """The prediction of one template step."""

    index: int
    step_id: str
    kind: str
    state: BenchState
    prediction: Prediction | None
    error: str = ""


def predict_state(bench: Bench, state: BenchState, *, n_samples: int = DEFAULT_SAMPLES, seed: int = DEFAULT_SEED,
                  harmonics: bool = True, band_locations: set[str] | None = None) -> Prediction:
    """Solve one configuration nominally and over tolerance samples.

    ``band_locations`` limits the Monte Carlo band to rows at those locations (the
    places a step reads) plus every ``loading`` row; other rows then carry a NaN band.
    """
    net = compile_network(bench, state)
    # BLAS on the calling thread only: its small products gain nothing from more, and idle BLAS
    # threads spin on the core the band's selection thread needs
    with _one_blas_thread():
        sol = solve_network(net, harmonics=harmonics)
        labels, nominal = quantity_arrays(sol)
        if n_samples > 0 and net.parameters:
            labels_mc, pct = _sampled_band(net, n_samples, seed, harmonics, band_locations, sol)
    low, high = nominal[0].copy(), nominal[0].copy()
    if n_samples > 0 and net.parameters:
        index = {(lab.location, lab.quantity): k for k, lab in enumerate(labels)}
        rows = np.array([index[(lab.location, lab.quantity)] for lab in labels_mc], dtype=np.intp)
        if band_locations is not None:
            low, high = np.full_like(low, np.nan), np.full_like(high, np.nan)
        nom = nominal[0, rows]
        lo, hi = np.where(np.isnan(pct[0]), nom, pct[0]), np.where(np.isnan(pct[1]), nom, pct[1])
        # angles near +-180 would wrap: band them around the nominal value instead
        angle = np.array([lab.quantity.endswith("angle") or lab.quantity == "phase" for lab in labels_mc], dtype=bool)
        with np.errstate(invalid="ignore"):  # NaN rows (a pf of no current) never wrap
            wrap = angle & (np.abs(hi - lo) > 180)
        low[rows] = np.minimum(np.where(wrap, nom - 180, lo), nom)
        high[rows] = np.maximum(np.where(wrap, nom + 180, hi), nom)
    pred = Prediction(labels, nominal[0], low, high, net, sol, list(sol.warnings), [], seed, n_samples)
    pred.rating_flags = _rating_flags(pred, "")
    return pred


BAND_BLOCK = 110_000
"""Sample x element values solved at a time (2,000 samples of a 55-element network): a block's
temporaries stay in cache and in the allocator's reach, where 10,000 samples of such a network at
once fault in fresh memory for every array (measured 2-4 x slower per sample on a two-core
machine); a small network takes bigger blocks, saving per-block overhead."""
BAND_BLOCK_MAX_SAMPLES = 4000  # beyond this the per-sample arrays of the harmonic orders outgrow the caches


def _block_samples(net: Network) -> int:
    return min(max(BAND_BLOCK // max(len(net.elements), 1), 64), BAND_BLOCK_MAX_SAMPLES)


def _sampled_band(net: Network, n: int, seed: int, harmonics: bool, locations: set[str] | None,
                  nominal: Solution | None = None) -> tuple[list[RowLabel], NDArray[np.float64]]:
    """Labels and band percentiles (2, rows) of every predicted quantity over ``n`` tolerance samples.

    Blocks of samples are solved one after another and their rows written into two reused
    buffers (fresh memory is slow to touch); the first (short) block sets the selection's
    thresholds, and each block's rows are selected down to the samples near each band edge.
    A worker thread computes a block's rows while this thread solves the next block and
    selects the block before. When the selection cannot decide a row (a rare sample beyond a
    threshold, or rows that differ between blocks), every sample is solved again and kept
    (:func:`_sampled_rows`). Every block's iterations start from the ``nominal`` solution's
    operating point. Each block's tolerance factors are drawn as it is solved (the numbers of
    :func:`~labkit.core.solve.sample_factors` with ``seed``).
    """
    draws = ToleranceDraws(net, seed)
    step = _block_samples(net)
    # a short first block: its samples set the thresholds, and nothing overlaps its solve
    head = min(THRESHOLD_SUBSAMPLE, step) if n > 2 * THRESHOLD_SUBSAMPLE else step
    starts = [0, *range(head, n, step)]
    stops = [*starts[1:], n]

    def solve(block: slice) -> Solution:  # blocks come in order
        factors = draws.next(block.stop - block.start)
        return solve_network(net, factors, harmonics=harmonics, warm_start=nominal)

    first = collect_quantity_rows(solve(slice(0, min(head, n))), locations)
    labels, layout = first.labels, first.layout
    selector = StreamingPercentiles(first.n_rows, n, BAND_PERCENTILES)
    width = max(stop - start for start, stop in zip(starts, stops, strict=True))
    buffers = [np.empty((first.n_rows, width)) for _ in range(2)]  # one written while the other is read

    def rows_of(sol: Solution, buffer: NDArray[np.float64]) -> NDArray[np.float64] | None:
        rows = collect_quantity_rows(sol, locations)
        return rows.write(buffer[:, : rows.n]) if rows.layout == layout else None

    # a worker thread takes one block's quantities into a buffer while this thread solves the next
    # block and selects the previous one from the other buffer (numpy releases the GIL in both)
    alike = True
    with ThreadPoolExecutor(max_workers=1) as worker:
        done: NDArray[np.float64] | None = first.write(buffers[0][:, : first.n])
        pending = None
        for k, (start, stop) in enumerate(zip(starts[1:], stops[1:], strict=True)):
            sol = solve(slice(start, stop))
            if pending is not None:
                done = pending.result()
                if done is None:
                    alike = False  # a block's rows differ from the first block's
                    break
            pending = worker.submit(rows_of, sol, buffers[(k + 1) % 2])
            if k:
                selector.add(done, starts[k])  # type: ignore[arg-type]
            else:
                selector.start(done)  # type: ignore[arg-type]
        if pending is None:
            selector.start(done)  # type: ignore[arg-type]
        elif alike:
            done = pending.result()
            alike = done is not None
            if done is not None:
                selector.add(done, starts[-1])
        pct = selector.result(worker) if alike else None
    if pct is None:
        labels, values = _sampled_rows(net, sample_factors(net, n, seed), harmonics, locations, nominal)
        pct = row_percentiles(values, BAND_PERCENTILES)
    return labels, pct


@functools.cache
def _blas_controller() -> ThreadpoolController:
    return ThreadpoolController()  # finds the loaded BLAS libraries once (about a millisecond)


def _one_blas_thread() -> AbstractContextManager[object]:
    """A context in which BLAS runs on the calling thread only."""
    return _blas_controller().limit(limits=1, user_api="blas")


def _sampled_rows(net: Network, factors: NDArray[np.float64], harmonics: bool, locations: set[str] | None,
                  nominal: Solution | None = None) -> tuple[list[RowLabel], NDArray[np.float64]]:
    """Every predicted quantity of every tolerance sample, by row (rows, S), solved in blocks (``BAND_BLOCK``).

    Row-major, so that each row's samples are contiguous for the percentile selection.
    """
    n = factors.shape[0]
    labels: list[RowLabel] = []
    out = np.empty((0, 0))
    index: dict[tuple[str, str], int] = {}
    step = _block_samples(net)
    for start in range(0, n, step):
        block = slice(start, min(start + step, n))
        rows = collect_quantity_rows(solve_network(net, factors[block], harmonics=harmonics, warm_start=nominal),
                                     locations)
        if start == 0:
            labels, layout, out = rows.labels, rows.layout, np.empty((rows.n_rows, n))
            index = {(lab.location, lab.quantity): k for k, lab in enumerate(labels)}
        if rows.layout == layout:
            rows.write(out[:, block])
            continue
        # a row that depends on the values (e.g. v_across when no slip): align by name, NaN where absent
        values = rows.matrix()
        out[:, block] = np.nan
        for k, lab in enumerate(rows.labels):
            if (lab.location, lab.quantity) in index:
                out[index[(lab.location, lab.quantity)], block] = values[k]
    return labels, out


def _rating_flags(pred: Prediction, context: str) -> list[str]:
    flags = []
    for k, lab in enumerate(pred.labels):
        if lab.quantity == "loading" and pred.band_high[k] > 100.0:
            flags.append(f"{lab.location} would carry {pred.band_high[k]:.0f} % of its rated current"
                         f" (upper edge of the band){context}")
    return flags


def predict_template(bench: Bench, template: SessionTemplate, *, n_samples: int = DEFAULT_SAMPLES,
                     seed: int = DEFAULT_SEED, harmonics: bool = True) -> list[StepPrediction]:
    """Predict every step of a template, in order (intermediate switch states checked for ratings)."""
    out: list[StepPrediction] = []
    state = initial_state(bench)
    for index, step in enumerate(template.steps):
        before = state
        state = apply_step(bench, state, step)
        try:
            pred = predict_state(bench, state, n_samples=n_samples, seed=seed, harmonics=harmonics)
        except NetworkError as exc:
            out.append(StepPrediction(index, step.id, step.kind, state, None, str(exc)))
            continue
        if step.kind == "synchronize":
            # the closing quantities belong to the moment before the switch closes
            pre = state.with_changes(switches={step.switch: before.switch_closed(step.switch)})
            try:
                pre_pred = predict_state(bench, pre, n_samples=n_samples, seed=seed, harmonics=False)
                pred.merge_rows(pre_pred, {step.switch}, "before closing")
                _add_surge_estimate(bench, step, pre_pred, pred)
            except NetworkError as exc:
                pred.warnings.append(f"the state before closing cannot be solved: {exc}")
        for mid in intermediate_states(before, state):
            try:
                mid_pred = predict_state(bench, mid, n_samples=min(n_samples, 500), seed=seed, harmonics=harmonics)
            except NetworkError as exc:
                pred.rating_flags.append(f"an intermediate switching state cannot be solved: {exc}")
                continue
            changed = _diff(before, mid)
            pred.rating_flags += _rating_flags(mid_pred, f" while switching ({changed} done first)")
        out.append(StepPrediction(index, step.id, step.kind, state, pred))
    return out


def _add_surge_estimate(bench: Bench, step: object, pre: Prediction, pred: Prediction) -> None:
    """First-cycle surge estimate of closing at the limit set's largest phase difference."""
    from labkit.core.bench import AlternatorSet
    from labkit.core.sync import closing_surge_estimate, limit_set

    src = bench.source(step.source)  # type: ignore[attr-defined]
    switch = bench.switch(step.switch)  # type: ignore[attr-defined]
    net = pre.network
    if not isinstance(src, AlternatorSet) or switch.from_bus not in net.bus_node or switch.to_bus not in net.bus_node:
        return
    running_bus = switch.to_bus if switch.from_bus == src.bus else switch.from_bus
    name = step.limits  # type: ignore[attr-defined]
    if name == "bench" and bench.bench.sync_limits is None:
        return
    try:
        limits = limit_set(name, sync_limits=bench.bench.sync_limits, bench_id=bench.bench.id,
                           rating_kva=src.rating / 1000.0)
    except LabkitError as exc:
        pred.warnings.append(f"no surge estimate: {exc}")
        return
    v_in = abs(pre.solution.v[0, 0, net.bus_node[src.bus]])
    v_run = abs(pre.solution.v[0, 0, net.bus_node[running_bus]])
    v_across = abs(v_in - v_run * np.exp(1j * np.radians(limits.max_dphi_deg)))
    estimate = closing_surge_estimate(v_across, src.x_subtransient, thevenin_impedance(net, net.bus_node[running_bus]))
    peak = float(np.asarray(estimate.peak_a).ravel()[0])
    pred.labels.append(RowLabel(switch.id, "surge_peak", "energized",
                                f"estimate at {limits.max_dphi_deg:g} deg ({limits.title}): {estimate.basis}"))
    pred.nominal = np.append(pred.nominal, peak)
    pred.band_low = np.append(pred.band_low, peak)
    pred.band_high = np.append(pred.band_high, peak)


def _diff(before: BenchState, mid: BenchState) -> str:
    parts = []
    for attr in ("switches", "lines", "loads"):
        old, new = dict(getattr(before, attr)), dict(getattr(mid, attr))
        parts += [f"{k}={v}" for k, v in new.items() if old.get(k) != v]
    return ", ".join(parts)
