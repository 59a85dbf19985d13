"""Crest factors of periodic waveforms given by their harmonic phasors, stacked over places and samples.

A waveform is w(theta) = sqrt(2) Re(sum_h X_h e^(j h theta)) over one fundamental period, from its RMS
phasors X_h of the harmonic ``orders``; its RMS is sqrt(sum_h |X_h|^2) (Parseval) and its crest factor
max |w| / RMS. The peak is searched on sampled points and refined by a Newton step
(:func:`sampled_peaks`); it is a value the waveform takes, so it never exceeds the true one.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

SQRT2 = float(np.sqrt(2.0))
ROUNDING = 1e-6  # relative slack of the kept points' bound: the points are compared in single precision
CREST_POINTS = 128  # sampled points per fundamental period (more when the highest order needs them)
SAMPLED_NEWTON_STEPS = 1  # from the parabola's vertex, within one point spacing of it
CREST_POINTS_PER_PERIOD = 16  # at least this many sampled points per period of the highest order
CREST_CHUNK = 4096  # waveforms sampled at a time: (chunk, points) stays a few MB
SAME_WAVEFORM_RTOL = 1e-12  # places whose phasors agree this closely (up to sign) share one crest factor


def crest_factor(x: NDArray[np.complex128], orders: list[int]) -> NDArray[np.float64]:
    """Crest factor (M, S) of waveforms from their RMS harmonic phasors ``x`` (M places, H orders, S samples).

    NaN where the phasors are not finite or the waveform is zero.
    """
    x = np.asarray(x, dtype=complex)
    rms = np.sqrt(np.sum(x.real**2 + x.imag**2, axis=1))
    first = same_waveform_as(x)
    unique = np.flatnonzero(first == np.arange(x.shape[0]))
    peak = np.empty(rms.shape)
    peak[unique] = sampled_peaks(x[unique], orders)
    with np.errstate(invalid="ignore", divide="ignore"):
        crest = peak / rms
    return crest[first]  # a place whose waveform is another's (or its negative) takes its crest factor


def same_waveform_as(x: NDArray[np.complex128]) -> NDArray[np.intp]:
    """For each place of ``x`` (M, H, S), the first place with the same waveforms up to sign
    (within ``SAME_WAVEFORM_RTOL`` of its largest phasor), such as the current at both ends of a
    series switch, or through a source and its line; itself when there is none.

    The crest factor does not change with sign or scale, so such places share one computation.
    """
    m = x.shape[0]
    out = np.arange(m)
    if m < 2 or x.shape[2] == 0:
        return out
    scale = np.max(np.abs(x), axis=(1, 2))
    for place in range(1, m):
        tol = SAME_WAVEFORM_RTOL * scale[place]
        if not (np.isfinite(tol) and tol > 0):
            continue
        for other in range(place):
            if out[other] != other or abs(scale[other] - scale[place]) > 2 * tol:
                continue
            sign = 1.0 if abs(x[place, 0, 0] - x[other, 0, 0]) <= abs(x[place, 0, 0] + x[other, 0, 0]) else -1.0
            if np.max(np.abs(x[place] - sign * x[other])) <= tol:
                out[place] = other
                break
    return out


def sampled_peaks(x: NDArray[np.complex128], orders: list[int]) -> NDArray[np.float64]:
    """Peaks max |w| (M, S) from sampled points of one period, refined by a Newton step.

    The waveform is sampled uniformly (``CREST_POINTS`` points, or ``CREST_POINTS_PER_PERIOD``
    per period of the highest order if more) in single precision: the samples only choose
    where to look (lobes of a twin peak within about 1e-7 of each other may be confused). From
    the vertex of the parabola through the largest sample and its neighbours, a Newton step on
    the waveform's derivative, kept within a point spacing, refines the peak; the peak is the
    larger of the waveform's values at the two angles, evaluated in double precision. Only the
    points where a sample can peak are sampled (:func:`sampled_points`).
    """
    m, h, s = x.shape
    h_arr = np.asarray(orders, dtype=float)
    points = max(CREST_POINTS, CREST_POINTS_PER_PERIOD * max(orders))
    theta = 2 * np.pi * np.arange(points) / points
    # [Re X, Im X] @ sqrt(2) [cos; -sin]: all samples of a chunk of waveforms in one real matrix product
    basis = SQRT2 * np.concatenate([np.cos(h_arr[:, None] * theta), -np.sin(h_arr[:, None] * theta)])
    parts = np.empty((m, s, 2 * h))
    parts[..., :h] = np.swapaxes(x.real, 1, 2)
    parts[..., h:] = np.swapaxes(x.imag, 1, 2)
    coarse = parts.astype(np.float32)
    at = np.empty(m * s)
    spacing = 2 * np.pi / points
    for place in range(m):
        cols = sampled_points(x[place], parts[place], basis)
        where = np.full(points, -1, dtype=np.intp)  # sample point -> its column in the product
        where[cols] = np.arange(cols.size)
        sub = basis[:, cols].astype(np.float32)
        for first in range(0, s, CREST_CHUNK):
            wave = np.abs(coarse[place, first : first + CREST_CHUNK] @ sub)
            rows = np.arange(wave.shape[0])
            k = cols[np.argmax(wave, axis=1)]
            y0 = wave[rows, where[k]].astype(float)
            y_left, y_right = wave[rows, where[k - 1]].astype(float), wave[rows, where[(k + 1) % points]]
            bend = 2 * y0 - y_left - y_right
            with np.errstate(invalid="ignore", divide="ignore"):
                offset = np.where(bend > 0, (y_right - y_left) / (2 * bend), 0.0)
            at[place * s + first : place * s + first + wave.shape[0]] = (
                theta[k] + np.clip(np.nan_to_num(offset), -0.5, 0.5) * spacing)
    # from the parabola's vertex, Newton steps on w'(theta) = 0, within a step of the vertex
    phasors = np.swapaxes(x, 0, 1).reshape(h, m * s)  # (H, waveforms): each order's phasors contiguous
    low, high = at - spacing, at + spacing
    peak = np.full(m * s, -np.inf)
    terms = np.empty_like(phasors)
    for step in range(SAMPLED_NEWTON_STEPS + 1):
        _terms_at(phasors, at, orders, terms)
        np.fmax(peak, SQRT2 * np.abs(terms.sum(axis=0).real), out=peak)
        if step == SAMPLED_NEWTON_STEPS:
            break
        d1 = -(h_arr @ terms).imag  # w' / sqrt(2)
        d2 = -(h_arr**2 @ terms).real  # w'' / sqrt(2)
        with np.errstate(invalid="ignore", divide="ignore"):
            newton = np.where(d2 != 0, d1 / d2, 0.0)
        np.clip(at - np.nan_to_num(newton), low, high, out=at)
    peak[~np.isfinite(phasors).all(axis=0)] = np.nan
    return peak.reshape(m, s)


def sampled_points(x: NDArray, parts: NDArray, basis: NDArray) -> NDArray[np.intp]:
    """The sample points (indices into ``basis``'s columns) where waveforms (H, S) of one place can peak.

    With the mean phasors as reference, a waveform differs from the reference waveform by at most
    its deviation sqrt(2) sum_h |X_h - mean_h| at every angle; its largest sample is at least its
    value at the reference's largest sample. So its largest sample lies where the reference is within
    (that value - deviation) of it: those points, and their neighbours for the parabola, are kept.
    Every point is kept when the samples are spread widely or are not finite.
    """
    points = basis.shape[1]
    reference = x.mean(axis=1)
    ref_wave = np.abs(np.concatenate([reference.real, reference.imag]) @ basis)
    k0 = int(np.argmax(ref_wave))
    deviation = SQRT2 * np.abs(x - reference[:, None]).sum(axis=0)
    floor = float(np.min(np.abs(parts @ basis[:, k0]) - deviation))
    floor -= ROUNDING * float(ref_wave[k0])
    if not np.isfinite(floor):
        return np.arange(points)
    near = ref_wave >= floor
    near |= np.roll(near, 1) | np.roll(near, -1)
    return np.flatnonzero(near)


def _powers(z: NDArray[np.complex128], orders: list[int], out: NDArray[np.complex128] | None = None
            ) -> NDArray[np.complex128]:
    """z**h for each of the increasing ``orders`` (H, len(z)), by multiplication rather than exp/log."""
    out = np.empty((len(orders), z.size), dtype=complex) if out is None else out
    steps: dict[int, NDArray[np.complex128]] = {}
    previous = 0
    for k, order in enumerate(orders):
        gap = order - previous
        if gap not in steps:
            steps[gap] = z if gap == 1 else z**gap
        if k == 0:
            out[0] = steps[gap]
        else:
            np.multiply(out[k - 1], steps[gap], out=out[k])
        previous = order
    return out


def _terms_at(phasors: NDArray[np.complex128], at: NDArray[np.float64], orders: list[int],
              out: NDArray[np.complex128]) -> NDArray[np.complex128]:
    """X_h e^(j h theta) (H, n) of phasors (H, n) at angles ``at`` (n,), written into ``out``
    (reused: fresh arrays of this size cost their page faults on every call)."""
    z = np.cos(at) + 1j * np.sin(at)
    _powers(z, orders, out=out)
    return np.multiply(out, phasors, out=out)
