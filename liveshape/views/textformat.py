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

#: Unit suffixes of key names and the unit shown; longer suffixes first (``_m_s`` before ``_s``).
_UNITS = (
    ("_g2_hz", "g²/Hz"), ("_fs2_hz", "FS²/Hz"), ("_db_oct", "dB/oct"), ("_db_s", "dB/s"),
    ("_m_s", "m/s"), ("_hz", "Hz"), ("_db", "dB"), ("_fs", "FS"), ("_g", "g"), ("_s", "s"),
    ("_m", "m"), ("_v", "V"), ("_a", "A"), ("_w", "W"), ("_ohm", "Ω"), ("_k", "K"),
)


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
    """Split a key with a unit suffix: ``"duration_s"`` gives ``("duration", "s")``."""
    for suffix, unit in _UNITS:
        if key.endswith(suffix) and len(key) > len(suffix):
            return key[: -len(suffix)].replace("_", " "), unit
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
        spec = ".0f" if v is not None and 1e4 <= abs(v) < 1e9 else ".4g"
        return fmt(value, spec, unit)
    if isinstance(value, (list, tuple)) and all(as_finite(v) is not None for v in value):
        return ", ".join(fmt(v, ".4g") for v in value) + (f" {unit}" if unit else "")
    return str(value)


def mapping_rows(data: Mapping[str, Any], skip: Sequence[str] = ()) -> list[tuple[str, str]]:
    """``(label, value)`` rows of a result mapping, units from the key suffixes.

    Nested mappings are flattened with their key in front (``record events``); keys in
    ``skip`` (top level only) are left out.
    """
    rows: list[tuple[str, str]] = []
    for key, value in data.items():
        if key in skip:
            continue
        if isinstance(value, Mapping):
            rows += mapping_rows({f"{key} {k}": v for k, v in value.items()})
            continue
        label, unit = label_and_unit(str(key))
        rows.append((label, fmt_value(value, unit)))
    return rows
