"""Target acceleration profiles (ASD breakpoint tables): levels, slopes, integrals, CSV files.

Pure: numpy and the standard library only. Profiles are read from breakpoint mappings and CSV
files by :mod:`liveshape.testdef.profilefile`; the tolerance bands are in
:mod:`liveshape.testdef.tolerance` and the single-degree-of-freedom response helpers (Miles'
equation) in :mod:`liveshape.dsp.response`.

A profile is a straight line on log-log axes between breakpoints ``(f1, a1)-(f2, a2)``. On such a
segment ``a(f) = a1 (f/f1)^n`` with exponent ``n = ln(a2/a1)/ln(f2/f1)``; the slope in dB/oct is
``m = 10 log10(a2/a1)/log2(f2/f1) = n * 10 log10(2)``, so ``n = m/3.0103``. The mean square of one
segment is ``A = a1 f1/(n+1) [(f2/f1)^(n+1) - 1]``, or ``a1 f1 ln(f2/f1)`` when ``n = -1`` (the
standard closed form of a power-law integral). Velocity and displacement PSDs follow from the
acceleration ASD by dividing by ``(2 pi f)^2`` and ``(2 pi f)^4`` (with ``g0`` to get SI units),
which is the same closed form with exponents ``n-2`` and ``n-4``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from liveshape.errors import ConfigError

__all__ = [
    "DB_OCT_PER_EXPONENT",
    "G0_M_S2",
    "Profile",
]

#: Standard acceleration of gravity in m/s² (CGPM 1901, ISO 80000-3).
G0_M_S2 = 9.80665

#: dB per octave for a unit power-law exponent: 10 log10(2).
DB_OCT_PER_EXPONENT = 10.0 * math.log10(2.0)

# |n + 1| below this uses the logarithmic form of the segment integral.
_LOG_FORM_EPS = 1e-6


def _power_law_area(c1: np.ndarray, x1: np.ndarray, x2: np.ndarray, m: np.ndarray) -> np.ndarray:
    """Integral of ``c1 (x/x1)^(m-1)`` from ``x1`` to ``x2``, i.e. ``c1 x1/m [(x2/x1)^m - 1]``.

    ``m`` is the power-law exponent plus one. ``expm1`` keeps steep segments exact; the
    logarithmic form is used when ``|m| < 1e-6``.
    """
    log_r = np.log(x2 / x1)
    m = np.asarray(m, dtype=float)
    small = np.abs(m) < _LOG_FORM_EPS
    safe_m = np.where(small, 1.0, m)
    general = c1 * x1 / safe_m * np.expm1(safe_m * log_r)
    return np.where(small, c1 * x1 * log_r, general)


@dataclass(frozen=True)
class Profile:
    """A target acceleration spectral density, straight between breakpoints on log-log axes.

    Parameters
    ----------
    f_hz : tuple of float
        Breakpoint frequencies in Hz, at least two, strictly increasing, positive, finite.
    asd_g2_hz : tuple of float
        Acceleration spectral density at each breakpoint in g²/Hz, positive and finite.
    name : str
        A label for messages and reports.
    """

    f_hz: tuple[float, ...]
    asd_g2_hz: tuple[float, ...]
    name: str = ""

    def __post_init__(self) -> None:
        label = f"profile {self.name!r}" if self.name else "profile"
        try:
            f = tuple(float(x) for x in self.f_hz)
            a = tuple(float(x) for x in self.asd_g2_hz)
        except (TypeError, ValueError):
            raise ConfigError(f"{label}: f_hz and asd_g2_hz must be sequences of numbers") from None
        object.__setattr__(self, "f_hz", f)
        object.__setattr__(self, "asd_g2_hz", a)
        if len(f) != len(a):
            raise ConfigError(f"{label}: {len(f)} frequencies but {len(a)} ASD values")
        if len(f) < 2:
            raise ConfigError(f"{label}: needs at least 2 breakpoints, got {len(f)}")
        for i, (fi, ai) in enumerate(zip(f, a, strict=True)):
            if not (math.isfinite(fi) and fi > 0):
                raise ConfigError(f"{label}: f_hz[{i}] = {fi!r} must be a finite number > 0")
            if not (math.isfinite(ai) and ai > 0):
                raise ConfigError(f"{label}: asd_g2_hz[{i}] = {ai!r} must be a finite number > 0")
            if i and not fi > f[i - 1]:
                raise ConfigError(
                    f"{label}: f_hz[{i}] = {fi:g} is not above f_hz[{i - 1}] = {f[i - 1]:g} "
                    "(frequencies must increase)"
                )

    # -- shape -----------------------------------------------------------------------------
    @property
    def f_min_hz(self) -> float:
        """Lowest breakpoint frequency in Hz."""
        return self.f_hz[0]

    @property
    def f_max_hz(self) -> float:
        """Highest breakpoint frequency in Hz."""
        return self.f_hz[-1]

    def _arrays(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        f = np.asarray(self.f_hz)
        a = np.asarray(self.asd_g2_hz)
        n = np.log(a[1:] / a[:-1]) / np.log(f[1:] / f[:-1])
        return f, a, n

    @property
    def exponents(self) -> tuple[float, ...]:
        """Power-law exponent ``n = ln(a2/a1)/ln(f2/f1)`` of each segment."""
        return tuple(float(x) for x in self._arrays()[2])

    @property
    def slopes_db_oct(self) -> tuple[float, ...]:
        """Slope of each segment in dB/octave, ``10 log10(a2/a1)/log2(f2/f1)``."""
        return tuple(float(x) * DB_OCT_PER_EXPONENT for x in self._arrays()[2])

    # -- integrals -------------------------------------------------------------------------
    def _segment_integrals(self, power: int) -> np.ndarray:
        """Exact integral of ``ASD(f) f^power`` over each segment (g²/Hz · Hz^(power+1))."""
        f, a, n = self._arrays()
        return _power_law_area(a[:-1] * f[:-1] ** power, f[:-1], f[1:], n + power + 1)

    def segment_areas_g2(self) -> np.ndarray:
        """Mean square acceleration of each segment in g², exact closed form (see module doc)."""
        return self._segment_integrals(0)

    @property
    def grms(self) -> float:
        """Overall rms acceleration in g: square root of the summed segment areas."""
        return float(math.sqrt(self.segment_areas_g2().sum()))

    @property
    def velocity_rms_m_s(self) -> float:
        """Rms velocity in m/s: velocity PSD = ASD g0²/(2 pi f)², integrated exactly."""
        ms = self._segment_integrals(-2).sum() * G0_M_S2**2 / (2.0 * math.pi) ** 2
        return float(math.sqrt(ms))

    @property
    def displacement_rms_m(self) -> float:
        """Rms displacement in m: displacement PSD = ASD g0²/(2 pi f)^4, integrated exactly."""
        ms = self._segment_integrals(-4).sum() * G0_M_S2**2 / (2.0 * math.pi) ** 4
        return float(math.sqrt(ms))

    @property
    def displacement_pp_3sigma_m(self) -> float:
        """Peak-to-peak displacement on a 3-sigma basis, ``6 x_rms`` in m.

        Common practice for stroke checks; MIL-STD-810H Method 514.8 Annex C tabulates peak
        displacement on a 3-sigma basis.
        """
        return 6.0 * self.displacement_rms_m

    def band_ms_g2(self, f_lo_hz: float, f_hi_hz: float) -> float:
        """Exact mean square acceleration in g² between ``f_lo_hz`` and ``f_hi_hz``.

        The band is clipped to ``[f_min_hz, f_max_hz]``; an empty intersection gives 0.
        """
        f, a, n = self._arrays()
        lo = max(float(f_lo_hz), f[0])
        hi = min(float(f_hi_hz), f[-1])
        if not hi > lo:
            return 0.0
        x1 = np.clip(f[:-1], lo, hi)
        x2 = np.clip(f[1:], lo, hi)
        keep = x2 > x1
        if not keep.any():
            return 0.0
        c1 = a[:-1][keep] * np.exp(n[keep] * np.log(x1[keep] / f[:-1][keep]))
        return float(_power_law_area(c1, x1[keep], x2[keep], n[keep] + 1.0).sum())

    # -- evaluation ------------------------------------------------------------------------
    def asd_at(self, f_hz: Any) -> Any:
        """ASD in g²/Hz at ``f_hz`` by log-log interpolation; 0 outside ``[f_min, f_max]``.

        Evaluated as ``a_k exp(n_k ln(f/f_k))`` on the segment holding ``f``, which stays
        bounded by the segment's end levels however steep it is. A scalar gives a float.
        """
        x = np.asarray(f_hz, dtype=float)
        f, a, n = self._arrays()
        out = np.zeros(x.shape)
        inside = (x >= f[0]) & (x <= f[-1])
        xi = x[inside]
        k = np.clip(np.searchsorted(f, xi, side="right") - 1, 0, len(n) - 1)
        vals = a[k] * np.exp(n[k] * np.log(xi / f[k]))
        # Exact at breakpoints (the right end of the last segment included).
        vals = np.where(xi == f[k + 1], a[k + 1], vals)
        out[inside] = vals
        return float(out) if out.ndim == 0 else out

    def lines(self, fs_hz: float, frame_length: int) -> np.ndarray:
        """ASD in g²/Hz on the lines ``k fs_hz / frame_length``, ``k = 0 .. frame_length//2``."""
        k = np.arange(int(frame_length) // 2 + 1)
        return self.asd_at(k * (float(fs_hz) / int(frame_length)))

    def scaled(self, db: float) -> Profile:
        """The same shape with every level multiplied by ``10^(db/10)``."""
        g = 10.0 ** (float(db) / 10.0)
        return Profile(self.f_hz, tuple(x * g for x in self.asd_g2_hz), self.name)
