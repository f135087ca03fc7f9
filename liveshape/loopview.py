"""What the control loop shows: its events, update records, the snapshot and the result.

Pure. :class:`EventLog` keeps the events; the functions turn the controller's state
(:mod:`liveshape.controller`) into the frozen records of :mod:`liveshape.runstate` that the
shell renders and records, and word the events of an update and of the identification. They
decide nothing: every number comes from the loop.
"""

from __future__ import annotations

import math
from collections import deque
from typing import Any

import numpy as np

from liveshape.drivestream import DriveStream
from liveshape.runstate import ControlSnapshot, Event, RunResult, UpdateRecord, frozen_array
from liveshape.safety import LevelSchedule, Trip
from liveshape.spectra import chi2_interval_db
from liveshape.stages import Judgement, judge

_DB = 10.0 / math.log(10.0)


class EventLog:
    """The run's events: every one, those not yet drained, and the latest few for the view."""

    def __init__(self, recent: int = 12) -> None:
        self._all: list[Event] = []
        self._new: list[Event] = []
        self.recent: deque[Event] = deque(maxlen=recent)

    def add(self, t_s: float, kind: str, message: str, data: dict[str, Any]) -> None:
        ev = Event(t_s, kind, message, dict(data))
        self._new.append(ev)
        self._all.append(ev)
        self.recent.append(ev)

    def drain(self) -> list[Event]:
        """Events since the last call, oldest first."""
        out, self._new = self._new, []
        return out

    @property
    def all(self) -> tuple[Event, ...]:
        """Every event so far, oldest first."""
        return tuple(self._all)


def update_record(*, index: int, t_s: float, stage: str, level_db: float, dof: float,
                  f_hz: np.ndarray, control_psd: np.ndarray, target_psd: np.ndarray,
                  drive_psd: np.ndarray, new_drive_psd: np.ndarray, h1: np.ndarray,
                  coherence: np.ndarray, rms_error_db: float, drive_update: Any,
                  applied: bool) -> UpdateRecord:
    """The frozen record of one equalizer update (band lines; PSDs in g²/Hz and FS²/Hz).

    ``drive_update`` is the equalizer's :class:`~liveshape.equalizer.DriveResult`, or None when
    a trip stopped the update before the law acted (no line limited, ceiling scale 1).
    """
    with np.errstate(divide="ignore"):
        dev = _DB * np.log(np.maximum(control_psd, 1e-300) / target_psd)
    res = drive_update
    return UpdateRecord(
        index=index, t_s=t_s, stage=stage, level_db=level_db, dof=dof, f_hz=f_hz,
        control_psd=frozen_array(control_psd), target_psd=frozen_array(target_psd),
        drive_psd=frozen_array(drive_psd), new_drive_psd=frozen_array(new_drive_psd),
        h1=frozen_array(h1, complex), coherence=frozen_array(coherence),
        rms_error_db=float(rms_error_db), max_dev_db=float(dev.max()),
        min_dev_db=float(dev.min()), applied=applied,
        lines_step_limited=0 if res is None else res.n_step_limited,
        lines_held=0 if res is None else res.n_held,
        ceiling_scale=1.0 if res is None else res.ceiling_scale)


def update_event(rec: UpdateRecord, *, in_tolerance: bool | None,
                 drive_rms_fs: float) -> tuple[str, dict[str, Any]]:
    """Message and data of the ``update`` event for ``rec``."""
    return (f"update {rec.index}: rms {rec.rms_error_db:+.2f} dB, lines "
            f"{rec.min_dev_db:+.1f}..{rec.max_dev_db:+.1f} dB",
            {"update": rec.index, "rms_error_db": rec.rms_error_db,
             "max_dev_db": rec.max_dev_db, "min_dev_db": rec.min_dev_db,
             "dof": rec.dof, "applied": rec.applied, "level_db": rec.level_db,
             "lines_step_limited": rec.lines_step_limited,
             "ceiling_scale": rec.ceiling_scale, "in_tolerance": in_tolerance,
             "drive_rms_fs": drive_rms_fs})


def identify_event(coherence: np.ndarray, n_frozen: int, drive_update: Any,
                   dof: float) -> tuple[str, dict[str, Any]]:
    """Message and data of the ``identify`` event (``coherence`` on the band lines)."""
    res = drive_update
    return (f"identified: mean coherence {float(np.mean(coherence)):.3f}, "
            f"{n_frozen} lines frozen, {res.n_step_limited} boost-limited",
            {"mean_coherence": float(np.mean(coherence)),
             "min_coherence": float(coherence.min()), "lines_frozen": n_frozen,
             "lines_boost_limited": res.n_step_limited, "dof": dof,
             "ceiling_scale": res.ceiling_scale})


def judge_update(u: UpdateRecord, *, alarm_db: np.ndarray, abort_db: np.ndarray,
                 rms_alarm_db: float, df_hz: float) -> Judgement:
    """The latest update estimate judged like a decision (shown until a decision is made)."""
    return judge(u.control_psd, u.target_psd, alarm_db=alarm_db, abort_db=abort_db,
                 rms_alarm_db=rms_alarm_db, dof=u.dof, df_hz=df_hz)


def control_snapshot(*, t_s: float, stage: str, status: str, schedule: LevelSchedule,
                     judgement: Judgement | None, target_psd: np.ndarray, drive: DriveStream,
                     band: np.ndarray, f_hz: np.ndarray, alarm_db: np.ndarray,
                     abort_db: np.ndarray, df_hz: float, updates: int,
                     loop_delay_samples: int | None, trip: Trip | None,
                     recent_events: tuple[Event, ...]) -> ControlSnapshot:
    """A frozen view of the loop.

    ``target_psd`` is the band target at the current level (g²/Hz), shown while there is no
    ``judgement``; with one, the judgement's own target is shown.
    """
    d = judgement
    g = drive.gain
    target_b = target_psd
    ctrl = None if d is None else d.control_psd
    dof = 0.0 if d is None else d.dof
    if d is not None:
        target_b = d.target_psd
    lo, hi = chi2_interval_db(dof) if dof > 0 else (math.nan, math.nan)
    drive_b = drive.played_psd(band)
    return ControlSnapshot(
        t_s=t_s, stage=stage, status=status,
        level_db=schedule.level_db,
        gain_db=20 * math.log10(g) if g > 0 else -math.inf,
        step_index=schedule.index, n_steps=len(schedule.steps_db),
        elapsed_s=t_s, remaining_s=schedule.remaining_s,
        time_at_full_level_s=schedule.time_at_full_level_s,
        full_level_s=schedule.full_level_s,
        control_grms_g=math.nan if d is None else d.control_grms_g,
        target_grms_g=math.sqrt(float(np.sum(target_b)) * df_hz),
        drive_rms_fs=math.sqrt(float(np.sum(drive_b)) * df_hz),
        drive_rms_limit_fs=drive.rms_limit_fs, drive_peak_fs=drive.peak_fs,
        drive_peak_limit_fs=drive.peak_limit_fs, f_hz=f_hz,
        control_psd=None if ctrl is None else frozen_array(ctrl),
        target_psd=frozen_array(target_b), drive_psd=frozen_array(drive_b),
        alarm_db=alarm_db, abort_db=abort_db,
        max_dev_db=math.nan if d is None else d.max_dev_db,
        min_dev_db=math.nan if d is None else d.min_dev_db,
        lines_outside_alarm=-1 if d is None else d.lines_outside_alarm,
        lines_outside_abort=-1 if d is None else d.lines_outside_abort,
        rms_error_db=math.nan if d is None else d.rms_error_db,
        dof=float(dof), chi2_lo_db=float(lo), chi2_hi_db=float(hi), updates=updates,
        loop_delay_samples=loop_delay_samples, trip=trip, recent_events=recent_events)


def run_result(*, status: str, trip: Trip | None, stop_reason: str | None,
               judgement: Judgement | None, updates_to_tolerance: int | None,
               schedule: LevelSchedule, updates: int) -> RunResult:
    """The outcome of a run so far (final once the controller is done)."""
    d = judgement
    reason = trip.message if trip is not None else stop_reason
    nan = math.nan
    return RunResult(
        status=status, abort_reason=reason, trip=trip,
        updates_to_tolerance=updates_to_tolerance,
        final_rms_error_db=nan if d is None else d.rms_error_db,
        final_max_dev_db=nan if d is None else float(np.max(np.abs(d.dev_db))),
        final_lines_outside_alarm=-1 if d is None else d.lines_outside_alarm,
        final_lines_outside_abort=-1 if d is None else d.lines_outside_abort,
        control_grms_g=nan if d is None else d.control_grms_g,
        target_grms_g=nan if d is None else d.target_grms_g,
        dof=0.0 if d is None else d.dof,
        time_at_full_level_s=schedule.time_at_full_level_s, updates=updates)
