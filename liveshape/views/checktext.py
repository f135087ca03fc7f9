"""What ``liveshape check`` shows, as rows of text: pure Python, no :mod:`rich`.

Each function takes the check report mapping of :func:`liveshape.control.checks.check_report` (or
one of its parts) and returns rows of strings; :func:`liveshape.views.dashboard.check_table` puts
them in tables. Lengths are shown in millimetres, levels in dB, missing figures as a dash.
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from typing import Any

from liveshape.views.textformat import DASH, as_finite, fmt, fmt_value

__all__ = [
    "BUDGET_COLUMNS",
    "SEGMENT_COLUMNS",
    "TIGHT_HEADROOM_DB",
    "budget_rows",
    "control_rows",
    "feasibility_rows",
    "headroom_verdict",
    "profile_rows",
    "segment_rows",
    "tolerance_rows",
]

SEGMENT_COLUMNS = ("from Hz", "to Hz", "ASD g²/Hz", "slope dB/oct", "area g²", "share")
BUDGET_COLUMNS = ("", "rms", "3σ peak", "limit", "headroom", "")

#: A budget with less headroom than this (dB) is called tight.
TIGHT_HEADROOM_DB = 3.0

_BUDGET_KEY = re.compile(r"^(?P<name>.+)_(?P<what>rms|peak_3sigma|limit)_(?P<unit>[a-z0-9]+)$")
#: Budget units shown, with the unit word and the scale from the key's unit.
_SHOWN_UNITS = {"fs": ("FS", 1.0), "v": ("V", 1.0), "a": ("A", 1.0), "m": ("mm", 1e3)}

Rows = list[tuple[str, str]]


def profile_rows(report: Mapping[str, Any]) -> Rows:
    """Band (Hz), grms (g), velocity rms (mm/s), displacement rms and 3σ peak-to-peak (mm)."""
    rows = [
        ("band", f"{fmt(report.get('f_min_hz'), 'g')} – {fmt(report.get('f_max_hz'), 'g')} Hz"),
        ("grms", fmt(report.get("grms_g"), ".3f", "g")),
    ]
    for label, key, unit in (("velocity rms", "velocity_rms_m_s", "mm/s"),
                             ("displacement rms", "displacement_rms_m", "mm"),
                             ("displacement 3σ peak-to-peak", "displacement_pp_3sigma_m", "mm")):
        v = as_finite(report.get(key))
        rows.append((label, fmt(None if v is None else v * 1e3, ".3g", unit)))
    return rows


#: Segments listed one per row; beyond this the table shows the first and last
#: :data:`SEGMENT_ENDS` and one row summing up the ones between (``--json`` lists them all).
MAX_SEGMENT_ROWS = 24
SEGMENT_ENDS = 10


def segment_rows(report: Mapping[str, Any]) -> list[tuple[str, ...]]:
    """Rows of the profile's segments, in the order of :data:`SEGMENT_COLUMNS`.

    Up to :data:`MAX_SEGMENT_ROWS` segments one row each; a longer profile (a measured CSV of
    thousands of points) shows its first and last :data:`SEGMENT_ENDS` segments and one row
    for the segments between them: their band, the range of their slopes, their summed area
    and share.
    """
    segs = list(report.get("segments", ()))
    if len(segs) <= MAX_SEGMENT_ROWS:
        return _segment_rows(segs)
    head, mid, tail = segs[:SEGMENT_ENDS], segs[SEGMENT_ENDS:-SEGMENT_ENDS], segs[-SEGMENT_ENDS:]
    slopes = [v for v in (as_finite(g.get("slope_db_oct")) for g in mid) if v is not None]
    areas = [v for v in (as_finite(g.get("area_g2")) for g in mid) if v is not None]
    shares = [v for v in (as_finite(g.get("share_of_ms")) for g in mid) if v is not None]
    slope = (f"{fmt(min(slopes), '+.2f')} … {fmt(max(slopes), '+.2f')}" if slopes else "—")
    summary = (
        fmt(mid[0].get("f_lo_hz"), "g"), fmt(mid[-1].get("f_hi_hz"), "g"),
        f"… {len(mid)} segments (check --json lists all)", slope,
        fmt(sum(areas), ".4g") if areas else "—",
        fmt(100 * sum(shares), ".1f", "%") if shares else "—",
    )
    return [*_segment_rows(head), summary, *_segment_rows(tail)]


def _segment_rows(segs: list[Any]) -> list[tuple[str, ...]]:
    rows = []
    for seg in segs:
        share = as_finite(seg.get("share_of_ms"))
        rows.append((
            fmt(seg.get("f_lo_hz"), "g"), fmt(seg.get("f_hi_hz"), "g"),
            f"{fmt(seg.get('asd_lo_g2_hz'))} → {fmt(seg.get('asd_hi_g2_hz'))}",
            fmt(seg.get("slope_db_oct"), "+.2f"), fmt(seg.get("area_g2"), ".4g"),
            fmt(None if share is None else 100 * share, ".1f", "%"),
        ))
    return rows


def tolerance_rows(report: Mapping[str, Any]) -> Rows:
    """Per-line and rms alarm / abort limits, then each band's own limits (dB)."""
    tol = report.get("tolerance") or {}

    def pair(alarm: Any, abort: Any) -> str:
        return f"±{fmt(alarm, 'g')} / ±{fmt(abort, 'g')} dB"

    rows = [("per line alarm / abort", pair(tol.get("alarm_db"), tol.get("abort_db"))),
            ("rms alarm / abort", pair(tol.get("rms_alarm_db"), tol.get("rms_abort_db")))]
    for b in tol.get("bands", ()):
        rows.append((f"band {fmt(b.get('f_lo_hz'), 'g')} – {fmt(b.get('f_hi_hz'), 'g')} Hz",
                     pair(b.get("alarm_db"), b.get("abort_db"))))
    return rows


def control_rows(report: Mapping[str, Any]) -> Rows:
    """Lines and their spacing, target DOF and averaging, seconds of data for the target DOF."""
    c = report.get("control") or {}
    n = c.get("frame_length")
    rows = [("lines", f"{fmt_value(int(n) // 2 + 1 if n else None)} of "
             f"{fmt(c.get('df_hz'), '.4g')} Hz, {fmt_value(c.get('lines_in_band'))} in band "
             f"(frame {fmt_value(n)} at {fmt(c.get('fs_hz'), 'g')} Hz)")]
    averaging = f" ({c['averaging']} averaging)" if c.get("averaging") else ""
    rows.append(("target DOF", f"{fmt(c.get('target_dof'), '.0f')}{averaging}"))
    if c.get("seconds_for_target_dof") is not None:
        rows.append(("data for target DOF",
                     f"{fmt(c.get('seconds_for_target_dof'), '.2f', 's')} "
                     f"({fmt_value(c.get('segments_for_target_dof'))} segments, Hann 50 %)"))
    return rows


def headroom_verdict(headroom_db: Any) -> str:
    """``over`` below 0 dB, ``tight`` below :data:`TIGHT_HEADROOM_DB`, else ``ok``;
    ``no limit`` when there is no figure."""
    h = as_finite(headroom_db)
    if h is None:
        return "no limit"
    return "over" if h < 0 else "tight" if h < TIGHT_HEADROOM_DB else "ok"


def budget_rows(rig: Mapping[str, Any]) -> tuple[list[tuple[str, ...]], set[str]]:
    """The rig budgets among the feasibility rows, one row each, and the keys they used.

    A budget is the keys ``<name>_rms_<unit>``, ``<name>_peak_3sigma_<unit>``,
    ``<name>_limit_<unit>`` and ``<name>_headroom_db``; a row follows :data:`BUDGET_COLUMNS`:
    name, rms, 3σ peak, limit, headroom and :func:`headroom_verdict`.
    """
    budgets: dict[str, dict[str, Any]] = {}
    for key, value in rig.items():
        m = _BUDGET_KEY.match(key)
        if m and m["unit"] in _SHOWN_UNITS:
            budgets.setdefault(m["name"], {"unit": m["unit"]})[m["what"]] = value
    rows: list[tuple[str, ...]] = []
    used: set[str] = set()
    for name, b in budgets.items():
        unit, scale = _SHOWN_UNITS[b["unit"]]
        headroom = rig.get(f"{name}_headroom_db")
        used |= {f"{name}_{w}_{b['unit']}" for w in ("rms", "peak_3sigma", "limit")}
        used.add(f"{name}_headroom_db")

        def scaled(x: Any, unit: str = unit, scale: float = scale) -> str:
            v = as_finite(x)
            return DASH if v is None else f"{v * scale:.3g} {unit}"

        rows.append((name.replace("_", " "), scaled(b.get("rms")), scaled(b.get("peak_3sigma")),
                     scaled(b.get("limit")), fmt(headroom, "+.1f", "dB"),
                     headroom_verdict(headroom)))
    return rows, used


#: Keys of the feasibility mapping that :func:`feasibility_rows` shows.
FEASIBILITY_KEYS = ("binding_limit", "headroom_left", "snr_headroom_db", "reachable_level_db",
                    "lowest_controllable_hz", "lowest_limited_by", "advice")


def feasibility_rows(rig: Mapping[str, Any]) -> tuple[Rows, set[str]]:
    """What binds and what would make the profile feasible, and the keys used.

    Rows: the binding limit and the headroom left on the others, the level the rig can reach
    (dB re the target), the lowest frequency it holds at full level (with the limits that bind
    below it), then one ``to make it feasible`` row per piece of advice.
    """
    if "binding_limit" not in rig:
        return [], set()
    rows: Rows = []
    binding = rig.get("binding_limit") or "none"
    rows.append(("binding limit", str(binding)))
    rows.append(("headroom left" if binding != "none" else "headroom",
                 str(rig.get("headroom_left") or DASH)))
    level = as_finite(rig.get("reachable_level_db"))
    if level is None:
        rows.append(("reachable level", "none: no level keeps every budget and the SNR rule"))
    elif level >= 0:
        rows.append(("reachable level", "the full target (0 dB)"))
    else:
        rows.append(("reachable level", f"{-level:.1f} dB below the target"))
    low = as_finite(rig.get("lowest_controllable_hz"))
    by = rig.get("lowest_limited_by") or "none"
    if low is None:
        text = "none: no lower band edge holds the full level"
    else:
        text = f"{low:.6g} Hz" + (f" (below it: {by})" if by != "none" else "")
    rows.append(("lowest frequency held at full level", text))
    for line in rig.get("advice") or ():
        rows.append(("to make it feasible", str(line)))
    return rows, set(FEASIBILITY_KEYS)
