"""Chain-node elimination (labkit.core.reduction) and the prepared element model, against full solves.

Reference: LAPACK's LU with partial pivoting through ``numpy.linalg.solve`` on the full nodal
admittance matrices (a general-purpose solver outside the project), for random stacked networks
with chains, meshes, parallel elements and shunts; the element model against the
textbook impedance formulas evaluated here with numpy; and tolerance bands that must not depend on how the samples
are blocked.
"""

from __future__ import annotations

import numpy as np
import pytest

from labkit.core import predict
from labkit.core.bench import Bench
from labkit.core.network import NEUTRAL, ElementModel, NetworkError, assemble, compile_network
from labkit.core.predict import predict_state
from labkit.core.reduction import plan_elimination, reduced_solve
from labkit.core.solve import element_arrays, sample_factors
from labkit.core.state import states_after_steps
from labkit.files.loader import load_template
from tests.conftest import DEMO


def _random_network(rng: np.random.Generator) -> tuple[int, np.ndarray, np.ndarray]:
    """A random connected element pattern: a spanning chain, extra mesh links, parallel pairs, shunts."""
    n = int(rng.integers(3, 16))
    a, b = [], []
    for k in range(1, n):  # a random spanning tree keeps every node connected
        a.append(int(rng.integers(0, k)))
        b.append(k)
    for _ in range(int(rng.integers(0, n))):
        u, v = rng.choice(n, 2, replace=False)
        a.append(int(u))
        b.append(int(v))
    for _ in range(int(rng.integers(0, 3))):  # a parallel element, and one whose ends share a node
        k = int(rng.integers(0, len(a)))
        a.append(a[k])
        b.append(b[k])
    a.append(0)
    b.append(0)
    for node in rng.choice(n, int(rng.integers(1, n + 1)), replace=False):
        a.append(int(node))
        b.append(NEUTRAL)
    return n, np.array(a, dtype=np.intp), np.array(b, dtype=np.intp)


def _admittances(rng: np.random.Generator, s: int, e: int) -> np.ndarray:
    # passive elements: conductance >= 0, susceptance of either sign (inductive or capacitive)
    return rng.uniform(0.01, 2.0, (s, e)) + 1j * rng.uniform(-3.0, 3.0, (s, e))


@pytest.mark.parametrize("seed", range(40))
def test_reduced_solve_equals_the_full_lu_solve(seed: int) -> None:
    rng = np.random.default_rng(seed)
    n, a, b = _random_network(rng)
    s = 30
    y = _admittances(rng, s, a.size)
    injected = rng.choice(n, int(rng.integers(1, 3)), replace=False)
    inj = np.zeros((s, n), dtype=complex)
    inj[:, injected] = rng.normal(size=(s, injected.size)) + 1j * rng.normal(size=(s, injected.size))
    plan = plan_elimination(n, a, b, injected)
    v, failed = reduced_solve(plan, y, inj)
    reference = np.linalg.solve(assemble(n, a, b, y), inj[..., None])[..., 0]
    assert not failed.any()
    np.testing.assert_allclose(v, reference, rtol=1e-9, atol=1e-9 * np.abs(reference).max())
    assert plan.n_kept <= n
    assert set(injected.tolist()) <= set(plan.kept.tolist())  # an injected node is never eliminated


def test_weak_pivot_and_singular_members_are_handled_on_their_own() -> None:
    # a chain 0 - 1 - 2 with shunts; node 1 is eliminated
    a = np.array([0, 1, 1, 2, 0], dtype=np.intp)
    b = np.array([1, 2, NEUTRAL, NEUTRAL, NEUTRAL], dtype=np.intp)
    plan = plan_elimination(3, a, b, np.array([0]))
    assert 1 not in plan.kept.tolist()
    rng = np.random.default_rng(7)
    y = _admittances(rng, 4, a.size)
    y[1, 2] = -(y[1, 0] + y[1, 1])  # member 1: node 1's admittances cancel (a resonance): zero pivot
    y[2] = 0.0  # member 2: no admittance at all: singular
    inj = np.zeros((4, 3), dtype=complex)
    inj[:, 0] = 1.0
    v, failed = reduced_solve(plan, y, inj)
    assert failed.tolist() == [False, False, True, False]
    assert np.isnan(v[2]).all()
    for k in (0, 1, 3):  # the others, the resonant one included, as LAPACK with pivoting solves them
        reference = np.linalg.solve(assemble(3, a, b, y[k]), inj[k])
        np.testing.assert_allclose(v[k], reference, rtol=1e-9)


def _demo_networks(bench: Bench) -> list:
    nets = []
    for name in ("lab1-line-and-loads", "lab2-synchronize", "lab3-harmonics"):
        template = load_template(DEMO / f"{name}.toml", bench).template
        for state in states_after_steps(bench, template):
            try:
                nets.append(compile_network(bench, state))
            except NetworkError:  # a state that cannot be compiled has nothing to compare
                continue
    return nets


def _textbook_admittances(kind, r, l, c, y_fixed, omega):  # noqa: E741
    """Series 1 / (R + jwL + 1/(jwC)), parallel 1/R + 1/(jwL) + jwC (absent parts inf, or C = 0 in parallel)."""
    w = np.broadcast_to(omega, r.shape)
    with np.errstate(divide="ignore", invalid="ignore"):
        series = 1.0 / (r + 1j * w * l + np.where(np.isfinite(c), 1.0 / (1j * w * c), 0.0))
        parallel = (np.where(np.isfinite(r), 1.0 / r, 0.0) + np.where(np.isfinite(l), 1.0 / (1j * w * l), 0.0)
                    + 1j * w * c)
    return np.where(kind == 0, series, np.where(kind == 1, parallel, y_fixed))


def test_element_model_equals_the_textbook_formulas(demo_bench: Bench) -> None:
    rng = np.random.default_rng(3)
    nets = _demo_networks(demo_bench)
    assert len(nets) > 10
    for net in nets:
        factors = sample_factors(net, 200, 11)
        arr = element_arrays(net, factors)
        model = ElementModel.from_network(net)
        per_element = rng.uniform(100.0, 2000.0, (200, len(net.elements)))
        for omega in (2 * np.pi * 60, np.full((200, 1), 2 * np.pi * 59.5), per_element):
            expected = _textbook_admittances(arr.kind, arr.r, arr.l, arr.c, arr.y_fixed, omega)
            np.testing.assert_allclose(model.admittances(factors, omega), expected, rtol=1e-13)


@pytest.mark.parametrize("template", ["lab2-synchronize", "lab3-harmonics"])
def test_tolerance_bands_do_not_depend_on_the_sample_blocks(demo_bench: Bench, template: str,
                                                            monkeypatch: pytest.MonkeyPatch) -> None:
    state = states_after_steps(demo_bench, load_template(DEMO / f"{template}.toml", demo_bench).template)[-1]
    monkeypatch.setattr(predict, "BAND_BLOCK", 10**9)
    whole = predict_state(demo_bench, state, n_samples=700, seed=5)
    monkeypatch.setattr(predict, "BAND_BLOCK", 1)  # the smallest blocks: 64 samples
    blocked = predict_state(demo_bench, state, n_samples=700, seed=5)
    assert [lab.location for lab in whole.labels] == [lab.location for lab in blocked.labels]
    np.testing.assert_allclose(blocked.band_low, whole.band_low, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(blocked.band_high, whole.band_high, rtol=1e-9, atol=1e-12)


@pytest.mark.parametrize("n", [1, 2])
def test_small_systems_in_closed_form_equal_lapack(n: int) -> None:
    # the closed-form 1 x 1 and 2 x 2 solves against numpy.linalg.solve (LAPACK gesv), singular members included
    from labkit.core.solve import stacked_solve

    rng = np.random.default_rng(n)
    y = rng.normal(size=(50, n, n)) + 1j * rng.normal(size=(50, n, n))
    y[7] = 0.0  # singular
    if n == 2:
        y[9, 1] = 2.0 * y[9, 0]  # rank one: singular
    i = rng.normal(size=(50, n)) + 1j * rng.normal(size=(50, n))
    v, failed = stacked_solve(y, i)
    singular = {7} | ({9} if n == 2 else set())
    assert set(np.flatnonzero(failed)) <= singular
    assert 7 in set(np.flatnonzero(failed))
    for k in range(50):
        if k in singular:
            assert failed[k] or not np.isfinite(v[k]).all() or np.allclose(y[k] @ v[k], i[k])
            continue
        np.testing.assert_allclose(v[k], np.linalg.solve(y[k], i[k]), rtol=1e-10)
