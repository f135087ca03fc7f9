"""Reference profiles and integrals shared by the profile and response tests."""

from __future__ import annotations

from scipy import integrate

from liveshape.dsp.profile import Profile
from liveshape.schema import Where
from liveshape.testdef.profilefile import profile_from_points

W = Where("test.yaml", "profile.breakpoints")
N_3DB = 3.0 / 3.0103  # exponent of +3 dB/oct, n = m/3.0103 (DOMAIN.md §1, calc)


def navmat() -> Profile:
    """NAVMAT P-9492: 20-80 Hz +3 dB/oct to 0.04 g²/Hz, flat to 350 Hz, -3 dB/oct to 2000 Hz."""
    return profile_from_points(
        [
            {"f_hz": 20, "asd": 0.04 * (20 / 80) ** N_3DB},
            {"f_hz": 80, "slope_db_oct": 3.0},
            {"f_hz": 350, "asd": 0.04},
            {"f_hz": 2000, "slope_db_oct": -3.0},
        ],
        W,
    )


def quad_segments(fun, f_hz) -> float:
    """scipy.integrate.quad of ``fun`` over each segment, summed (scipy as reference)."""
    total = 0.0
    for f1, f2 in zip(f_hz[:-1], f_hz[1:], strict=True):
        val, err = integrate.quad(fun, f1, f2, epsrel=1e-12, epsabs=0, limit=200)
        total += val
    return total
