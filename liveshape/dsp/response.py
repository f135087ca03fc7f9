"""Response of a base-excited single-degree-of-freedom system to a random profile.

Pure numpy/scipy: Miles' equation, the absolute-acceleration transmissibility and the exact rms
response to a :class:`liveshape.dsp.profile.Profile` by quadrature.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING, Any

import numpy as np
from scipy.integrate import simpson

from liveshape.errors import ConfigError

if TYPE_CHECKING:
    from liveshape.dsp.profile import Profile

__all__ = ["miles_grms", "sdof_response_grms", "sdof_transmissibility_sq"]


def miles_grms(fn_hz: float, q: float, asd_g2_hz: float) -> float:
    """Miles' equation: rms response ``sqrt(pi/2 fn Q ASD(fn))`` in g of an SDOF on white input.

    References
    ----------
    NASA GSFC FEMCI, "Miles' Equation".
    """
    return math.sqrt(math.pi / 2.0 * float(fn_hz) * float(q) * float(asd_g2_hz))


def sdof_transmissibility_sq(f_hz: Any, fn_hz: float, q: float) -> np.ndarray:
    """``|T(f)|²`` of absolute acceleration of a base-excited SDOF with damping ``1/(2Q)``.

    ``|T|² = (1 + (2 zeta r)²) / ((1 - r²)² + (2 zeta r)²)`` with ``r = f/fn`` (standard
    vibration-isolation transmissibility).
    """
    r = np.asarray(f_hz, dtype=float) / float(fn_hz)
    two_zr_sq = (r / float(q)) ** 2
    return (1.0 + two_zr_sq) / ((1.0 - r * r) ** 2 + two_zr_sq)


def sdof_response_grms(profile: Profile, fn_hz: float, q: float) -> float:
    """Rms absolute acceleration in g of a base-excited SDOF driven by ``profile``.

    Integrates ``|T(f)|² ASD(f)`` over the profile's band by Simpson's rule in ``ln f`` on each
    segment, with a step of at most ``1/(40 Q)`` in ``ln f`` (the half-power width of the
    resonance is about ``1/Q`` there), so the quadrature error is far below 1e-5.
    """
    if not (math.isfinite(fn_hz) and fn_hz > 0):
        raise ConfigError(f"sdof: fn_hz = {fn_hz!r} must be a finite number > 0")
    if not (math.isfinite(q) and q > 0):
        raise ConfigError(f"sdof: q = {q!r} must be a finite number > 0")
    h = min(0.01, 1.0 / (40.0 * q))
    total = 0.0
    for f1, f2 in zip(profile.f_hz[:-1], profile.f_hz[1:], strict=True):
        u1, u2 = math.log(f1), math.log(f2)
        n = max(8, 2 * math.ceil((u2 - u1) / (2.0 * h)))
        u = np.linspace(u1, u2, n + 1)
        f = np.exp(u)
        f[0], f[-1] = f1, f2
        y = profile.asd_at(f) * sdof_transmissibility_sq(f, fn_hz, q) * f  # df = f du
        total += float(simpson(y, x=u))
    return math.sqrt(total)
