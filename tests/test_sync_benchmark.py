"""Timing figures of the synchronization and drive models (printed; no timed assertion)."""

from __future__ import annotations

import math
import time

import numpy as np
import pytest

from labkit.core import frequency as F
from labkit.core import sync as S


@pytest.mark.benchmark
def test_benchmark_sync_and_drive() -> None:
    figures: dict[str, float] = {}
    lim = S.ieee1547_limits(1)
    rng = np.random.default_rng(0)
    n = 1_000_000
    slip, dphi = rng.uniform(-1, 1, n), rng.uniform(-180, 180, n)
    v_in = rng.uniform(100, 140, n)
    t0 = time.perf_counter()
    ok = S.within_limits(slip, v_in, 120.0, dphi, lim, 120.0)["all"]
    across = S.voltage_across_rms(v_in, 120.0, dphi)
    figures["within_limits + v_across, 1e6 configurations (s)"] = time.perf_counter() - t0
    assert ok.shape == across.shape == (n,)

    t = np.arange(0.0, 12.0, 1e-4)
    v1 = math.sqrt(2) * 120 * np.sin(2 * np.pi * 60 * t)
    v2 = math.sqrt(2) * 120 * np.sin(2 * np.pi * 60.25 * t)
    t0 = time.perf_counter()
    beat = S.measure_beat(t, v2, v1)
    figures["measure_beat, 120k samples (s)"] = time.perf_counter() - t0
    assert beat.beat_period_s > 0

    drive = F.DriveSet("G1", 0.08, 2, 60.0, 1000.0, kp=0.4, ki=4.0, torque_limit_nm=6.0, droop=0.05)
    t0 = time.perf_counter()
    r = F.simulate_load_step(drive, 60.0, F.ExponentLoad(67.0, 2, 60.0), F.ExponentLoad(134.0, 2, 60.0), 5.0)
    figures["simulate_load_step, 5 s (s)"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    c = F.simulate_closing(drive, 60.1, 60.0, 5.0, F.synchronizing_power_max(127, 120, 2.0), 5.0,
                           damping_w_per_hz=200.0)
    figures["simulate_closing, 5 s (s)"] = time.perf_counter() - t0
    assert r.time_s.size == c.time_s.size
    for key, value in figures.items():
        print(f"{key}: {value:.3f}")
