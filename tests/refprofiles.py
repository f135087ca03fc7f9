"""Reference profiles and integrals shared by the profile and response tests."""

from __future__ import annotations

import math

import numpy as np
from scipy import integrate, stats

from liveshape.dsp.profile import Profile
from liveshape.schema import Where
from liveshape.testdef.profilefile import profile_from_points

W = Where("test.yaml", "profile.breakpoints")
# exponent of +3 dB/oct: a segment straight on log-log axes has a2/a1 = (f2/f1)^n and a slope of
# 10 log10(a2/a1)/log2(f2/f1) dB/oct, so n = m/(10 log10 2) = m/3.0103 (definition of the dB and
# of the octave; docs/methods.md, "Profile integrals")
N_3DB = 3.0 / 3.0103


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


def loglog(f_hz, asd):
    """The profile through breakpoints ``(f_hz, asd)``, straight on log-log axes, 0 outside.

    Written here with ``np.interp`` on the logarithms so that the tests do not lean on
    ``Profile.asd_at``.
    """
    lf, la = np.log(np.asarray(f_hz, float)), np.log(np.asarray(asd, float))

    def g(f):
        f = np.asarray(f, float)
        inside = (f >= math.exp(lf[0])) & (f <= math.exp(lf[-1]))
        out = np.zeros(f.shape)
        out[inside] = np.exp(np.interp(np.log(f[inside]), lf, la))
        return float(out) if out.ndim == 0 else out

    return g


def quad_grms(f_hz, asd) -> float:
    """grms of a breakpoint table by ``scipy.integrate.quad`` of its log-log interpolation."""
    return math.sqrt(quad_segments(loglog(f_hz, asd), f_hz))


def gaussian_sums(f_hz, asd, fs_hz: float, n_fft: int = 1 << 20) -> tuple[float, float]:
    """``(sum rho^2, sum rho^4)`` over all lags of a Gaussian process with this profile at fs_hz.

    ``rho`` is the normalized autocorrelation at lags ``k / fs_hz``, the inverse Fourier transform
    of the profile (Wiener-Khinchin), evaluated on ``n_fft`` points (``fs_hz / n_fft`` Hz apart,
    far finer than the profile's features). For Gaussian data the mean of a Hermite polynomial
    ``He_k(x/sigma)`` over N samples has variance ``k! sum rho^k / N`` (Isserlis 1918), so the
    mean square has ``N / sum rho^2`` DOF and the kurtosis a standard error
    ``sqrt(24 sum rho^4 / N)`` (docs/methods.md, "Sampling scatter of rms and kurtosis").
    """
    g = loglog(f_hz, asd)(np.arange(n_fft // 2 + 1) * (fs_hz / n_fft))
    r = np.fft.irfft(g, n_fft)
    r /= r[0]
    return float(np.sum(r**2)), float(np.sum(r**4))


def clipped_gaussian_moments(c: float) -> tuple[float, float]:
    """``(E[y^2], E[y^4] / E[y^2]^2)`` of a unit normal clipped at ``±c`` (truncated-normal
    moments in closed form: E[x^2; |x| < c] = 1 - 2Q(c) - 2c phi(c),
    E[x^4; |x| < c] = 3(1 - 2Q(c)) - 2 phi(c)(c^3 + 3c), plus c^2 resp. c^4 times 2Q(c))."""
    q, ph = stats.norm.sf(c), stats.norm.pdf(c)
    m2 = 1 - 2 * q - 2 * c * ph + 2 * c**2 * q
    m4 = 3 * (1 - 2 * q) - 2 * ph * (c**3 + 3 * c) + 2 * c**4 * q
    return float(m2), float(m4 / m2**2)
