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
probability ``p`` per tested frequency (docs/methods.md, "Lines not caused by the drive").

A line is *not caused by the drive* when the control block has a significant line at ``f`` and
the drive block does not (a sine-on-random tone is in the drive, so it is not flagged).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

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


def _tapers(n: int, nw: float, k: int) -> np.ndarray:
    return np.atleast_2d(signal.windows.dpss(n, nw, Kmax=k, norm=2))


def harmonic_f_test(
    x: np.ndarray, fs_hz: float, *, nw: float = 4.0, n_tapers: int | None = None,
    pad: int = 1,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Thomson's harmonic F statistic and line amplitude on an FFT grid.

    Parameters
    ----------
    x : ndarray
        One block of the signal (any unit, e.g. g).
    fs_hz : float
        Sample rate, Hz.
    nw : float
        Time-bandwidth product; the half bandwidth is ``W = nw·fs/n`` Hz.
    n_tapers : int, optional
        Number of tapers ``K``; default ``2·nw − 1``.
    pad : int
        Zero-padding factor of the FFT grid (grid step ``fs/(pad·n)``).

    Returns
    -------
    f_hz : ndarray
        Frequencies of the one-sided grid, Hz.
    f_stat : ndarray
        F statistic, distributed F(2, 2K−2) where there is no line.
    amplitude : ndarray
        Estimated line amplitude ``2|μ̂|`` (peak, unit of ``x``).
    """
    x = np.asarray(x, dtype=float)
    n = x.size
    k = int(n_tapers) if n_tapers is not None else max(2, int(round(2 * nw - 1)))
    v = _tapers(n, nw, k)
    y = np.fft.rfft(v * (x - x.mean()), n=pad * n, axis=1)
    u = v.sum(axis=1)
    su2 = float(np.sum(u * u))
    mu = (u[:, None] * y).sum(axis=0) / su2
    resid = np.sum(np.abs(y - mu[None, :] * u[:, None]) ** 2, axis=0)
    with np.errstate(divide="ignore", invalid="ignore"):
        f_stat = (k - 1) * np.abs(mu) ** 2 * su2 / resid
    f_stat = np.where(np.isfinite(f_stat), f_stat, 0.0)
    f_hz = np.fft.rfftfreq(pad * n, 1.0 / fs_hz)
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
    p: float = 1e-4, nw: float = 4.0, band_hz: tuple[float, float] | None = None,
) -> list[LineFinding]:
    """Lines in ``control`` that are significant by the harmonic F-test and absent in ``drive``.

    A grid frequency is a line when its F exceeds :func:`f_threshold` ``(p, K)`` and is the
    largest F within ``±W``; it is caused by the drive when the drive's F at that frequency also
    exceeds the threshold. Testing every Fourier frequency of the band gives about
    ``p · n_lines`` false findings per block.

    Parameters
    ----------
    control, drive : ndarray
        Simultaneous blocks of control (g) and drive (any unit); ``drive`` None: no drive check.
    fs_hz : float
        Sample rate, Hz.
    p : float
        False-alarm probability per tested frequency.
    nw : float
        Time-bandwidth product.
    band_hz : (float, float), optional
        Only report lines inside this band.

    Returns
    -------
    list of LineFinding
    """
    k = max(2, int(round(2 * nw - 1)))
    crit = f_threshold(p, k)
    f, fc, amp = harmonic_f_test(control, fs_hz, nw=nw, n_tapers=k)
    if drive is not None:
        _, fd, _ = harmonic_f_test(drive, fs_hz, nw=nw, n_tapers=k)
    else:
        fd = np.zeros_like(fc)
    half = max(1, int(round(nw)))  # W in grid steps (pad = 1: step fs/n, W = nw·fs/n)
    out: list[LineFinding] = []
    for i in np.flatnonzero(fc > crit):
        lo, hi = max(0, i - half), min(fc.size, i + half + 1)
        if fc[i] < fc[lo:hi].max():
            continue
        if band_hz is not None and not band_hz[0] <= f[i] <= band_hz[1]:
            continue
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

    ``γ² Gyy = |Gxy|²/Gxx`` is the part of the control PSD linearly related to the drive
    (Bendat & Piersol, *Random Data*, 4th ed., §6.1.4, "coherent output spectrum"); on a hum line
    it leaves the hum out, so an equalizer fed with it does not cut the drive there.
    """
    c = np.asarray(control_psd, dtype=float).copy()
    m = np.asarray(mask, dtype=bool)
    c[m] = np.asarray(coherence, dtype=float)[m] * c[m]
    return c
