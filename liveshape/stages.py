"""Pure pieces of the control loop's stages: the connection check and the decision estimate.

Pure numpy/scipy, no state beyond the small :class:`DecisionPool`. The controller
(:mod:`liveshape.controller`) strings these together.

* :func:`analyse_connection` looks at the very-low-level connection record: loop delay by
  cross-correlation, then coherence and H1 on the delay-aligned record, and whether the control
  channel responds at all.
* :func:`segments_for_dof` turns a DOF requirement into a number of Welch segments (Welch 1967
  equivalent DOF of Hann segments at 50 % overlap, :func:`liveshape.spectra.welch_dof`).
* :class:`DecisionPool` combines whole, independent update estimates into the estimate used for
  decisions (tolerance, display) with at least the target DOF.
"""

from __future__ import annotations

import math
from collections import deque
from dataclasses import dataclass

import numpy as np

from liveshape.spectra import CrossSpectrum, PsdAverager, estimate_delay, welch_dof

#: Welch segments of the connection check (coherence bias for no response ≈ 1/16).
CONNECT_SEGMENTS = 16


def segments_for_dof(dof: float) -> int:
    """Smallest number of Hann 50 %-overlap segments whose Welch DOF reaches ``dof``."""
    k = max(1, int(math.ceil(dof / 2.0)))
    while welch_dof(k) < dof:
        k += 1
    return k


def update_dof_for(target_dof: float) -> float:
    """DOF of one equalizer update estimate: half the decision DOF, at least 16.

    Two independent update estimates pool to the decision DOF, so the first tolerance decision
    after a drive change needs two updates. The equalizer's own steady-state true error,
    ``γ/(2−γ)·σ²(ν_u)`` (DOMAIN.md §4), is then ``σ²(ν_u)/3`` at γ = 0.5, below the display
    scatter σ²(ν_d) of the decision estimate.
    """
    return max(16.0, 0.5 * float(target_dof))


@dataclass(frozen=True)
class ConnectionCheck:
    """Result of the connection look (all FS units, band lines only where arrays).

    Attributes
    ----------
    delay_samples : int
        Loop delay from the drive stream to the response stream, samples.
    delay_peak : float
        Normalized cross-correlation at the delay (−1..1).
    h1 : ndarray
        H1 (FS/FS) on all lines, delay-aligned.
    coherence : ndarray
        Coherence on all lines.
    mean_coherence : float
        Mean coherence over the band lines.
    response_rms_fs : float
        Response rms during the connection drive, FS.
    background_rms_fs : float
        Response rms while silent, FS.
    snr_db : float
        Band power of the response with drive over the band power while silent, dB.
    """

    delay_samples: int
    delay_peak: float
    h1: np.ndarray
    coherence: np.ndarray
    mean_coherence: float
    response_rms_fs: float
    background_rms_fs: float
    snr_db: float


def analyse_connection(
    x: np.ndarray,
    y: np.ndarray,
    background: np.ndarray,
    *,
    fs_hz: float,
    nperseg: int,
    band: np.ndarray,
    max_lag: int,
    skip: int,
) -> ConnectionCheck:
    """Delay, coherence and H1 of the connection record.

    Parameters
    ----------
    x, y : ndarray
        Drive and response streams over the same sample indices (response not yet aligned).
    background : ndarray
        Response while the drive was silent.
    fs_hz, nperseg : float, int
        Sample rate and segment length.
    band : ndarray of bool
        Lines under control.
    max_lag : int
        Largest delay searched, samples.
    skip : int
        Samples at the start of the aligned record to leave out (the fade-in).
    """
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    est = estimate_delay(x, y, max_lag=max_lag)
    d = est.samples
    xa, ya = x[: x.size - d], y[d:]
    xa, ya = xa[skip:], ya[skip:]
    cs = CrossSpectrum(fs_hz, nperseg, averaging="linear")
    cs.push(xa, ya)
    coh = cs.coherence
    cb = coh[band]
    mean_coh = float(np.mean(np.where(np.isfinite(cb), cb, 0.0)))
    bg = PsdAverager(fs_hz, nperseg, averaging="linear")
    bg.push(np.asarray(background, dtype=float))
    p_sig = float(np.sum(cs.gyy[band]))
    p_bg = float(np.sum(bg.psd[band])) if bg.n_segments else 0.0
    if p_sig > 0 and p_bg > 0:
        snr_db = 10.0 * math.log10(p_sig / p_bg)
    else:
        snr_db = math.inf if p_sig > 0 else -math.inf
    return ConnectionCheck(
        delay_samples=int(d),
        delay_peak=float(est.peak),
        h1=cs.h1,
        coherence=coh,
        mean_coherence=mean_coh,
        response_rms_fs=float(np.sqrt(np.mean(ya * ya))) if ya.size else 0.0,
        background_rms_fs=float(np.sqrt(np.mean(np.square(background)))) if len(background)
        else 0.0,
        snr_db=snr_db,
    )


class DecisionPool:
    """Decision estimate from whole update estimates (each independent, one drive each).

    ``"linear"``: the mean of the last ``n_avg`` update estimates. ``"exponential"``: the first
    ``n_avg`` estimates are averaged with equal weights, then each new one enters with weight
    ``1/n_avg`` (the same "stable" exponential start as :class:`liveshape.spectra.CrossSpectrum`).
    ``n_avg = ceil(target_dof / update_dof)``, so the DOF reaches the target after ``n_avg``
    updates in both modes. The DOF is tracked exactly for independent χ² estimates: with weights
    ``w_i`` (summing to 1) ``2/ν = Σ w_i² · 2/ν_i``.

    Parameters
    ----------
    target_dof, update_dof : float
        Decision DOF and DOF of one update estimate.
    averaging : {"linear", "exponential"}
    """

    def __init__(self, target_dof: float, update_dof: float, averaging: str) -> None:
        if averaging not in ("linear", "exponential"):
            raise ValueError(f"averaging must be linear or exponential, got {averaging!r}")
        self.target_dof = float(target_dof)
        self.averaging = averaging
        self.n_avg = max(1, int(math.ceil(target_dof / update_dof - 1e-9)))
        self._items: deque[tuple[np.ndarray, float]] = deque(maxlen=self.n_avg)
        self._mean: np.ndarray | None = None
        self._var = 0.0  # Σ w² · 2/ν
        self._k = 0

    def reset(self) -> None:
        self._items.clear()
        self._mean = None
        self._var = 0.0
        self._k = 0

    @property
    def count(self) -> int:
        return self._k

    def push(self, psd: np.ndarray, dof: float) -> None:
        p = np.asarray(psd, dtype=float)
        self._k += 1
        if self.averaging == "linear":
            self._items.append((p.copy(), float(dof)))
            return
        a = 1.0 / min(self._k, self.n_avg)
        if self._mean is None:
            self._mean = p.copy()
            self._var = 2.0 / dof
        else:
            self._mean = (1.0 - a) * self._mean + a * p
            self._var = (1.0 - a) ** 2 * self._var + a * a * 2.0 / dof

    @property
    def psd(self) -> np.ndarray | None:
        """Decision PSD (a copy), or None before the first update."""
        if self.averaging == "linear":
            if not self._items:
                return None
            return np.mean([p for p, _ in self._items], axis=0)
        return None if self._mean is None else self._mean.copy()

    @property
    def dof(self) -> float:
        """Equivalent DOF of :attr:`psd` (0 before the first update)."""
        if self.averaging == "linear":
            m = len(self._items)
            if not m:
                return 0.0
            var = sum(2.0 / nu for _, nu in self._items) / (m * m)
            return 2.0 / var
        return 2.0 / self._var if self._var > 0 else 0.0

    @property
    def ready(self) -> bool:
        """True when the DOF reaches the target (to rounding)."""
        return self.dof >= self.target_dof * (1.0 - 1e-9)
