"""What ``liveshape survey`` prints, as lines of plain text (pure Python, no :mod:`rich`)."""

from __future__ import annotations

import math
from collections.abc import Iterable
from typing import Any

__all__ = ["compare_lines", "survey_lines"]


def _q(q: float) -> str:
    return "-" if not math.isfinite(q) else f"{q:.1f}"


def survey_lines(result: Any, folder: Any, settings: Any) -> list[str]:
    """Header, one row per resonance, and where the record is."""
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


def compare_lines(changes: Iterable[Any], before: Any, after: Any) -> list[str]:
    """One row per feature of the first survey with its partner in the second, flags last."""
    rows = [f"before: {before}", f"after:  {after}",
            f"{'kind':<5} {'f before Hz':>11} {'f after Hz':>10} {'shift %':>8} {'z':>5} "
            f"{'Δ|H| dB':>8}  flag"]
    n = 0
    for c in changes:
        if c.after is None:
            rows.append(f"{c.before.kind:<5} {c.before.f_hz:>11.2f} {'-':>10} {'-':>8} "
                        f"{'-':>5} {'-':>8}  FLAG: {'; '.join(c.flagged)}")
            n += 1
            continue
        flag = ("FLAG: " + "; ".join(c.flagged)) if c.flagged else "ok"
        n += bool(c.flagged)
        rows.append(f"{c.before.kind:<5} {c.before.f_hz:>11.2f} {c.after.f_hz:>10.2f} "
                    f"{c.shift_pct:>+8.2f} {c.z_f:>5.1f} {c.level_change_db:>+8.2f}  {flag}")
    rows.append(f"{n} change(s) flagged")
    return rows
