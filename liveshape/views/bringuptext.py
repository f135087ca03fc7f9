"""The bring-up hold as lines of text: the instruction, the live meter and its verdict.

Pure Python, no :mod:`rich`. The reading is a
:class:`liveshape.control.bringup.MeterReading` (or None before the first one); the dashboard
(:mod:`liveshape.views.dashboard`) shows these lines in a panel, ``run --json`` writes them to
stderr.
"""

from __future__ import annotations

import math
from typing import Any

from liveshape.testdef.chain import G_UNIT, AccelUnit

__all__ = ["INSTRUCTION", "bring_up_lines", "last_refusal", "meter_line", "state_line"]

#: What the user is asked to do while the drive is held (``{level}``: FS rms).
INSTRUCTION = (
    "Bring-up: the drive is held at the connection level, {level:g} FS rms; nothing louder "
    "plays until you confirm.",
    "Raise the amplifier gain slowly until the meter says 'usable'. "
    "Press Enter to go on, Ctrl-C to stop.",
)


def _num(value: float, spec: str) -> str:
    return format(value, spec) if math.isfinite(value) else ("inf" if value > 0 else "-inf")


def meter_line(r: Any, units: AccelUnit = G_UNIT) -> str:
    """The meter's figures on one line."""
    drive = f"drive {r.drive_rms_fs:.4f} FS rms"
    if r.drive_rms_v is not None:
        drive += f" = {r.drive_rms_v:.3g} V rms"
    return (f"response {r.response_rms_fs:.3g} FS rms = {r.response_rms_g * units.per_g:.3g} "
            f"{units.rms} | SNR {_num(r.snr_db, '.1f')} dB | coherence {r.coherence:.2f} | "
            f"input headroom {_num(r.headroom_db, '.1f')} dB | {drive}")


def state_line(r: Any, refused: str | None = None) -> str:
    """``usable: press Enter to go on``, ``not usable yet: ...`` or ``measuring ...``."""
    if r is None:
        return "measuring: the first reading needs about 2 s of the held drive"
    head = "usable: press Enter to go on" if r.usable else f"not usable yet: {r.reason}"
    if refused and not r.usable:
        head += f" ({refused})"
    return head


def bring_up_lines(reading: Any, level_fs: float, units: AccelUnit = G_UNIT,
                   refused: str | None = None) -> list[str]:
    """The instruction, the meter and its verdict, one string per line."""
    lines = [INSTRUCTION[0].format(level=level_fs), INSTRUCTION[1]]
    if reading is not None:
        lines.append(meter_line(reading, units))
    lines.append(state_line(reading, refused))
    return lines


def last_refusal(events: Any) -> str | None:
    """The message of the newest event when it is a refused Enter (else None)."""
    events = tuple(events or ())
    if events and getattr(events[-1], "kind", None) == "bring_up_refused":
        return str(events[-1].message)
    return None
