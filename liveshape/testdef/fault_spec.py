"""Faults as a test definition gives them: the kinds, the FaultSpec record and its two readers.

Pure. A fault is given in a test definition as a mapping ``{kind, at_s, value, duration_s}``
(:func:`fault_from_mapping`, with an optional ``input`` channel) or on the command line as
``KIND[:INPUT]@SECONDS[=VALUE][/DURATION]``
(:func:`parse_fault`); both give a frozen :class:`FaultSpec`. What a fault does to the
simulated rig is :mod:`liveshape.rigs.faults`.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from typing import Any

from liveshape.schema import Where, as_choice, as_float, as_int, check_keys
from liveshape.testdef.overrides import COMMAND_LINE, did_you_mean

__all__ = ["FAULT_KINDS", "FaultSpec", "fault_from_mapping", "parse_fault"]

FAULT_KINDS = (
    "sensor_detached",
    "sensor_gain",
    "amp_trip",
    "resonance_shift",
    "plant_gain",
    "noise_burst",
    "dropout",
    "dac_gain",
)


@dataclass(frozen=True)
class FaultSpec:
    """A fault injected into the simulated rig at ``at_s`` seconds of run time.

    ``input`` is the input channel (counted from 1) a sensor-side fault acts on; None: the
    control input (rig-wide kinds take none).
    """

    kind: str
    at_s: float
    value: float | None = None
    duration_s: float | None = None
    input: int | None = None


def _opt_float(value: Any, w: Where, **bounds: float) -> float | None:
    return None if value is None else as_float(value, w, **bounds)


def fault_from_mapping(item: Any, w: Where) -> FaultSpec:
    """Read one fault: ``{kind, at_s, value, duration_s}``, the text form, or a FaultSpec."""
    keys = ("kind", "at_s", "value", "duration_s", "input")
    if isinstance(item, FaultSpec):
        item = {k: getattr(item, k) for k in keys}
    if isinstance(item, str):
        return parse_fault(item, where=w)
    d = check_keys(item, keys, w, required=("kind", "at_s"))
    channel = d.get("input")
    return FaultSpec(
        kind=as_choice(d["kind"], w.key("kind"), FAULT_KINDS),
        at_s=as_float(d["at_s"], w.key("at_s"), ge=0),
        value=_opt_float(d.get("value"), w.key("value")),
        duration_s=_opt_float(d.get("duration_s"), w.key("duration_s"), gt=0),
        input=None if channel is None else as_int(channel, w.key("input"), ge=1),
    )


_FAULT_RE = re.compile(r"^\s*([A-Za-z_]+)\s*(?::\s*(\S+?)\s*)?"
                       r"@\s*([^=/]+?)\s*(?:=\s*([^/]+?)\s*)?(?:/\s*(.+?))?\s*$")


def parse_fault(text: str, *, where: Where | None = None) -> FaultSpec:
    """Parse the command-line form ``KIND[:INPUT]@SECONDS[=VALUE][/DURATION]``.

    Examples: ``sensor_gain@12=0.5``, ``noise_burst@20=0.1/0.5``, ``sensor_detached@30``,
    ``sensor_detached:2@30`` (on input channel 2).
    """
    w = where if where is not None else Where(COMMAND_LINE, "fault")
    m = _FAULT_RE.match(text) if isinstance(text, str) else None
    if m is None:
        raise w.fail(text, "is not KIND[:INPUT]@SECONDS[=VALUE][/DURATION] (e.g. "
                     "sensor_gain@12=0.5)")
    kind, channel, at, value, duration = m.groups()
    if kind not in FAULT_KINDS:
        hint = did_you_mean(kind, FAULT_KINDS)
        raise w.fail(text, f"names no known fault (valid: {', '.join(FAULT_KINDS)}){hint}")

    def num(s: str | None, what: str, low: float | None = None, strict: bool = False):
        if s is None:
            return None
        try:
            x = float(s)
        except ValueError:
            raise w.fail(text, f"has {what} {s!r}, which is not a number") from None
        if not math.isfinite(x):
            raise w.fail(text, f"has {what} {s!r}, which is not a finite number")
        if low is not None and (x <= low if strict else x < low):
            rel = ">" if strict else ">="
            raise w.fail(text, f"has {what} {s!r}, which must be {rel} {low:g}")
        return x

    if channel is not None and not (channel.isdigit() and int(channel) >= 1):
        raise w.fail(text, f"has input {channel!r}, which must be an input channel >= 1")
    return FaultSpec(
        kind, num(at, "seconds", 0.0), num(value, "value"), num(duration, "duration", 0.0, True),
        None if channel is None else int(channel),
    )
