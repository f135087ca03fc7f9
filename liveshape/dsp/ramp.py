"""Per-sample gain ramps: level changes of the drive are never steps.

Pure numpy. :class:`GainRamp` gives the gain of every sample: exponential (straight in dB)
between non-zero gains, a raised-cosine fade to or from zero. :class:`liveshape.dsp.synth.
RandomPhaseSynth` applies one to its output.
"""

from __future__ import annotations

import math

import numpy as np

from liveshape.errors import ConfigError

__all__ = ["GainRamp", "check_positive"]


class GainRamp:
    """A per-sample gain that moves to its target smoothly, never in a step.

    Between two non-zero gains the ramp is exponential (straight in dB) at ``rate_db_s``; to or from
    zero it is a raised-cosine fade ``g0 + (g1 - g0) (1 - cos(pi t)) / 2`` over ``duration_s``
    (a dB ramp cannot reach zero). A new target starts a new ramp from the gain reached so far.

    The largest change between two samples is bounded: ``g * (10^(rate / (20 fs)) - 1)`` on the
    dB ramp (the sample-to-sample ratio is at most ``10^(rate / (20 fs))``) and
    ``|g1 - g0| * pi / (2 M)`` on a fade of ``M`` samples (the slope of the raised cosine).

    Parameters
    ----------
    fs_hz : float
        Sample rate in Hz.
    gain : float, optional
        Starting gain (linear, >= 0). Default 1.
    rate_db_s : float, optional
        Default dB rate of a ramp between non-zero gains, dB/s. Default 6.
    fade_s : float, optional
        Default duration of a fade to or from zero, s. Default 0.25.
    """

    def __init__(
        self, fs_hz: float, *, gain: float = 1.0, rate_db_s: float = 6.0, fade_s: float = 0.25
    ) -> None:
        self.fs_hz = check_positive(fs_hz, "fs_hz")
        self._rate_db_s = check_positive(rate_db_s, "rate_db_s")
        self._fade_s = check_positive(fade_s, "fade_s")
        g = _gain_value(gain)
        self._g0 = g  # start of the current ramp
        self._g1 = g  # target
        self._i = 0  # samples done on the current ramp
        self._m = 0  # length of the current ramp in samples (0: no ramp)
        self._fade = False
        self._gain = g  # gain of the last sample produced

    @property
    def gain(self) -> float:
        """Gain applied to the last sample produced (linear)."""
        return self._gain

    @property
    def gain_target(self) -> float:
        """Gain the ramp is heading to (linear)."""
        return self._g1

    @property
    def ramping(self) -> bool:
        """True while the gain has not reached its target."""
        return self._i < self._m

    def remaining_samples(self) -> int:
        """Samples left until the target is reached."""
        return self._m - self._i

    def set(
        self, gain: float, *, rate_db_s: float | None = None, duration_s: float | None = None
    ) -> None:
        """Head for ``gain`` from the current gain.

        Parameters
        ----------
        gain : float
            New target (linear, >= 0).
        rate_db_s : float, optional
            dB rate between non-zero gains (default: the constructor's ``rate_db_s``).
        duration_s : float, optional
            Duration of a fade to or from zero (default: the constructor's ``fade_s``).
        """
        target = _gain_value(gain)
        rate = self._rate_db_s
        if rate_db_s is not None:
            rate = check_positive(rate_db_s, "rate_db_s")
        fade_s = self._fade_s
        if duration_s is not None:
            fade_s = check_positive(duration_s, "duration_s")
        g = self._gain
        self._g0, self._g1, self._i = g, target, 0
        if target == g:
            self._m = 0
        elif g == 0.0 or target == 0.0:
            self._fade = True
            self._m = max(1, math.ceil(fade_s * self.fs_hz))
        else:
            self._fade = False
            change_db = abs(20.0 * math.log10(target / g))
            self._m = max(1, math.ceil(change_db * self.fs_hz / rate))

    def fill(self, out: np.ndarray) -> None:
        """Write the next ``len(out)`` per-sample gains into ``out`` and advance."""
        n = out.size
        k = min(n, self._m - self._i)
        if k > 0:
            t = np.arange(self._i + 1, self._i + k + 1, dtype=np.float64)
            t /= self._m
            if self._fade:
                np.cos(np.pi * t, out=out[:k])
                out[:k] = self._g0 + (self._g1 - self._g0) * 0.5 * (1.0 - out[:k])
            else:
                out[:k] = self._g0 * np.power(self._g1 / self._g0, t)
            self._i += k
            if self._i == self._m:
                out[k - 1] = self._g1  # land exactly on the target
        else:
            k = 0
        out[k:] = self._g1
        if n:
            self._gain = float(out[n - 1])

    def apply(self, x: np.ndarray) -> None:
        """Multiply ``x`` in place by the next ``len(x)`` gains and advance."""
        n = x.size
        if n == 0:
            return
        if self._i >= self._m:
            if self._g1 != 1.0:
                x *= self._g1
            self._gain = self._g1
            return
        k = min(n, self._m - self._i)
        g = np.empty(k)
        self.fill(g)
        x[:k] *= g
        if k < n:
            self.apply(x[k:])


def check_positive(value: float, name: str) -> float:
    """``value`` as a finite float > 0, or a ConfigError naming ``synth: <name>``."""
    x = float(value)
    if not math.isfinite(x) or x <= 0:
        raise ConfigError(f"synth: {name} = {value!r} must be a finite number > 0")
    return x


def _gain_value(value: float) -> float:
    x = float(value)
    if not math.isfinite(x) or x < 0:
        raise ConfigError(f"synth: gain = {value!r} must be a finite number >= 0")
    return x
