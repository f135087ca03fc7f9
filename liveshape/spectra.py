"""Streaming Welch spectra, their statistics, H1 and coherence, and the loop-delay estimate.

Pure numpy/scipy: arrays in, arrays or frozen dataclasses out, no I/O, deterministic.

Conventions (the same as :func:`scipy.signal.welch` and :func:`scipy.signal.csd`):

* one-sided density spectra in units²/Hz (full scale²/Hz for audio signals, g²/Hz once a
  calibration is applied), on the lines ``f_hz = k * fs_hz / nperseg``, ``k = 0 .. nperseg//2``;
* Hann window (scipy's periodic ``"hann"``), 50 % overlap (``noverlap = nperseg // 2``), the mean
  of each segment removed (``detrend="constant"``), density scaling ``1 / (fs_hz * sum(w**2))``,
  every line but DC (and Nyquist for even ``nperseg``) doubled;
* the cross spectrum of a reference ``x`` and a response ``y`` is ``Gxy = 2 conj(X) Y / (fs Σw²)``
  (scipy's ``csd(x, y)``), so ``H1 = Gxy / Gxx`` is the transfer function from ``x`` to ``y`` in
  numpy's ``exp(-2j pi k n / N)`` FFT sign convention, the one :func:`scipy.signal.freqz` uses.

The classes add only the streaming layer to scipy: blocks of any length are buffered in
preallocated arrays, cut into the same segments ``scipy.signal.welch`` would cut from the
concatenated record, and averaged linearly (identical to scipy to rounding) or exponentially.

References
----------
.. [1] P. D. Welch, "The use of fast Fourier transform for the estimation of power spectra: a
   method based on time averaging over short, modified periodograms", IEEE Trans. Audio
   Electroacoust. AU-15(2), 70-73, 1967.
.. [2] J. S. Bendat and A. G. Piersol, *Random Data: Analysis and Measurement Procedures*,
   Wiley (chapters on statistical errors of spectral and frequency-response estimates).
.. [3] F. J. Harris, "On the use of windows for harmonic analysis with the discrete Fourier
   transform", Proc. IEEE 66(1), 51-83, 1978 (Hann: equivalent noise bandwidth 1.5 bins).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import scipy.fft as sp_fft
import scipy.signal as sp_signal

from liveshape.delay import DelayEstimate, estimate_delay  # re-exported
from liveshape.spectral_stats import WHERE as _WHERE
from liveshape.spectral_stats import check_count as _check_count
from liveshape.spectral_stats import check_fs as _check_fs
from liveshape.spectral_stats import check_nperseg as _check_nperseg
from liveshape.spectral_stats import (  # re-exported
    chi2_interval_db,
    db_scatter_std,
    exp_average_dof,
    welch_dof,
)
from liveshape.spectral_stats import overlap_correlation_sq as _overlap_c2
from liveshape.spectral_stats import weighted_average_dof as _weights_dof

__all__ = [
    "CrossSpectrum",
    "DelayEstimate",
    "PsdAverager",
    "band_mask",
    "chi2_interval_db",
    "db_scatter_std",
    "estimate_delay",
    "exp_average_dof",
    "rms_from_psd",
    "welch_dof",
    "welch_psd",
]

_MAX_SEGMENTS_PER_BATCH = 64  # bounds the temporary arrays of one push





def welch_psd(
    x: np.ndarray, fs_hz: float, nperseg: int, *, axis: int = -1
) -> tuple[np.ndarray, np.ndarray]:
    """One-sided Welch PSD: Hann segments at 50 % overlap, density scaling.

    A thin wrapper of :func:`scipy.signal.welch` that fixes liveshape's conventions (see the
    module docstring), so every spectrum of the project is computed the same way.

    Parameters
    ----------
    x : array_like
        Signal (any unit ``u``; full scale for audio signals). At least ``nperseg`` samples
        along ``axis``.
    fs_hz : float
        Sampling rate in Hz.
    nperseg : int
        Segment (frame) length in samples; the line spacing is ``fs_hz / nperseg`` Hz.
    axis : int, optional
        Axis of time.

    Returns
    -------
    f_hz : ndarray
        Line frequencies in Hz, ``k * fs_hz / nperseg``.
    psd : ndarray
        One-sided PSD in u²/Hz.

    References
    ----------
    Welch 1967 [1]_.
    """
    nperseg = _check_nperseg(nperseg)
    fs_hz = _check_fs(fs_hz)
    x = np.asarray(x, dtype=float)
    if x.shape[axis] < nperseg:
        raise _WHERE.key("x").fail(
            f"{x.shape[axis]} samples", f"is shorter than one segment (nperseg = {nperseg})"
        )
    return sp_signal.welch(
        x, fs=fs_hz, window="hann", nperseg=nperseg, noverlap=nperseg // 2,
        detrend="constant", return_onesided=True, scaling="density", axis=axis,
    )


# --------------------------------------------------------------------------------------------
# Streaming averagers
# --------------------------------------------------------------------------------------------


class _Stream:
    """Shared streaming core: buffering, segmenting, windowing and averaging of C channels."""

    def __init__(
        self, fs_hz: float, nperseg: int, n_channels: int, *, averaging: str,
        n_avg: int | None, window: Any,
    ) -> None:
        self._fs_hz = _check_fs(fs_hz)
        self._nperseg = _check_nperseg(nperseg)
        if averaging not in ("linear", "exponential"):
            raise _WHERE.key("averaging").fail(averaging, "must be 'linear' or 'exponential'")
        if averaging == "exponential":
            if n_avg is None:
                raise _WHERE.key("n_avg").fail(n_avg, "is required for exponential averaging")
            self._n_avg: int | None = _check_count(n_avg, "n_avg", minimum=1)
        else:
            self._n_avg = None if n_avg is None else _check_count(n_avg, "n_avg", minimum=1)
        self._averaging = averaging
        self._window = window
        self._win = np.asarray(sp_signal.get_window(window, self._nperseg), dtype=float)
        self._hop = self._nperseg - self._nperseg // 2
        self._scale = 1.0 / (self._fs_hz * float(np.dot(self._win, self._win)))
        self._c2 = _overlap_c2(window, (self._nperseg // 2) / self._nperseg, self._nperseg)
        self._n_lines = self._nperseg // 2 + 1
        self._f_hz = sp_fft.rfftfreq(self._nperseg, 1.0 / self._fs_hz)
        self._f_hz.setflags(write=False)
        self._buf = np.zeros((n_channels, self._nperseg))
        self._fill = 0
        self._k = 0
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
        """Number of segments averaged so far."""
        return self._k

    @property
    def dof(self) -> float:
        """Equivalent DOF of the current estimate (lines away from DC and Nyquist).

        Linear averaging: :func:`welch_dof` of :attr:`n_segments`. Exponential averaging: the
        exact DOF of the weights actually applied (Welch 1967 [1]_ with arbitrary weights): equal
        to :func:`welch_dof` for the first ``n_avg`` segments (linear start), then rising to
        :func:`exp_average_dof` as the start is forgotten.
        """
        k = self._k
        if self._dof_cache[0] == k:
            return self._dof_cache[1]
        if k == 0:
            value = 0.0
        elif self._averaging == "linear" or k <= self._n_avg:
            j = np.arange(1, min(k, self._c2.size + 1))
            value = 2.0 * k / (1.0 + 2.0 * float(np.sum((1.0 - j / k) * self._c2[: j.size])))
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
            c2 = self._c2
            jj = np.arange(1, c2.size + 1)
            return 2.0 * (2 * n - 1) / (1.0 + 2.0 * float(np.sum(beta**jj * c2)))
        w = np.empty(m + n)
        w[:m] = beta ** np.arange(m) / n
        w[m:] = beta**m / n
        return _weights_dof(w, self._c2)

    def _reset_stream(self) -> None:
        self._buf[:] = 0.0
        self._fill = 0
        self._k = 0
        self._dof_cache = (0, 0.0)

    # -- segmenting --------------------------------------------------------------------------

    def _feed(self, data: np.ndarray) -> None:
        """Append ``data`` (channels x samples) and average every completed segment."""
        n = data.shape[1]
        limit = _MAX_SEGMENTS_PER_BATCH * self._hop
        start = 0
        while start < n:
            stop = min(n, start + limit)
            self._feed_chunk(data[:, start:stop])
            start = stop

    def _feed_chunk(self, data: np.ndarray) -> None:
        n = data.shape[1]
        fill, nps, hop = self._fill, self._nperseg, self._hop
        if fill + n < nps:
            self._buf[:, fill:fill + n] = data
            self._fill = fill + n
            return
        joined = np.concatenate((self._buf[:, :fill], data), axis=1)
        total = fill + n
        m = 1 + (total - nps) // hop
        view = np.lib.stride_tricks.sliding_window_view(joined, nps, axis=1)
        segs = view[:, : (m - 1) * hop + 1: hop]
        segs = segs - segs.mean(axis=-1, keepdims=True)  # scipy detrend="constant"
        spectra = sp_fft.rfft(segs * self._win, axis=-1)
        rest = total - m * hop
        self._buf[:, :rest] = joined[:, m * hop:]
        self._fill = rest
        self._accumulate(spectra)

    def _one_sided(self, p: np.ndarray) -> np.ndarray:
        """Density scale and one-sided doubling, as scipy's ``_spectral_helper``."""
        p *= self._scale
        if self._nperseg % 2:
            p[..., 1:] *= 2.0
        else:
            p[..., 1:-1] *= 2.0
        return p

    def _accumulate(self, spectra: np.ndarray) -> None:  # pragma: no cover - abstract
        raise NotImplementedError

    def _exp_coefficients(self, m: int) -> tuple[float, np.ndarray]:
        """Apply ``m`` exponential updates at once; returns (factor of the old state, weights).

        Segment ``k`` (counted from 1) enters with the weight ``a_k = 1 / min(k, n_avg)``:
        ``G_k = (1 - a_k) G_{k-1} + a_k P_k``, a running mean for the first ``n_avg`` segments
        and the exponential average after. Unrolled over the batch,
        ``G = prod(1 - a) G_old + sum_i a_i prod_{j>i}(1 - a_j) P_i``.
        """
        k = self._k + np.arange(1, m + 1)
        a = 1.0 / np.minimum(k, self._n_avg)
        keep = 1.0 - a
        after = np.ones(m)
        after[:-1] = np.cumprod(keep[::-1])[::-1][1:]
        self._k += m
        return float(np.prod(keep)), a * after


class CrossSpectrum(_Stream):
    """Streaming auto and cross spectra of a reference ``x`` (drive) and a response ``y``.

    Blocks of any length (also shorter than a segment) are buffered in preallocated arrays and
    cut into the segments :func:`scipy.signal.welch` would cut from the concatenated record:
    Hann window, 50 % overlap, segment mean removed, one-sided density scaling. Memory does not
    grow with the number of samples pushed.

    Averaging:

    * ``"linear"``: the plain mean of all segments; :attr:`gxx`, :attr:`gyy`, :attr:`gxy` and
      :attr:`coherence` equal ``scipy.signal.welch / csd / coherence`` of the concatenated data
      to rounding.
    * ``"exponential"``: ``G_k = (1 - alpha) G_{k-1} + alpha P_k`` with ``alpha = 1/n_avg``.
      The first ``n_avg`` segments are averaged linearly (weight ``1/k`` for segment ``k``), so
      the estimate is unbiased from the start and no zero state is faded out; from then on the
      weight stays ``1/n_avg``.

    Parameters
    ----------
    fs_hz : float
        Sampling rate in Hz.
    nperseg : int
        Segment (frame) length in samples; lines at ``k * fs_hz / nperseg``.
    averaging : {"linear", "exponential"}, optional
        Averaging of segment spectra.
    n_avg : int, optional
        Exponential averaging number (required for ``"exponential"``, ignored for ``"linear"``).
    delay_samples : int, optional
        Delay ``D`` applied to ``x`` before the spectra: the pairs are ``(x(t - D), y(t))``, so
        a loop delay ``D`` between drive and response is removed before H1. Samples of ``y``
        before the first ``D`` (whose reference is unknown) are discarded, so the result equals
        ``scipy.signal.csd(x[:N - D], y[D:])``. An unaligned delay ``tau`` biases ``|H1|`` low
        by the window's overlap correlation at lag ``tau`` (``1 - tau/T`` for a rectangular
        window, Bendat & Piersol [2]_; lower still for Hann).
    window : str or tuple, optional
        Window for :func:`scipy.signal.get_window` (default scipy's periodic ``"hann"``).

    Notes
    -----
    ``Gxy = 2 conj(X) Y / (fs sum w**2)`` as ``scipy.signal.csd(x, y)``; ``h1 = Gxy / Gxx`` is then
    the transfer function from ``x`` to ``y`` with the phase of ``y`` relative to ``x``, directly
    comparable with :func:`scipy.signal.freqz`.

    Examples
    --------
    >>> import numpy as np, scipy.signal as sig
    >>> rng = np.random.default_rng(1)
    >>> x = rng.standard_normal(48_000)
    >>> y = sig.lfilter([0.5, 0.25], [1.0], x)
    >>> cs = CrossSpectrum(48_000.0, 1024)
    >>> for i in range(0, x.size, 500):
    ...     cs.push(x[i:i + 500], y[i:i + 500])
    >>> bool(np.allclose(cs.gxy, sig.csd(x, y, 48_000.0, nperseg=1024)[1]))
    True
    """

    def __init__(
        self, fs_hz: float, nperseg: int, *, averaging: str = "linear",
        n_avg: int | None = None, delay_samples: int = 0, window: Any = "hann",
    ) -> None:
        super().__init__(fs_hz, nperseg, 2, averaging=averaging, n_avg=n_avg, window=window)
        self._delay = _check_count(delay_samples, "delay_samples")
        self._delay_line = np.zeros(self._delay)
        self._n_in = 0
        self._sxx = np.zeros(self._n_lines)
        self._syy = np.zeros(self._n_lines)
        self._sxy = np.zeros(self._n_lines, dtype=complex)

    @property
    def delay_samples(self) -> int:
        """Delay applied to ``x`` before the spectra, in samples."""
        return self._delay

    def reset(self) -> None:
        """Forget every sample and segment (the settings stay)."""
        self._reset_stream()
        self._delay_line[:] = 0.0
        self._n_in = 0
        self._sxx[:] = 0.0
        self._syy[:] = 0.0
        self._sxy[:] = 0.0

    def push(self, x: np.ndarray, y: np.ndarray) -> None:
        """Add a block of reference ``x`` and response ``y`` samples (same length, any length).

        Parameters
        ----------
        x : array_like
            Reference (drive) samples, 1-D.
        y : array_like
            Response samples taken at the same instants, 1-D, same length as ``x``.
        """
        if x is None:
            raise TypeError("CrossSpectrum.push needs the reference x; use PsdAverager for y alone")
        x = np.asarray(x, dtype=float)
        y = np.asarray(y, dtype=float)
        if x.ndim != 1 or y.ndim != 1 or x.size != y.size:
            raise ValueError(
                f"spectra: push needs two 1-D blocks of equal length, got {x.shape} and {y.shape}"
            )
        n = x.size
        d = self._delay
        if d:
            delayed = np.empty(n)
            if n <= d:
                delayed[:] = self._delay_line[:n]
                self._delay_line[: d - n] = self._delay_line[n:]
                self._delay_line[d - n:] = x
            else:
                delayed[:d] = self._delay_line
                delayed[d:] = x[: n - d]
                self._delay_line[:] = x[n - d:]
            skip = min(n, max(0, d - self._n_in))  # reference before the record is unknown
            self._n_in += n
            x, y = delayed[skip:], y[skip:]
        if x.size:
            self._feed(np.stack((x, y)))

    def _accumulate(self, spectra: np.ndarray) -> None:
        xs, ys = spectra[0], spectra[1]
        pxx = self._one_sided((np.conj(xs) * xs).real)
        pyy = self._one_sided((np.conj(ys) * ys).real)
        pxy = self._one_sided(np.conj(xs) * ys)
        if self._averaging == "linear":
            self._k += xs.shape[0]
            self._sxx += pxx.sum(axis=0)
            self._syy += pyy.sum(axis=0)
            self._sxy += pxy.sum(axis=0)
            return
        keep, coef = self._exp_coefficients(xs.shape[0])
        self._sxx *= keep
        self._sxx += coef @ pxx
        self._syy *= keep
        self._syy += coef @ pyy
        self._sxy *= keep
        self._sxy += _weighted_rows(coef, pxy)

    def _mean(self, s: np.ndarray) -> np.ndarray:
        if self._averaging == "linear" and self._k:
            return s / self._k
        return s.copy()

    @property
    def gxx(self) -> np.ndarray:
        """One-sided auto spectrum of the reference in x-units²/Hz (zeros before a segment)."""
        return self._mean(self._sxx)

    @property
    def gyy(self) -> np.ndarray:
        """One-sided auto spectrum of the response in y-units²/Hz (zeros before a segment)."""
        return self._mean(self._syy)

    @property
    def gxy(self) -> np.ndarray:
        """One-sided cross spectrum ``2 conj(X) Y / (fs sum w**2)`` averaged, x·y-units/Hz."""
        return self._mean(self._sxy)

    @property
    def h1(self) -> np.ndarray:
        """H1 estimate ``Gxy / Gxx`` of the transfer function from x to y (y-units/x-units).

        NaN on lines where ``Gxx`` is zero (before the first segment).
        """
        gxx = self._sxx
        out = np.full(self._n_lines, np.nan + 0j)
        np.divide(self._sxy, gxx, out=out, where=gxx > 0.0)
        return out

    @property
    def coherence(self) -> np.ndarray:
        """Magnitude-squared coherence ``|Gxy|**2 / (Gxx Gyy)`` in [0, 1] (NaN where undefined).

        Identical to :func:`scipy.signal.coherence` on the same segments (linear averaging).
        """
        den = self._sxx * self._syy
        out = np.full(self._n_lines, np.nan)
        np.divide(np.abs(self._sxy) ** 2, den, out=out, where=den > 0.0)
        return out


class PsdAverager(_Stream):
    """Streaming one-sided Welch PSD of one channel (control spectrum, drive files).

    The same segmenting, scaling and averaging as :class:`CrossSpectrum` for a single signal:
    with linear averaging :attr:`psd` equals :func:`welch_psd` of the concatenated blocks to
    rounding.

    Parameters
    ----------
    fs_hz : float
        Sampling rate in Hz.
    nperseg : int
        Segment length in samples.
    averaging : {"linear", "exponential"}, optional
        Averaging of segment spectra (see :class:`CrossSpectrum`).
    n_avg : int, optional
        Exponential averaging number (required for ``"exponential"``).
    window : str or tuple, optional
        Window for :func:`scipy.signal.get_window` (default ``"hann"``).
    """

    def __init__(
        self, fs_hz: float, nperseg: int, *, averaging: str = "linear",
        n_avg: int | None = None, window: Any = "hann",
    ) -> None:
        super().__init__(fs_hz, nperseg, 1, averaging=averaging, n_avg=n_avg, window=window)
        self._s = np.zeros(self._n_lines)

    def reset(self) -> None:
        """Forget every sample and segment (the settings stay)."""
        self._reset_stream()
        self._s[:] = 0.0

    def push(self, x: np.ndarray) -> None:
        """Add a block of samples (1-D, any length)."""
        x = np.asarray(x, dtype=float)
        if x.ndim != 1:
            raise ValueError(f"spectra: push needs a 1-D block, got shape {x.shape}")
        if x.size:
            self._feed(x[np.newaxis, :])

    def _accumulate(self, spectra: np.ndarray) -> None:
        xs = spectra[0]
        p = self._one_sided((np.conj(xs) * xs).real)
        if self._averaging == "linear":
            self._k += xs.shape[0]
            self._s += p.sum(axis=0)
            return
        keep, coef = self._exp_coefficients(xs.shape[0])
        self._s *= keep
        self._s += coef @ p

    @property
    def psd(self) -> np.ndarray:
        """One-sided PSD in units²/Hz (zeros before the first segment)."""
        if self._averaging == "linear" and self._k:
            return self._s / self._k
        return self._s.copy()


def _weighted_rows(coef: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """``coef @ rows`` for complex rows through a real matrix product (real and imaginary parts)."""
    flat = np.ascontiguousarray(rows).view(np.float64)
    return (coef @ flat).view(np.complex128)


# --------------------------------------------------------------------------------------------
# Small helpers
# --------------------------------------------------------------------------------------------


def band_mask(f_hz: np.ndarray, f_lo_hz: float, f_hi_hz: float) -> np.ndarray:
    """Boolean mask of the lines with ``f_lo_hz <= f <= f_hi_hz`` (Hz)."""
    f = np.asarray(f_hz, dtype=float)
    if not f_lo_hz <= f_hi_hz:
        raise _WHERE.key("f_hi_hz").fail(f_hi_hz, f"is below f_lo_hz = {f_lo_hz}")
    return (f >= f_lo_hz) & (f <= f_hi_hz)


def rms_from_psd(psd: np.ndarray, df_hz: float, *, mask: np.ndarray | None = None) -> float:
    """RMS from a one-sided PSD by Parseval: ``sqrt(sum(psd) * df_hz)``.

    Parameters
    ----------
    psd : array_like
        One-sided PSD in units²/Hz.
    df_hz : float
        Line spacing in Hz.
    mask : array_like of bool, optional
        Lines to include (e.g. from :func:`band_mask`); all lines by default.

    Returns
    -------
    float
        RMS in units (grms for a PSD in g²/Hz).
    """
    p = np.asarray(psd, dtype=float)
    if mask is not None:
        p = p[np.asarray(mask, dtype=bool)]
    return math.sqrt(max(0.0, float(np.sum(p)) * float(df_hz)))
