"""Tolerance of a test: per-line alarm and abort limits (± dB about the target), rms limits.

Pure. :class:`Tolerance` holds the overall limits and frequency bands that override the
per-line ones; :func:`tolerance_from_mapping` reads it strictly from the ``tolerance`` section
of a test definition (one-line :class:`~liveshape.errors.ConfigError` naming key and value).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from liveshape.errors import ConfigError
from liveshape.schema import Where, as_float, as_list, check_keys

__all__ = ["Tolerance", "ToleranceBand", "tolerance_from_mapping"]


def _check_limits(alarm_db: float, abort_db: float, label: str) -> None:
    for key, v in (("alarm_db", alarm_db), ("abort_db", abort_db)):
        if not (isinstance(v, (int, float)) and math.isfinite(v)):
            raise ConfigError(f"{label}: {key} = {v!r} is not a finite number")
    if not alarm_db > 0:
        raise ConfigError(f"{label}: alarm_db = {alarm_db:g} must be > 0")
    if not abort_db >= alarm_db:
        raise ConfigError(f"{label}: abort_db = {abort_db:g} must be >= alarm_db = {alarm_db:g}")


@dataclass(frozen=True)
class ToleranceBand:
    """Alarm and abort limits (± dB about the target) that apply from ``f_lo_hz`` to ``f_hi_hz``."""

    f_lo_hz: float
    f_hi_hz: float
    alarm_db: float
    abort_db: float

    def __post_init__(self) -> None:
        label = f"tolerance band {self.f_lo_hz:g}-{self.f_hi_hz:g} Hz"
        if not (math.isfinite(self.f_lo_hz) and self.f_lo_hz > 0):
            raise ConfigError(f"{label}: f_lo_hz = {self.f_lo_hz!r} must be a finite number > 0")
        if not (math.isfinite(self.f_hi_hz) and self.f_hi_hz > self.f_lo_hz):
            raise ConfigError(f"{label}: f_hi_hz = {self.f_hi_hz!r} must be above f_lo_hz")
        _check_limits(self.alarm_db, self.abort_db, label)


@dataclass(frozen=True)
class Tolerance:
    """Per-line ASD limits and overall rms limits, in ± dB about the target.

    Defaults are common practice: ±3 dB alarm, ±6 dB abort per line (IEC 60068-2-64 tolerance
    ±3 dB), rms alarm ±1 dB and abort ±1.5 dB. ``bands`` override the per-line limits where
    ``f_lo_hz <= f <= f_hi_hz`` (a later band wins where bands overlap).
    ``max_alarm_fraction`` is the largest fraction of the full-level decisions that may be in
    alarm for the test to pass (common practice; 0.1 is this project's default).
    """

    alarm_db: float = 3.0
    abort_db: float = 6.0
    rms_alarm_db: float = 1.0
    rms_abort_db: float = 1.5
    bands: tuple[ToleranceBand, ...] = field(default_factory=tuple)
    max_alarm_fraction: float = 0.1

    def __post_init__(self) -> None:
        object.__setattr__(self, "bands", tuple(self.bands))
        if not (math.isfinite(self.max_alarm_fraction) and 0.0 <= self.max_alarm_fraction <= 1.0):
            raise ConfigError(f"tolerance: max_alarm_fraction = {self.max_alarm_fraction!r} "
                              "must be between 0 and 1")
        _check_limits(self.alarm_db, self.abort_db, "tolerance")
        if not (math.isfinite(self.rms_alarm_db) and self.rms_alarm_db > 0):
            raise ConfigError(f"tolerance: rms_alarm_db = {self.rms_alarm_db!r} must be > 0")
        if not (math.isfinite(self.rms_abort_db) and self.rms_abort_db >= self.rms_alarm_db):
            raise ConfigError(
                f"tolerance: rms_abort_db = {self.rms_abort_db!r} must be >= "
                f"rms_alarm_db = {self.rms_alarm_db:g}"
            )

    def _at(self, f_hz: Any, attr: str) -> np.ndarray:
        f = np.asarray(f_hz, dtype=float)
        out = np.full(f.shape, float(getattr(self, attr)))
        for b in self.bands:
            out[(f >= b.f_lo_hz) & (f <= b.f_hi_hz)] = getattr(b, attr)
        return out

    def alarm_db_at(self, f_hz: Any) -> np.ndarray:
        """Alarm limit in ± dB at each frequency of ``f_hz``."""
        return self._at(f_hz, "alarm_db")

    def abort_db_at(self, f_hz: Any) -> np.ndarray:
        """Abort limit in ± dB at each frequency of ``f_hz``."""
        return self._at(f_hz, "abort_db")


def tolerance_from_mapping(data: Any, where: Where) -> Tolerance:
    """Read a :class:`Tolerance` from its mapping (keys: ``alarm_db``, ``abort_db``,
    ``rms_alarm_db``, ``rms_abort_db``, ``bands``, ``max_alarm_fraction``).

    Each band is ``{f_lo_hz, f_hi_hz, alarm_db, abort_db}``; a band's missing limits take the
    overall ones. Missing keys take the defaults of :class:`Tolerance`.
    """
    keys = ("alarm_db", "abort_db", "rms_alarm_db", "rms_abort_db", "bands",
            "max_alarm_fraction")
    d = check_keys(data, keys, where)
    base = Tolerance()
    vals = {k: as_float(d[k], where.key(k), gt=0) if k in d else getattr(base, k) for k in keys[:4]}
    for lo, hi in (("alarm_db", "abort_db"), ("rms_alarm_db", "rms_abort_db")):
        if not vals[hi] >= vals[lo]:
            raise where.key(hi).fail(d.get(hi, vals[hi]), f"must be >= {lo} = {vals[lo]:g}")
    bands = []
    for i, item in enumerate(as_list(d.get("bands", []), where.key("bands"))):
        w = where.key("bands").index(i)
        b = check_keys(
            item, ("f_lo_hz", "f_hi_hz", "alarm_db", "abort_db"), w, required=("f_lo_hz", "f_hi_hz")
        )
        lo = as_float(b["f_lo_hz"], w.key("f_lo_hz"), gt=0)
        hi = as_float(b["f_hi_hz"], w.key("f_hi_hz"), gt=0)
        if not hi > lo:
            raise w.key("f_hi_hz").fail(b["f_hi_hz"], f"must be above f_lo_hz = {lo:g}")
        alarm = as_float(b.get("alarm_db", vals["alarm_db"]), w.key("alarm_db"), gt=0)
        abort = as_float(b.get("abort_db", vals["abort_db"]), w.key("abort_db"), gt=0)
        if not abort >= alarm:
            raise w.key("abort_db").fail(
                b.get("abort_db", abort), f"must be >= alarm_db = {alarm:g}"
            )
        bands.append(ToleranceBand(lo, hi, alarm, abort))
    frac = base.max_alarm_fraction
    if "max_alarm_fraction" in d:
        frac = as_float(d["max_alarm_fraction"], where.key("max_alarm_fraction"), ge=0, le=1)
    return Tolerance(bands=tuple(bands), max_alarm_fraction=frac, **vals)
