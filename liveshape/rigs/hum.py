"""Mains hum for the simulated rig: a line at the mains frequency and its harmonics, with drift.

Pure numpy. Harmonic ``h`` (1 = fundamental) is ``A cos(h·φ(t) + θ_h)`` with ``A = level_g·√2``
(so each line has the rms ``level_g``), random start phases ``θ_h`` and the fundamental's phase
``φ(t) = 2π ∫₀ᵗ f(τ) dτ`` for a slow sinusoidal drift of the mains frequency
``f(t) = f0 + d·sin(2π t / T)``, whose integral in closed form is
``φ(t) = 2π f0 t + d·T·(1 − cos(2π t / T))``. The sample count is kept, not a running phase sum,
so blocks join without a phase step and the output does not depend on how it is split into
blocks. Lines at or above the Nyquist frequency are left out. The settings are
:class:`liveshape.testdef.hum_spec.HumSpec` (re-exported here).
"""

from __future__ import annotations

import math

import numpy as np

from liveshape.testdef.hum_spec import HumSpec, hum_from_mapping

__all__ = ["HumSource", "HumSpec", "hum_from_mapping"]


class HumSource:
    """Phase-continuous hum, block by block.

    Parameters
    ----------
    spec : HumSpec
        Mains frequency, number of lines, rms level per line (g) and drift.
    fs_hz : float
        Sample rate, Hz.
    seed : int or numpy.random.SeedSequence or None
        Seed of the random start phases of the lines.
    """

    def __init__(self, spec: HumSpec, fs_hz: float,
                 seed: int | np.random.SeedSequence | None = 0) -> None:
        fs = float(fs_hz)
        if not (math.isfinite(fs) and fs > 0):
            raise ValueError(f"fs_hz must be a finite number > 0, got {fs_hz!r}")
        self.spec = spec
        self.fs_hz = fs
        self._n = 0
        self._theta = np.random.default_rng(seed).uniform(0, 2 * math.pi, spec.harmonics)
        self._h = np.arange(1, spec.harmonics + 1)
        self._amp = spec.level_g * math.sqrt(2.0) * (self._h * spec.mains_hz < fs / 2)

    @property
    def samples(self) -> int:
        """Samples produced so far."""
        return self._n

    def phase(self, t_s: np.ndarray) -> np.ndarray:
        """Fundamental phase ``φ(t)`` at times ``t_s`` (s from the first sample), radians."""
        s = self.spec
        t = np.asarray(t_s, dtype=float)
        drift = s.drift_hz * s.drift_period_s * (1.0 - np.cos(2 * math.pi * t / s.drift_period_s))
        return 2 * math.pi * s.mains_hz * t + drift

    def frequency_hz(self, t_s: np.ndarray) -> np.ndarray:
        """Instantaneous fundamental frequency ``f(t) = f0 + d·sin(2πt/T)``, Hz."""
        s = self.spec
        t = np.asarray(t_s, dtype=float)
        return s.mains_hz + s.drift_hz * np.sin(2 * math.pi * t / s.drift_period_s)

    def block(self, n: int) -> np.ndarray:
        """Next ``n`` samples of hum, g."""
        t = (self._n + np.arange(n)) / self.fs_hz
        self._n += n
        ph = self.phase(t)
        return (self._amp[:, None] * np.cos(self._h[:, None] * ph[None, :]
                                             + self._theta[:, None])).sum(axis=0)
