"""The level schedule of a test: reduced-level steps, holds, and time counted at full level.

Pure. :class:`LevelSchedule` steps the test level through ``schedule.steps_db`` (e.g. −12, −9,
−6, −3, 0 dB). It steps up only after the control has been inside tolerance continuously for
``hold_s``; time at full level is counted only at 0 dB with the gain settled there (time at
reduced level does not count toward the test duration; common practice). A step below full level
that lasts longer than ``max_step_s`` is :meth:`~LevelSchedule.overdue`: the controller then
ends the run (rule ``level_unreachable``) instead of waiting for ever. Re-exported by
:mod:`liveshape.control.safety`.
"""

from __future__ import annotations

import math
from typing import Any


class LevelSchedule:
    """The reduced-level steps of a test and the time counted at full level.

    Parameters
    ----------
    schedule : spec.Schedule
        ``steps_db`` (increasing, last 0), ``hold_s``, ``full_level_s``, ``rate_db_s`` and
        ``max_step_s`` (None or absent: no limit).
    max_step_s : float, optional
        The limit to use instead of ``schedule.max_step_s`` (the controller passes the
        automatic one of :func:`liveshape.control.runplan.max_step_s`).

    Notes
    -----
    The controller calls :meth:`observe` after each tolerance decision, :meth:`step_up` when it
    starts the ramp to the next step (with the ramp duration ``|Δ dB| / rate_db_s``), and
    :meth:`count_full_level` for every block played with the gain settled at the step's level.
    """

    def __init__(self, schedule: Any, *, max_step_s: float | None = None) -> None:
        steps = tuple(float(s) for s in schedule.steps_db)
        rising = all(b > a for a, b in zip(steps[:-1], steps[1:], strict=True))
        if not steps or steps[-1] != 0.0 or not rising:
            raise ValueError(f"steps_db must increase to 0, got {steps}")
        self.steps_db = steps
        self.hold_s = float(schedule.hold_s)
        self.full_level_s = float(schedule.full_level_s)
        self.rate_db_s = float(schedule.rate_db_s)
        given = getattr(schedule, "max_step_s", None) if max_step_s is None else max_step_s
        self.max_step_s = math.inf if given is None else float(given)
        self._step_started_s: float | None = None
        self._index = 0
        self._since_s: float | None = None
        self._full_s = 0.0

    @property
    def index(self) -> int:
        """Index of the current step in ``steps_db``."""
        return self._index

    @property
    def level_db(self) -> float:
        """Level of the current step, dB re full level."""
        return self.steps_db[self._index]

    @property
    def at_last_step(self) -> bool:
        return self._index == len(self.steps_db) - 1

    @property
    def in_tolerance_since_s(self) -> float | None:
        return self._since_s

    @property
    def time_at_full_level_s(self) -> float:
        return self._full_s

    @property
    def remaining_s(self) -> float:
        """Full-level time still to run, s."""
        return max(0.0, self.full_level_s - self._full_s)

    @property
    def complete(self) -> bool:
        return self._full_s >= self.full_level_s

    def observe(self, t_s: float, in_tolerance: bool) -> bool:
        """Record one tolerance decision at run time ``t_s``; True when a step up is due.

        A step up is due when every decision since ``t_s - hold_s`` or earlier was in
        tolerance (the first in-tolerance decision starts the hold clock; any decision out of
        tolerance stops it) and the current step is not the last.
        """
        if not in_tolerance:
            self._since_s = None
            return False
        if self._since_s is None:
            self._since_s = float(t_s)
        return (not self.at_last_step) and (t_s - self._since_s >= self.hold_s)

    def start_step(self, t_s: float) -> None:
        """The current step's level starts playing at run time ``t_s`` (its clock starts)."""
        self._step_started_s = float(t_s)

    def time_at_step_s(self, t_s: float) -> float:
        """Run time spent at the current step so far, s (0 before :meth:`start_step`)."""
        return 0.0 if self._step_started_s is None else max(0.0, t_s - self._step_started_s)

    def overdue(self, t_s: float) -> bool:
        """True when a step below full level has lasted longer than ``max_step_s``."""
        return (not self.at_last_step) and self.time_at_step_s(t_s) > self.max_step_s

    def step_up(self) -> tuple[float, float]:
        """Move to the next step; return ``(new level_db, ramp duration_s)``."""
        if self.at_last_step:
            raise RuntimeError("already at full level")
        old = self.level_db
        self._index += 1
        self._since_s = None
        return self.level_db, self.ramp_duration_s(old, self.level_db)

    def ramp_duration_s(self, from_db: float, to_db: float) -> float:
        """Duration of a dB-linear ramp at ``rate_db_s``, s."""
        return abs(to_db - from_db) / self.rate_db_s

    def count_full_level(self, duration_s: float, *, settled: bool) -> float:
        """Add ``duration_s`` of drive played at the current step; counted only at 0 dB.

        Returns the time actually counted, s.
        """
        if not (self.at_last_step and settled) or duration_s <= 0:
            return 0.0
        self._full_s += float(duration_s)
        return float(duration_s)
