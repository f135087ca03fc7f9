"""Sine tones on random as a test definition gives them: :class:`ToneSpec` and its reader.

Pure. The top-level ``tones:`` list of a test definition reads into a tuple of frozen
:class:`ToneSpec` (:func:`tones_from_list`); :func:`check_tones` holds them against the profile
band and the Nyquist frequency. The generation and the fit of tones are
:mod:`liveshape.dsp.tones`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

from liveshape.dsp.tones import Tone
from liveshape.schema import Where, as_float, as_list, check_keys

__all__ = ["TONE_KEYS", "ToneSpec", "check_tones", "tones_from_list"]

TONE_KEYS = ("f_hz", "f_hi_hz", "rate_oct_min", "amplitude_g", "tolerance_db", "abort_db")
_SWEEP_KEYS = ("f_hi_hz", "rate_oct_min")

#: Alarm and abort limits of a tone's amplitude, dB about its target. [common practice] for
#: sine-on-random tests; no standard is named for these defaults.
TONE_TOLERANCE_DB = 1.0
TONE_ABORT_DB = 3.0


@dataclass(frozen=True)
class ToneSpec:
    """One tone of a sine-on-random test.

    Attributes
    ----------
    f_hz : float
        Frequency of a fixed tone, or the lower limit of a sweep, Hz.
    amplitude_g : float
        Target peak amplitude in the control, g.
    f_hi_hz : float or None
        Upper limit of a log sweep, Hz (None: a fixed tone).
    rate_oct_min : float or None
        Sweep rate, octaves per minute (None for a fixed tone).
    tolerance_db : float
        Alarm limit of the measured amplitude about the target, ± dB.
    abort_db : float
        Abort limit, ± dB (above ``tolerance_db``).
    """

    f_hz: float
    amplitude_g: float
    f_hi_hz: float | None = None
    rate_oct_min: float | None = None
    tolerance_db: float = TONE_TOLERANCE_DB
    abort_db: float = TONE_ABORT_DB

    @property
    def swept(self) -> bool:
        """True for a swept tone."""
        return self.f_hi_hz is not None

    @property
    def f_top_hz(self) -> float:
        """Highest frequency the tone reaches, Hz."""
        return self.f_hi_hz if self.f_hi_hz is not None else self.f_hz

    def tone(self, amplitude: float | None = None, phase_rad: float = 0.0) -> Tone:
        """The :class:`~liveshape.dsp.tones.Tone` with this frequency plan.

        Parameters
        ----------
        amplitude : float, optional
            Peak amplitude in the signal's unit (default ``amplitude_g``, g).
        phase_rad : float
            Phase at time 0, rad.
        """
        a = self.amplitude_g if amplitude is None else float(amplitude)
        if self.swept:
            return Tone(a, self.f_hz, self.f_hi_hz, float(self.rate_oct_min), phase_rad)
        return Tone(a, self.f_hz, phase_rad=phase_rad)

    def as_mapping(self) -> dict[str, Any]:
        """Plain mapping; :func:`tones_from_list` of a list of them gives the same tones back."""
        d: dict[str, Any] = {"f_hz": self.f_hz, "amplitude_g": self.amplitude_g,
                             "tolerance_db": self.tolerance_db, "abort_db": self.abort_db}
        if self.swept:
            d["f_hi_hz"] = self.f_hi_hz
            d["rate_oct_min"] = self.rate_oct_min
        return d


def _tone(data: Any, w: Where) -> ToneSpec:
    d = check_keys(data, TONE_KEYS, w, required=("f_hz", "amplitude_g"))
    f = as_float(d["f_hz"], w.key("f_hz"), gt=0)
    amp = as_float(d["amplitude_g"], w.key("amplitude_g"), gt=0)
    given = [k for k in _SWEEP_KEYS if k in d]
    f_hi = rate = None
    if given:
        if len(given) == 1:
            other = _SWEEP_KEYS[1 - _SWEEP_KEYS.index(given[0])]
            raise w.key(given[0]).fail(d[given[0]], f"needs {other} too (a sweep gives both)")
        f_hi = as_float(d["f_hi_hz"], w.key("f_hi_hz"), gt=0)
        if not f_hi > f:
            raise w.key("f_hi_hz").fail(d["f_hi_hz"], f"must be above f_hz = {f:g} "
                                        "(the sweep's upper limit)")
        rate = as_float(d["rate_oct_min"], w.key("rate_oct_min"), gt=0)
    tol = as_float(d.get("tolerance_db", TONE_TOLERANCE_DB), w.key("tolerance_db"), gt=0)
    abort = as_float(d.get("abort_db", TONE_ABORT_DB), w.key("abort_db"), gt=0)
    if not abort > tol:
        raise w.key("abort_db").fail(d.get("abort_db", abort),
                                     f"must be above tolerance_db = {tol:g}")
    return ToneSpec(f, amp, f_hi, rate, tol, abort)


def tones_from_list(data: Any, where: Where) -> tuple[ToneSpec, ...]:
    """Validate a ``tones:`` list (None or empty: no tones).

    Raises
    ------
    ConfigError
        One line naming ``tones[i].key``, the value and the rule.
    """
    if data is None:
        return ()
    return tuple(_tone(x, where.index(i)) for i, x in enumerate(as_list(data, where)))


def check_tones(tones: Any, f_min_hz: float, f_max_hz: float, fs_hz: float, where: Where) -> None:
    """Every tone (and sweep limit) inside the profile band ``[f_min_hz, f_max_hz]`` and below
    Nyquist ``fs_hz / 2``; one-line ConfigError naming ``tones[i].key`` otherwise."""
    for i, t in enumerate(tones):
        w = where.index(i)
        for key, f in (("f_hz", t.f_hz), ("f_hi_hz", t.f_hi_hz)):
            if f is None:
                continue
            if not f_min_hz <= f <= f_max_hz:
                raise w.key(key).fail(f, f"must lie in the profile band "
                                      f"{f_min_hz:g}-{f_max_hz:g} Hz")
            if not (math.isfinite(f) and f < fs_hz / 2):
                raise w.key(key).fail(f, f"must be below Nyquist ({fs_hz / 2:g} Hz)")
