"""Timing figures of labkit.core.lines on Monte Carlo x harmonic stacks (printed; no timed assertions)."""

from __future__ import annotations

import time

import numpy as np
import pytest

from labkit.core.bench import Bench
from labkit.core.lines import TwoPort, bench_section_values, branch_admittance, position_paths

pytestmark = pytest.mark.benchmark


def best_of(repeats: int, func) -> float:
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        func()
        times.append(time.perf_counter() - start)
    return min(times)


def test_branch_admittance_monte_carlo_by_harmonics(demo_bench: Bench):
    values = bench_section_values(demo_bench)
    rng = np.random.default_rng(1)
    n_samples, omega = 2000, 2 * np.pi * 60.0 * np.arange(1, 26)
    sampled = {k: v.with_values(r=v.r * rng.normal(1, 0.05, n_samples), l=v.l * rng.normal(1, 0.05, n_samples),
                                c=v.c * rng.normal(1, 0.05, n_samples)) for k, v in values.items()}
    for branch_id, position in (("L12", "long"), ("L12", "double"), ("L23", "series")):
        paths = position_paths(demo_bench.branch(branch_id), position, sampled)
        y = branch_admittance(paths, omega)
        assert y.shape == (n_samples, omega.size, 2, 2)
        assert np.all(np.isfinite(y))
        seconds = best_of(3, lambda paths=paths: branch_admittance(paths, omega))
        print(f"\nbranch_admittance {branch_id}/{position}: {n_samples} samples x {omega.size} harmonics "
              f"in {seconds * 1e3:.1f} ms")


def test_power_of_stacked_sections():
    rng = np.random.default_rng(2)
    z = rng.uniform(0.1, 1.0, 100_000) + 1j * rng.uniform(1.0, 3.0, 100_000)
    section = TwoPort.pi(z, 1j * rng.uniform(1e-4, 1e-3, 100_000))
    result = section.power(64)
    assert np.all(np.isfinite(result.abcd))
    seconds = best_of(3, lambda: section.power(64))
    print(f"\nTwoPort.power(64) on a stack of 100000 sections in {seconds * 1e3:.1f} ms")
