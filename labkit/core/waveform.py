"""Readings from sampled voltage/current captures: frequency, true RMS, phasors, IEEE 1459-2010 powers.

Pure numpy, vectorized over channels and samples; the input is an array shaped
``(channels, samples)`` in physical units (V, A) and the sample rate in Hz.

Method, in order (each step uses every sample of its window, nothing is subsampled):

1. **Frequency** of a reference channel relative to the sample clock: Hann-windowed
   DFT peak with the exact two-bin interpolation of the Hann window, then refined by
   a least-squares regression of the per-cycle fundamental phase on time (per-cycle
   phasors come from a cumulative sum of the demodulated signal, cut at fractional
   cycle boundaries, so each cycle is exactly one period long).
2. **Window**: the largest integer number of cycles that fits; RMS, dc, P are
   trapezoid means over exactly that many periods (fractional end by linear
   interpolation), so a non-integer number of captured cycles does not bias them.
3. **Phasors**: least-squares fit of dc + harmonics 1..H at the estimated frequency
   (complex exponentials, Gram matrix in closed form), so off-nominal frequency and a
   non-integer window do not leak one harmonic into another.
4. **Powers**: IEEE 1459-2010 single-phase quantities (clause 3.1.2) per
   voltage/current pair.

Conventions (:mod:`labkit.core.conventions`): RMS phasors, ``x(t) = sqrt(2)|X|cos(h w t + angle)``;
``phase`` is the current's fundamental angle relative to the voltage's, negative when
the current lags; Q1 > 0 for an inductive load. Harmonic angles in the table are given
against the voltage fundamental of their pair: ``angle_h - h * angle_V1`` (independent
of where the capture starts).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import ArrayLike, NDArray

from labkit.core.conventions import wrap_deg
from labkit.core.errors import CaptureError
from labkit.core.quantities import quantity

if TYPE_CHECKING:
    import pandas as pd

FloatArray = NDArray[np.float64]
ComplexArray = NDArray[np.complex128]

MAX_ORDER = 15
"""Highest harmonic order of the table (and of the least-squares fit)."""
MIN_CYCLES = 3.0
"""Fewest fundamental cycles a capture must hold (common practice: IEEE 1459 Annex B uses 3)."""
MIN_SAMPLES_PER_CYCLE = 6.0
"""Fewest samples per fundamental cycle; fewer is "too near Nyquist" (fs/f < 6: f > fs/6)."""
_HARMONIC_NYQUIST_FRACTION = 0.45  # orders with h*f above 0.45*fs are not resolved (anti-alias margin)
_CHUNK = 8192  # samples per block of the least-squares projections: keeps the basis in cache


@dataclass(frozen=True)
class CaptureWarning:
    """A problem found in a capture that did not stop the analysis; carried in the result.

    ``code`` is one of ``clipped``, ``no_fundamental``, ``dc_unavailable``,
    ``harmonics_above_nyquist``, ``few_cycles``, ``frequency_unstable``.
    """

    code: str
    channel: str
    message: str

    def __str__(self) -> str:
        return f"{self.code} [{self.channel}]: {self.message}"


# --------------------------------------------------------------------------- checks


def _as_channels(x: ArrayLike) -> FloatArray:
    arr = np.asarray(x, dtype=np.float64)
    if arr.ndim == 1:
        arr = arr[np.newaxis, :]
    if arr.ndim != 2:
        msg = f"expected samples shaped (channels, samples), found an array with {arr.ndim} dimensions"
        raise CaptureError(msg)
    return arr


def _channel_names(names: Sequence[str] | None, count: int) -> list[str]:
    if names is None:
        return [f"ch{k}" for k in range(count)]
    if len(names) != count:
        msg = f"expected {count} channel names, found {len(names)}"
        raise CaptureError(msg)
    return [str(n) for n in names]


def check_finite(x: ArrayLike, names: Sequence[str] | None = None) -> None:
    """Refuse NaN or infinite samples, naming the channel and the first bad sample index.

    Raises
    ------
    CaptureError
        When any sample is not finite.
    """
    arr = _as_channels(x)
    bad = ~np.isfinite(arr)
    if bad.any():
        rows = np.flatnonzero(bad.any(axis=1))
        labels = _channel_names(names, arr.shape[0])
        first = int(np.argmax(bad[rows[0]]))
        count = int(bad.sum())
        msg = (f"channel {labels[rows[0]]} has a NaN or infinite sample at index {first} "
               f"({count} non-finite samples in {len(rows)} channel(s)); expected finite numbers")
        raise CaptureError(msg)


def check_time_axis(t: ArrayLike, *, tolerance: float = 0.01) -> float:
    """Check a time column for dropped samples or uneven steps and return the sample rate.

    Parameters
    ----------
    t
        Sample times, s, strictly increasing.
    tolerance
        Largest allowed deviation of one step from the median step, as a fraction of it.

    Returns
    -------
    float
        The sample rate, Hz: (samples - 1) / (last time - first time).

    Raises
    ------
    CaptureError
        On fewer than 2 times, non-increasing times, or a step off the median by more
        than ``tolerance`` (a dropped sample shows as a double step).
    """
    times = np.asarray(t, dtype=np.float64)
    if times.ndim != 1 or times.size < 2:
        msg = f"expected a time column with at least 2 samples, found {times.size}"
        raise CaptureError(msg)
    if not np.isfinite(times).all():
        first = int(np.argmax(~np.isfinite(times)))
        msg = f"time column has a non-finite value at sample {first}"
        raise CaptureError(msg)
    steps = np.diff(times)
    step = float(np.median(steps))
    if step <= 0:
        msg = f"time column is not increasing (median step {step:g} s)"
        raise CaptureError(msg)
    off = np.abs(steps - step) > tolerance * step
    if off.any():
        idx = np.flatnonzero(off)
        first = int(idx[0])
        ratio = steps[first] / step
        kind = (f"{round(ratio) - 1} dropped sample(s)" if ratio > 1.5 and abs(ratio - round(ratio)) < 0.1
                else "an uneven time step")
        msg = (f"time column shows {kind} after sample {first} (t = {times[first]:.9g} s, step "
               f"{steps[first]:.6g} s against the median {step:.6g} s); {idx.size} irregular step(s) in all")
        raise CaptureError(msg)
    return float((times.size - 1) / (times[-1] - times[0]))


def detect_clipping(
    x: ArrayLike,
    *,
    full_scale: ArrayLike | None = None,
    names: Sequence[str] | None = None,
    flat_fraction: float = 0.02,
    extremes: tuple[FloatArray, FloatArray] | None = None,
) -> list[CaptureWarning]:
    """Find channels whose waveform is flat-topped at the converter limits.

    Parameters
    ----------
    x
        Samples, (channels, samples), in the units of ``full_scale``.
    full_scale
        Converter limits per channel: a scalar or (channels,) array ``L`` means
        ``[-L, +L]``; a (channels, 2) array gives ``[low, high]``. With limits, a channel
        is clipped when two or more samples sit at or beyond a limit (within 1e-9 of its span).
    flat_fraction
        Without limits: a channel is clipped when more than this fraction of its samples
        sits exactly on its maximum or on its minimum value, and more than three times what
        the top code of an unclipped sine quantized with the channel's step holds
        (``sqrt(2 q / A) / pi``, analytic for a sine; the factor 3 is common practice).
    extremes
        Per-channel (max, min) when the caller has them already (saves two passes).

    Returns
    -------
    list of CaptureWarning
        One ``clipped`` warning per clipped channel.
    """
    arr = _as_channels(x)
    labels = _channel_names(names, arr.shape[0])
    hi, lo = extremes if extremes is not None else (arr.max(axis=1), arr.min(axis=1))
    out: list[CaptureWarning] = []
    if full_scale is not None:
        fs = np.asarray(full_scale, dtype=np.float64)
        if fs.ndim == 2:
            low, high = fs[:, 0], fs[:, 1]
        else:
            high = np.broadcast_to(np.abs(fs), (arr.shape[0],))
            low = -high
        tol = 1e-9 * (high - low)
        at_high = np.count_nonzero(arr >= (high - tol)[:, None], axis=1)
        at_low = np.count_nonzero(arr <= (low + tol)[:, None], axis=1)
        for k in np.flatnonzero((at_high >= 2) | (at_low >= 2)):
            out.append(CaptureWarning("clipped", labels[k], (
                f"{int(at_high[k] + at_low[k])} samples at the converter limits [{low[k]:g}, {high[k]:g}]; "
                "RMS, peak, harmonics and powers of this channel are wrong")))
        return out
    span = hi - lo
    tol = 1e-12 * np.maximum(span, 1e-300)
    n = arr.shape[1]
    at_high = np.count_nonzero(arr >= (hi - tol)[:, None], axis=1) / n
    at_low = np.count_nonzero(arr <= (lo + tol)[:, None], axis=1) / n
    # a quantized sine of amplitude A and step q holds about sqrt(2 q / A) / pi of its samples on its top code;
    # the step is estimated from the smallest non-zero sample-to-sample change of a leading stretch
    head = np.abs(np.diff(arr[:, : min(n, 50_000)], axis=1))
    step = np.where(head > 0, head, np.inf).min(axis=1)
    step = np.where(np.isfinite(step), step, 0.0)
    expected = np.sqrt(2.0 * step / np.maximum(0.5 * span, 1e-300)) / np.pi
    limit = np.maximum(flat_fraction, 3.0 * expected)
    for k in np.flatnonzero(((at_high > limit) | (at_low > limit)) & (span > 0)):
        out.append(CaptureWarning("clipped", labels[k], (
            f"flat top: {100 * max(at_high[k], at_low[k]):.1f} % of samples sit on one extreme value "
            f"({hi[k]:g} / {lo[k]:g}); the signal is likely clipped or saturated")))
    return out


# --------------------------------------------------------------------------- frequency


def _ramp(omega: float, n: int) -> ComplexArray:
    """``exp(-1j*omega*k)`` for k = 0..n-1, from two short exp tables (an outer product)."""
    block = 4096
    blocks = -(-n // block)
    inner = np.exp(-1j * omega * np.arange(block))
    outer = np.exp(-1j * omega * block * np.arange(blocks))
    return (outer[:, None] * inner[None, :]).ravel()[:n]


def _coarse_frequency(x: FloatArray, sample_rate: float, f_min: float, f_max: float) -> FloatArray:
    """Hann-windowed DFT peak with the exact Hann two-bin interpolation, one frequency per channel."""
    n = x.shape[1]
    window = 0.5 - 0.5 * _ramp(2.0 * np.pi / n, n).real  # periodic Hann: the interpolation below is exact for it
    spectrum = np.abs(np.fft.rfft((x - x.mean(axis=1, keepdims=True)) * window, axis=1))
    bins = np.arange(spectrum.shape[1]) * sample_rate / n
    allowed = (bins >= f_min) & (bins <= f_max)
    allowed[:2] = False
    allowed[-1] = False
    if not allowed.any():
        msg = f"no DFT bin between {f_min:g} and {f_max:g} Hz: the capture is too short"
        raise CaptureError(msg)
    masked = np.where(allowed[None, :], spectrum, -1.0)
    k = masked.argmax(axis=1)
    rows = np.arange(x.shape[0])
    mk = spectrum[rows, k]
    right = spectrum[rows, k + 1]
    left = spectrum[rows, k - 1]
    use_right = right >= left
    alpha = np.where(use_right, right, left) / np.maximum(mk, 1e-300)
    delta = (2.0 * alpha - 1.0) / (alpha + 1.0)  # exact two-bin ratio formula of the Hann window
    delta = np.where(use_right, delta, -delta)
    return (k + delta) * sample_rate / n


def _cycle_phasors(x: FloatArray, sample_rate: float, frequency: float) -> tuple[ComplexArray, FloatArray]:
    """RMS phasors of each whole cycle at ``frequency`` (channels, cycles) and the cycles' centre times, s.

    The demodulated signal is summed over exactly one period per cycle (cumulative sum
    read at fractional boundaries), which nulls the harmonics of ``frequency``.
    """
    n = x.shape[1]
    period = sample_rate / frequency
    cycles = int(np.floor(n / period + 1e-9))
    z = x * _ramp(2.0 * np.pi * frequency / sample_rate, n)[None, :]
    cum = np.concatenate([np.zeros((x.shape[0], 1), complex), np.cumsum(z, axis=1)], axis=1)
    edges = np.arange(cycles + 1) * period
    whole = np.floor(edges).astype(np.int64)
    frac = edges - whole
    at_edges = cum[:, np.minimum(whole, n)] + frac[None, :] * z[:, np.minimum(whole, n - 1)]
    phasors = np.sqrt(2.0) * np.diff(at_edges, axis=1) / period
    centres = (edges[:-1] + 0.5 * period - 0.5) / sample_rate
    return phasors, centres


def _phase_slope_hz(phasors: ComplexArray, centres: FloatArray) -> FloatArray:
    """Least-squares slope of the unwrapped cycle phase against time, as a frequency offset in Hz."""
    phase = np.unwrap(np.angle(phasors), axis=1)
    tc = centres - centres.mean()
    slope = (phase - phase.mean(axis=1, keepdims=True)) @ tc / (tc @ tc)
    return slope / (2.0 * np.pi)


def _track_cycles(
    row: FloatArray, sample_rate: float, frequency: float, passes: int = 3,
) -> tuple[float, ComplexArray, FloatArray]:
    """Refine a frequency by the per-cycle phase regression until it moves less than 1e-4 cycle per capture.

    Returns the frequency, and the per-cycle phasors and centre times of the last pass.
    """
    duration = row.shape[1] / sample_rate
    freq = frequency
    phasors, centres = _cycle_phasors(row, sample_rate, freq)
    for _ in range(passes):
        if phasors.shape[1] < 2:
            break
        step = float(_phase_slope_hz(phasors, centres)[0])
        freq += step
        if abs(step) * duration < 1e-4:
            break
        phasors, centres = _cycle_phasors(row, sample_rate, freq)
    return freq, phasors, centres


def _half_split_step(half_fund: ComplexArray, n: int, sample_rate: float) -> FloatArray:
    """Frequency correction, Hz, from the fundamental angle of the second half-window fit minus the first.

    Both fits refer their angle to the first sample, so the angle difference is the phase a
    frequency error accumulates between the two half-window centres, ``n/2`` samples apart.
    """
    dphi = np.angle(half_fund[:, 1] * np.conj(half_fund[:, 0]))
    return dphi / (2.0 * np.pi * (n // 2) / sample_rate)


def estimate_frequency(
    x: ArrayLike,
    sample_rate: float,
    *,
    f_min: float = 1.0,
    f_max: float | None = None,
    refinements: int = 2,
) -> FloatArray:
    """Fundamental frequency of each channel relative to the sample clock, Hz.

    Three stages: the Hann-windowed DFT peak with two-bin interpolation; the per-cycle phase
    regression; then ``refinements`` passes of a least-squares fit (dc + harmonics to the
    15th) on each half of the capture, whose fundamental-angle difference gives the last
    correction free of harmonic leakage.

    Parameters
    ----------
    x
        Samples, (channels, samples) or (samples,).
    sample_rate
        Sample clock, Hz.
    f_min, f_max
        Search band of the DFT peak, Hz (``f_max`` defaults to 0.45 * sample_rate).
    refinements
        Passes of the half-window least-squares refinement.

    Returns
    -------
    ndarray
        (channels,) frequencies, Hz. On a clean 2 s capture the error is well below 1 mHz.
    """
    arr = _as_channels(x)
    check_finite(arr)
    f_hi = 0.45 * sample_rate if f_max is None else f_max
    freq = _coarse_frequency(arr, sample_rate, f_min, f_hi)
    n = arr.shape[1]
    for k in range(arr.shape[0]):  # each channel has its own demodulation frequency
        row = arr[k:k + 1]
        fk, _, _ = _track_cycles(row, sample_rate, float(freq[k]))
        for _ in range(refinements):
            _, _, half = _fit(row, sample_rate, fk, n, MAX_ORDER, halves=True)
            if half is None:
                break
            fk += float(_half_split_step(half, n, sample_rate)[0])
        freq[k] = fk
    return freq


# --------------------------------------------------------------------------- window means, fit


def _window_terms(y_m: FloatArray, y_next: FloatArray | None, y_0: FloatArray, frac: float) -> FloatArray:
    """Trapezoid area of the partial last segment [m, m + frac] of a window.

    The value at the window end is interpolated from ``y_next``; when the window ends
    after the last sample (an exact integer number of cycles filling the capture) it is the
    first sample's value, since the window is a whole number of periods (``y(L) = y(0)``).
    """
    y_end = y_0 if y_next is None else y_m + frac * (y_next - y_m)
    return 0.5 * frac * (y_m + y_end)


def _window_dot_mean(a: FloatArray, b: FloatArray, length: float) -> FloatArray:
    """Trapezoid mean of ``a * b`` row by row over exactly [0, length] samples (length fractional).

    With ``length`` an integer number of periods this equals the plain mean over those
    samples for periodic content; the einsum avoids an (a*b) temporary.
    """
    n = a.shape[1]
    m = min(int(np.floor(length)), n - 1)
    frac = length - m
    body = np.einsum("ij,ij->i", a[:, :m + 1], b[:, :m + 1]) - 0.5 * (a[:, 0] * b[:, 0] + a[:, m] * b[:, m])
    nxt = a[:, m + 1] * b[:, m + 1] if m + 1 < n else None
    return (body + _window_terms(a[:, m] * b[:, m], nxt, a[:, 0] * b[:, 0], frac)) / length


def _window_mean(y: FloatArray, length: float) -> FloatArray:
    """Trapezoid mean of each row over exactly [0, length] samples (see :func:`_window_dot_mean`)."""
    n = y.shape[1]
    m = min(int(np.floor(length)), n - 1)
    frac = length - m
    body = y[:, :m + 1].sum(axis=1) - 0.5 * (y[:, 0] + y[:, m])
    nxt = y[:, m + 1] if m + 1 < n else None
    return (body + _window_terms(y[:, m], nxt, y[:, 0], frac)) / length


def _projections(arr: FloatArray, omega: float, h: int, start: int, stop: int) -> ComplexArray:
    """``p_k = sum_{n=start}^{stop-1} x[n] exp(-j k w n)``, k = 0..h, per channel (channels, h+1).

    Cache-sized blocks; each block is one real GEMM against the interleaved re/im view of
    the complex basis (no per-sample Python work).
    """
    proj = np.zeros((arr.shape[0], 2 * (h + 1)))
    width = min(_CHUNK, max(stop - start, 1))
    base = np.exp(-1j * omega * np.outer(np.arange(width), np.arange(h + 1)))  # (block, h+1)
    orders = np.arange(h + 1)
    buf = np.empty_like(base)
    for first in range(start, stop, width):
        last = min(first + width, stop)
        rows = last - first
        np.multiply(base[:rows], np.exp(-1j * omega * first * orders)[None, :], out=buf[:rows])
        proj += arr[:, first:last] @ buf[:rows].view(np.float64)
    return proj[:, 0::2] + 1j * proj[:, 1::2]


def _solve_harmonics(p: ComplexArray, omega: float, h: int, start: int, stop: int) -> ComplexArray:
    """Least-squares coefficients a_k, k = -h..h, from the projections of samples [start, stop).

    The Gram matrix ``G[k, l] = sum_n exp(j (l - k) w n)`` is a shifted Dirichlet kernel.
    """
    p_full = np.concatenate([np.conj(p[:, :0:-1]), p], axis=1)  # real input: p_-k = conj(p_k)
    ks = np.arange(-h, h + 1)
    theta = (ks[None, :] - ks[:, None]) * omega
    count = stop - start
    with np.errstate(divide="ignore", invalid="ignore"):
        kernel = (1.0 - np.exp(1j * theta * count)) / (1.0 - np.exp(1j * theta))
    kernel = np.where(np.abs(np.sin(theta / 2.0)) < 1e-12, count + 0j, kernel)
    gram = np.exp(1j * theta * start) * kernel
    return np.linalg.solve(gram, p_full.T).T  # (channels, 2h+1)


def _resolvable_orders(sample_rate: float, frequency: float, max_order: int) -> int:
    orders = int(min(max_order, np.floor(_HARMONIC_NYQUIST_FRACTION * sample_rate / frequency)))
    if orders < 1:
        msg = f"fundamental {frequency:g} Hz is too near the Nyquist frequency {sample_rate / 2:g} Hz"
        raise CaptureError(msg)
    return orders


def _fit(
    arr: FloatArray, sample_rate: float, frequency: float, n: int, max_order: int, *, halves: bool = False,
) -> tuple[ComplexArray, FloatArray, ComplexArray | None]:
    """Harmonic fit over samples [0, n); with ``halves`` also the fundamental of each half window.

    Returns (phasors (channels, max_order), dc (channels,), half_fundamentals (channels, 2) or None).
    The halves share the pass over the data: their projections add up to the full ones.
    """
    omega = 2.0 * np.pi * frequency / sample_rate
    h = _resolvable_orders(sample_rate, frequency, max_order)
    half_fund = None
    if halves and n >= 4 * (2 * h + 1):
        mid = n // 2
        p_a = _projections(arr, omega, h, 0, mid)
        p_b = _projections(arr, omega, h, mid, n)
        p = p_a + p_b
        half_fund = np.stack([_solve_harmonics(p_a, omega, h, 0, mid)[:, h + 1],
                              _solve_harmonics(p_b, omega, h, mid, n)[:, h + 1]], axis=1)
    else:
        p = _projections(arr, omega, h, 0, n)
    coeffs = _solve_harmonics(p, omega, h, 0, n)
    phasors = np.full((arr.shape[0], max_order), np.nan + 0j)
    phasors[:, :h] = np.sqrt(2.0) * coeffs[:, h + 1:]
    return phasors, coeffs[:, h].real, half_fund


def fit_harmonics(
    x: ArrayLike,
    sample_rate: float,
    frequency: float,
    *,
    max_order: int = MAX_ORDER,
    samples: int | None = None,
) -> tuple[ComplexArray, FloatArray]:
    """Least-squares RMS phasors of harmonics 1..max_order and the dc value of each channel.

    The model ``x[n] = sum_{h=-H..H} a_h exp(j h w n)`` (with ``a_-h = conj(a_h)``) is fitted
    over the first ``samples`` samples at the given frequency; the Gram matrix of the
    exponentials is a Dirichlet kernel written in closed form, so a window that is not
    an integer number of cycles, or an off-nominal frequency, costs no leakage.

    Parameters
    ----------
    x
        Samples, (channels, samples).
    sample_rate, frequency
        Hz.
    max_order
        Highest order fitted; orders above 0.45 * sample_rate are left out (NaN).
    samples
        Samples used from the start; default all.

    Returns
    -------
    phasors : ndarray, complex, (channels, max_order)
        RMS phasors of orders 1..max_order, angle at the first sample (t = 0), cos reference.
    dc : ndarray, (channels,)
        The fitted dc value.
    """
    arr = _as_channels(x)
    n = arr.shape[1] if samples is None else int(samples)
    phasors, dc, _ = _fit(arr, sample_rate, frequency, n, max_order)
    return phasors, dc


# --------------------------------------------------------------------------- results


@dataclass(frozen=True, eq=False)
class HarmonicTable:
    """RMS magnitudes and angles of orders 1..15 of every channel.

    ``angle_deg`` is against the pair's voltage fundamental (``angle_h - h * angle_V1``),
    wrapped to (-180, 180]; NaN for orders above the resolvable limit.
    """

    orders: NDArray[np.int64]
    magnitude: FloatArray  # (channels, orders), V or A RMS
    angle_deg: FloatArray  # (channels, orders)

    def thd_from_table(self) -> FloatArray:
        """THD from the table, sqrt(sum_{h>=2} X_h^2) / X_1, per channel (fraction; NaN orders skipped)."""
        mag = self.magnitude
        return np.sqrt(np.nansum(mag[:, 1:] ** 2, axis=1)) / mag[:, 0]


@dataclass(frozen=True)
class PairPowers:
    """IEEE 1459-2010 single-phase quantities of one voltage/current pair (SI; ratios as fractions).

    Field names are the registry names (:mod:`labkit.core.quantities`); clause numbers
    are those of IEEE 1459-2010 clause 3.1.2 as listed in the registry.
    """

    location: str
    voltage: str
    current: str
    frequency: float
    v_rms: float
    i_rms: float
    v1_rms: float
    i1_rms: float
    vh_rms: float
    ih_rms: float
    phase: float
    p: float
    p1: float
    ph: float
    q1: float
    s: float
    s1: float
    sn: float
    di: float
    dv: float
    sh: float
    dh: float
    n: float
    pf: float
    pf1: float
    thd_v: float
    thd_i: float
    thd_v_table: float
    thd_i_table: float
    v_dc: float
    i_dc: float
    crest_v: float
    crest_i: float

    def values(self) -> dict[str, float]:
        """The registered quantities of the pair by name, SI values."""
        skip = {"location", "voltage", "current"}
        return {k: v for k, v in self.__dict__.items() if k not in skip}


@dataclass(frozen=True, eq=False)
class WaveformAnalysis:
    """Everything read from one capture; per-channel arrays in channel order.

    Attributes
    ----------
    frequency
        Fundamental frequency of the reference channel, Hz.
    window_samples
        Length of the analysis window, samples (fractional: an integer number of cycles).
    cycles
        Whole cycles in the window.
    rms, dc, peak
        Per channel over the window (V or A); dc NaN when the acquisition is ac-coupled.
    phasors
        (channels, 15) complex RMS phasors, angle at t = 0 (first sample).
    harmonics
        The harmonic table.
    pairs
        IEEE 1459 quantities per voltage/current pair.
    cycle_times, cycle_rms, cycle_frequency
        Trends: centre time of each cycle (s), per-cycle RMS (channels, cycles), per-cycle
        frequency of the reference channel (Hz).
    warnings
        Problems found that did not stop the analysis.
    """

    channels: tuple[str, ...]
    sample_rate: float
    frequency: float
    window_samples: float
    cycles: int
    rms: FloatArray
    dc: FloatArray
    peak: FloatArray
    phasors: ComplexArray
    harmonics: HarmonicTable
    pairs: tuple[PairPowers, ...]
    cycle_times: FloatArray
    cycle_rms: FloatArray
    cycle_frequency: FloatArray
    warnings: tuple[CaptureWarning, ...] = field(default=())
    dc_available: bool = True

    def pair(self, location: str) -> PairPowers:
        """The pair at ``location``."""
        for p in self.pairs:
            if p.location == location:
                return p
        msg = f'no voltage/current pair at "{location}"; the capture has {[p.location for p in self.pairs]}'
        raise CaptureError(msg)

    def to_frame(self) -> pd.DataFrame:
        """Tidy table: one row per location and quantity, values in the registry unit.

        Columns: ``location``, ``quantity``, ``unit``, ``value``, ``symbol``, ``clause``,
        ``note`` (the codes of the warnings that concern the row's channels).
        """
        import pandas as pd

        rows: list[dict[str, object]] = []
        index = {name: k for k, name in enumerate(self.channels)}
        for pair in self.pairs:
            notes = ",".join(sorted({w.code for w in self.warnings if w.channel in (pair.voltage, pair.current)}))
            values = dict(pair.values())
            values["thd_v_table"] = pair.thd_v_table
            values["thd_i_table"] = pair.thd_i_table
            for prefix, ch in (("v", pair.voltage), ("i", pair.current)):
                k = index[ch]
                for j, order in enumerate(self.harmonics.orders):
                    if order == 1:
                        continue
                    values[f"{prefix}_h{order}"] = float(self.harmonics.magnitude[k, j])
                    values[f"{prefix}_h{order}_angle"] = float(self.harmonics.angle_deg[k, j])
            for name, value in values.items():
                q = quantity(name)
                rows.append({"location": pair.location, "quantity": name, "unit": q.unit,
                             "value": float(value) * q.scale, "symbol": q.symbol, "clause": q.clause,
                             "note": notes})
        return pd.DataFrame(rows, columns=["location", "quantity", "unit", "value", "symbol", "clause", "note"])

    def trends_frame(self) -> pd.DataFrame:
        """Per-cycle trends: ``time_s``, ``frequency_hz`` and one ``<channel>_rms`` column per channel."""
        import pandas as pd

        data: dict[str, FloatArray] = {"time_s": self.cycle_times, "frequency_hz": self.cycle_frequency}
        for k, name in enumerate(self.channels):
            data[f"{name}_rms"] = self.cycle_rms[k]
        return pd.DataFrame(data)


@dataclass(frozen=True)
class Pair:
    """A voltage channel and a current channel measured at one location."""

    voltage: int
    current: int
    location: str = ""


def _cycle_integrals(y: FloatArray, period: float, cycles: int, length: float) -> FloatArray:
    """Trapezoid integrals of each row of ``y`` over each whole cycle, (channels, cycles), sample units.

    Cycle boundaries are fractional (``k * period``); partial end segments are linearly
    interpolated, and past the last sample the signal continues periodically (``y(L) = y(0)``).
    One ``add.reduceat`` pass over the samples; no per-cycle Python loop.
    """
    n = y.shape[1]
    edges = np.arange(cycles + 1) * period
    edges[-1] = length
    m = np.minimum(np.floor(edges).astype(np.int64), n - 1)
    frac = edges - m
    y_m = y[:, m]
    y_next = np.where((m + 1 < n)[None, :], y[:, np.minimum(m + 1, n - 1)], y[:, :1])
    tail = frac * (y_m + 0.5 * frac * (y_next - y_m))  # area from sample m to the edge
    inner = np.add.reduceat(y[:, :m[-1] + 1], m[:-1] + 1, axis=1)  # sum of y over (m_k, m_{k+1}]
    return inner - 0.5 * (y_m[:, 1:] - y_m[:, :-1]) + tail[:, 1:] - tail[:, :-1]


def _safe_sqrt_diff(a: FloatArray | float, b: FloatArray | float) -> FloatArray:
    """sqrt(a^2 - b^2), 0 where rounding makes the difference slightly negative."""
    return np.sqrt(np.maximum(np.square(a) - np.square(b), 0.0))


def analyze(
    x: ArrayLike,
    sample_rate: float,
    pairs: Sequence[Pair | tuple[int, int]],
    *,
    names: Sequence[str] | None = None,
    reference: int | None = None,
    delays_s: ArrayLike | None = None,
    full_scale: ArrayLike | None = None,
    ac_coupled: bool = False,
    min_cycles: float = MIN_CYCLES,
    min_fundamental_snr_db: float = 20.0,
    strict: bool = False,
    f_min: float = 1.0,
) -> WaveformAnalysis:
    """Analyse a capture: frequency, true RMS, harmonic table, IEEE 1459-2010 powers, trends.

    Parameters
    ----------
    x
        Samples in physical units (V, A), (channels, samples).
    sample_rate
        Hz.
    pairs
        Voltage/current channel pairs (channel indices), one per measured location.
    names
        Channel names (default ``ch0``, ``ch1``...).
    reference
        Channel whose frequency is the capture's (default: the first pair's voltage).
    delays_s
        Per-channel delay of the samples behind true time, s (sensor or converter skew);
        the phasor angles are corrected by ``+h*w*delay`` and P by the same correction of the
        fitted content.
    full_scale
        Converter limits for the clipping check (see :func:`detect_clipping`).
    ac_coupled
        The acquisition removes dc (a sound card): dc quantities are reported unavailable (NaN).
    min_cycles
        Fewest fundamental cycles accepted.
    min_fundamental_snr_db
        A channel whose fundamental is less than this far above the per-bin noise floor
        (residual power * 2 / samples) has "no fundamental": its angle-based quantities are NaN.
    strict
        Raise :class:`CaptureError` on any warning instead of carrying it.
    f_min
        Lowest fundamental frequency searched, Hz.

    Raises
    ------
    CaptureError
        NaN samples, fewer than ``min_cycles`` cycles, a fundamental too near Nyquist, bad pairs.
    """
    arr = _as_channels(x)
    labels = _channel_names(names, arr.shape[0])
    if not np.isfinite(arr.sum(axis=1)).all():  # one cheap pass; the detailed scan only when it fails
        check_finite(arr, labels)
    if sample_rate <= 0 or not np.isfinite(sample_rate):
        msg = f"expected a positive sample rate in Hz, found {sample_rate}"
        raise CaptureError(msg)
    pair_list = [p if isinstance(p, Pair) else Pair(int(p[0]), int(p[1])) for p in pairs]
    for p in pair_list:
        for role, ch in (("voltage", p.voltage), ("current", p.current)):
            if not 0 <= ch < arr.shape[0]:
                msg = f"{role} channel index {ch} is outside the capture's {arr.shape[0]} channels"
                raise CaptureError(msg)
    n = arr.shape[1]
    if n < 16:
        msg = f"capture has {n} samples; expected at least {min_cycles:g} fundamental cycles"
        raise CaptureError(msg)
    ref = (pair_list[0].voltage if pair_list else 0) if reference is None else int(reference)
    hi, lo = arr.max(axis=1), arr.min(axis=1)
    warnings: list[CaptureWarning] = detect_clipping(arr, full_scale=full_scale, names=labels, extremes=(hi, lo))

    ref_row = arr[ref:ref + 1]
    f_coarse = float(_coarse_frequency(ref_row, sample_rate, f_min, 0.45 * sample_rate)[0])
    if sample_rate / f_coarse < MIN_SAMPLES_PER_CYCLE:
        msg = (f"fundamental {f_coarse:.6g} Hz of channel {labels[ref]} is too near the Nyquist frequency "
               f"({sample_rate / 2:g} Hz): {sample_rate / f_coarse:.2f} samples per cycle, expected at least "
               f"{MIN_SAMPLES_PER_CYCLE:g}")
        raise CaptureError(msg)
    held = n * f_coarse / sample_rate
    if held < min_cycles * (1.0 - 1e-6):
        msg = (f"capture holds {held:.2f} cycles of {f_coarse:.4g} Hz ({n} samples at {sample_rate:g} Hz); "
               f"expected at least {min_cycles:g} cycles")
        raise CaptureError(msg)
    freq, cyc_ph, centres = _track_cycles(ref_row, sample_rate, f_coarse)
    # per-cycle frequency trend from the phase step between successive cycles (at the demodulation frequency)
    f_demod = 1.0 / (centres[1] - centres[0]) if centres.size > 1 else freq
    dphi = np.angle(cyc_ph[0, 1:] * np.conj(cyc_ph[0, :-1]))
    cycle_frequency = f_demod + dphi * f_demod / (2.0 * np.pi)
    cycle_frequency = np.concatenate([cycle_frequency[:1], cycle_frequency]) if cycle_frequency.size else \
        np.full(cyc_ph.shape[1], freq)

    period = sample_rate / freq
    cycles = int(np.floor(n / period + 1e-6))
    fit_samples = min(int(np.floor(cycles * period)) + 1, n)
    phasors, _, half = _fit(arr, sample_rate, freq, fit_samples, MAX_ORDER, halves=True)
    if half is not None:  # last correction, free of harmonic leakage: half-window fits of the reference
        step = float(_half_split_step(half[ref:ref + 1], fit_samples, sample_rate)[0])
        freq += step
        window_s = fit_samples / sample_rate
        # a frequency error leaks into the fitted magnitudes to first order, roughly (error * window) / cycles
        if abs(step) * window_s / max(cycles, 1) > 1e-8:
            phasors, _, _ = _fit(arr, sample_rate, freq, fit_samples, MAX_ORDER)
    period = sample_rate / freq
    cycles = int(np.floor(n / period + 1e-6))
    length = min(cycles * period, float(n))
    sq = arr * arr
    per_cycle = _cycle_integrals(sq, period, cycles, length)
    rms = np.sqrt(np.maximum(per_cycle.sum(axis=1) / length, 0.0))
    cycle_rms = np.sqrt(np.maximum(per_cycle / period, 0.0))
    del sq
    dc_window = _window_mean(arr, length)
    peak = np.maximum(hi, -lo)
    resolved = int(np.sum(np.isfinite(phasors[0].real)))
    if resolved < MAX_ORDER:
        warnings.append(CaptureWarning("harmonics_above_nyquist", "*", (
            f"orders above {resolved} exceed 0.45 x the sample rate; left out of the harmonic table "
            "(THD still counts all non-fundamental content)")))
    if delays_s is not None:
        delays = np.broadcast_to(np.asarray(delays_s, dtype=float), (arr.shape[0],))
        orders = np.arange(1, MAX_ORDER + 1)
        rot = np.exp(1j * 2.0 * np.pi * freq * orders[None, :] * delays[:, None])
        corrected = phasors * rot
    else:
        corrected = phasors

    # noise floor: residual power after dc and fitted harmonics, spread over n/2 bins
    fitted_power = np.nansum(np.abs(phasors) ** 2, axis=1) + dc_window**2
    residual = np.maximum(rms**2 - fitted_power, 0.0)
    floor = residual * 2.0 / length
    fund_power = np.abs(phasors[:, 0]) ** 2
    no_fund = fund_power < floor * 10 ** (min_fundamental_snr_db / 10.0)
    no_fund |= np.abs(phasors[:, 0]) <= 1e-12 * np.maximum(rms, 1e-300)

    dc = np.full(arr.shape[0], np.nan) if ac_coupled else dc_window
    if ac_coupled:
        warnings.append(CaptureWarning("dc_unavailable", "*", (
            "the acquisition is ac-coupled (e.g. a sound card): v_dc and i_dc are unavailable and "
            "VH/IH exclude any dc the signal had")))

    mag = np.abs(corrected)
    orders = np.arange(1, MAX_ORDER + 1)
    angle_abs = np.degrees(np.angle(corrected))
    rel_ref = np.full(arr.shape[0], np.angle(corrected[ref, 0], deg=True))
    for p in pair_list:  # each pair's channels are referred to that pair's voltage fundamental
        rel_ref[[p.voltage, p.current]] = angle_abs[p.voltage, 0]
    angle_rel = wrap_deg(angle_abs - orders[None, :] * rel_ref[:, None])
    angle_rel = np.where(np.isfinite(mag), angle_rel, np.nan)
    table = HarmonicTable(orders=orders, magnitude=mag, angle_deg=angle_rel)
    thd_table = table.thd_from_table()

    results: list[PairPowers] = []
    for idx, p in enumerate(pair_list):
        v, i = p.voltage, p.current
        location = p.location or f"{labels[v]}/{labels[i]}"
        v_rms, i_rms = float(rms[v]), float(rms[i])
        p_time = float(_window_dot_mean(arr[v:v + 1], arr[i:i + 1], length)[0])
        vp, ip = corrected[v], corrected[i]
        if delays_s is not None:  # replace the fitted content's share of P by its skew-corrected value
            raw = np.nansum((phasors[v] * np.conj(phasors[i])).real)
            p_time = p_time - raw + float(np.nansum((vp * np.conj(ip)).real))
        v1, i1 = float(abs(vp[0])), float(abs(ip[0]))
        s1_complex = vp[0] * np.conj(ip[0])
        fund_ok = not (no_fund[v] or no_fund[i])
        for ch in (v, i):
            if no_fund[ch] and not any(w.code == "no_fundamental" and w.channel == labels[ch] for w in warnings):
                warnings.append(CaptureWarning("no_fundamental", labels[ch], (
                    f"no fundamental above the noise floor (fundamental {np.sqrt(fund_power[ch]):.3g}, "
                    f"broadband residual {np.sqrt(residual[ch]):.3g} RMS): the channel looks like noise only; "
                    "phase, P1, Q1, S1, PF1 and the distortion powers are not given")))
        nan = float("nan")
        vh = float(_safe_sqrt_diff(v_rms, v1))
        ih = float(_safe_sqrt_diff(i_rms, i1))
        s = v_rms * i_rms
        if fund_ok:
            p1, q1 = float(s1_complex.real), float(s1_complex.imag)
            s1 = v1 * i1
            phase = float(wrap_deg(np.angle(ip[0], deg=True) - np.angle(vp[0], deg=True)))
            ph = p_time - p1
            sh = vh * ih
            vals = {
                "phase": phase, "p1": p1, "q1": q1, "s1": s1, "ph": ph,
                "sn": float(_safe_sqrt_diff(s, s1)), "di": v1 * ih, "dv": vh * i1, "sh": sh,
                "dh": float(_safe_sqrt_diff(sh, ph)), "pf1": p1 / s1 if s1 > 0 else nan,
                "thd_v": vh / v1 if v1 > 0 else nan, "thd_i": ih / i1 if i1 > 0 else nan,
            }
        else:
            vals = dict.fromkeys(("phase", "p1", "q1", "s1", "ph", "sn", "di", "dv", "sh", "dh", "pf1"), nan)
            vals["thd_v"] = vh / v1 if not no_fund[v] and v1 > 0 else nan
            vals["thd_i"] = ih / i1 if not no_fund[i] and i1 > 0 else nan
        results.append(PairPowers(
            location=location if location else f"pair{idx}", voltage=labels[v], current=labels[i],
            frequency=freq, v_rms=v_rms, i_rms=i_rms, v1_rms=v1, i1_rms=i1, vh_rms=vh, ih_rms=ih,
            phase=vals["phase"], p=p_time, p1=vals["p1"], ph=vals["ph"], q1=vals["q1"], s=s, s1=vals["s1"],
            sn=vals["sn"], di=vals["di"], dv=vals["dv"], sh=vals["sh"], dh=vals["dh"],
            n=float(_safe_sqrt_diff(s, p_time)), pf=p_time / s if s > 0 else nan, pf1=vals["pf1"],
            thd_v=vals["thd_v"], thd_i=vals["thd_i"],
            thd_v_table=float(thd_table[v]) if not no_fund[v] else nan,
            thd_i_table=float(thd_table[i]) if not no_fund[i] else nan,
            v_dc=float(dc[v]), i_dc=float(dc[i]),
            crest_v=float(peak[v] / v_rms) if v_rms > 0 else nan,
            crest_i=float(peak[i] / i_rms) if i_rms > 0 else nan,
        ))

    if held < 2 * min_cycles:
        warnings.append(CaptureWarning("few_cycles", labels[ref], (
            f"only {held:.2f} cycles: trends and the frequency have little averaging")))
    if strict and warnings:
        msg = "capture rejected (strict): " + "; ".join(str(w) for w in warnings)
        raise CaptureError(msg)
    return WaveformAnalysis(
        channels=tuple(labels), sample_rate=float(sample_rate), frequency=freq, window_samples=length,
        cycles=cycles, rms=rms, dc=dc, peak=peak, phasors=corrected, harmonics=table, pairs=tuple(results),
        cycle_times=centres, cycle_rms=cycle_rms, cycle_frequency=cycle_frequency,
        warnings=tuple(warnings), dc_available=not ac_coupled,
    )

