"""The live view of a run and its result, as rows of text: pure Python, no :mod:`rich`.

A snapshot is the controller's frozen :class:`liveshape.control.runstate.ControlSnapshot` or any
object or mapping with the same names (:func:`field` reads either). Each function returns text
pieces ``(text, role)``; a role names the colour a view gives it (the fields of
:class:`liveshape.views.dashboard.Palette`: ``value``, ``label``, ``dim``, ``ok``, ``alarm``,
``abort``, ``title``, and ``stage`` for the stage word). :mod:`liveshape.views.dashboard` turns them
into rich renderables.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from liveshape.testdef.chain import AccelUnit
from liveshape.views.textformat import (
    DASH,
    as_count,
    as_finite,
    fmt,
    fmt_db,
    fmt_time,
    fmt_value,
    mapping_rows,
)

__all__ = [
    "accel_label",
    "asd_label",
    "in_units",
    "STAGE_WORDS",
    "TOLERANCE_ROLES",
    "as_mapping",
    "chi2_band_db",
    "compact_control_rows",
    "compact_drive_rows",
    "control_rows",
    "drive_rows",
    "event_rows",
    "field",
    "header_pieces",
    "limit_role",
    "result_rows",
    "steps_to_full_level",
    "time_pieces",
    "to_full_level_text",
    "tolerance_state",
    "verdict_rows",
]

#: ``(text, role)``
Piece = tuple[str, str]
#: ``(label, pieces of the value)``
Row = tuple[str, tuple[Piece, ...]]

STAGE_WORDS = {
    "connect": "connect", "identify": "identify", "equalize": "equalize",
    "full_level": "full level", "ramp_down": "ramp down", "done": "done",
}
_STATUS_ROLE = {"completed": "ok", "aborted": "abort", "stopped": "alarm", "crashed": "abort"}
#: Result keys :func:`result_rows` shows in its own rows (or leaves out: the record counts).
_RESULT_SHOWN = frozenset({
    "status", "abort_reason", "control_grms_g", "target_grms_g", "final_rms_error_db",
    "final_max_dev_db", "final_lines_outside_alarm", "final_lines_outside_abort",
    "updates_to_tolerance", "dof", "time_at_full_level_s", "record", "trip",
    "verdict", "verdict_reasons", "verdict_rule", "full_level_dof", "full_level_rms_error_db",
    "full_level_max_dev_db", "full_level_min_dev_db", "full_level_lines_outside_alarm",
    "full_level_lines_outside_abort", "full_level_control_grms_g", "alarm_fraction",
    "max_alarm_fraction", "accel_unit", "asd_unit", "tones", "control_kurtosis",
    "lines_not_caused_by_drive", "inputs",
})
_VERDICT_ROLE = {"pass": "ok", "fail": "abort", "incomplete": "alarm"}


def field(obj: Any, *names: str, default: Any = None) -> Any:
    """First attribute (or mapping key) of ``names`` that ``obj`` has and is not None."""
    for name in names:
        value = obj.get(name) if isinstance(obj, Mapping) else getattr(obj, name, None)
        if value is not None:
            return value
    return default


def as_mapping(obj: Any) -> dict[str, Any]:
    """A result as a dict: a mapping, a dataclass, or an object with ``to_dict()``."""
    if isinstance(obj, Mapping):
        return dict(obj)
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        return dataclasses.asdict(obj)
    to_dict = getattr(obj, "to_dict", None)
    if callable(to_dict):
        return dict(to_dict())
    raise TypeError(f"expected a mapping or a dataclass, got {type(obj).__name__}")


def limit_role(value: Any, limit: Any) -> str:
    """``abort`` above the limit, ``alarm`` above 80 % of it, else ``ok`` (``value`` if none)."""
    v, lim = as_finite(value), as_finite(limit)
    if v is None or lim is None or lim <= 0:
        return "value"
    if v > lim:
        return "abort"
    return "alarm" if v > 0.8 * lim else "ok"


def chi2_band_db(snapshot: Any, dof: float | None) -> tuple[float | None, float | None]:
    """The snapshot's 90 % χ² band (dB), or the one its DOF implies (Bendat & Piersol)."""
    band = field(snapshot, "chi2_band_db", "chi2_db")
    if band is not None and len(band) == 2:
        return as_finite(band[0]), as_finite(band[1])
    lo, hi = as_finite(field(snapshot, "chi2_lo_db")), as_finite(field(snapshot, "chi2_hi_db"))
    if (lo is not None and hi is not None) or dof is None or dof <= 0:
        return lo, hi
    from liveshape.dsp.spectra import chi2_interval_db

    lo, hi = chi2_interval_db(dof, 0.90)
    return float(lo), float(hi)


def _row(label: str, text: str, role: str = "value") -> Row:
    return label, ((text, role),)


#: The tolerance state in words and the role (colour) each is shown in.
TOLERANCE_ROLES = {"in tolerance": "ok", "alarm": "alarm", "abort pending": "abort"}


def tolerance_state(snapshot: Any) -> str:
    """``in tolerance``, ``alarm``, ``abort pending`` or ``""`` (no estimate yet).

    The snapshot's ``tolerance_state`` when it has one; otherwise worked out from its numbers:
    a line outside the abort limit is an abort pending, a line outside the alarm limit or an
    rms error beyond the rms alarm limit (``rms_alarm_db``, when the snapshot has it) is an
    alarm.
    """
    state = field(snapshot, "tolerance_state")
    if state:
        return str(state)
    n_al = as_count(field(snapshot, "lines_outside_alarm"))
    n_ab = as_count(field(snapshot, "lines_outside_abort"))
    if n_al is None and n_ab is None:
        return ""
    if n_ab:
        return "abort pending"
    rms, rms_lim = as_finite(field(snapshot, "rms_error_db")), as_finite(
        field(snapshot, "rms_alarm_db"))
    if n_al or (rms is not None and rms_lim is not None and abs(rms) > rms_lim):
        return "alarm"
    return "in tolerance"


def _state_pieces(snapshot: Any) -> list[Piece]:
    status = str(field(snapshot, "status", default="running"))
    if status not in ("running", ""):
        return [(status.upper(), _STATUS_ROLE.get(status, "value"))]
    state = tolerance_state(snapshot)
    if not state:
        return [("NO ESTIMATE YET", "dim")]
    return [(state.upper(), TOLERANCE_ROLES.get(state, "value"))]


def _step_text(snapshot: Any, compact: bool) -> str | None:
    step, n_steps = field(snapshot, "step_index", "step"), field(snapshot, "n_steps", "steps")
    if step is None:
        return None
    shown = int(step) + 1 if field(snapshot, "step_index") is not None else int(step)
    if n_steps is None:
        return str(shown)
    return f"{shown}/{int(n_steps)}" if compact else f"{shown} of {int(n_steps)}"


def steps_to_full_level(snapshot: Any) -> int | None:
    """Level steps still to go before full level (0 at full level), None if unknown."""
    step, n_steps = field(snapshot, "step_index"), field(snapshot, "n_steps")
    if step is None or n_steps is None:
        return None
    return max(int(n_steps) - 1 - int(step), 0)


def to_full_level_text(snapshot: Any) -> str:
    """``reached``, ``1 step``, ``3 steps`` (each step waits for tolerance, so no clock time)."""
    n = steps_to_full_level(snapshot)
    if n is None:
        return DASH
    return "reached" if n == 0 else f"{n} step{'s' if n > 1 else ''}"


def header_pieces(snapshot: Any, *, compact: bool = False) -> list[Piece]:
    """Tolerance state (or the run's end), stage, level (dB), step of the schedule.

    The full layout starts with the program name; the times come in :func:`time_pieces`.
    """
    stage = str(field(snapshot, "stage", default="?"))
    out: list[Piece] = [] if compact else [("liveshape  ", "title")]
    out += _state_pieces(snapshot)
    out += [("  " if compact else "   ", "value"), (STAGE_WORDS.get(stage, stage), "stage")]
    level = field(snapshot, "level_db")
    if level is not None:
        out += [("   level ", "label"), (fmt(level, "+.1f", "dB"), "value")]
    step = _step_text(snapshot, compact)
    if step is not None:
        out += [("   step ", "label"), (step, "value")]
    return out


def time_pieces(snapshot: Any) -> list[Piece]:
    """Elapsed time, steps to full level, time at full level (of the total) and time left."""
    at = field(snapshot, "time_at_full_level_s")
    total = field(snapshot, "full_level_s")
    at_text = fmt_time(at) + (f" of {fmt_time(total)}" if as_finite(total) is not None else "")
    return [("elapsed ", "label"), (fmt_time(field(snapshot, "elapsed_s", "t_s")), "value"),
            ("   to full level ", "label"), (to_full_level_text(snapshot), "value"),
            ("   at full level ", "label"), (at_text, "value"),
            ("   left at full level ", "label"), (fmt_time(field(snapshot, "remaining_s")),
                                                  "value")]


def _grms_text(snapshot: Any) -> tuple[str, float | None]:
    c = as_finite(field(snapshot, "control_grms_g"))
    t = as_finite(field(snapshot, "target_grms_g"))
    err = 10.0 * math.log10(c**2 / t**2) if c and t else None
    return f"{fmt(c, '.3f')} / {fmt(t, '.3f')} {accel_label(snapshot)}", err


#: Acceleration amplitudes (g) among the fields of a snapshot or a run result.
ACCEL_FIELDS = ("control_grms_g", "target_grms_g", "full_level_control_grms_g",
                "full_level_target_grms_g")
#: Acceleration spectra (g²/Hz) among the fields of a snapshot.
ASD_FIELDS = ("control_psd", "target_psd")


def in_units(obj: Any, unit: AccelUnit) -> Any:
    """A snapshot or result with its acceleration figures in ``unit`` (for display only).

    The record and the controller always work in g; this converts the fields of
    :data:`ACCEL_FIELDS` (times ``unit.per_g``) and :data:`ASD_FIELDS` (times ``unit.per_g²``)
    and adds ``accel_unit`` and ``asd_unit`` labels that the rows use. ``obj`` is returned
    unchanged for g.
    """
    if unit.per_g == 1.0:
        return obj
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        out = {f.name: getattr(obj, f.name) for f in dataclasses.fields(obj)}  # shallow
    else:
        out = as_mapping(obj)
    for key in ACCEL_FIELDS:
        v = as_finite(out.get(key))
        if v is not None:
            out[key] = v * unit.per_g
    for key in ASD_FIELDS:
        if out.get(key) is not None:
            out[key] = np.asarray(out[key], dtype=float) * unit.per_g ** 2
    out["accel_unit"] = unit.amplitude
    out["asd_unit"] = unit.asd
    return out


def accel_label(obj: Any) -> str:
    """The amplitude unit of a snapshot or result shown (``g`` unless :func:`in_units` set it)."""
    return str(field(obj, "accel_unit", default="g"))


def asd_label(obj: Any) -> str:
    """The ASD unit of a snapshot or result shown (``g²/Hz`` unless :func:`in_units` set it)."""
    return str(field(obj, "asd_unit", default="g²/Hz"))


def _outside_pieces(snapshot: Any) -> tuple[Piece, ...]:
    n_al = as_count(field(snapshot, "lines_outside_alarm"))
    n_ab = as_count(field(snapshot, "lines_outside_abort"))
    return ((f"{fmt_value(n_al)} alarm", "alarm" if n_al else "ok"), ("  ", "value"),
            (f"{fmt_value(n_ab)} abort", "abort" if n_ab else "ok"))


def control_rows(snapshot: Any) -> list[Row]:
    """grms against target, rms error, line deviations, lines outside, DOF and χ² band."""
    grms, err = _grms_text(snapshot)
    dof = as_finite(field(snapshot, "dof")) or None  # 0 DOF: no estimate yet
    lo, hi = chi2_band_db(snapshot, dof)
    return [
        _row("grms control / target", f"{grms}  ({fmt_db(err)})"),
        _row("rms error", fmt_db(field(snapshot, "rms_error_db"))),
        _row("line deviation max / min", f"{fmt_db(field(snapshot, 'max_dev_db'))} / "
             f"{fmt_db(field(snapshot, 'min_dev_db'))}"),
        ("lines outside", _outside_pieces(snapshot)),
        _row("DOF", f"{fmt(dof, '.0f')}   90 % χ² band {fmt(lo, '+.2f')} / "
             f"{fmt(hi, '+.2f')} dB"),
        _row("updates", fmt_value(field(snapshot, "updates", "n_updates"))),
        *variant_rows(snapshot),
    ]


def variant_rows(obj: Any) -> list[Row]:
    """Tones (measured against target peak, error) and the control's kurtosis, when the test
    has them (``tones`` / ``kurtosis`` of a snapshot, ``tones`` / ``control_kurtosis`` of a
    summary)."""
    rows = []
    for t in field(obj, "tones", default=None) or ():
        err = t.get("error_db")
        ok = t.get("in_tolerance")
        rows.append(_row(f"tone {t['f_hz']:g} Hz", f"{fmt(t.get('measured_g'), '.3f')} of "
                         f"{fmt(t.get('target_g'), '.3f')} g peak  ({fmt_db(err)})",
                         "value" if ok or ok is None else "alarm"))
    lines = field(obj, "lines", "lines_not_caused_by_drive", default=None)
    if lines:
        rows.append(_row("lines not from the drive", ", ".join(
            f"{ln['f_hz']:.1f} Hz ({fmt(ln.get('rms_g'), '.3g')} g rms)" for ln in lines)
            + "  taken out of the control", "alarm"))
    k = field(obj, "kurtosis", "control_kurtosis", default=None)
    if isinstance(k, Mapping):
        measured = k.get("control", k.get("kurtosis"))
        se = k.get("std_error")
        text = f"{fmt(measured, '.2f')}"
        if se is not None:
            text += f" ± {fmt(se, '.2f')}"
        drive = k.get("drive", k.get("drive_kurtosis"))
        text += f" of {fmt(k.get('target'), '.2f')}  (drive {fmt(drive, '.2f')})"
        rows.append(_row("control kurtosis", text))
    rows.extend(input_rows(field(obj, "inputs", default=None)))
    return rows


def input_rows(inputs: Any) -> list[Row]:
    """Several inputs: each input's grms (a monitor with a limit: how close it is), the notches
    and the extremal-control bias (``inputs`` of a snapshot or a summary)."""
    if not isinstance(inputs, Mapping):
        return []
    rows = []
    for r in inputs.get("inputs", ()):
        text = f"{fmt(r.get('grms_g'), '.3f')} grms"
        role = "value"
        if r.get("limit_margin_db") is not None:
            m = r["limit_margin_db"]
            text += f"  limit {fmt_db(m)} at {fmt(r.get('limit_f_hz'), '.0f')} Hz"
            role = "alarm" if m > 0 else "value"
        rows.append(_row(f"{r.get('role', 'input')} {r.get('channel')} {r.get('name', '')}",
                         text, role))
    n = inputs.get("notched_lines")
    if n:
        lo, hi = inputs.get("notch_f_hz", (math.nan, math.nan))
        rows.append(_row("notched by limits", f"{n} lines {fmt(lo, '.0f')}-{fmt(hi, '.0f')} Hz,"
                         f" deepest {fmt_db(inputs.get('notch_deepest_db'), '+.1f')}"))
    bias = inputs.get("extremal_bias_db")
    if bias is not None:
        rows.append(_row(f"{inputs.get('strategy')} control bias",
                         f"reads up to {fmt_db(bias, '+.2f')} off at this DOF (order statistics)"))
    return rows


def compact_control_rows(snapshot: Any) -> list[Row]:
    """The control numbers of the compact view, one per row (label and value within 35
    characters for counts up to 4 digits)."""
    grms, _ = _grms_text(snapshot)
    dof = as_finite(field(snapshot, "dof")) or None  # 0 DOF: no estimate yet
    lo, hi = chi2_band_db(snapshot, dof)
    return [
        _row("grms", grms),
        _row("rms error", fmt_db(field(snapshot, "rms_error_db"))),
        _row("max/min dev", f"{fmt(field(snapshot, 'max_dev_db'), '+.1f')}/"
             f"{fmt_db(field(snapshot, 'min_dev_db'), '+.1f')}"),
        ("outside", _outside_pieces(snapshot)),
        _row("DOF", f"{fmt(dof, '.0f')}  χ² {fmt(lo, '+.1f')}/{fmt(hi, '+.1f')} dB"),
        _row("updates", fmt_value(field(snapshot, "updates", "n_updates"))),
    ]


def compact_drive_rows(snapshot: Any) -> list[Row]:
    """Drive (against its limit, coloured by :func:`limit_role`) and time numbers of the
    compact view, one per row (within 39 characters for runs under 100 h)."""
    rows = []
    for label, key, lim_keys in (
        ("drive rms", "drive_rms_fs", ("drive_rms_limit_fs", "drive_rms_max_fs")),
        ("drive peak", "drive_peak_fs", ("drive_peak_limit_fs", "drive_peak_max_fs")),
    ):
        value, limit = field(snapshot, key), field(snapshot, *lim_keys)
        rows.append(_row(label, f"{fmt(value, '.3f')}/{fmt(limit, '.3f')} FS",
                         limit_role(value, limit)))
    total = field(snapshot, "full_level_s")
    at = fmt_time(field(snapshot, "time_at_full_level_s"))
    rows += [
        _row("elapsed", fmt_time(field(snapshot, "elapsed_s", "t_s"))),
        _row("to full level", to_full_level_text(snapshot)),
        _row("at full level", at + (f" of {fmt_time(total)}"
                                    if as_finite(total) is not None else "")),
        _row("left at full level", fmt_time(field(snapshot, "remaining_s"))),
    ]
    return rows


def drive_rows(snapshot: Any) -> list[Row]:
    """Drive rms and peak against their limits (FS), gain, loop delay and a trip if any."""
    rows = []
    for label, key, lim_keys in (
        ("rms", "drive_rms_fs", ("drive_rms_limit_fs", "drive_rms_max_fs")),
        ("peak", "drive_peak_fs", ("drive_peak_limit_fs", "drive_peak_max_fs")),
    ):
        value, limit = field(snapshot, key), field(snapshot, *lim_keys)
        v, lim = as_finite(value), as_finite(limit)
        frac = f"  ({100 * v / lim:.0f} %)" if v is not None and lim else ""
        rows.append(_row(label, f"{fmt(value, '.3f')} of {fmt(limit, '.3f')} FS{frac}",
                         limit_role(value, limit)))
    gain = field(snapshot, "gain_db")
    if gain is not None:
        rows.append(_row("gain", fmt(gain, "+.1f", "dB")))
    delay = field(snapshot, "loop_delay_samples")
    if delay is not None:
        rows.append(_row("loop delay", f"{int(delay)} samples"))
    trip = field(snapshot, "trip")
    if trip:
        rule, message = field(trip, "rule"), field(trip, "message", default=trip)
        rows.append(_row("trip", f"{rule}: {message}" if rule else str(message), "abort"))
    return rows


def event_rows(events: Sequence[Any], n: int = 6) -> list[tuple[str, str, Piece]]:
    """The last ``n`` events as ``(time, kind, (message, role))``."""
    rows = []
    for ev in list(events)[-n:]:
        kind = str(field(ev, "kind", default=""))
        role = "abort" if kind in ("abort", "trip", "crash") else (
            "alarm" if kind == "alarm" else "value")
        rows.append((fmt(field(ev, "t_s"), ".1f", "s"), kind,
                     (str(field(ev, "message", default="")), role)))
    return rows


def verdict_rows(result: Mapping[str, Any]) -> list[Row]:
    """The verdict in words, its reasons and rule, and the full-level average's figures.

    Nothing for a result without a verdict (a record made before verdicts were recorded).
    """
    verdict = result.get("verdict")
    if not verdict:
        return []
    rows = [_row("verdict", str(verdict).upper(), _VERDICT_ROLE.get(str(verdict), "value"))]
    rows += [_row("  reason", str(r), _VERDICT_ROLE.get(str(verdict), "value"))
             for r in result.get("verdict_reasons") or ()]
    if result.get("verdict_rule"):
        rows.append(_row("  rule", str(result["verdict_rule"]), "dim"))
    dof = result.get("full_level_dof")
    if as_finite(dof) is not None:
        rows += [
            _row("full-level average", f"{fmt(dof, '.0f')} DOF, "
                 f"{fmt(result.get('full_level_control_grms_g'), '.3f', accel_label(result))}"),
            _row("  rms error", fmt_db(result.get("full_level_rms_error_db"))),
            _row("  line deviation max / min",
                 f"{fmt_db(result.get('full_level_max_dev_db'))} / "
                 f"{fmt_db(result.get('full_level_min_dev_db'))}"),
            _row("  lines outside alarm / abort",
                 f"{fmt_value(as_count(result.get('full_level_lines_outside_alarm')))} / "
                 f"{fmt_value(as_count(result.get('full_level_lines_outside_abort')))}"),
        ]
    frac = as_finite(result.get("alarm_fraction"))
    if frac is not None:
        lim = as_finite(result.get("max_alarm_fraction"))
        rows.append(_row("time in alarm", f"{100 * frac:.0f} % of the full-level time"
                         + (f" (at most {100 * lim:.0f} %)" if lim is not None else "")))
    return rows


def result_rows(result: Mapping[str, Any]) -> list[Row]:
    """Status, abort rule and reason, grms, final errors, DOF, time at level, then the rest."""
    status = str(result.get("status", "unknown"))
    rows = [_row("status", status, _STATUS_ROLE.get(status, "value"))]
    trip = result.get("trip")
    if isinstance(trip, Mapping) and trip.get("rule"):
        rows.append(_row("abort rule", str(trip["rule"]), "abort"))
    if result.get("abort_reason"):
        if status == "stopped":
            rows.append(_row("stop reason", str(result["abort_reason"]), "alarm"))
        else:
            rows.append(_row("abort reason", str(result["abort_reason"]), "abort"))
    rows += verdict_rows(result)
    rows += [
        _row("grms control / target", f"{fmt(result.get('control_grms_g'), '.3f')} / "
             f"{fmt(result.get('target_grms_g'), '.3f')} {accel_label(result)}"),
        _row("final rms error", fmt_db(result.get("final_rms_error_db"))),
        # the largest |deviation| of a line: a magnitude, shown without a sign
        _row("final worst line |deviation|", fmt(result.get("final_max_dev_db"), ".2f", "dB")),
        _row("lines outside alarm / abort",
             f"{fmt_value(as_count(result.get('final_lines_outside_alarm')))} / "
             f"{fmt_value(as_count(result.get('final_lines_outside_abort')))}"),
        _row("updates to tolerance", fmt_value(result.get("updates_to_tolerance"))),
        _row("DOF", fmt(result.get("dof"), ".0f")),
        _row("time at full level", fmt(result.get("time_at_full_level_s"), ".1f", "s")),
        *variant_rows(result),
    ]
    rows += [_row(label, text) for label, text in mapping_rows(result, skip=_RESULT_SHOWN)]
    return rows
