"""Streaming core of the Welch estimators: buffering, batched windowed FFTs, averaging weights.

Pure numpy/scipy. :class:`WelchStream` is the base of :class:`liveshape.spectra.CrossSpectrum`
and :class:`liveshape.spectra.PsdAverager`. Blocks of any length are copied once into a
preallocated contiguous buffer; the completed segments (Hann by default, 50 % overlap, the mean
of each removed as scipy's ``detrend="constant"``) are windowed and transformed together in one
batched ``rfft`` of a strided view of the buffer (no per-segment copy or Python loop), when the
buffer is full or a result is read. A batch is at most ``_BATCH_SAMPLES`` samples per channel,
so its work arrays stay in the CPU cache. The density scale ``1 / (fs sum w**2)`` and the
one-sided doubling are applied to the batch sums, not to every periodogram. Batching changes
when the work is done, never the result: the segments and their weights are those of the
segment-by-segment definition, to rounding.

Only elementwise numpy, ``numpy.einsum`` (no BLAS) and :mod:`scipy.fft`: a threaded BLAS is
slow on these short products on a loaded machine.

References
----------
.. [1] P. D. Welch, "The use of fast Fourier transform for the estimation of power spectra: a
   method based on time averaging over short, modified periodograms", IEEE Trans. Audio
   Electroacoust. AU-15(2), 70-73, 1967.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import scipy.fft as sp_fft
import scipy.signal as sp_signal

from liveshape.spectral_stats import (
    WHERE,
    check_count,
    check_fs,
    check_nperseg,
    linear_average_dof,
    overlap_correlation_sq,
    steady_exp_dof,
    weighted_average_dof,
)

__all__ = ["WelchStream"]

#: Samples per channel of one batched FFT: the windowed segments stay in the CPU cache.
_BATCH_SAMPLES = 1 << 15
#: Most segments of one batch (bounds the per-batch arrays for short segments).
_MAX_BATCH = 64


class WelchStream:
    """Streaming core shared by the Welch estimators: C channels buffered, segmented, averaged.

    Subclasses keep their sums and implement :meth:`_accumulate`; the properties here are
    common to all of them.

    Channel ``c`` may lead the others by ``leads[c]`` samples (the delayed reference of
    :class:`liveshape.spectra.CrossSpectrum`): its row holds that many samples beyond the
    common fill. The buffer holds one batch of segments; they are transformed when it is full
    or a result is read (:meth:`_flush`), then the unfinished tail moves to the front.
    """

    def __init__(
        self, fs_hz: float, nperseg: int, leads: tuple[int, ...], *, averaging: str,
        n_avg: int | None, window: Any,
    ) -> None:
        self._fs_hz = check_fs(fs_hz)
        nps = self._nperseg = check_nperseg(nperseg)
        if averaging not in ("linear", "exponential"):
            raise WHERE.key("averaging").fail(averaging, "must be 'linear' or 'exponential'")
        if averaging == "exponential":
            if n_avg is None:
                raise WHERE.key("n_avg").fail(n_avg, "is required for exponential averaging")
            self._n_avg: int | None = check_count(n_avg, "n_avg", minimum=1)
        else:
            self._n_avg = None if n_avg is None else check_count(n_avg, "n_avg", minimum=1)
        self._averaging = averaging
        self._win = np.asarray(sp_signal.get_window(window, nps), dtype=float)
        hop = self._hop = nps - nps // 2
        self._c2 = overlap_correlation_sq(window, (nps // 2) / nps, nps)
        self._n_lines = nps // 2 + 1
        # density scale and one-sided doubling of each line, applied to the batch sums
        self._line_scale = np.full(self._n_lines, 2.0 / (self._fs_hz * float(np.dot(
            self._win, self._win))))
        self._line_scale[0] *= 0.5
        if nps % 2 == 0:
            self._line_scale[-1] *= 0.5
        self._f_hz = sp_fft.rfftfreq(nps, 1.0 / self._fs_hz)
        self._f_hz.setflags(write=False)
        self._batch = max(1, min(_MAX_BATCH, _BATCH_SAMPLES // nps))  # segments per FFT call
        self._cap = nps + (self._batch - 1) * hop  # a full buffer holds one batch of segments
        self._leads = leads
        self._buf = np.zeros((len(leads), self._cap + max(leads)))
        self._work = np.empty((len(leads), self._batch, nps))
        self._start = 0  # buffer index of the next segment's first sample
        self._fill = 0  # samples in the buffer (common to all rows, leads excluded)
        self._k = 0  # segments averaged into the sums (the buffer may hold more)
        self._dof_cache: tuple[int, float] = (0, 0.0)

    # -- common read-only properties ---------------------------------------------------------

    @property
    def fs_hz(self) -> float:
        """Sampling rate in Hz."""
        return self._fs_hz

    @property
    def nperseg(self) -> int:
        """Segment length in samples."""
        return self._nperseg

    @property
    def averaging(self) -> str:
        """``"linear"`` or ``"exponential"``."""
        return self._averaging

    @property
    def n_avg(self) -> int | None:
        """Exponential averaging number (``alpha = 1/n_avg``), or None for linear."""
        return self._n_avg

    @property
    def df_hz(self) -> float:
        """Line spacing in Hz, ``fs_hz / nperseg``."""
        return self._fs_hz / self._nperseg

    @property
    def f_hz(self) -> np.ndarray:
        """Line frequencies in Hz (read-only array), ``k * fs_hz / nperseg``."""
        return self._f_hz

    @property
    def n_segments(self) -> int:
        """Number of complete segments pushed so far (those in the estimate)."""
        pending = self._fill - self._start - self._nperseg
        return self._k if pending < 0 else self._k + 1 + pending // self._hop

    @property
    def dof(self) -> float:
        """Equivalent DOF of the current estimate (lines away from DC and Nyquist).

        Linear averaging: :func:`liveshape.spectral_stats.welch_dof` of :attr:`n_segments`.
        Exponential averaging: the exact DOF of the weights actually applied (Welch 1967 [1]_
        with arbitrary weights): equal to ``welch_dof`` for the first ``n_avg`` segments (linear
        start), then rising to ``exp_average_dof`` as the start is forgotten.
        """
        k = self.n_segments
        if self._dof_cache[0] == k:
            return self._dof_cache[1]
        if self._averaging == "linear" or k <= self._n_avg:
            value = linear_average_dof(k, self._c2)
        else:
            value = self._exp_dof(k)
        self._dof_cache = (k, value)
        return value

    def _exp_dof(self, k: int) -> float:
        n = self._n_avg
        beta = 1.0 - 1.0 / n
        m = k - n  # exponential updates after the linear start
        # Weights newest first: alpha beta^i for the m updates, beta^m / n for the first n.
        if beta == 0.0 or m * math.log(beta) < math.log(1e-13):
            return steady_exp_dof(n, self._c2)
        w = np.empty(m + n)
        w[:m] = beta ** np.arange(m) / n
        w[m:] = beta**m / n
        return weighted_average_dof(w, self._c2)

    def _reset_stream(self) -> None:
        self._buf[:] = 0.0
        self._start = 0
        self._fill = 0
        self._k = 0
        self._dof_cache = (0, 0.0)

    # -- segmenting --------------------------------------------------------------------------

    def _feed(self, rows: tuple[np.ndarray, ...]) -> None:
        """Append one block per channel (equal lengths); transform segments when full."""
        n = rows[0].size
        buf, cap, leads = self._buf, self._cap, self._leads
        pos = 0
        while True:
            fill = self._fill
            k = min(n - pos, cap - fill)
            for c, lead in enumerate(leads):
                buf[c, fill + lead: fill + lead + k] = rows[c][pos: pos + k]
            self._fill = fill + k
            pos += k
            if pos == n:
                return
            self._flush()  # full, more to come: average its segments, move the tail
            start = self._start
            for c, lead in enumerate(leads):
                buf[c, : cap + lead - start] = buf[c, start: cap + lead]
            self._fill -= start
            self._start = 0

    def _flush(self) -> None:
        """Average every complete segment still in the buffer (in batches)."""
        start, fill, nps, hop = self._start, self._fill, self._nperseg, self._hop
        while fill - start >= nps:
            m = min(self._batch, 1 + (fill - start - nps) // hop)
            self._segments(start, m)
            start += m * hop
        self._start = start

    def _segments(self, start: int, m: int) -> None:
        """Window and transform the ``m`` segments from buffer index ``start``; average them."""
        buf, nps = self._buf, self._nperseg
        if m == 1:
            segs = buf[:, start: start + nps]
            work = self._work[:, 0]
        else:  # a strided view: segment i starts i hops after start, nothing is copied
            step = buf.strides[1]
            segs = np.ndarray((buf.shape[0], m, nps), np.float64, buffer=buf,
                              offset=start * step, strides=(buf.strides[0], self._hop * step, step))
            work = self._work[:, :m]
        mean = np.add.reduce(segs, axis=-1, keepdims=True)
        mean /= nps
        np.subtract(segs, mean, out=work)  # scipy's detrend="constant"
        work *= self._win
        spectra = sp_fft.rfft(work, axis=-1)
        if m == 1:
            spectra = spectra[:, np.newaxis]
        self._accumulate(spectra, *self._weights(m))

    def _accumulate(self, spectra: np.ndarray, keep: float, coef: float | np.ndarray) -> None:
        """Add a batch (channels x m x lines): ``S = keep S + scale sum_i coef_i P_i``."""
        raise NotImplementedError  # pragma: no cover - abstract

    def _weights(self, m: int) -> tuple[float, float | np.ndarray]:
        """Advance by ``m`` segments; returns (factor of the old sums, weights of the new ones).

        Linear averaging sums (``1, 1``; the mean divides by :attr:`n_segments`). Exponential:
        segment ``k`` (counted from 1) enters with the weight ``a_k = 1 / min(k, n_avg)``,
        ``G_k = (1 - a_k) G_{k-1} + a_k P_k``, a running mean for the first ``n_avg`` segments
        and the exponential average after. Unrolled over the batch,
        ``G = prod(1 - a) G_old + sum_i a_i prod_{j>i}(1 - a_j) P_i``.
        """
        k0 = self._k
        self._k += m
        if self._averaging == "linear":
            return 1.0, 1.0
        if m == 1:
            a = 1.0 / min(k0 + 1, self._n_avg)
            return 1.0 - a, a
        a = 1.0 / np.minimum(k0 + np.arange(1, m + 1), self._n_avg)
        keep = 1.0 - a
        after = np.ones(m)
        after[:-1] = np.cumprod(keep[::-1])[::-1][1:]
        return float(np.prod(keep)), a * after

    def _scaled(self, s: np.ndarray, coef: float | np.ndarray) -> np.ndarray:
        """Density scale, one-sided doubling and a scalar weight applied to a batch sum."""
        if isinstance(coef, np.ndarray) or coef == 1.0:
            s *= self._line_scale
        else:
            s *= self._line_scale * coef
        return s

    def _power(self, spec: np.ndarray, coef: float | np.ndarray) -> np.ndarray:
        """``scale * sum_i coef_i |X_i|**2`` over the segments (rows) of one channel."""
        flat = spec.view(np.float64)  # re, im interleaved: |X|**2 = re**2 + im**2
        if isinstance(coef, np.ndarray):
            s = np.einsum("m,mk,mk->k", coef, flat, flat)
        else:
            s = np.einsum("mk,mk->k", flat, flat)
        return self._scaled(s[0::2] + s[1::2], coef)
