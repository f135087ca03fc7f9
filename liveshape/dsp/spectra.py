"""Streaming Welch spectra: auto and cross spectra, H1 and coherence of blocks of any length.

Pure numpy/scipy: arrays in, arrays out, no I/O, deterministic.

Conventions (the same as :func:`scipy.signal.welch` and :func:`scipy.signal.csd`):

* one-sided density spectra in units²/Hz (full scale²/Hz for audio signals, g²/Hz once a
  calibration is applied), on the lines ``f_hz = k * fs_hz / nperseg``, ``k = 0 .. nperseg//2``;
* Hann window (scipy's periodic ``"hann"``), 50 % overlap (``noverlap = nperseg // 2``), the mean
  of each segment removed (``detrend="constant"``), density scaling ``1 / (fs_hz * sum(w**2))``,
  every line but DC (and Nyquist for even ``nperseg``) doubled;
* the cross spectrum of a reference ``x`` and a response ``y`` is ``Gxy = 2 conj(X) Y / (fs Σw²)``
  (scipy's ``csd(x, y)``), so ``H1 = Gxy / Gxx`` is the transfer function from ``x`` to ``y`` in
  numpy's ``exp(-2j pi k n / N)`` FFT sign convention, the one :func:`scipy.signal.freqz` uses.

The classes add only the streaming layer to scipy (its core, the buffering, batched transforms
and averaging weights, is :class:`liveshape.dsp.welch_stream.WelchStream`): segments identical to
those :func:`scipy.signal.welch` cuts from the concatenated record, averaged linearly (identical
to scipy to rounding) or exponentially. The statistics of the estimates are in
:mod:`liveshape.dsp.spectral_stats` and the loop-delay estimate in :mod:`liveshape.dsp.delay`; their
public names are re-exported here.

References
----------
.. [1] P. D. Welch, "The use of fast Fourier transform for the estimation of power spectra: a
   method based on time averaging over short, modified periodograms", IEEE Trans. Audio
   Electroacoust. AU-15(2), 70-73, 1967.
.. [2] J. S. Bendat and A. G. Piersol, *Random Data: Analysis and Measurement Procedures*,
   Wiley (chapters on statistical errors of spectral and frequency-response estimates).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import scipy.signal as sp_signal

from liveshape.dsp.delay import DelayEstimate, estimate_delay  # re-exported
from liveshape.dsp.spectral_stats import (  # re-exported: chi2_interval_db .. welch_dof
    WHERE,
    check_count,
    check_fs,
    check_nperseg,
    chi2_interval_db,
    db_scatter_std,
    exp_average_dof,
    welch_dof,
)
from liveshape.dsp.welch_stream import WelchStream

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
    nperseg = check_nperseg(nperseg)
    fs_hz = check_fs(fs_hz)
    x = np.asarray(x, dtype=float)
    if x.shape[axis] < nperseg:
        raise WHERE.key("x").fail(
            f"{x.shape[axis]} samples", f"is shorter than one segment (nperseg = {nperseg})"
        )
    return sp_signal.welch(
        x, fs=fs_hz, window="hann", nperseg=nperseg, noverlap=nperseg // 2,
        detrend="constant", return_onesided=True, scaling="density", axis=axis,
    )


class CrossSpectrum(WelchStream):
    """Streaming auto and cross spectra of a reference ``x`` (drive) and a response ``y``.

    Blocks of any length (also shorter than a segment) are buffered in preallocated arrays and
    cut into the segments :func:`scipy.signal.welch` would cut from the concatenated record:
    Hann window, 50 % overlap, segment mean removed, one-sided density scaling. Memory does not
    grow with the number of samples pushed. Completed segments are transformed together when the
    buffer is full or a result is read (the result does not depend on when).

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
        delay = check_count(delay_samples, "delay_samples")
        # the reference row leads by D: x(s) waits there for its partner y(s + D)
        super().__init__(fs_hz, nperseg, (delay, 0), averaging=averaging, n_avg=n_avg,
                         window=window)
        self._delay = delay
        self._n_in = 0
        self._sxy = np.zeros(self._n_lines, dtype=complex)  # unscaled sum of conj(X) Y
        self._sxy_new = np.empty(self._n_lines, dtype=complex)  # one batch's sum

    @property
    def delay_samples(self) -> int:
        """Delay applied to ``x`` before the spectra, in samples."""
        return self._delay

    def reset(self) -> None:
        """Forget every sample and segment (the settings stay)."""
        self._reset_stream()
        self._n_in = 0
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
        if self._n_in < self._delay:  # the first D references wait; their responses are unknown
            k = min(x.size, self._delay - self._n_in)
            self._buf[0, self._n_in: self._n_in + k] = x[:k]
            self._n_in += k
            x, y = x[k:], y[k:]
        if x.size:
            self._feed((x, y))

    def _decay(self, keep: float) -> None:
        super()._decay(keep)
        self._sxy *= keep

    def _accumulate(self, spectra: np.ndarray, coef: float | np.ndarray) -> None:
        xs, ys = spectra[0], spectra[1]
        new = self._sxy_new
        if xs.shape[0] == 1:
            np.conjugate(xs[0], out=new)
            new *= ys[0]  # conj(X) Y, as scipy's csd(x, y)
            if coef != 1.0:
                new *= coef
        else:
            cross = np.conjugate(xs)
            cross *= ys
            if isinstance(coef, np.ndarray):
                np.einsum("m,mk->k", coef, cross.view(np.float64), out=new.view(np.float64))
            else:
                np.add.reduce(cross, axis=0, out=new)
        self._sxy += new

    @property
    def gxx(self) -> np.ndarray:
        """One-sided auto spectrum of the reference in x-units²/Hz (zeros before a segment)."""
        return self._auto(0)

    @property
    def gyy(self) -> np.ndarray:
        """One-sided auto spectrum of the response in y-units²/Hz (zeros before a segment)."""
        return self._auto(1)

    @property
    def gxy(self) -> np.ndarray:
        """One-sided cross spectrum ``2 conj(X) Y / (fs sum w**2)`` averaged, x·y-units/Hz."""
        self._flush()
        return self._density(self._sxy.copy())

    @property
    def h1(self) -> np.ndarray:
        """H1 estimate ``Gxy / Gxx`` of the transfer function from x to y (y-units/x-units).

        NaN on lines where ``Gxx`` is zero (before the first segment).
        """
        self._flush()
        sxx = self._power_sum(0)  # the density scale cancels in the ratio
        out = np.full(self._n_lines, np.nan + 0j)
        np.divide(self._sxy, sxx, out=out, where=sxx > 0.0)
        return out

    @property
    def coherence(self) -> np.ndarray:
        """Magnitude-squared coherence ``|Gxy|**2 / (Gxx Gyy)`` in [0, 1] (NaN where undefined).

        Identical to :func:`scipy.signal.coherence` on the same segments (linear averaging).
        """
        self._flush()
        den = self._power_sum(0)  # the density scale cancels in the ratio
        den *= self._power_sum(1)
        sxy = self._sxy.view(np.float64)
        num = np.multiply(sxy, sxy)
        num = np.add(num[0::2], num[1::2])  # |Sxy|**2
        out = np.full(self._n_lines, np.nan)
        np.divide(num, den, out=out, where=den > 0.0)
        return out


class PsdAverager(WelchStream):
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
        super().__init__(fs_hz, nperseg, (0,), averaging=averaging, n_avg=n_avg, window=window)

    def reset(self) -> None:
        """Forget every sample and segment (the settings stay)."""
        self._reset_stream()

    def push(self, x: np.ndarray) -> None:
        """Add a block of samples (1-D, any length)."""
        x = np.asarray(x, dtype=float)
        if x.ndim != 1:
            raise ValueError(f"spectra: push needs a 1-D block, got shape {x.shape}")
        if x.size:
            self._feed((x,))

    @property
    def psd(self) -> np.ndarray:
        """One-sided PSD in units²/Hz (zeros before the first segment)."""
        return self._auto(0)


# --------------------------------------------------------------------------------------------
# Small helpers
# --------------------------------------------------------------------------------------------


def band_mask(f_hz: np.ndarray, f_lo_hz: float, f_hi_hz: float) -> np.ndarray:
    """Boolean mask of the lines with ``f_lo_hz <= f <= f_hi_hz`` (Hz)."""
    f = np.asarray(f_hz, dtype=float)
    if not f_lo_hz <= f_hi_hz:
        raise WHERE.key("f_hi_hz").fail(f_hi_hz, f"is below f_lo_hz = {f_lo_hz}")
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
