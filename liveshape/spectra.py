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
from dataclasses import dataclass
from typing import Any

import numpy as np
import scipy.fft as sp_fft
import scipy.signal as sp_signal
import scipy.special as sp_special
import scipy.stats as sp_stats

from liveshape.schema import Where

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

_WHERE = Where("spectra")
_DB = 10.0 / math.log(10.0)  # 4.343 dB per neper of power
_DOF_WINDOW_LENGTH = 1024  # samples used to evaluate a window's overlap correlation
_MAX_SEGMENTS_PER_BATCH = 64  # bounds the temporary arrays of one push


# --------------------------------------------------------------------------------------------
# Welch PSD and its degrees of freedom
# --------------------------------------------------------------------------------------------


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


def _overlap_c2(window: Any, overlap: float, nperseg: int = _DOF_WINDOW_LENGTH) -> np.ndarray:
    """Squared overlap correlations ``c(j)**2``, ``j = 1, 2, ...`` while segments overlap.

    ``c(j) = sum_n w(n) w(n + j S) / sum_n w(n)**2`` with the hop ``S = nperseg - noverlap``
    (Welch 1967 [1]_, eq. for the variance of overlapped estimates). For white noise the
    covariance of the periodograms of segments ``j`` hops apart is ``G**2 c(j)**2``.
    """
    if not 0.0 <= overlap < 1.0:
        raise _WHERE.key("overlap").fail(overlap, "must be in [0, 1)")
    w = np.asarray(sp_signal.get_window(window, nperseg), dtype=float)
    noverlap = int(round(overlap * nperseg))
    hop = nperseg - noverlap
    energy = float(np.dot(w, w))
    c = [float(np.dot(w[: nperseg - j * hop], w[j * hop:])) / energy
         for j in range(1, -(-nperseg // hop))]
    return np.square(np.array(c, dtype=float))


def _weights_dof(weights: np.ndarray, c2: np.ndarray) -> float:
    """Equivalent DOF of a weighted average of consecutive segment periodograms.

    ``weights`` are in segment order (one entry per segment). For white noise
    ``var / mean**2 = sum_ij w_i w_j c(|i-j|)**2 / (sum w)**2`` and ``nu = 2 mean**2 / var``
    (Welch 1967 [1]_; Bendat & Piersol [2]_ for ``nu = 2 mean**2 / var`` of a chi-square).
    """
    total = float(weights.sum())
    if total <= 0.0:
        return 0.0
    quad = float(np.dot(weights, weights))
    for j, c2j in enumerate(c2, start=1):
        if j >= weights.size:
            break
        quad += 2.0 * c2j * float(np.dot(weights[:-j], weights[j:]))
    return 2.0 * total * total / quad


def welch_dof(n_segments: int, *, overlap: float = 0.5, window: Any = "hann") -> float:
    """Equivalent degrees of freedom of a Welch average of ``n_segments`` overlapped segments.

    .. math:: \\nu = \\frac{2K}{1 + 2\\sum_{j=1}^{K-1} (1 - j/K)\\, c(j)^2},\\qquad
              c(j) = \\frac{\\sum_n w(n)\\,w(n + jS)}{\\sum_n w(n)^2}

    with ``K = n_segments`` and the hop ``S`` (Welch 1967 [1]_). ``c(j)`` is computed from the
    window itself (``scipy.signal.get_window``). Hann at 50 % overlap has ``c(1) = 1/6``, so
    each segment adds ``2 / (1 + 1/18) = 36/19 = 1.895`` DOF when ``K`` is large; without
    overlap every segment adds 2 (Bendat & Piersol [2]_). Valid for lines away from DC and
    Nyquist (those carry half the DOF) and spectra smooth over a few lines.

    Parameters
    ----------
    n_segments : int
        Number of averaged segments ``K`` (0 gives 0 DOF).
    overlap : float, optional
        Overlap as a fraction of the segment length, in [0, 1).
    window : str or tuple, optional
        Window as accepted by :func:`scipy.signal.get_window`.

    Returns
    -------
    float
        Equivalent DOF ``nu`` (the estimate scatters like ``G chi2_nu / nu``).
    """
    k = _check_count(n_segments, "n_segments")
    if k == 0:
        return 0.0
    c2 = _overlap_c2(window, overlap)
    j = np.arange(1, min(k, c2.size + 1))
    denom = 1.0 + 2.0 * float(np.sum((1.0 - j / k) * c2[: j.size]))
    return 2.0 * k / denom


def exp_average_dof(n_avg: int, *, overlap: float = 0.5, window: Any = "hann") -> float:
    """Steady-state equivalent DOF of exponential averaging with weight ``alpha = 1/n_avg``.

    The exponential average ``G_k = (1 - alpha) G_{k-1} + alpha P_k`` of segment periodograms
    ``P_k`` is, in steady state, ``alpha sum_m beta**m P_{k-m}`` with ``beta = 1 - alpha``.
    For white noise ``var(P_i) = G**2`` and ``cov(P_i, P_{i+j}) = G**2 c(j)**2`` (Welch 1967
    [1]_), so

    .. math:: \\frac{\\mathrm{var}}{G^2} = \\alpha^2 \\sum_{m, m'} \\beta^{m+m'} c(|m-m'|)^2
              = \\frac{\\alpha}{2-\\alpha}\\Bigl[1 + 2\\sum_{j\\ge1}\\beta^j c(j)^2\\Bigr]

    using ``sum_m beta**(2m) = 1 / (1 - beta**2) = 1 / (alpha (2 - alpha))``. With
    ``nu = 2 G**2 / var`` this is

    .. math:: \\nu = \\frac{2(2n-1)}{1 + 2\\sum_{j\\ge1}(1 - 1/n)^j c(j)^2}

    i.e. without overlap ``2(2n - 1)``: an exponential average of time constant ``n`` segments
    is as steady as a linear average of ``2n - 1`` segments (the variance ratio
    ``alpha / (2 - alpha)``, Bendat & Piersol [2]_ for the non-overlapped form). Hann at 50 %
    gives ``2(2n-1) / (1 + (1 - 1/n)/18)``.

    Parameters
    ----------
    n_avg : int
        Averaging number ``n`` (``alpha = 1/n``), at least 1.
    overlap, window
        As for :func:`welch_dof`.

    Returns
    -------
    float
        Equivalent DOF in steady state (after many more than ``n_avg`` segments).
    """
    n = _check_count(n_avg, "n_avg", minimum=1)
    c2 = _overlap_c2(window, overlap)
    beta = 1.0 - 1.0 / n
    j = np.arange(1, c2.size + 1)
    return 2.0 * (2 * n - 1) / (1.0 + 2.0 * float(np.sum(beta**j * c2)))


# --------------------------------------------------------------------------------------------
# Chi-square statistics of a PSD estimate
# --------------------------------------------------------------------------------------------


def chi2_interval_db(
    dof: float | np.ndarray, confidence: float = 0.90
) -> tuple[float | np.ndarray, float | np.ndarray]:
    """Confidence interval of the true PSD about an estimate with ``dof`` DOF, in dB.

    With ``nu G_hat / G ~ chi2_nu`` (Bendat & Piersol [2]_), the true ``G`` lies in
    ``[nu G_hat / chi2_{nu; (1+c)/2}, nu G_hat / chi2_{nu; (1-c)/2}]`` with probability ``c``.
    Returned as ``10 log10`` of those factors: ``lo_db < 0 < hi_db``. For ``nu = 120`` and 90 %:
    ``-0.87 / +0.98`` dB.

    Parameters
    ----------
    dof : float or array_like
        Equivalent DOF ``nu`` (> 0), e.g. from :func:`welch_dof`.
    confidence : float, optional
        Two-sided confidence level in (0, 1).

    Returns
    -------
    lo_db, hi_db : float or ndarray
        Lower and upper limits in dB relative to the estimate.
    """
    nu = np.asarray(dof, dtype=float)
    if np.any(~np.isfinite(nu)) or np.any(nu <= 0.0):
        raise _WHERE.key("dof").fail(dof, "must be finite and > 0")
    if not 0.0 < confidence < 1.0:
        raise _WHERE.key("confidence").fail(confidence, "must be in (0, 1)")
    tail = 0.5 * (1.0 - confidence)
    lo = _DB * np.log(nu / sp_stats.chi2.isf(tail, nu))
    hi = _DB * np.log(nu / sp_stats.chi2.ppf(tail, nu))
    if lo.ndim == 0:
        return float(lo), float(hi)
    return lo, hi


def db_scatter_std(dof: float | np.ndarray) -> float | np.ndarray:
    """Standard deviation in dB of ``10 log10(G_hat / G)`` for a chi-square estimate.

    ``ln(chi2_nu / 2)`` has variance ``psi1(nu / 2)`` (trigamma), so the dB scatter is
    ``4.343 sqrt(psi1(nu / 2))``: 1.10 dB at ``nu = 32``, 0.56 dB at ``nu = 120``.

    Parameters
    ----------
    dof : float or array_like
        Equivalent DOF ``nu`` (> 0).

    Returns
    -------
    float or ndarray
        Standard deviation in dB.
    """
    nu = np.asarray(dof, dtype=float)
    if np.any(~np.isfinite(nu)) or np.any(nu <= 0.0):
        raise _WHERE.key("dof").fail(dof, "must be finite and > 0")
    s = _DB * np.sqrt(sp_special.polygamma(1, 0.5 * nu))
    return float(s) if s.ndim == 0 else s


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
# Loop delay
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class DelayEstimate:
    """Delay of a response behind its reference, from the cross-correlation peak.

    Attributes
    ----------
    samples : int
        Integer lag in samples of the largest ``|r|``, within ``0 .. max_lag``.
    fraction : float
        Sub-sample correction in (-0.5, 0.5) from a parabola through the peak and its two
        neighbours; the delay is ``samples + fraction`` samples.
    peak : float
        Normalized correlation at the peak, ``r / sqrt(sum x**2 sum y**2)`` in [-1, 1]
        (negative when the response is inverted).
    """

    samples: int
    fraction: float
    peak: float

    @property
    def delay_samples(self) -> float:
        """Sub-sample delay ``samples + fraction`` in samples."""
        return self.samples + self.fraction


def estimate_delay(x: np.ndarray, y: np.ndarray, *, max_lag: int) -> DelayEstimate:
    """Estimate the delay of response ``y`` behind reference ``x`` by FFT cross-correlation.

    ``r(k) = sum_t x(t) y(t + k)`` for lags ``k = 0 .. max_lag`` (zero-padded FFT, no circular
    wrap); the lag of the largest ``|r(k)|`` is the integer delay, and a parabola through
    ``|r|`` at the peak and its neighbours gives the sub-sample fraction (common practice).
    For a white reference the cross-correlation is the plant's impulse response (Bendat &
    Piersol [2]_), so the peak sits at the pure (loop) delay plus the lag of the impulse
    response's largest sample: exactly the pure delay when that is the first sample, one or a
    few samples more through a band-pass. Aligning :class:`CrossSpectrum` by this lag leaves at
    most that small residual delay (a linear phase in H1, a negligible magnitude bias).

    Parameters
    ----------
    x : array_like
        Reference (drive) samples, 1-D.
    y : array_like
        Response samples, 1-D, same length as ``x``.
    max_lag : int
        Largest lag searched, in samples (``0 <= max_lag < len(x)``).

    Returns
    -------
    DelayEstimate
    """
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    if x.ndim != 1 or y.ndim != 1 or x.size != y.size:
        raise ValueError(
            f"spectra: estimate_delay needs two 1-D records of equal length, "
            f"got {x.shape} and {y.shape}"
        )
    max_lag = _check_count(max_lag, "max_lag")
    n = x.size
    if max_lag >= n:
        raise _WHERE.key("max_lag").fail(max_lag, f"must be below the record length {n}")
    nfft = sp_fft.next_fast_len(n + max_lag + 2, real=True)
    r = sp_fft.irfft(np.conj(sp_fft.rfft(x, nfft)) * sp_fft.rfft(y, nfft), nfft)
    norm = math.sqrt(float(np.dot(x, x)) * float(np.dot(y, y)))
    if norm == 0.0:
        return DelayEstimate(0, 0.0, 0.0)
    lags = r[: max_lag + 2]  # lags 0 .. max_lag + 1; r[-1] is lag -1
    k = int(np.argmax(np.abs(lags[: max_lag + 1])))
    left = abs(r[k - 1]) if k > 0 else abs(r[-1])
    mid, right = abs(lags[k]), abs(lags[k + 1])
    curv = left - 2.0 * mid + right
    fraction = 0.0
    if curv < 0.0:
        fraction = float(np.clip(0.5 * (left - right) / curv, -0.5, 0.5))
    return DelayEstimate(samples=k, fraction=fraction, peak=float(lags[k] / norm))


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


# --------------------------------------------------------------------------------------------
# Argument checks
# --------------------------------------------------------------------------------------------


def _check_fs(fs_hz: Any) -> float:
    if isinstance(fs_hz, bool) or not isinstance(fs_hz, (int, float, np.number)):
        raise _WHERE.key("fs_hz").fail(fs_hz, "must be a number")
    value = float(fs_hz)
    if not math.isfinite(value) or value <= 0.0:
        raise _WHERE.key("fs_hz").fail(fs_hz, "must be finite and > 0")
    return value


def _check_nperseg(nperseg: Any) -> int:
    if isinstance(nperseg, bool) or not isinstance(nperseg, (int, np.integer)) or nperseg < 2:
        raise _WHERE.key("nperseg").fail(nperseg, "must be an integer >= 2")
    return int(nperseg)


def _check_count(value: Any, name: str, *, minimum: int = 0) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < minimum:
        raise _WHERE.key(name).fail(value, f"must be an integer >= {minimum}")
    return int(value)
