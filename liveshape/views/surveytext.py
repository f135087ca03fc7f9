"""What ``liveshape survey`` prints, as lines of plain text (pure Python, no :mod:`rich`)."""

from __future__ import annotations

import math
from collections.abc import Iterable
from typing import Any

__all__ = ["compare_input_lines", "compare_lines", "survey_lines"]


def _q(q: float) -> str:
    return "-" if not math.isfinite(q) else f"{q:.1f}"


def _res_row(r: Any, name: str | None = None) -> str:
    head = "" if name is None else f"{name:<14} "
    return (f"{head}{r.kind:<5} {r.f_hz:>10.2f} {r.f_sigma_hz:>7.2f} {r.level_db:>8.2f} "
            f"{r.level_sigma_db:>7.2f} {_q(r.q):>6}")


def _input_lines(result: Any) -> list[str]:
    """Several inputs: one row per resonance of every input's FRF from the drive and of every
    transmissibility peak, the input named on each row; the reference's output gain."""
    rows = [f"{'input':<14} {'kind':<5} {'f Hz':>10} {'±1σ Hz':>7} {'|H| dB':>8} "
            f"{'±1σ dB':>7} {'Q':>6}"]
    for r in result.inputs:
        if r.role == "reference":
            mag = [abs(h) for h in r.h1]
            mag.sort()
            med = mag[len(mag) // 2] if mag else 0.0
            gain = f"{20 * math.log10(med):+.2f} dB" if med > 0 else "-"
            rows.append(f"{r.name:<14} reference: output gain (drive as it left the card over "
                        f"the digital drive) median {gain}")
            continue
        rows += [_res_row(x, r.name) for x in r.resonances]
        rows += [_res_row(x, f"{r.name}/T") for x in r.trans_resonances]
        if not r.resonances and not r.trans_resonances:
            rows.append(f"{r.name:<14} (no resonance found on lines with coherence >= 0.8)")
    rows.append("(NAME/T: transmissibility over the first control input, |T| in dB re g/g)")
    return rows


def survey_lines(result: Any, folder: Any, settings: Any) -> list[str]:
    """Header, one row per resonance, and where the record is (several inputs: a row per
    resonance of each input, named)."""
    if getattr(result, "inputs", ()):
        first = next(r.name for r in result.inputs if r.role == "control")
        lines = [
            f"survey {result.status}: {settings.level_fs:g} FS rms flat random, "
            f"{settings.band_hz[0]:g}-{settings.band_hz[1]:g} Hz, {settings.duration_s:g} s, "
            f"{result.dof:.0f} DOF, lines {settings.fs_hz / settings.frame_length:.3g} Hz apart",
            f"loop delay {result.delay_samples} samples; {len(result.inputs)} inputs; "
            f"{first} (first control) {result.response_rms_fs:.4g} FS rms",
            *_input_lines(result), f"record: {folder}"]
        return lines
    lines = [
        f"survey {result.status}: {settings.level_fs:g} FS rms flat random, "
        f"{settings.band_hz[0]:g}-{settings.band_hz[1]:g} Hz, {settings.duration_s:g} s, "
        f"{result.dof:.0f} DOF, lines {settings.fs_hz / settings.frame_length:.3g} Hz apart",
        f"loop delay {result.delay_samples} samples; response {result.response_rms_fs:.4g} FS rms",
        f"{'kind':<5} {'f Hz':>10} {'±1σ Hz':>7} {'|H| dB':>8} {'±1σ dB':>7} {'Q':>6}",
    ]
    for r in result.resonances:
        lines.append(f"{r.kind:<5} {r.f_hz:>10.2f} {r.f_sigma_hz:>7.2f} {r.level_db:>8.2f} "
                     f"{r.level_sigma_db:>7.2f} {_q(r.q):>6}")
    if not result.resonances:
        lines.append("(no resonance found on lines with coherence >= 0.8)")
    lines.append(f"record: {folder}")
    return lines


def compare_input_lines(groups: Iterable[tuple[str | None, Any]], before: Any,
                        after: Any) -> list[str]:
    """The compare of two surveys input by input: each row names its input (``NAME/T``: the
    transmissibility over the first control input); one group labelled None is exactly
    :func:`compare_lines`."""
    groups = list(groups)
    if len(groups) == 1 and groups[0][0] is None:
        return compare_lines(groups[0][1], before, after)
    rows = [f"before: {before}", f"after:  {after}",
            f"{'input':<14} {'kind':<5} {'f before Hz':>11} {'f after Hz':>10} {'shift %':>8} "
            f"{'z':>5} {'Δ|H| dB':>8}  flag"]
    n = 0
    for name, changes in groups:
        for c in changes:
            rows.append(f"{name:<14} " + _change_row(c))
            n += bool(c.flagged) or c.after is None
    rows.append(f"{n} change(s) flagged")
    return rows


def _change_row(c: Any) -> str:
    """One feature of the first survey against its partner in the second (flags last)."""
    head = f"{c.before.kind:<5} {c.before.f_hz:>11.2f} "
    if c.after is None:
        return f"{head}{'-':>10} {'-':>8} {'-':>5} {'-':>8}  FLAG: {'; '.join(c.flagged)}"
    flag = ("FLAG: " + "; ".join(c.flagged)) if c.flagged else "ok"
    return (f"{head}{c.after.f_hz:>10.2f} {c.shift_pct:>+8.2f} {c.z_f:>5.1f} "
            f"{c.level_change_db:>+8.2f}  {flag}")


def compare_lines(changes: Iterable[Any], before: Any, after: Any) -> list[str]:
    """One row per feature of the first survey with its partner in the second, flags last."""
    rows = [f"before: {before}", f"after:  {after}",
            f"{'kind':<5} {'f before Hz':>11} {'f after Hz':>10} {'shift %':>8} {'z':>5} "
            f"{'Δ|H| dB':>8}  flag"]
    n = 0
    for c in changes:
        rows.append(_change_row(c))
        n += bool(c.flagged) or c.after is None
    rows.append(f"{n} change(s) flagged")
    return rows
