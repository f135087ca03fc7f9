"""Statistics of Welch PSD estimates: equivalent DOF, chi-square bands, dB scatter.

Pure numpy/scipy. The degrees of freedom of an average of overlapped, windowed segment
periodograms follow Welch 1967 [1]_: for white noise the periodograms of segments ``j`` hops
apart have the covariance ``G**2 c(j)**2`` with the window's overlap correlation

.. math:: c(j) = \\frac{\\sum_n w(n)\\,w(n + jS)}{\\sum_n w(n)^2}

(hop ``S``), and an estimate that scatters like ``G chi2_nu / nu`` has ``nu = 2 mean**2 / var``
(Bendat & Piersol [2]_). The argument checks shared by :mod:`liveshape.dsp.spectra` and
:mod:`liveshape.dsp.delay` live here too, so every spectral error names the place ``spectra``.

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
import scipy.special as sp_special
import scipy.stats as sp_stats

from liveshape.schema import Where

__all__ = [
    "chi2_interval_db",
    "db_scatter_std",
    "exp_average_dof",
    "linear_average_dof",
    "overlap_correlation_sq",
    "steady_exp_dof",
    "weighted_average_dof",
    "welch_dof",
]

WHERE = Where("spectra")  # the place named in every spectral ConfigError
_DB = 10.0 / math.log(10.0)  # 4.343 dB per neper of power
_DOF_WINDOW_LENGTH = 1024  # samples used to evaluate a window's overlap correlation


# --------------------------------------------------------------------------------------------
# Window overlap correlation and degrees of freedom
# --------------------------------------------------------------------------------------------


def overlap_correlation_sq(
    window: Any, overlap: float, nperseg: int = _DOF_WINDOW_LENGTH
) -> np.ndarray:
    """Squared overlap correlations ``c(j)**2``, ``j = 1, 2, ...`` while segments overlap.

    ``c(j) = sum_n w(n) w(n + j S) / sum_n w(n)**2`` with the hop ``S = nperseg - noverlap``
    (Welch 1967 [1]_, eq. for the variance of overlapped estimates). For white noise the
    covariance of the periodograms of segments ``j`` hops apart is ``G**2 c(j)**2``.

    Parameters
    ----------
    window : str or tuple
        Window as accepted by :func:`scipy.signal.get_window`.
    overlap : float
        Overlap as a fraction of the segment length, in [0, 1).
    nperseg : int, optional
        Segment length in samples on which the window is evaluated.

    Returns
    -------
    ndarray
        ``c(j)**2`` for ``j = 1 .. ceil(nperseg / hop) - 1`` (empty without overlap).
    """
    if not 0.0 <= overlap < 1.0:
        raise WHERE.key("overlap").fail(overlap, "must be in [0, 1)")
    w = np.asarray(sp_signal.get_window(window, nperseg), dtype=float)
    noverlap = int(round(overlap * nperseg))
    hop = nperseg - noverlap
    energy = float(np.dot(w, w))
    c = [float(np.dot(w[: nperseg - j * hop], w[j * hop:])) / energy
         for j in range(1, -(-nperseg // hop))]
    return np.square(np.array(c, dtype=float))


def linear_average_dof(n_segments: int, c2: np.ndarray) -> float:
    """Equivalent DOF of the plain mean of ``n_segments`` segments with overlap terms ``c2``.

    ``nu = 2K / (1 + 2 sum_{j=1}^{K-1} (1 - j/K) c(j)**2)`` (Welch 1967 [1]_), with ``c2`` from
    :func:`overlap_correlation_sq`; 0 for no segment.
    """
    k = int(n_segments)
    if k <= 0:
        return 0.0
    j = np.arange(1, min(k, c2.size + 1))
    return 2.0 * k / (1.0 + 2.0 * float(np.sum((1.0 - j / k) * c2[: j.size])))


def weighted_average_dof(weights: np.ndarray, c2: np.ndarray) -> float:
    """Equivalent DOF of a weighted average of consecutive segment periodograms.

    ``weights`` are in segment order (one entry per segment). For white noise
    ``var / mean**2 = sum_ij w_i w_j c(|i-j|)**2 / (sum w)**2`` and ``nu = 2 mean**2 / var``
    (Welch 1967 [1]_; Bendat & Piersol [2]_ for ``nu = 2 mean**2 / var`` of a chi-square).
    """
    w = np.asarray(weights, dtype=float)
    total = float(w.sum())
    if total <= 0.0:
        return 0.0
    quad = float(np.dot(w, w))
    for j, c2j in enumerate(c2, start=1):
        if j >= w.size:
            break
        quad += 2.0 * c2j * float(np.dot(w[:-j], w[j:]))
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
    k = check_count(n_segments, "n_segments")
    if k == 0:
        return 0.0
    return linear_average_dof(k, overlap_correlation_sq(window, overlap))


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
    n = check_count(n_avg, "n_avg", minimum=1)
    return steady_exp_dof(n, overlap_correlation_sq(window, overlap))


def steady_exp_dof(n_avg: int, c2: np.ndarray) -> float:
    """:func:`exp_average_dof` for given overlap terms ``c2`` (no argument checks)."""
    beta = 1.0 - 1.0 / n_avg
    j = np.arange(1, c2.size + 1)
    return 2.0 * (2 * n_avg - 1) / (1.0 + 2.0 * float(np.sum(beta**j * c2)))


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
    nu = _check_dof(dof)
    if not 0.0 < confidence < 1.0:
        raise WHERE.key("confidence").fail(confidence, "must be in (0, 1)")
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
    nu = _check_dof(dof)
    s = _DB * np.sqrt(sp_special.polygamma(1, 0.5 * nu))
    return float(s) if s.ndim == 0 else s


# --------------------------------------------------------------------------------------------
# Argument checks shared by the spectral modules (ConfigError naming ``spectra``)
# --------------------------------------------------------------------------------------------


def _check_dof(dof: Any) -> np.ndarray:
    nu = np.asarray(dof, dtype=float)
    if np.any(~np.isfinite(nu)) or np.any(nu <= 0.0):
        raise WHERE.key("dof").fail(dof, "must be finite and > 0")
    return nu


def check_fs(fs_hz: Any) -> float:
    """``fs_hz`` as a finite float > 0, or a ConfigError naming ``spectra: fs_hz``."""
    if isinstance(fs_hz, bool) or not isinstance(fs_hz, (int, float, np.number)):
        raise WHERE.key("fs_hz").fail(fs_hz, "must be a number")
    value = float(fs_hz)
    if not math.isfinite(value) or value <= 0.0:
        raise WHERE.key("fs_hz").fail(fs_hz, "must be finite and > 0")
    return value


def check_nperseg(nperseg: Any) -> int:
    """``nperseg`` as an int >= 2, or a ConfigError naming ``spectra: nperseg``."""
    if isinstance(nperseg, bool) or not isinstance(nperseg, (int, np.integer)) or nperseg < 2:
        raise WHERE.key("nperseg").fail(nperseg, "must be an integer >= 2")
    return int(nperseg)


def check_count(value: Any, name: str, *, minimum: int = 0) -> int:
    """``value`` as an int >= ``minimum``, or a ConfigError naming ``spectra: <name>``."""
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < minimum:
        raise WHERE.key(name).fail(value, f"must be an integer >= {minimum}")
    return int(value)
