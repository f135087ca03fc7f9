"""Mains hum for the simulated rig: a line at the mains frequency and its harmonics, with drift.

Pure numpy. Harmonic ``h`` (1 = fundamental) is ``A_h cos(h·φ(t) + θ_h)`` with the fundamental's
phase ``φ(t) = 2π ∫ f(τ) dτ`` and a slow sinusoidal drift of the mains frequency
``f(t) = f0 + d·sin(2π t / T)``, whose phase integral in closed form is
``φ(t) = 2π f0 t + d·T·(1 − cos(2π t / T))``. The time is kept, not a running phase sum, so blocks
join without a phase step and without round-off drift.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from liveshape.schema import Where, check_keys

__all__ = ["HumSpec", "HumSource", "hum_from_mapping"]

KEYS = ("mains_hz", "harmonics", "level_g", "drift_hz", "drift_period_s")


@dataclass(frozen=True)
class HumSpec:
    """Hum settings.

    Attributes
    ----------
    mains_hz : float
        Mains frequency, Hz (50 or 60).
    harmonics : int
        Number of lines: the fundamental and ``harmonics − 1`` multiples (1–20).
    level_g : float
        Rms level of each line in the control, g.
    drift_hz : float
        Peak deviation of the mains frequency, Hz (0–0.1; grids hold ±0.1 Hz or better,
        EN 50160 allows ±1 % over a year [from memory]).
    drift_period_s : float
        Period of the drift, s.
    """

    mains_hz: float = 50.0
    harmonics: int = 3
    level_g: float = 0.01
    drift_hz: float = 0.0
    drift_period_s: float = 60.0

    def frequencies_hz(self) -> np.ndarray:
        """Nominal line frequencies, Hz."""
        return self.mains_hz * np.arange(1, self.harmonics + 1)


def hum_from_mapping(data: Any, where: Where) -> HumSpec:
    """Validate a ``hum:`` mapping of a plant/rig section; one-line ConfigError on a bad key."""
    d = check_keys(data, KEYS, where)
    spec = HumSpec()
    vals = {k: d.get(k, getattr(spec, k)) for k in KEYS}
    for key in ("mains_hz", "level_g", "drift_hz", "drift_period_s"):
        v = vals[key]
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
            raise where.key(key).fail(v, "must be a finite number")
    if vals["mains_hz"] not in (50, 60):
        raise where.key("mains_hz").fail(vals["mains_hz"], "must be 50 or 60")
    h = vals["harmonics"]
    if isinstance(h, bool) or not isinstance(h, int) or not 1 <= h <= 20:
        raise where.key("harmonics").fail(h, "must be an integer from 1 to 20")
    if not vals["level_g"] > 0:
        raise where.key("level_g").fail(vals["level_g"], "must be > 0")
    if not 0 <= vals["drift_hz"] <= 0.1:
        raise where.key("drift_hz").fail(vals["drift_hz"], "must be from 0 to 0.1")
    if not vals["drift_period_s"] > 0:
        raise where.key("drift_period_s").fail(vals["drift_period_s"], "must be > 0")
    return HumSpec(float(vals["mains_hz"]), int(h), float(vals["level_g"]),
                   float(vals["drift_hz"]), float(vals["drift_period_s"]))


class HumSource:
    """Phase-continuous hum, block by block.

    Parameters
    ----------
    spec : HumSpec
    fs_hz : float
        Sample rate, Hz.
    seed : int
        Seed of the random start phases of the harmonics.
    """

    def __init__(self, spec: HumSpec, fs_hz: float, seed: int = 0) -> None:
        self.spec = spec
        self.fs_hz = float(fs_hz)
        self._n = 0
        self._theta = np.random.default_rng(seed).uniform(0, 2 * math.pi, spec.harmonics)
        self._h = np.arange(1, spec.harmonics + 1)
        self._amp = spec.level_g * math.sqrt(2.0) * (self._h * spec.mains_hz < fs_hz / 2)

    def phase(self, t_s: np.ndarray) -> np.ndarray:
        """Fundamental phase φ(t), radians."""
        s = self.spec
        t = np.asarray(t_s, dtype=float)
        drift = s.drift_hz * s.drift_period_s * (1.0 - np.cos(2 * math.pi * t / s.drift_period_s))
        return 2 * math.pi * s.mains_hz * t + drift

    def block(self, n: int) -> np.ndarray:
        """Next ``n`` samples of hum, g."""
        t = (self._n + np.arange(n)) / self.fs_hz
        self._n += n
        ph = self.phase(t)
        return (self._amp[:, None] * np.cos(self._h[:, None] * ph[None, :]
                                             + self._theta[:, None])).sum(axis=0)
