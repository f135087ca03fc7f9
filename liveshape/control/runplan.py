"""How long a run is expected to last, and checks that need that length (fault times).

Pure: no I/O. The length is a nominal estimate from the spec (see docs/methods.md, "Run length
and record size"): the silent look, the connection check and the identification, then for each
reduced-level step its ramp, two update estimates (one tolerance decision) and the hold, then
the time at full level and the end ramp. A run that takes longer than planned to settle at a
step lasts longer; the estimate is what the start-up message and the record-size estimate use,
and the bound within which an injected fault must fall.
"""

from __future__ import annotations

import math
from typing import Any

from liveshape.control.fastloop import fast_update_segments
from liveshape.control.stages import segments_for_dof, update_dof_for
from liveshape.errors import ConfigError

__all__ = ["DEFAULT_MAX_STEP_S", "START_S", "check_fault_times", "check_max_step",
           "least_step_s", "max_step_s", "nominal_run_s", "record_period_s", "update_period_s"]

#: Silent look at the start plus the connection check, s (about 0.5 s + 2.7 s; [from the
#: controller's defaults], a generous round figure).
START_S = 4.0
#: Length of the cosine fade at the end of a completed run, s (the controller's default).
END_RAMP_S = 1.0


def _estimate_s(dof: float, frame_length: int, fs_hz: float) -> float:
    """Signal time for a Hann, 50 %-overlap Welch estimate reaching ``dof``, s."""
    k = segments_for_dof(dof)
    return (k + 1) * 0.5 * frame_length / fs_hz


def _fast(spec: Any) -> bool:
    return getattr(spec.control, "loop", "block") == "fast"


def update_period_s(spec: Any) -> float:
    """Run time between two control updates of ``spec``, s (block loop: one update estimate;
    fast loop: ``control.update_interval_s`` in whole segments)."""
    c = spec.control
    n, fs = int(c.frame_length), float(c.fs_hz)
    if _fast(spec):
        hop = n // 2
        return fast_update_segments(float(c.update_interval_s), fs, hop) * hop / fs
    return _estimate_s(update_dof_for(float(c.target_dof)), n, fs)


def record_period_s(spec: Any) -> float:
    """Run time between two update records, s: the block loop records every update; the fast
    loop every safety block of update DOF."""
    c = spec.control
    if _fast(spec):
        n = int(c.frame_length)
        k = segments_for_dof(update_dof_for(float(c.target_dof)))
        return k * (n // 2) / float(c.fs_hz)
    return update_period_s(spec)


def nominal_run_s(spec: Any) -> float:
    """Nominal length of a run of ``spec``, s (start, steps, full level, end ramp).

    Parameters
    ----------
    spec : TestSpec
        Resolved test definition (``schedule``, ``control``).

    Returns
    -------
    float
        Seconds of run time. Block loop: the identification needs ``target_dof`` and each step
        one decision from two update estimates of
        :func:`~liveshape.control.stages.update_dof_for` DOF each. Fast loop: the
        identification needs the update DOF, the first step a decision window of ``target_dof``,
        each step its ramp, ``hold_s`` and one update period.
    """
    c, sch = spec.control, spec.schedule
    fs, n = float(c.fs_hz), int(c.frame_length)
    fast = _fast(spec)
    update_dof = update_dof_for(float(c.target_dof))
    identify_s = _estimate_s(update_dof if fast else float(c.target_dof), n, fs)
    if fast:
        first_s, decision_s = _estimate_s(float(c.target_dof), n, fs), update_period_s(spec)
    else:
        first_s, decision_s = 0.0, 2.0 * _estimate_s(update_dof, n, fs)
    total = START_S + identify_s + first_s
    level = float(sch.steps_db[0]) if sch.steps_db else 0.0
    rate = float(sch.rate_db_s)
    for step in sch.steps_db:
        total += abs(float(step) - level) / rate if rate > 0 else 0.0
        level = float(step)
        total += decision_s + (float(sch.hold_s) if float(step) < 0 else 0.0)
    return total + float(sch.full_level_s) + END_RAMP_S


#: Shortest automatic limit on the time at one reduced-level step, s.
DEFAULT_MAX_STEP_S = 60.0
#: The automatic limit is at least this many times the least time a step takes.
AUTO_STEP_FACTOR = 4.0
#: An explicit ``schedule.max_step_s`` must be at least this many times the least time a step
#: takes (a loop needs a few updates to settle at a new level [common practice margin]).
MIN_STEP_FACTOR = 1.5


def least_step_s(spec: Any) -> float:
    """The least run time a reduced-level step can last at ``spec``'s settings, s.

    The largest ramp between steps, one frame for the estimate to start after it, one tolerance
    decision (block loop: two update estimates; fast loop: the first step's decision window of
    ``target_dof``), then ``hold_s`` rounded up to whole update periods (a step up happens at a
    decision).
    """
    c, sch = spec.control, spec.schedule
    period = update_period_s(spec)
    decision_s = 2.0 * period
    if _fast(spec):
        decision_s = _estimate_s(float(c.target_dof), int(c.frame_length), float(c.fs_hz)) + period
    steps = [float(s) for s in sch.steps_db]
    rate = float(sch.rate_db_s)
    ramp = max((abs(b - a) / rate for a, b in zip(steps[:-1], steps[1:], strict=True)),
               default=0.0)
    hold = math.ceil(float(sch.hold_s) / period - 1e-9) * period
    return ramp + int(c.frame_length) / float(c.fs_hz) + decision_s + hold


def max_step_s(spec: Any) -> float:
    """The limit on the time at one reduced-level step, s: ``schedule.max_step_s`` when given,
    else the larger of :data:`DEFAULT_MAX_STEP_S` and :data:`AUTO_STEP_FACTOR` × the least time
    a step takes (:func:`least_step_s`)."""
    given = getattr(spec.schedule, "max_step_s", None)
    if given is not None:
        return float(given)
    return max(DEFAULT_MAX_STEP_S, AUTO_STEP_FACTOR * least_step_s(spec))


def check_max_step(spec: Any) -> None:
    """Refuse a ``schedule.max_step_s`` that no step could meet at these settings.

    Raises
    ------
    ConfigError
        One line naming the key, its value and the least time a step takes.
    """
    given = getattr(spec.schedule, "max_step_s", None)
    if given is None:
        return
    least = least_step_s(spec)
    if float(given) < MIN_STEP_FACTOR * least:
        raise ConfigError(
            f"{spec.source or spec.name}: schedule.max_step_s = {float(given):g} s is shorter "
            f"than {MIN_STEP_FACTOR:g} × the least time a step takes at these settings "
            f"({least:.1f} s: ramp, a tolerance decision, hold_s rounded up to updates of "
            f"{update_period_s(spec):.2f} s); give at least {MIN_STEP_FACTOR * least:.0f} s")


def check_fault_times(faults: Any, run_s: float, what: str = "the run") -> None:
    """Refuse an injected fault that starts at or after ``run_s`` (it would never happen).

    Raises
    ------
    ConfigError
        One line naming the fault, its time and the length of the run.
    """
    for f in faults or ():
        if float(f.at_s) >= run_s:
            raise ConfigError(
                f"fault {f.kind}@{float(f.at_s):g} starts after the end of {what} "
                f"(about {run_s:.0f} s); fault times must fall within it"
            )
