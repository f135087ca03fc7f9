"""Mains hum as a test definition gives it: the :class:`HumSpec` record and its reader.

Pure. The ``rig.hum`` mapping of a test definition (simulated rig only) reads into a frozen
:class:`HumSpec` (:func:`hum_from_mapping`); what the hum does to the simulated rig is
:mod:`liveshape.rigs.hum`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from liveshape.schema import Where, check_keys

__all__ = ["HUM_KEYS", "HumSpec", "hum_from_mapping"]

HUM_KEYS = ("mains_hz", "harmonics", "level_g", "drift_hz", "drift_period_s")


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
        Rms level of each line in the control, g (peak ``level_g·√2``).
    drift_hz : float
        Peak deviation of the mains frequency, Hz (0–0.1; grids are held well within ±0.1 Hz
        in normal operation [from memory]); harmonic ``h`` deviates by ``h·drift_hz``.
    drift_period_s : float
        Period of the sinusoidal drift, s.
    """

    mains_hz: float = 50.0
    harmonics: int = 3
    level_g: float = 0.01
    drift_hz: float = 0.0
    drift_period_s: float = 60.0

    def frequencies_hz(self) -> np.ndarray:
        """Nominal line frequencies, Hz."""
        return self.mains_hz * np.arange(1, self.harmonics + 1)

    def as_mapping(self) -> dict[str, Any]:
        """Plain mapping; :func:`hum_from_mapping` of it gives the same spec back."""
        return {k: getattr(self, k) for k in HUM_KEYS}


def hum_from_mapping(data: Any, where: Where) -> HumSpec:
    """Validate a ``hum:`` mapping (missing keys take the :class:`HumSpec` defaults).

    Raises
    ------
    ConfigError
        One line naming the key, the value and the rule.
    """
    d = check_keys(data, HUM_KEYS, where)
    spec = HumSpec()
    vals = {k: d.get(k, getattr(spec, k)) for k in HUM_KEYS}
    for key in ("mains_hz", "level_g", "drift_hz", "drift_period_s"):
        v = vals[key]
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
            raise where.key(key).fail(v, "must be a finite number")
    if vals["mains_hz"] not in (50, 60):
        raise where.key("mains_hz").fail(vals["mains_hz"], "must be 50 or 60")
    h = vals["harmonics"]
    if isinstance(h, float) and h.is_integer():
        h = int(h)
    if isinstance(h, bool) or not isinstance(h, int) or not 1 <= h <= 20:
        raise where.key("harmonics").fail(h, "must be a whole number from 1 to 20")
    if not vals["level_g"] > 0:
        raise where.key("level_g").fail(vals["level_g"], "must be > 0")
    if not 0 <= vals["drift_hz"] <= 0.1:
        raise where.key("drift_hz").fail(vals["drift_hz"], "must be from 0 to 0.1")
    if not vals["drift_period_s"] > 0:
        raise where.key("drift_period_s").fail(vals["drift_period_s"], "must be > 0")
    return HumSpec(float(vals["mains_hz"]), int(h), float(vals["level_g"]),
                   float(vals["drift_hz"]), float(vals["drift_period_s"]))
