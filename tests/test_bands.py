"""Band percentiles taken block by block equal numpy's percentile of all the samples.

Outside reference: ``numpy.percentile`` / ``numpy.nanpercentile`` with the default linear
interpolation (the definition the bands use), on the whole (rows, samples) array at once.
"""

from __future__ import annotations

import warnings
from concurrent.futures import Executor, ThreadPoolExecutor

import numpy as np
import pytest

from labkit.core import predict
from labkit.core.bands import BAND_PERCENTILES, StreamingPercentiles, row_percentiles


def _reference(values: np.ndarray) -> np.ndarray:
    clean = np.where(np.isfinite(values), values, np.nan)
    with warnings.catch_warnings():  # an all-NaN row stays NaN
        warnings.simplefilter("ignore", RuntimeWarning)
        return np.nanpercentile(clean, BAND_PERCENTILES, axis=1)


def _stream(values: np.ndarray, step: int, order: list[int] | None = None, pool: Executor | None = None
            ) -> np.ndarray | None:
    n = values.shape[1]
    selector = StreamingPercentiles(values.shape[0], n)
    starts = list(range(0, n, step))
    selector.start(values[:, :step].copy())
    rest = starts[1:] if order is None else [starts[1:][k] for k in order]
    for start in rest:
        buffer = values[:, start : start + step].copy()
        selector.add(buffer, start)
        buffer[:] = -1.0  # the selector keeps nothing of a block's buffer
    return selector.result(pool)


def _mixed_rows(rng: np.random.Generator, n: int) -> np.ndarray:
    return np.stack([
        rng.normal(120.0, 2.0, n),                 # a bus voltage
        rng.uniform(-1.0, 1.0, n),                 # a uniform tolerance
        rng.standard_cauchy(n),                    # heavy tails
        np.round(rng.normal(0.0, 1.0, n), 1),      # many ties (a quantized reading)
        np.full(n, 60.0),                          # a constant (a frequency)
        -rng.exponential(1.0, n),                  # skewed toward the low tail
        rng.normal(0.0, 1e-12, n),                 # tiny values
        np.where(rng.random(n) < 0.5, 1.0, 2.0),   # two levels only
        rng.normal(1e6, 1e-7, n),                  # a spread of a few hundred rounding steps of its value
    ])


@pytest.mark.parametrize(("n", "step"), [(10_000, 2000), (10_000, 1700), (3000, 1024), (5000, 4000)])
def test_streaming_equals_numpy_percentile(n: int, step: int) -> None:
    values = _mixed_rows(np.random.default_rng(n + step), n)
    got = _stream(values, step)
    assert got is not None
    np.testing.assert_allclose(got, np.percentile(values, BAND_PERCENTILES, axis=1), rtol=1e-14, atol=0)


def test_the_high_tail_on_another_thread_gives_the_same_band() -> None:
    values = _mixed_rows(np.random.default_rng(5), 8000)
    with ThreadPoolExecutor(max_workers=1) as pool:
        threaded = _stream(values, 2000, pool=pool)
        late_nan = values.copy()
        late_nan[0, 6000] = np.nan
        short = _stream(late_nan, 2000, pool=pool)
    assert threaded is not None
    np.testing.assert_array_equal(threaded, _stream(values, 2000))
    np.testing.assert_allclose(threaded, np.percentile(values, BAND_PERCENTILES, axis=1), rtol=1e-14, atol=0)
    assert short is None


def test_block_order_does_not_matter() -> None:
    values = _mixed_rows(np.random.default_rng(3), 9000)
    forward = _stream(values, 1500)
    shuffled = _stream(values, 1500, order=[4, 0, 3, 1, 2])
    assert forward is not None
    assert shuffled is not None
    np.testing.assert_array_equal(forward, shuffled)


def test_non_finite_rows_of_the_first_block_are_ignored_like_nanpercentile() -> None:
    rng = np.random.default_rng(8)
    values = _mixed_rows(rng, 6000)
    values[0, 17] = np.nan   # one NaN sample in the first block
    values[1, 5] = np.inf    # and an inf
    values[2, :] = np.inf    # a beat period of no slip: inf in every sample
    values[3, :] = np.nan    # a power factor of no current
    got = _stream(values, 2000)
    assert got is not None
    np.testing.assert_allclose(got, _reference(values), rtol=1e-14, atol=0)


def test_a_late_non_finite_sample_asks_for_the_plain_way() -> None:
    values = _mixed_rows(np.random.default_rng(9), 6000)
    values[0, 4500] = np.nan  # beyond the first block: the row's ranks would shift
    assert _stream(values, 2000) is None


def test_an_unrepresentative_first_block_asks_for_the_plain_way() -> None:
    rng = np.random.default_rng(10)
    values = rng.normal(size=(3, 8000))
    values[:, 2000:] -= 10.0  # later samples all far below the first block's threshold: fine for the low tail
    values[1, 2000:] += 20.0  # ... but for this row the high tail's candidates come from the first block only
    got = _stream(values, 2000)
    assert got is None or np.allclose(got, np.percentile(values, BAND_PERCENTILES, axis=1))
    values[0, 2000:] += 20.0
    values[2, 2000:] += 20.0
    assert _stream(values, 2000) is None  # every row's low tail now falls short of its threshold


@pytest.mark.parametrize(("n", "step"), [(700, 64), (2000, 2000), (900, 399)])
def test_small_first_blocks_keep_every_row_whole(n: int, step: int) -> None:
    values = _mixed_rows(np.random.default_rng(n), n)
    got = _stream(values, step)
    assert got is not None
    np.testing.assert_allclose(got, np.percentile(values, BAND_PERCENTILES, axis=1), rtol=1e-14, atol=0)


def test_row_percentiles_equal_numpy_percentile() -> None:
    values = _mixed_rows(np.random.default_rng(11), 4321)
    np.testing.assert_allclose(row_percentiles(values.copy()), np.percentile(values, BAND_PERCENTILES, axis=1),
                               rtol=1e-14, atol=0)


def test_blocks_that_do_not_fit_are_refused() -> None:
    selector = StreamingPercentiles(3, 100)
    with pytest.raises(ValueError, match="first block"):
        selector.add(np.zeros((3, 10)), 10)
    with pytest.raises(ValueError, match="does not fit 3 rows"):
        selector.start(np.zeros((2, 10)))
    selector.start(np.zeros((3, 10)))
    with pytest.raises(ValueError, match="10 of 100 samples"):
        selector.result()


def test_prediction_falls_back_to_keeping_every_sample(demo_bench, monkeypatch: pytest.MonkeyPatch) -> None:
    from labkit.core.state import states_after_steps
    from labkit.files.loader import load_template
    from tests.conftest import DEMO

    state = states_after_steps(demo_bench, load_template(DEMO / "lab2-synchronize.toml", demo_bench).template)[-1]
    monkeypatch.setattr(predict, "BAND_BLOCK_MAX_SAMPLES", 1000)
    streamed = predict.predict_state(demo_bench, state, n_samples=5000, seed=4)
    monkeypatch.setattr(StreamingPercentiles, "result", lambda self, pool=None: None)
    plain = predict.predict_state(demo_bench, state, n_samples=5000, seed=4)
    np.testing.assert_array_equal(streamed.band_low, plain.band_low)
    np.testing.assert_array_equal(streamed.band_high, plain.band_high)
