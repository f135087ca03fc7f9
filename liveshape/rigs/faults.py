"""Faults injected into the simulated rig: their kinds, validation and the state they set.

Pure (the standard library). A fault is any object with ``kind, at_s, value, duration_s`` (as
:class:`liveshape.testdef.spec.FaultSpec`). :func:`schedule_faults` checks them against the plant
and the sample rate and turns each into a :class:`ScheduledFault` that acts from sample
``round(at_s fs)`` for ``round(duration_s fs)`` samples (None: to the end; ``amp_trip`` always to
the end). :func:`fault_state` says what the faults in effect at one sample do; the rig
(:class:`liveshape.rigs.sim.SimRig`) keeps that state constant between the :func:`fault_bounds`.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

from liveshape.errors import ConfigError

if TYPE_CHECKING:
    from liveshape.rigs.plant import Plant

#: What each fault kind does (value meaning in brackets).
FAULT_RULES: dict[str, str] = {
    "sensor_detached": "the response is sensor and card noise only",
    "sensor_gain": "the sensor chain's output (signal and sensor noise) is multiplied by value "
                   "(a factor >= 0)",
    "amp_trip": "the amplifier trips: 0 V output from at_s on (duration ignored)",
    "resonance_shift": "every payload resonance frequency is multiplied by value (> 0)",
    "plant_gain": "the amplifier gain changes by value dB",
    "noise_burst": "white noise of value FS rms is added to the response",
    "dropout": "the response is zeros",
    "dac_gain": "the card's output gain changes by value dB (the drive to the amplifier and its "
                "loopback alike): a step, or with duration_s a drift that reaches value dB over "
                "duration_s and stays",
}
#: Kinds that act on the whole rig; the others act on one input (``input``: a channel counted
#: from 1; None: the control input).
RIG_WIDE_KINDS = ("amp_trip", "resonance_shift", "plant_gain", "dac_gain")
FAULT_KINDS = tuple(FAULT_RULES)
# Kinds that need a value, with its lower bound (None: checked by kind).
_NEEDS_VALUE = {"sensor_gain": 0.0, "resonance_shift": None, "plant_gain": None, "noise_burst": 0.0,
                "dac_gain": None}


@dataclass(frozen=True)
class ScheduledFault:
    """A checked fault on the rig's sample clock: active for ``start <= n < end``."""

    kind: str
    start: int
    end: float  # sample index (math.inf: to the end)
    value: float
    input: int | None = None  # the input channel it acts on (None: the control input)


@dataclass(frozen=True)
class FaultState:
    """What the faults in effect at one sample do (the neutral state when none is).

    ``sensor_gain`` and ``plant_gain`` are linear factors, ``f_factor`` multiplies every modal
    frequency, ``burst_var`` is the added noise variance in FS²; ``detached``, ``dropout`` and
    ``trip`` are the on/off faults.
    """

    sensor_gain: float = 1.0
    plant_gain: float = 1.0
    f_factor: float = 1.0
    burst_var: float = 0.0
    detached: bool = False
    dropout: bool = False
    trip: bool = False


_NO_FAULT = FaultState()


def _check_fault(i: int, f: Any, plant: Plant, fs: float) -> ScheduledFault:
    kind = getattr(f, "kind", None)
    at_s = getattr(f, "at_s", None)
    label = f"faults[{i}] {kind}@{at_s}"
    if kind not in FAULT_RULES:
        raise ConfigError(f"faults[{i}].kind = {kind!r} is not one of {', '.join(FAULT_KINDS)}")
    if isinstance(at_s, bool) or not isinstance(at_s, (int, float)) or not at_s >= 0:
        raise ConfigError(f"faults[{i}].at_s = {at_s!r} must be a number >= 0")
    value, dur = getattr(f, "value", None), getattr(f, "duration_s", None)
    if kind in _NEEDS_VALUE:
        if value is None or not math.isfinite(value):
            raise ConfigError(f"{label}: value is required ({FAULT_RULES[kind]})")
        lo = _NEEDS_VALUE[kind]
        if (lo is not None and value < lo) or (kind == "resonance_shift" and not value > 0):
            raise ConfigError(f"{label}: value = {value!r} out of range ({FAULT_RULES[kind]})")
    if kind == "resonance_shift":
        if not plant.payload.resonances:
            raise ConfigError(f"{label}: plant {plant.name!r} has no payload resonances")
        top = max(r.f_hz for r in (*plant.payload.resonances,
                                    *plant.payload.fixture_points)) * value
        if top >= 0.45 * fs:
            raise ConfigError(f"{label}: shifted resonance {top:g} Hz is above 0.45 fs")
    if dur is not None and not (math.isfinite(dur) and dur > 0):
        raise ConfigError(f"{label}: duration_s = {dur!r} must be > 0")
    channel = getattr(f, "input", None)
    if channel is not None:
        if isinstance(channel, bool) or not isinstance(channel, int) or channel < 1:
            raise ConfigError(f"{label}: input = {channel!r} must be an input channel >= 1")
        if kind in RIG_WIDE_KINDS:
            raise ConfigError(f"{label}: input = {channel} is given, but {kind} acts on the "
                              "whole rig (give no input)")
    start = int(round(at_s * fs))
    end = math.inf if dur is None or kind == "amp_trip" else start + int(round(dur * fs))
    return ScheduledFault(kind, start, end, 1.0 if value is None else float(value), channel)


def schedule_faults(faults: Iterable[Any], plant: Plant, fs_hz: float
                    ) -> tuple[ScheduledFault, ...]:
    """Check faults (objects with ``kind, at_s, value, duration_s``) and put them on the clock.

    Raises
    ------
    ConfigError
        One line naming the fault (``faults[i]``), the bad field and the rule of its kind.
    """
    return tuple(_check_fault(i, f, plant, float(fs_hz)) for i, f in enumerate(faults))


def fault_bounds(faults: Sequence[ScheduledFault]) -> tuple[int, ...]:
    """Sorted sample indices where some fault starts or ends (the fault state may change)."""
    return tuple(sorted({f.start for f in faults}
                        | {int(f.end) for f in faults if f.end != math.inf}))


def active_faults(faults: Sequence[ScheduledFault], n: int) -> list[ScheduledFault]:
    """The faults in effect at sample ``n``."""
    return [f for f in faults if f.start <= n < f.end]


def fault_state(faults: Sequence[ScheduledFault], n: int,
                inputs: tuple[int | None, ...] = (None,)) -> FaultState:
    """The combined effect of the faults in effect at sample ``n`` (gains multiply, noise
    variances add) whose ``input`` is one of ``inputs`` (default: the rig-wide faults and those
    on the control input)."""
    active = [f for f in active_faults(faults, n) if f.input in inputs]
    if not active:
        return _NO_FAULT
    sensor_gain = plant_gain = f_factor = 1.0
    burst_var = 0.0
    kinds = set()
    for f in active:
        kinds.add(f.kind)
        if f.kind == "sensor_gain":
            sensor_gain *= f.value
        elif f.kind == "plant_gain":
            plant_gain *= 10.0 ** (f.value / 20.0)
        elif f.kind == "resonance_shift":
            f_factor *= f.value
        elif f.kind == "noise_burst":
            burst_var += f.value**2
    return FaultState(sensor_gain, plant_gain, f_factor, burst_var,
                      detached="sensor_detached" in kinds, dropout="dropout" in kinds,
                      trip="amp_trip" in kinds)
