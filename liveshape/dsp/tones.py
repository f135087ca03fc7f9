"""Sine tones on top of random: phase-continuous generation, fixed or swept, and the
least-squares fit of their amplitudes in a block of the control signal.

Pure numpy. A tone ``i`` has a frequency ``f_i(t)`` (fixed, or swept logarithmically between two
limits at a rate in octaves per minute, up and down) and an amplitude ``A_i`` (peak, in the
signal's unit). Its phase is the integral of the frequency, ``φ(t) = φ0 + 2π ∫ f(τ) dτ``, carried
from block to block in closed form (:class:`ToneBank` keeps the time, not a running sum, so the
phase does not drift with the number of blocks).

A log sweep ``f(t) = f_lo · 2^(r t / 60)`` (``r`` octaves/min) has the phase integral
``2π f_lo · 60 (2^(r t/60) − 1) / (r ln 2)``; at the upper limit it turns and comes down the same
way (a triangle in log frequency), which is the usual way a swept sine is run back and forth
between limits.

:func:`fit_tones` is the linear least-squares fit of ``a cos + b sin`` for each known frequency
(plus an offset) to a block, i.e. the three-parameter sine fit of IEEE Std 1057 extended to
several tones; the amplitude is ``sqrt(a² + b²)``. For a tone in white noise of variance σ² over
``n`` samples, the amplitude's standard deviation is about ``σ sqrt(2/n)`` (the Cramér-Rao bound
for a sinusoid's amplitude at known frequency; Kay, *Fundamentals of Statistical Signal
Processing: Estimation Theory*, 1993, §3.7).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from liveshape.schema import Where

__all__ = ["Tone", "ToneBank", "ToneFit", "fit_tones", "tone_line_mask"]

WHERE = Where("tones")


@dataclass(frozen=True)
class Tone:
    """One tone of a sine-on-random test.

    Attributes
    ----------
    amplitude : float
        Peak amplitude in the signal's unit (g for a target, FS for a drive).
    f_hz : float
        Frequency, Hz (the lower limit of a sweep).
    f_hi_hz : float or None
        Upper limit of a sweep, Hz; None for a fixed tone.
    rate_oct_min : float
        Sweep rate, octaves per minute (ignored for a fixed tone).
    phase_rad : float
        Phase at time 0, radians (the tone is ``A cos(φ(t))``).
    """

    amplitude: float
    f_hz: float
    f_hi_hz: float | None = None
    rate_oct_min: float = 1.0
    phase_rad: float = 0.0

    def __post_init__(self) -> None:
        for key, v in (("amplitude", self.amplitude), ("f_hz", self.f_hz)):
            if not (math.isfinite(v) and v > 0):
                raise WHERE.key(key).fail(repr(v), "must be a finite number > 0")
        if self.f_hi_hz is not None:
            if not (math.isfinite(self.f_hi_hz) and self.f_hi_hz > self.f_hz):
                raise WHERE.key("f_hi_hz").fail(repr(self.f_hi_hz),
                                                f"must be above f_hz = {self.f_hz:g}")
            if not (math.isfinite(self.rate_oct_min) and self.rate_oct_min > 0):
                raise WHERE.key("rate_oct_min").fail(repr(self.rate_oct_min),
                                                     "must be a finite number > 0")

    @property
    def swept(self) -> bool:
        """True for a swept tone."""
        return self.f_hi_hz is not None

    def frequency(self, t_s: Any) -> np.ndarray:
        """Instantaneous frequency at times ``t_s`` (s), Hz."""
        t = np.asarray(t_s, dtype=float)
        if not self.swept:
            return np.full(t.shape, self.f_hz)
        u, _ = self._fold(t)
        return self.f_hz * np.exp2(u)

    def phase(self, t_s: Any) -> np.ndarray:
        """Phase ``φ(t)`` at times ``t_s`` (s), radians (the integral of 2π f)."""
        t = np.asarray(t_s, dtype=float)
        if not self.swept:
            return self.phase_rad + 2.0 * math.pi * self.f_hz * t
        k = self.rate_oct_min / 60.0  # octaves per second
        span = math.log2(self.f_hi_hz / self.f_hz)  # octaves up
        t_up = span / k
        c = self.f_hz / (k * math.log(2.0))  # ∫ f_lo 2^(k τ) dτ = c (2^(k t) − 1)
        cycle = 2.0 * c * (2.0 ** span - 1.0)  # cycles in one up-and-down period
        n_per, rem = np.divmod(t, 2.0 * t_up)
        up = rem <= t_up
        cyc_up = c * (np.exp2(k * np.minimum(rem, t_up)) - 1.0)
        down = rem - t_up
        cyc_down = c * (2.0 ** span) * (1.0 - np.exp2(-k * np.maximum(down, 0.0)))
        cycles = n_per * cycle + np.where(up, cyc_up, c * (2.0 ** span - 1.0) + cyc_down)
        return self.phase_rad + 2.0 * math.pi * cycles

    def _fold(self, t: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        k = self.rate_oct_min / 60.0
        span = math.log2(self.f_hi_hz / self.f_hz)
        t_up = span / k
        rem = np.mod(t, 2.0 * t_up)
        up = rem <= t_up
        u = np.where(up, k * rem, span - k * (rem - t_up))
        return u, up


class ToneBank:
    """Phase-continuous sum of tones, block by block.

    Parameters
    ----------
    tones : sequence of Tone
    fs_hz : float
        Sample rate, Hz; every tone (and sweep limit) must lie below Nyquist.
    """

    def __init__(self, tones: Any, fs_hz: float) -> None:
        self.tones = tuple(tones)
        self.fs_hz = float(fs_hz)
        for t in self.tones:
            top = t.f_hi_hz if t.swept else t.f_hz
            if top >= self.fs_hz / 2:
                raise WHERE.key("f_hz").fail(f"{top:g}",
                                             f"must be below Nyquist ({self.fs_hz / 2:g} Hz)")
        self.n = 0  # samples produced so far

    def read(self, n: int) -> np.ndarray:
        """The next ``n`` samples of the sum of tones."""
        t = (self.n + np.arange(int(n))) / self.fs_hz
        out = np.zeros(t.size)
        for tone in self.tones:
            out += tone.amplitude * np.cos(tone.phase(t))
        self.n += int(n)
        return out

    def frequencies(self, n: int) -> np.ndarray:
        """Frequency of each tone at the middle of the next ``n`` samples, Hz."""
        t_mid = (self.n + 0.5 * (int(n) - 1)) / self.fs_hz
        return np.array([float(tone.frequency(t_mid)) for tone in self.tones])


@dataclass(frozen=True)
class ToneFit:
    """Least-squares amplitudes and phases of known tones in one block."""

    f_hz: np.ndarray
    amplitude: np.ndarray
    phase_rad: np.ndarray
    residual_rms: float


def fit_tones(x: Any, f_hz: Any, fs_hz: float, t0_s: float = 0.0) -> ToneFit:
    """Fit ``c + Σ a_i cos(2π f_i t) + b_i sin(2π f_i t)`` to ``x`` by linear least squares.

    Parameters
    ----------
    x : array_like
        The block (any unit).
    f_hz : array_like
        The tones' frequencies, Hz (fixed within the block).
    fs_hz : float
        Sample rate, Hz.
    t0_s : float
        Time of the block's first sample, s (the phases refer to t = 0).

    Returns
    -------
    ToneFit
        ``amplitude = sqrt(a² + b²)`` (peak) and ``phase`` with ``x ≈ A cos(2π f t + phase)``.
    """
    y = np.asarray(x, dtype=float).ravel()
    f = np.atleast_1d(np.asarray(f_hz, dtype=float))
    t = t0_s + np.arange(y.size) / float(fs_hz)
    cols = [np.ones(y.size)]
    for fk in f:
        w = 2.0 * math.pi * fk * t
        cols += [np.cos(w), np.sin(w)]
    m = np.column_stack(cols)
    coef, *_ = np.linalg.lstsq(m, y, rcond=None)
    a, b = coef[1::2], coef[2::2]
    resid = y - m @ coef
    return ToneFit(f, np.hypot(a, b), np.arctan2(-b, a), float(np.sqrt(np.mean(resid**2))))


def tone_line_mask(f_lines_hz: Any, tone_f_hz: Any, df_hz: float, half_width_lines: int = 2
                   ) -> np.ndarray:
    """Lines within ``half_width_lines`` lines of a tone: left out of the random control.

    A Hann-windowed tone spreads over its line and the next one on each side (the window's
    main lobe is ±2 lines wide; Harris, Proc. IEEE 66(1), 1978), so ±2 lines hold it.
    """
    f = np.asarray(f_lines_hz, dtype=float)
    mask = np.zeros(f.shape, dtype=bool)
    for ft in np.atleast_1d(np.asarray(tone_f_hz, dtype=float)):
        mask |= np.abs(f - ft) <= half_width_lines * df_hz + 1e-9 * df_hz
    return mask
