"""How long a run is expected to last, and checks that need that length (fault times).

Pure: no I/O. The length is a nominal estimate from the spec (see docs/methods.md, "Run length
and record size"): the silent look, the connection check and the identification, then for each
reduced-level step its ramp, two update estimates (one tolerance decision) and the hold, then
the time at full level and the end ramp. A run that takes longer than planned to settle at a
step lasts longer; the estimate is what the start-up message and the record-size estimate use,
and the bound within which an injected fault must fall.
"""

from __future__ import annotations

from typing import Any

from liveshape.control.stages import segments_for_dof, update_dof_for
from liveshape.errors import ConfigError

__all__ = ["START_S", "check_fault_times", "nominal_run_s", "update_period_s"]

#: Silent look at the start plus the connection check, s (about 0.5 s + 2.7 s; [from the
#: controller's defaults], a generous round figure).
START_S = 4.0
#: Length of the cosine fade at the end of a completed run, s (the controller's default).
END_RAMP_S = 1.0


def _estimate_s(dof: float, frame_length: int, fs_hz: float) -> float:
    """Signal time for a Hann, 50 %-overlap Welch estimate reaching ``dof``, s."""
    k = segments_for_dof(dof)
    return (k + 1) * 0.5 * frame_length / fs_hz


def update_period_s(spec: Any) -> float:
    """Run time between two control updates of ``spec``, s (one update estimate)."""
    c = spec.control
    return _estimate_s(update_dof_for(float(c.target_dof)), int(c.frame_length), float(c.fs_hz))


def nominal_run_s(spec: Any) -> float:
    """Nominal length of a run of ``spec``, s (start, steps, full level, end ramp).

    Parameters
    ----------
    spec : TestSpec
        Resolved test definition (``schedule``, ``control``).

    Returns
    -------
    float
        Seconds of run time; the identification needs ``target_dof`` and each step one decision
        from two update estimates of :func:`~liveshape.control.stages.update_dof_for` DOF each.
    """
    c, sch = spec.control, spec.schedule
    fs, n = float(c.fs_hz), int(c.frame_length)
    identify_s = _estimate_s(float(c.target_dof), n, fs)
    decision_s = 2.0 * _estimate_s(update_dof_for(float(c.target_dof)), n, fs)
    total = START_S + identify_s
    level = float(sch.steps_db[0]) if sch.steps_db else 0.0
    rate = float(sch.rate_db_s)
    for step in sch.steps_db:
        total += abs(float(step) - level) / rate if rate > 0 else 0.0
        level = float(step)
        total += decision_s + (float(sch.hold_s) if float(step) < 0 else 0.0)
    return total + float(sch.full_level_s) + END_RAMP_S


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
