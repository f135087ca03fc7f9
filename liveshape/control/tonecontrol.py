"""Control of sine tones on top of the random drive (sine-on-random): pure numpy.

:class:`ToneLoop` produces the tones of the drive (FS) and, per block of aligned drive and
control samples, fits every tone's amplitude and phase in both by linear least squares on the
tone's own phase ``φ_i(t)`` (the three-parameter sine fit of IEEE Std 1057, several tones at
once; for a fixed tone it is :func:`liveshape.dsp.tones.fit_tones`; for a swept tone the
regressors ``cos φ_i(t)``, ``sin φ_i(t)`` follow the sweep within the block). The ratio of the
control's to the drive's complex amplitude is the chain's gain ``|H_i|`` (g/FS) at the tone; a
running (exponential) average of it gives the update

    a_drive ← a_drive · (a_target / (|H_i| a_drive))^γ,

with each step limited to ``±max_step_db`` (docs/methods.md, "Sine tones on random"). With
``γ = 1`` and an exact gain this is one step to the target; ``γ < 1`` trades speed for less
scatter. Amplitude changes are applied as linear ramps over the next block read, so the tones
never step.

:meth:`ToneLoop.remove` subtracts the fitted tones from a control block (the random spectrum
is then estimated without them) and :meth:`ToneLoop.line_mask` gives the lines within ±k lines
of each tone over a block (to leave out of the random control;
:func:`liveshape.dsp.tones.tone_line_mask`).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from liveshape.dsp.tones import Tone, tone_line_mask

__all__ = ["ToneBlockFit", "ToneLoop", "ToneUpdate", "fit_tone_phases", "initial_drive_fs"]


@dataclass(frozen=True)
class ToneBlockFit:
    """Least-squares tones of one block.

    Attributes
    ----------
    amplitude : ndarray
        Peak amplitude of each tone, in the block's unit.
    phase_rad : ndarray
        Phase of each tone relative to its plan: ``y ≈ A cos(φ_i(t) + phase)``, rad.
    coef : ndarray
        Complex amplitude ``A e^{j phase}`` of each tone.
    tones_part : ndarray
        The fitted tones summed over the block (same length as the block).
    residual_rms : float
        Rms of the block less the fitted tones and offset.
    """

    amplitude: np.ndarray
    phase_rad: np.ndarray
    coef: np.ndarray
    tones_part: np.ndarray
    residual_rms: float


def fit_tone_phases(y: Any, phases: np.ndarray) -> ToneBlockFit:
    """Fit ``c + Σ a_i cos φ_i(t) + b_i sin φ_i(t)`` to a block by linear least squares.

    Parameters
    ----------
    y : array_like
        The block, length ``n`` (any unit).
    phases : ndarray
        Shape ``(n_tones, n)``: each tone's phase at each sample, rad.

    Returns
    -------
    ToneBlockFit
        ``A = sqrt(a² + b²)``, ``y ≈ A cos(φ + phase)`` with ``phase = atan2(−b, a)`` (IEEE Std
        1057 three-parameter fit; its amplitude scatter in white noise of variance σ² is
        σ sqrt(2/n), Kay 1993 §3.7).
    """
    x = np.asarray(y, dtype=float).ravel()
    ph = np.atleast_2d(np.asarray(phases, dtype=float))
    cols = [np.ones(x.size)]
    for p in ph:
        cols += [np.cos(p), np.sin(p)]
    m = np.column_stack(cols)
    coef, *_ = np.linalg.lstsq(m, x, rcond=None)
    a, b = coef[1::2], coef[2::2]
    part = m[:, 1:] @ coef[1:]
    resid = x - coef[0] - part
    z = a - 1j * b
    return ToneBlockFit(np.abs(z), np.angle(z), z, part, float(np.sqrt(np.mean(resid**2))))


@dataclass(frozen=True)
class ToneUpdate:
    """What one :meth:`ToneLoop.update` measured and decided (per tone, arrays).

    Attributes
    ----------
    measured_g : ndarray
        Fitted amplitude of each tone in the control, g (peak).
    target_g : ndarray
        Target amplitude at the current level, g (peak).
    error_db : ndarray
        ``20 log10(measured / target)``, dB.
    gain_g_per_fs : ndarray
        Running estimate of the chain's gain ``|H|`` at each tone, g/FS.
    drive_fs : ndarray
        New drive amplitude of each tone, FS (peak), applied over the next block read.
    alarm, abort : ndarray of bool
        ``|error_db|`` beyond the tone's ``tolerance_db`` / ``abort_db``.
    f_hz : ndarray
        Frequency of each tone at the block's middle, Hz.
    """

    measured_g: np.ndarray
    target_g: np.ndarray
    error_db: np.ndarray
    gain_g_per_fs: np.ndarray
    drive_fs: np.ndarray
    alarm: np.ndarray
    abort: np.ndarray
    f_hz: np.ndarray


class ToneLoop:
    """Drive tones and their amplitude control, block by block.

    Parameters
    ----------
    tones : sequence
        The tones (:class:`liveshape.testdef.tone_spec.ToneSpec` or alike: ``f_hz``,
        ``f_hi_hz``, ``rate_oct_min``, ``amplitude_g``, ``tolerance_db``, ``abort_db``).
    fs_hz : float
        Sample rate, Hz (every tone below Nyquist).
    drive_fs : sequence of float
        Initial drive amplitude of each tone, FS (peak), e.g. ``amplitude_g / (|H| g_per_fs)``
        from an FRF, or ``amplitude_g / g_per_fs`` without one.
    gamma : float
        Exponent of the update law, 0 < γ <= 1.
    max_step_db : float
        Largest change of a drive amplitude per update, dB (> 0).
    averaging : float
        Weight of the newest gain estimate in the running average, 0 < w <= 1 (1: newest only).
    max_drive_fs : float, optional
        Cap on the sum of the tones' drive amplitudes, FS; all are scaled down together to
        keep it (None: no cap).
    """

    def __init__(self, tones: Sequence[Any], fs_hz: float, drive_fs: Sequence[float], *,
                 gamma: float = 1.0, max_step_db: float = 3.0, averaging: float = 0.5,
                 max_drive_fs: float | None = None) -> None:
        self.specs = tuple(tones)
        self.fs_hz = float(fs_hz)
        self.plans = tuple(
            Tone(1.0, t.f_hz, t.f_hi_hz, float(t.rate_oct_min or 1.0)) for t in self.specs)
        for p in self.plans:
            top = p.f_hi_hz if p.swept else p.f_hz
            if not top < self.fs_hz / 2:
                raise ValueError(f"tone at {top:g} Hz is not below Nyquist ({self.fs_hz / 2:g})")
        if not 0 < gamma <= 1 or not max_step_db > 0 or not 0 < averaging <= 1:
            raise ValueError("need 0 < gamma <= 1, max_step_db > 0, 0 < averaging <= 1")
        self.gamma, self.max_step_db, self.averaging = float(gamma), float(max_step_db), averaging
        self.max_drive_fs = max_drive_fs
        self.target_g = np.array([float(t.amplitude_g) for t in self.specs])
        self.tol_db = np.array([float(t.tolerance_db) for t in self.specs])
        self.abort_db = np.array([float(t.abort_db) for t in self.specs])
        self.drive_fs = self._capped(np.asarray(drive_fs, dtype=float).copy())
        if self.drive_fs.shape != self.target_g.shape or np.any(self.drive_fs < 0):
            raise ValueError("drive_fs: one amplitude >= 0 per tone")
        self._current = self.drive_fs.copy()  # amplitude at the end of the last block read
        self.gain = np.full(self.target_g.shape, np.nan)  # running |H|, g/FS
        self.n = 0  # samples read so far (the tones' time origin is sample 0)
        self.updates = 0

    # -- drive -------------------------------------------------------------------------------
    def phases(self, n0: int, n: int) -> np.ndarray:
        """Phase of each tone at stream samples ``n0 .. n0+n−1``, rad; shape (n_tones, n)."""
        t = (int(n0) + np.arange(int(n))) / self.fs_hz
        return np.array([p.phase(t) for p in self.plans]).reshape(len(self.plans), int(n))

    def read(self, n: int) -> np.ndarray:
        """The next ``n`` drive samples of the tones, FS; amplitudes ramp linearly from their
        previous values to :attr:`drive_fs` over the block."""
        n = int(n)
        ph = self.phases(self.n, n)
        ramp = (np.arange(1, n + 1) / n)[None, :]
        amp = self._current[:, None] + (self.drive_fs - self._current)[:, None] * ramp
        self._current = self.drive_fs.copy()
        self.n += n
        return np.sum(amp * np.cos(ph), axis=0) if len(self.plans) else np.zeros(n)

    # -- measurement and update --------------------------------------------------------------
    def fit(self, y: Any, n0: int) -> ToneBlockFit:
        """Fit the tones in a block whose first sample is stream sample ``n0``."""
        y = np.asarray(y, dtype=float).ravel()
        return fit_tone_phases(y, self.phases(n0, y.size))

    def update(self, drive: Any, control_g: Any, n0: int, *, level_db: float = 0.0
               ) -> ToneUpdate:
        """One update from aligned drive (FS) and control (g) blocks starting at sample ``n0``.

        The gain ``|H|`` at each tone is the ratio of the fitted amplitudes (control over drive)
        in the block, averaged with weight ``averaging``; the new drive amplitude follows the
        law of the module doc towards ``amplitude_g · 10^(level_db/20)``, within
        ``±max_step_db``. A tone whose drive amplitude in the block fits below 1e-9 FS keeps its
        amplitude and gain estimate (nothing to measure).
        """
        fd = self.fit(drive, n0)
        fc = self.fit(control_g, n0)
        target = self.target_g * 10.0 ** (float(level_db) / 20.0)
        ok = fd.amplitude > 1e-9
        g_new = np.where(ok, fc.amplitude / np.where(ok, fd.amplitude, 1.0), np.nan)
        first = ~np.isfinite(self.gain)
        w = self.averaging
        self.gain = np.where(ok & first, g_new,
                             np.where(ok, (1 - w) * self.gain + w * g_new, self.gain))
        known = np.isfinite(self.gain) & (self.gain > 0)
        with np.errstate(divide="ignore", invalid="ignore"):
            predicted = self.gain * self.drive_fs
            step_db = self.gamma * 20.0 * np.log10(target / predicted)
        step_db = np.clip(np.where(known & (self.drive_fs > 0), step_db, 0.0),
                          -self.max_step_db, self.max_step_db)
        self.drive_fs = self._capped(self.drive_fs * 10.0 ** (step_db / 20.0))
        with np.errstate(divide="ignore"):
            err = 20.0 * np.log10(fc.amplitude / target)
        self.updates += 1
        mid = (int(n0) + 0.5 * (np.asarray(drive).size - 1)) / self.fs_hz
        return ToneUpdate(
            measured_g=fc.amplitude, target_g=target, error_db=err,
            gain_g_per_fs=self.gain.copy(), drive_fs=self.drive_fs.copy(),
            alarm=np.abs(err) > self.tol_db, abort=np.abs(err) > self.abort_db,
            f_hz=np.array([float(p.frequency(mid)) for p in self.plans]))

    def _capped(self, a: np.ndarray) -> np.ndarray:
        if self.max_drive_fs is None or a.sum() <= self.max_drive_fs:
            return a
        return a * (self.max_drive_fs / a.sum())

    # -- the random part ---------------------------------------------------------------------
    @staticmethod
    def remove(y: Any, fit: ToneBlockFit) -> np.ndarray:
        """The block less its fitted tones (the offset and the random part stay)."""
        return np.asarray(y, dtype=float).ravel() - fit.tones_part

    def line_mask(self, f_lines_hz: Any, df_hz: float, n0: int, n: int,
                  half_width_lines: int = 2) -> np.ndarray:
        """Lines within ``half_width_lines`` lines of any tone over samples ``n0 .. n0+n−1``
        (a swept tone masks the whole range it covers in the block)."""
        t = (int(n0) + np.linspace(0.0, max(int(n) - 1, 0), 17)) / self.fs_hz
        mask = np.zeros(np.shape(f_lines_hz), dtype=bool)
        for p in self.plans:
            f = p.frequency(t)
            lo, hi = float(f.min()), float(f.max())
            # tone_line_mask around each end, and everything between them
            mask |= tone_line_mask(f_lines_hz, [lo, hi], df_hz, half_width_lines)
            fl = np.asarray(f_lines_hz, dtype=float)
            mask |= (fl >= lo) & (fl <= hi)
        return mask

    @property
    def peak_fs(self) -> float:
        """Largest possible sum of the tones' drive amplitudes, FS (all in phase)."""
        return float(np.sum(np.maximum(self.drive_fs, self._current)))


def initial_drive_fs(amplitude_g: Any, g_per_fs: float, h_abs: Any = None) -> np.ndarray:
    """Starting drive amplitudes, FS: ``amplitude_g / (g_per_fs · |H|)``, with ``|H| = 1``
    (FS response per FS drive) when no FRF is known."""
    a = np.asarray(amplitude_g, dtype=float)
    h = np.ones_like(a) if h_abs is None else np.asarray(h_abs, dtype=float)
    return a / (float(g_per_fs) * h)
