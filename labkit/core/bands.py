"""Exact band percentiles of many rows of tolerance samples, taken block by block.

:func:`row_percentiles` is the plain exact method: numpy's linear interpolation
between order statistics, found by partitioning each row. :class:`StreamingPercentiles`
gives the same numbers without holding every sample: the first block of samples fixes,
for each row and tail, a threshold safely beyond the percentile (a few standard errors of
the sample quantile); each later block keeps only the samples beyond the thresholds (about
a tenth), and the order statistics of those are the exact order statistics of the whole
set. Vectorized comparisons over the blocks replace most of the (branchy, slow)
partitioning of full rows.
"""

from __future__ import annotations

import math
import warnings
from concurrent.futures import Executor

import numpy as np
from numpy.typing import NDArray

from labkit.core.defaults import BAND_PERCENTILES


def row_percentiles(by_row: NDArray[np.float64], percentiles: tuple[float, ...] = BAND_PERCENTILES
                    ) -> NDArray[np.float64]:
    """The percentiles of each row of ``by_row`` (rows, S), as ``numpy.percentile`` (linear interpolation).

    Non-finite samples are ignored. The array is reordered in place: one partition per row
    finds the order statistics; rows holding NaN or inf take the slower NaN-aware path.
    Returns (len(percentiles), rows).
    """
    n = by_row.shape[1]
    out = np.full((len(percentiles), by_row.shape[0]), np.nan)
    if n == 0:
        return out
    bad_rows = ~np.isfinite(by_row).all(axis=1)
    lo, hi, frac = _ranks(n, percentiles)
    kth = np.unique(np.concatenate([lo, hi]))
    rest = by_row[bad_rows]  # a copy, taken before the partition reorders the rows
    by_row.partition(kth, axis=1)
    out[:] = (by_row[:, lo] * (1 - frac) + by_row[:, hi] * frac).T
    if rest.size:
        rest[~np.isfinite(rest)] = np.nan
        with warnings.catch_warnings():  # rows that are NaN in every sample (a pf of no current) stay NaN
            warnings.simplefilter("ignore", RuntimeWarning)
            out[:, bad_rows] = np.nanpercentile(rest, percentiles, axis=1)
    return out


def _ranks(n: int, percentiles: tuple[float, ...]) -> tuple[NDArray[np.intp], NDArray[np.intp], NDArray]:
    pos = np.array(percentiles, dtype=float) / 100.0 * (n - 1)
    lo = np.floor(pos).astype(np.intp)
    return lo, np.ceil(pos).astype(np.intp), pos - lo


STREAM_MIN_FIRST_BLOCK = 400
"""Fewer first-block samples than this make thresholds too loose to pay: every row is kept whole."""
THRESHOLD_SUBSAMPLE = 512  # first-block samples the thresholds are taken from
REACH_SHORTFALL = 1e-12  # relative: the one-pass test of both tails errs towards keeping samples
THRESHOLD_SIGMAS = 5.0
"""How far beyond the percentile a threshold sits, in standard errors of the subsample's rank: a
row's candidates then fall short with probability about 3e-7 (then :meth:`result` says so)."""


class StreamingPercentiles:
    """Exact percentiles of ``n_rows`` rows of ``n_samples`` samples that arrive as column blocks.

    :meth:`start` takes the first block (thresholds come from it); :meth:`add` takes the
    others, in any order (each block's candidates are found on their own). A row whose
    first block holds non-finite values, or many ties at a threshold (a constant row, say),
    is kept whole and goes through :func:`row_percentiles`. Every other row keeps only its
    candidates: the samples at or below its low threshold and at or above its high one.
    :meth:`result` returns None when some such row's candidates did not reach its
    percentile, or when it met a non-finite sample in a later block; the caller then
    computes the band the plain way.
    """

    def __init__(self, n_rows: int, n_samples: int, percentiles: tuple[float, ...] = BAND_PERCENTILES) -> None:
        self.n_rows, self.n = n_rows, n_samples
        self.percentiles = tuple(percentiles)
        self.lo_rank, self.hi_rank, self.frac = _ranks(n_samples, self.percentiles)
        self._low = np.array([p < 50.0 for p in self.percentiles], dtype=bool)
        self._whole = np.ones(n_rows, dtype=bool)  # rows kept whole
        self._whole_values = np.empty((0, 0))
        self._thresholds = np.full((2, n_rows, 1), np.nan)  # low and high tail threshold per row
        self._blocks: list[tuple[int, list[tuple[NDArray[np.intp], NDArray[np.float64]]]]] = []
        self._failed = False
        self._started = False
        self._both_tails = False
        self._centre = np.full((n_rows, 1), np.nan)  # of the thresholds, set by start()
        self._reach = np.full((n_rows, 1), np.nan)
        self._buffers: tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.bool_]] | None = None

    def start(self, block: NDArray[np.float64]) -> None:
        """The first (n_rows, b) block: thresholds from its samples, then its candidates."""
        self._check(block)
        b = block.shape[1]
        s = min(b, THRESHOLD_SUBSAMPLE)
        finite = np.isfinite(block).all(axis=1)
        low_p = [p for p in self.percentiles if p < 50.0]
        high_p = [p for p in self.percentiles if p >= 50.0]
        # 0-based ranks in the subsample: from the bottom for the low tail, from the top for the high one
        j = [self._threshold_rank(max(low_p) / 100, s) if low_p else None,
             self._threshold_rank(1 - min(high_p) / 100, s) if high_p else None]
        self._whole = ~finite
        if b >= self.n or s < STREAM_MIN_FIRST_BLOCK or max(k or 0 for k in j) >= s // 2:
            self._whole[:] = True  # one block, or too few samples to bracket: keep every row
        else:
            sub = np.where(finite[:, None], block[:, :s], 0.0)  # rows with NaN are kept whole anyway
            at = [j[0], None if j[1] is None else s - 1 - j[1]]  # positions of the thresholds, ascending order
            sub.partition(sorted(k for k in at if k is not None), axis=1)
            for tail in (0, 1):
                if at[tail] is None:
                    continue
                thr = sub[:, at[tail] : at[tail] + 1]
                self._thresholds[tail] = thr
                # many ties at a threshold (a constant row) would keep nearly every sample
                head = block[:, :s]
                count = np.count_nonzero(head <= thr if tail == 0 else head >= thr, axis=1)
                self._whole |= count > 2 * (j[tail] + 1)  # type: ignore[operator]
        self._thresholds[:, self._whole] = np.nan  # NaN thresholds select nothing
        self._both_tails = bool(low_p and high_p)
        low_thr, high_thr = self._thresholds
        self._centre = (low_thr + high_thr) / 2
        self._reach = (high_thr - low_thr) / 2 * (1 - REACH_SHORTFALL)
        self._whole_values = np.empty((int(self._whole.sum()), self.n))
        self._started = True
        self.add(block, 0)

    def add(self, block: NDArray[np.float64], offset: int) -> None:
        """A later (n_rows, b) block whose samples are numbers ``offset`` to ``offset + b - 1``.

        The block is read, not kept: its buffer may be reused afterwards. Not for two threads
        at once (the selection's work arrays are reused).
        """
        if not self._started:
            msg = "the first block goes to start()"
            raise ValueError(msg)
        self._check(block)
        b = block.shape[1]
        whole = self._whole
        if whole.any():
            self._whole_values[:, offset : offset + b] = block[whole]
        tails: list[tuple[NDArray[np.intp], NDArray[np.float64]]] = []
        if not whole.all():
            if offset and not np.isfinite(block.sum(axis=1)[~whole]).all():  # NaN or inf: its row sum is not finite
                self._failed = True  # a row kept by candidates met NaN or inf: its ranks would shift
                self._blocks.append((b, tails))
                return
            flat = np.ascontiguousarray(block)
            bounds = np.arange(self.n_rows + 1) * b
            if self._both_tails:
                # one pass finds both tails' samples: |x - centre| >= reach, from the centre and half-width
                # of the thresholds (the reach a little short, so rounding only adds samples); the sign of
                # x - centre then tells the tails apart. For each tail this keeps all the samples beyond
                # some value, so the order statistics found are the exact ones.
                signed, distance, beyond = self._scratch(flat.shape)
                np.subtract(flat, self._centre, out=signed)
                np.abs(signed, out=distance)
                at = np.flatnonzero(np.greater_equal(distance, self._reach, out=beyond))  # row-major
                values = flat.ravel()[at]
                low = signed.ravel()[at] < 0
                per_row = np.searchsorted(at, bounds)  # each row's run of candidates
                low_counts = np.diff(np.concatenate([[0], np.cumsum(low)])[per_row])
                tails.append((low_counts, values[low]))
                tails.append((np.diff(per_row) - low_counts, -values[~low]))
            else:
                for tail in (0, 1):
                    at = np.flatnonzero(flat <= self._thresholds[0] if tail == 0 else flat >= self._thresholds[1])
                    values = flat.ravel()[at]
                    tails.append((np.diff(np.searchsorted(at, bounds)), values if tail == 0 else -values))
        self._blocks.append((b, tails))

    def _scratch(self, shape: tuple[int, ...]) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.bool_]]:
        """Work arrays of a block's shape, kept for the next block (fresh memory is slow to touch)."""
        if self._buffers is None or self._buffers[0].shape != shape:
            self._buffers = (np.empty(shape), np.empty(shape), np.empty(shape, dtype=bool))
        return self._buffers

    def result(self, pool: Executor | None = None) -> NDArray[np.float64] | None:
        """(len(percentiles), n_rows), or None when the candidates do not determine some row.

        With a ``pool``, the high tail is selected on it while this thread takes the low one.
        """
        seen = sum(blk[0] for blk in self._blocks)
        if seen != self.n:
            msg = f"{seen} of {self.n} samples given"
            raise ValueError(msg)
        if self._failed:
            return None
        out = np.full((len(self.percentiles), self.n_rows), np.nan)
        whole = self._whole
        streamed = ~whole
        decided = True
        if streamed.any():
            high = None if pool is None else pool.submit(self._tail_percentiles, 1, streamed, out)
            decided = self._tail_percentiles(0, streamed, out)
            decided &= self._tail_percentiles(1, streamed, out) if high is None else high.result()
        if whole.any():
            out[:, whole] = _whole_row_percentiles(self._whole_values, self.percentiles)
        return out if decided else None

    def _tail_percentiles(self, tail: int, streamed: NDArray[np.bool_], out: NDArray[np.float64]) -> bool:
        """Fill ``out``'s percentiles of one tail (0: low, 1: high) for the streamed rows; False when
        a threshold fell short of the percentile (a rare sample)."""
        sel = self._low if tail == 0 else ~self._low
        if not sel.any():
            return True
        lo_r, hi_r = self.lo_rank[sel], self.hi_rank[sel]
        if tail == 1:  # ranks counted from the top: the high tail holds negated values
            lo_r, hi_r = self.n - 1 - lo_r, self.n - 1 - hi_r
        kth = np.unique(np.concatenate([lo_r, hi_r]))
        cand, filled = self._gather(tail, streamed)
        if np.any(filled <= kth.max()):
            return False
        cand.partition(kth, axis=1)
        sign = 1.0 if tail == 0 else -1.0
        for m, p_index in enumerate(np.flatnonzero(sel)):
            f = self.frac[p_index]
            out[p_index, streamed] = sign * (cand[:, lo_r[m]] * (1 - f) + cand[:, hi_r[m]] * f)
        return True

    def _gather(self, tail: int, rows: NDArray[np.bool_]) -> tuple[NDArray[np.float64], NDArray[np.intp]]:
        """Every block's candidates of one tail for ``rows`` (the only rows with candidates), a row each,
        padded with +inf; and their counts."""
        counts = np.array([tails[tail][0][rows] for _, tails in self._blocks])  # (blocks, rows)
        filled = counts.sum(axis=0)
        n_rows = int(rows.sum())
        width = max(int(filled.max()), 1)
        store = np.full((n_rows, width), np.inf)
        before = np.cumsum(counts, axis=0) - counts  # a block's first column in each row
        flat = store.ravel()
        for k, (_, tails) in enumerate(self._blocks):
            c, values = counts[k], tails[tail][1]
            if values.size:
                # destination = row * width + before + (rank within this block's run of the row)
                shift = np.arange(n_rows) * width + before[k] - (np.cumsum(c) - c)
                flat[np.repeat(shift, c) + np.arange(values.size)] = values
        return store, filled

    def _check(self, block: NDArray[np.float64]) -> None:
        if block.ndim != 2 or block.shape[0] != self.n_rows:
            msg = f"a block of shape {block.shape} does not fit {self.n_rows} rows"
            raise ValueError(msg)

    @staticmethod
    def _threshold_rank(p: float, s: int) -> int:
        """0-based rank in an s-sample subsample, THRESHOLD_SIGMAS standard errors beyond fraction p."""
        return math.ceil(p * s + THRESHOLD_SIGMAS * math.sqrt(s * p * (1 - p)))


def _whole_row_percentiles(values: NDArray[np.float64], percentiles: tuple[float, ...]) -> NDArray[np.float64]:
    """:func:`row_percentiles`, with constant rows (common among rows kept whole) answered directly."""
    out = np.full((len(percentiles), values.shape[0]), np.nan)  # rows with no finite sample stay NaN
    first = values[:, 0]
    constant = np.isfinite(first) & (values == first[:, None]).all(axis=1)
    out[:, constant] = first[constant]
    rest = ~constant & ~(np.isinf(first) & (values == first[:, None]).all(axis=1))  # an inf throughout
    if rest.any():
        out[:, rest] = row_percentiles(values[rest], percentiles)
    return out
