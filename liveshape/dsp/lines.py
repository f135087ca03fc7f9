"""Discrete lines not caused by the drive (hum): detection by the multitaper harmonic F-test.

Pure numpy/scipy. Method: Thomson's harmonic F-test (D. J. Thomson, "Spectrum estimation and
harmonic analysis", Proc. IEEE 70(9), 1982, §XIII; Percival & Walden, *Spectral Analysis for
Physical Applications*, 1993, §10.11). A block ``x_t`` (``n`` samples) is tapered with the ``K``
Slepian sequences ``v_k`` of time-bandwidth ``NW`` (``scipy.signal.windows.dpss``, unit energy);
the eigencoefficients are ``y_k(f) = Σ_t v_k(t) x_t e^{−i2πft/fs}`` and ``U_k = Σ_t v_k(t)``.
A sinusoid ``A cos(2πf0 t + φ)`` gives ``y_k(f0) ≈ μ U_k`` with ``μ = (A/2) e^{iφ}``, so the
least-squares line amplitude is ``μ̂ = Σ U_k y_k / Σ U_k²`` and

    F(f) = (K − 1) |μ̂|² Σ U_k² / Σ_k |y_k − μ̂ U_k|².

With no line at ``f`` and a spectrum that is smooth over ``±W = ±NW·fs/n``, ``F`` follows the
F distribution with (2, 2K − 2) degrees of freedom, so ``F > F_{2,2K−2}(1 − p)`` has false-alarm
probability ``p`` per tested frequency in ``W ≤ f ≤ fs/2 − W`` (docs/methods.md, "Lines not
caused by the drive"). :func:`find_extraneous_lines` searches a zero-padded grid (a line between
Fourier frequencies loses its F on the plain grid) with the threshold set so that a block
without lines gives at most ``false_per_block`` false findings on average.

A line is *not caused by the drive* when the control block has a significant line at ``f`` and
the drive block does not (a sine-on-random tone is in the drive, so it is not flagged).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from scipy import signal, stats

__all__ = ["LineFinding", "f_threshold", "harmonic_f_test", "find_extraneous_lines",
           "line_mask", "coherent_control_psd"]


def f_threshold(p: float, n_tapers: int) -> float:
    """Critical value of the harmonic F statistic for a false-alarm probability ``p``.

    Parameters
    ----------
    p : float
        False-alarm probability per tested frequency, 0 < p < 1.
    n_tapers : int
        Number ``K`` of Slepian tapers (≥ 2).

    Returns
    -------
    float
        ``F_{2, 2K−2}(1 − p)`` (Thomson 1982, §XIII).
    """
    if not 0.0 < p < 1.0:
        raise ValueError(f"p must be in (0, 1), got {p}")
    if n_tapers < 2:
        raise ValueError(f"n_tapers must be >= 2, got {n_tapers}")
    return float(stats.f.isf(p, 2, 2 * n_tapers - 2))


@lru_cache(maxsize=8)
def _tapers(n: int, nw: float, k: int) -> np.ndarray:
    """The ``k`` unit-energy Slepian tapers, ``(k, n)``, read-only (cached: blocks repeat)."""
    v = np.atleast_2d(signal.windows.dpss(n, nw, Kmax=k, norm=2))
    v.flags.writeable = False
    return v


def _n_tapers(nw: float, n_tapers: int | None) -> int:
    return int(n_tapers) if n_tapers is not None else max(2, int(round(2 * nw - 1)))


def harmonic_f_test(
    x: np.ndarray, fs_hz: float, *, nw: float = 4.0, n_tapers: int | None = None,
    pad: int = 1,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Thomson's harmonic F statistic and line amplitude on an FFT grid.

    Parameters
    ----------
    x : ndarray
        One block of the signal (any unit, e.g. g); its mean is removed.
    fs_hz : float
        Sample rate, Hz.
    nw : float
        Time-bandwidth product; the half bandwidth is ``W = nw·fs/n`` Hz.
    n_tapers : int, optional
        Number of tapers ``K`` (2 to ``2·nw``); default ``2·nw − 1``.
    pad : int
        Zero-padding factor of the FFT grid (grid step ``fs/(pad·n)``). A line between grid
        frequencies loses F quickly (half a step off at ``pad = 1`` it can vanish), so search
        for lines on a padded grid.

    Returns
    -------
    f_hz : ndarray
        Frequencies of the one-sided grid, Hz.
    f_stat : ndarray
        F statistic; where there is no line it is distributed F(2, 2K−2) for
        ``W ≤ f ≤ fs/2 − W`` (Thomson 1982, §XIII). 0 where it is undefined (0/0).
    amplitude : ndarray
        Estimated line amplitude ``2|μ̂|`` (peak, unit of ``x``).
    """
    x = np.asarray(x, dtype=float)
    if x.ndim != 1:
        raise ValueError(f"x must be one-dimensional, got shape {x.shape}")
    n = x.size
    k = _n_tapers(nw, n_tapers)
    if not 2 <= k <= 2 * nw:
        raise ValueError(f"n_tapers must be from 2 to 2·nw = {2 * nw:g}, got {k}")
    if n < 4 * k or int(pad) < 1:
        raise ValueError(f"need at least 4·K = {4 * k} samples and pad >= 1, got {n}, {pad}")
    v = _tapers(n, nw, k)
    y = np.fft.rfft(v * (x - x.mean()), n=int(pad) * n, axis=1)
    u = v.sum(axis=1)
    su2 = float(np.sum(u * u))
    mu = (u[:, None] * y).sum(axis=0) / su2
    resid = np.sum(np.abs(y - mu[None, :] * u[:, None]) ** 2, axis=0)
    with np.errstate(divide="ignore", invalid="ignore"):
        f_stat = (k - 1) * np.abs(mu) ** 2 * su2 / resid
    f_stat = np.where(np.isnan(f_stat), 0.0, f_stat)
    f_hz = np.fft.rfftfreq(int(pad) * n, 1.0 / fs_hz)
    return f_hz, f_stat, 2.0 * np.abs(mu)


@dataclass(frozen=True)
class LineFinding:
    """One line in the control that the drive did not cause.

    Attributes
    ----------
    f_hz : float
        Frequency of the line, Hz.
    amplitude_g : float
        Peak amplitude in the control, g (rms is ``amplitude_g/√2``).
    f_stat : float
        Harmonic F statistic of the control at ``f_hz``.
    p_value : float
        Probability of an F this large with no line (per tested frequency).
    """

    f_hz: float
    amplitude_g: float
    f_stat: float
    p_value: float

    def as_dict(self) -> dict:
        """Plain dict for events and summary.json."""
        return {"f_hz": round(self.f_hz, 3), "amplitude_g_peak": self.amplitude_g,
                "rms_g": self.amplitude_g / math.sqrt(2.0), "p_value": self.p_value,
                "cause": "not caused by the drive"}


def find_extraneous_lines(
    control: np.ndarray, drive: np.ndarray | None, fs_hz: float, *,
    false_per_block: float = 0.01, nw: float = 4.0,
    band_hz: tuple[float, float] | None = None, pad: int = 8,
) -> list[LineFinding]:
    """Lines in ``control`` that are significant by the harmonic F-test and absent in ``drive``.

    The F statistic is computed on a grid zero-padded ``pad`` times (a line between Fourier
    frequencies is found at full strength). A grid frequency is a line when its F exceeds
    :func:`f_threshold` ``(p, K)`` and is the largest F within ``±W``; it is caused by the drive
    when the drive's F exceeds the threshold anywhere within ``±W`` of it. Only
    ``W ≤ f ≤ fs/2 − W`` is searched (where the test holds). The threshold is set for the
    false-alarm probability ``p = false_per_block / N`` per grid point, ``N`` the number of grid
    points searched; a false finding needs at least one grid point above the threshold, so a
    block without lines gives on average at most ``false_per_block`` false findings (fewer in
    practice, as neighbouring grid points are correlated; ``tests/benchmarks/bench_lines.py``
    measures it).

    Parameters
    ----------
    control, drive : ndarray
        Simultaneous blocks of control (g) and drive (any unit), same length; ``drive`` None:
        no drive check.
    fs_hz : float
        Sample rate, Hz.
    false_per_block : float
        Bound on the mean number of false findings per block (0 < value < 1).
    nw : float
        Time-bandwidth product (``K = 2·nw − 1`` tapers).
    band_hz : (float, float), optional
        Only report lines inside this band, Hz.
    pad : int
        Zero-padding factor of the search grid.

    Returns
    -------
    list of LineFinding
        In increasing frequency.
    """
    control = np.asarray(control, dtype=float)
    if drive is not None and np.shape(drive) != control.shape:
        raise ValueError(f"drive and control differ in shape: {np.shape(drive)} vs "
                         f"{control.shape}")
    k = _n_tapers(nw, None)
    f, fc, amp = harmonic_f_test(control, fs_hz, nw=nw, n_tapers=k, pad=pad)
    if drive is not None:
        _, fd, _ = harmonic_f_test(drive, fs_hz, nw=nw, n_tapers=k, pad=pad)
    else:
        fd = np.zeros_like(fc)
    w_hz = nw * fs_hz / control.size
    half = max(1, int(math.ceil(nw * pad)))  # W in grid steps (step fs/(pad·n))
    lo_hz, hi_hz = w_hz, fs_hz / 2 - w_hz
    if band_hz is not None:
        lo_hz, hi_hz = max(lo_hz, band_hz[0]), min(hi_hz, band_hz[1])
    searched = (f >= lo_hz) & (f <= hi_hz)
    n_searched = int(np.count_nonzero(searched))
    if n_searched == 0:
        return []
    crit = f_threshold(false_per_block / n_searched, k)
    out: list[LineFinding] = []
    for i in np.flatnonzero((fc > crit) & searched):
        lo, hi = max(0, i - half), min(fc.size, i + half + 1)
        if fc[i] < fc[lo:hi].max() or fc[i] == fc[lo:i].max(initial=-1.0):
            continue  # not the peak within ±W (the first of equal peaks counts)
        if fd[lo:hi].max() > crit:
            continue
        out.append(LineFinding(float(f[i]), float(amp[i]), float(fc[i]),
                               float(stats.f.sf(fc[i], 2, 2 * k - 2))))
    return out


def line_mask(f_hz: np.ndarray, findings: list[LineFinding], half_width_hz: float) -> np.ndarray:
    """Boolean mask of the spectral lines ``f_hz`` within ``half_width_hz`` of a finding.

    Use a half width of at least the Welch line spacing plus the drift of the line (Hz).
    """
    f = np.asarray(f_hz, dtype=float)
    mask = np.zeros(f.shape, dtype=bool)
    for line in findings:
        mask |= np.abs(f - line.f_hz) <= half_width_hz
    return mask


def coherent_control_psd(control_psd: np.ndarray, coherence: np.ndarray,
                         mask: np.ndarray) -> np.ndarray:
    """Control PSD with the coherent output power ``γ²·Gyy`` on the masked lines.

    ``γ² Gyy = |Gxy|²/Gxx`` is the part of the control PSD linearly related to the drive, the
    coherent output spectrum (Bendat & Piersol, *Random Data*, 4th ed., Ch. 6, single
    input/output relationships [section number from memory: §6.1.4]); on a hum line it leaves
    the hum out, so an equalizer fed with it does not cut the drive there.

    Parameters
    ----------
    control_psd : ndarray
        Control PSD ``Gyy``, g²/Hz.
    coherence : ndarray
        Ordinary coherence ``γ²`` drive→control on the same lines (0–1).
    mask : ndarray of bool
        Lines to replace (e.g. :func:`line_mask` of the findings).

    Returns
    -------
    ndarray
        ``γ²·Gyy`` on the masked lines, ``Gyy`` elsewhere, g²/Hz.
    """
    c = np.asarray(control_psd, dtype=float).copy()
    m = np.asarray(mask, dtype=bool)
    c[m] = np.asarray(coherence, dtype=float)[m] * c[m]
    return c
