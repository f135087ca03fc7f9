"""Numbers as short text for the terminal views: pure Python, no :mod:`rich`.

Missing values (``None``, NaN, infinities, things that are not numbers) are shown as a dash
(:data:`DASH`) so a view never prints ``nan``. Keys that carry their unit as a suffix
(``duration_s``, ``asd_g2_hz``, ``headroom_db``; see the naming rules in DEVELOPERS.md) are
split into a label and a unit by :func:`label_and_unit`.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

__all__ = [
    "DASH",
    "as_count",
    "as_finite",
    "fmt",
    "fmt_db",
    "fmt_span",
    "fmt_time",
    "fmt_value",
    "label_and_unit",
    "mapping_rows",
]

#: Shown for a missing or non-finite value.
DASH = "—"

#: Unit suffixes of key names and the unit shown; longer suffixes first (``_m_s`` before ``_s``,
#: ``_mv_per_g`` before ``_g``). A key that is only a unit (``g_per_fs``) is named by
#: :data:`_KEY_WORDS`.
_UNITS = (
    ("_g2_hz", "g²/Hz"), ("_fs2_hz", "FS²/Hz"), ("_db_oct", "dB/oct"), ("_db_s", "dB/s"),
    ("_mv_per_g", "mV/g"), ("_v_per_fs", "V/FS"), ("_g_per_fs", "g/FS"), ("_k_per_w", "K/W"),
    ("_per_k", "1/K"), ("_samples", "samples"),
    ("_m_s", "m/s"), ("_hz", "Hz"), ("_db", "dB"), ("_fs", "FS"), ("_g", "g"), ("_s", "s"),
    ("_m", "m"), ("_v", "V"), ("_a", "A"), ("_w", "W"), ("_ohm", "Ω"), ("_k", "K"),
)
#: Keys whose name is (mostly) a unit, or an abbreviation: the words and unit shown.
_KEY_WORDS = {
    "g_per_fs": ("g per full scale", "g/FS"),
    "accel_mv_per_g": ("accelerometer sensitivity", "mV/g"),
    "sens_mv_per_g": ("sensitivity", "mV/g"),
    "mv_per_g": ("sensitivity", "mV/g"),
    "out_v_per_fs": ("output", "V/FS"),
    "in_v_per_fs": ("input", "V/FS"),
    "v_per_fs": ("volts per full scale", "V/FS"),
    "t_s": ("run time", "s"),
    "re_ohm_now": ("coil resistance now", "Ω"),
    "re_ohm": ("coil resistance", "Ω"),
    "n_samples": ("samples", ""),
    "n_lines": ("lines", ""),
    "dof": ("DOF", ""),
    "target_grms": ("target", "g rms"),
    "grms": ("rms", "g"),
    "fs_hz": ("sample rate", "Hz"),
}
#: Values smaller than this (in the unit shown) are rounding noise and shown as 0.
_NOISE = 1e-9


def as_finite(x: Any) -> float | None:
    """``float(x)`` when that is a finite number, else None."""
    try:
        v = float(x)
    except (TypeError, ValueError):
        return None
    return v if math.isfinite(v) else None


def as_count(value: Any) -> int | None:
    """A count of lines; negative (the controller's 'none yet') and missing give None."""
    v = as_finite(value)
    return None if v is None or v < 0 else int(v)


def fmt(x: Any, spec: str = ".3g", unit: str = "") -> str:
    """``x`` in the format ``spec`` followed by `` unit``; :data:`DASH` when not finite."""
    v = as_finite(x)
    if v is None:
        return DASH
    return f"{v:{spec}}{' ' + unit if unit else ''}"


def fmt_db(x: Any, spec: str = "+.2f") -> str:
    """A level difference in dB, signed: ``+0.50 dB``."""
    return fmt(x, spec, "dB")


def fmt_time(seconds: Any) -> str:
    """A duration as ``m:ss`` or ``h:mm:ss`` (whole seconds, negative shown as 0:00)."""
    v = as_finite(seconds)
    if v is None:
        return DASH
    v = max(v, 0.0)
    m, s = divmod(int(round(v)), 60)
    h, m = divmod(m, 60)
    return f"{h}:{m:02d}:{s:02d}" if h else f"{m}:{s:02d}"


def fmt_span(values: Sequence[float] | np.ndarray) -> str:
    """``3`` for equal values, ``3…4.5`` for a range (limits that vary by band)."""
    arr = np.asarray(values, dtype=float)
    ok = arr[np.isfinite(arr)]
    if ok.size == 0:
        return DASH
    lo, hi = float(ok.min()), float(ok.max())
    return f"{lo:g}" if lo == hi else f"{lo:g}…{hi:g}"


def label_and_unit(key: str) -> tuple[str, str]:
    """Split a key with a unit suffix: ``"duration_s"`` gives ``("duration", "s")``.

    Keys that are a unit or an abbreviation get words (``g_per_fs`` is "g per full scale" in
    g/FS, ``t_s`` "run time"); ``_t_s`` at the end of a longer key reads "time".
    """
    if key in _KEY_WORDS:
        return _KEY_WORDS[key]
    for suffix, unit in _UNITS:
        if key.endswith(suffix) and len(key) > len(suffix):
            label = key[: -len(suffix)].replace("_", " ")
            if label == "t" or label.endswith(" t"):
                label = label[:-1] + "time"
            return label, unit
    return key.replace("_", " "), ""


def fmt_value(value: Any, unit: str = "") -> str:
    """Any figure of a result mapping: yes/no, whole numbers, 4 significant digits, lists."""
    if value is None:
        return DASH
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, (int, np.integer)):
        return f"{int(value)}{' ' + unit if unit else ''}"
    if isinstance(value, (float, np.floating)):
        v = as_finite(value)
        if v is not None and abs(v) < _NOISE:
            v = 0.0
        if v is not None and unit == "m" and abs(v) < 0.1:  # strokes read better in mm
            v, unit = v * 1e3, "mm"
        spec = ".0f" if v is not None and (1e4 <= abs(v) < 1e9 or v == 0.0) else ".4g"
        return fmt(v, spec, unit)
    if isinstance(value, (list, tuple)):
        if not value:
            return "none"
        if all(as_finite(v) is not None and not isinstance(v, bool) for v in value):
            return ", ".join(fmt(v, ".4g") for v in value) + (f" {unit}" if unit else "")
        return "; ".join(str(v) for v in value)
    if isinstance(value, str) and not value:
        return "none"
    return str(value)


def mapping_rows(data: Mapping[str, Any], skip: Sequence[str] = ()) -> list[tuple[str, str]]:
    """``(label, value)`` rows of a result mapping, units from the key suffixes.

    Nested mappings are flattened with their key in front (``record events``); keys in
    ``skip`` (top level only) are left out.
    """
    return _mapping_rows(data, skip, "")


def _mapping_rows(data: Mapping[str, Any], skip: Sequence[str], prefix: str
                  ) -> list[tuple[str, str]]:
    rows: list[tuple[str, str]] = []
    for key, value in data.items():
        if key in skip:
            continue
        if isinstance(value, Mapping):
            rows += _mapping_rows(value, (), f"{prefix}{label_and_unit(str(key))[0]} ")
            continue
        label, unit = label_and_unit(str(key))
        rows.append((prefix + label, fmt_value(value, unit)))
    return rows
