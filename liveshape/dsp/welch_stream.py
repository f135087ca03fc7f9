"""Streaming core of the Welch estimators: buffering, batched windowed FFTs, averaging weights.

Pure numpy/scipy. :class:`WelchStream` is the base of :class:`liveshape.dsp.spectra.CrossSpectrum`
and :class:`liveshape.dsp.spectra.PsdAverager`. Blocks of any length are copied once into a
preallocated contiguous buffer; the completed segments (Hann by default, 50 % overlap, the mean
of each removed as scipy's ``detrend="constant"``) are windowed and transformed together in one
batched ``rfft`` of a strided view of the buffer (no per-segment copy or Python loop), when the
buffer is full or a result is read. A batch is at most ``_BATCH_SAMPLES`` samples per channel,
so its work arrays stay in the CPU cache. The sums are kept unscaled: the power sums as the
squares of the real and imaginary parts side by side (``re**2, im**2`` of each line, one
elementwise product per batch), added in pairs, scaled by the density scale
``1 / (fs sum w**2)`` with the one-sided doubling and divided by the count only when a spectrum is
read; H1 and coherence are ratios in which the scale cancels. Batching changes when the work is
done, never the result: the segments and their weights are those of the segment-by-segment
definition, to rounding.

Only elementwise numpy, ``numpy.einsum`` (no BLAS) and scipy's pocketfft (through
:func:`liveshape.dsp.frames.rfft_into`, into a preallocated array): a threaded BLAS is slow on these
short products on a loaded machine.

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

from liveshape.dsp.frames import rfft_into
from liveshape.dsp.spectral_stats import (
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
    :class:`liveshape.dsp.spectra.CrossSpectrum`): its row holds that many samples beyond the
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
        # density scale with the one-sided doubling (not on DC, nor on Nyquist for even nps)
        self._scale = 2.0 / (self._fs_hz * float(np.dot(self._win, self._win)))
        self._last_single = nps % 2 == 0
        self._f_hz = sp_fft.rfftfreq(nps, 1.0 / self._fs_hz)
        self._f_hz.setflags(write=False)
        self._batch = max(1, min(_MAX_BATCH, _BATCH_SAMPLES // nps))  # segments per FFT call
        self._cap = nps + (self._batch - 1) * hop  # a full buffer holds one batch of segments
        self._leads = leads
        nch = len(leads)
        self._buf = np.zeros((nch, self._cap + max(leads)))
        self._work = np.empty((nch, self._batch, nps))
        self._spectra = np.empty((nch, self._batch, self._n_lines), dtype=np.complex128)
        # unscaled power sums of each channel, re**2 and im**2 of every line side by side
        self._pow = np.zeros((nch, 2 * self._n_lines))
        self._pow_new = np.empty((nch, 2 * self._n_lines))  # one batch's sums
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

        Linear averaging: :func:`liveshape.dsp.spectral_stats.welch_dof` of :attr:`n_segments`.
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
        self._pow[:] = 0.0
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
            segs = buf[:, np.newaxis, start: start + nps]
        else:  # a strided view: segment i starts i hops after start, nothing is copied
            step = buf.strides[1]
            segs = np.ndarray((buf.shape[0], m, nps), np.float64, buffer=buf, offset=start * step,
                              strides=(buf.strides[0], self._hop * step, step))
        work = self._work[:, :m]
        mean = np.add.reduce(segs, axis=-1, keepdims=True)
        mean /= nps
        np.subtract(segs, mean, out=work)  # scipy's detrend="constant"
        work *= self._win
        spectra = rfft_into(work, self._spectra[:, :m])  # channels x m x lines
        keep, coef = self._weights(m)
        if keep != 1.0:
            self._decay(keep)
        flat = spectra.view(np.float64)  # re, im side by side: |X|**2 = re**2 + im**2
        new = self._pow_new
        if m == 1:
            np.multiply(flat[:, 0], flat[:, 0], out=new)
            if coef != 1.0:
                new *= coef
        elif isinstance(coef, np.ndarray):
            np.einsum("m,cmk,cmk->ck", coef, flat, flat, out=new)
        else:
            np.einsum("cmk,cmk->ck", flat, flat, out=new)
        self._pow += new
        self._accumulate(spectra, coef)

    def _decay(self, keep: float) -> None:
        """Multiply every sum by ``keep`` (exponential averaging)."""
        self._pow *= keep

    def _accumulate(self, spectra: np.ndarray, coef: float | np.ndarray) -> None:
        """Add the cross terms of a batch (channels x m x lines) with the weights ``coef``."""

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

    # -- reading -----------------------------------------------------------------------------

    def _power_sum(self, c: int) -> np.ndarray:
        """Unscaled power sum of channel ``c`` per line (a new array)."""
        p = self._pow[c]
        return np.add(p[0::2], p[1::2])

    def _density(self, s: np.ndarray) -> np.ndarray:
        """Scale an unscaled sum (new array, scaled in place) to the averaged one-sided density."""
        scale = self._scale
        if self._averaging == "linear" and self._k:
            scale /= self._k
        s *= scale
        s[0] *= 0.5
        if self._last_single:
            s[-1] *= 0.5
        return s

    def _auto(self, c: int) -> np.ndarray:
        """Averaged one-sided PSD of channel ``c`` (zeros before the first segment)."""
        self._flush()
        return self._density(self._power_sum(c))
