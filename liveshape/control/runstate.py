"""Frozen records the controller hands to the shell: events, updates, snapshots and the result.

Pure data. Arrays inside these records are read-only copies; numbers carry their units in their
names. The dashboard renders :class:`ControlSnapshot`, the run record appends :class:`Event` and
:class:`UpdateRecord` as they happen and writes :class:`RunResult` at the end.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np

from liveshape.control.safety import VERDICT_FAIL_EXIT, Trip, exit_status

STAGES = ("connect", "identify", "equalize", "full_level", "ramp_down", "done")
STATUSES = ("running", "completed", "aborted", "stopped")


def frozen_array(a: Any, dtype: Any = float) -> np.ndarray:
    """A read-only copy of ``a``."""
    out = np.array(a, dtype=dtype, copy=True)
    out.setflags(write=False)
    return out


@dataclass(frozen=True)
class Event:
    """Something that happened, at run time ``t_s`` (samples / fs).

    ``kind`` is one of: ``stage`` (stage change), ``connect`` (connection check numbers),
    ``identify`` (identification numbers), ``level`` (a level step starts), ``update`` (one
    equalizer update with its numbers), ``hold`` (an abort rule is pending: the update could
    only lower the drive), ``ceiling`` (drive scaled to the ceiling at a step), ``dropout``
    (a silent stretch restarted the estimate), ``alarm`` / ``alarm_clear`` (tolerance alarm
    state changes), ``trip`` (a safety rule tripped), ``stop`` (stop requested),
    ``underflow`` (rig reported drive underflows).
    ``data`` holds numbers with units in the key names.
    """

    t_s: float
    kind: str
    message: str
    data: dict[str, Any] = field(default_factory=dict)

    def as_dict(self) -> dict[str, Any]:
        return asdict(self)


@dataclass(frozen=True)
class UpdateRecord:
    """One equalizer update: the spectra behind it (band lines) and what it did.

    ``control_psd`` (g²/Hz) is the update estimate at the played level, ``drive_psd`` (FS²/Hz)
    the drive that produced it as played (level included), ``new_drive_psd`` the drive PSD sent
    to the synthesizer afterwards (at full level, level not included), ``h1`` (g/FS) and
    ``coherence`` from the identification (refreshed by the blend law). ``applied`` is False
    when a safety rule tripped on this update or was pending (then the drive could only go
    down). ``decision_psd`` (g²/Hz) is the pooled estimate behind the tolerance decision made
    with this update, of ``decision_dof`` DOF (NaN and 0 when no decision was made).
    """

    index: int
    t_s: float
    stage: str
    level_db: float
    dof: float
    f_hz: np.ndarray
    control_psd: np.ndarray
    target_psd: np.ndarray
    drive_psd: np.ndarray
    new_drive_psd: np.ndarray
    h1: np.ndarray
    coherence: np.ndarray
    rms_error_db: float
    max_dev_db: float
    min_dev_db: float
    applied: bool
    lines_step_limited: int
    lines_held: int
    ceiling_scale: float
    decision_psd: np.ndarray
    decision_dof: float
    #: Several inputs: per-line arrays of the block (each input's PSD, each monitor's
    #: transmissibility, the reference FRF, the notch; names in
    #: :meth:`liveshape.control.inputset.InputSet.block_arrays`); None with one input.
    inputs: dict[str, np.ndarray] | None = None


@dataclass(frozen=True)
class ControlSnapshot:
    """A frozen view of the loop for the dashboard and the record.

    Spectra are on the band lines ``f_hz``: ``control_psd`` (g²/Hz, the decision estimate at the
    current level, or the latest update estimate before one is made, None before any update;
    ``dof`` says which), ``target_psd``
    (g²/Hz at the current level), ``drive_psd`` (FS²/Hz as played, level included).
    ``alarm_db``/``abort_db`` are the ± limits per line; ``chi2_lo_db``/``chi2_hi_db`` the 90 %
    χ² interval of the true PSD about an estimate with ``dof`` DOF. ``tolerance_state`` is
    ``in tolerance``, ``alarm``, ``abort pending`` (an abort rule counts towards its trip) or
    ``""`` before any estimate.
    """

    t_s: float
    stage: str
    status: str
    level_db: float
    gain_db: float
    step_index: int
    n_steps: int
    elapsed_s: float
    remaining_s: float
    time_at_full_level_s: float
    full_level_s: float
    control_grms_g: float
    target_grms_g: float
    drive_rms_fs: float
    drive_rms_limit_fs: float
    drive_peak_fs: float
    drive_peak_limit_fs: float
    f_hz: np.ndarray
    control_psd: np.ndarray | None
    target_psd: np.ndarray
    drive_psd: np.ndarray
    alarm_db: np.ndarray
    abort_db: np.ndarray
    max_dev_db: float
    min_dev_db: float
    lines_outside_alarm: int
    lines_outside_abort: int
    rms_error_db: float
    dof: float
    chi2_lo_db: float
    chi2_hi_db: float
    updates: int
    loop_delay_samples: int | None
    trip: Trip | None
    recent_events: tuple[Event, ...]
    tolerance_state: str = ""
    #: The bring-up meter's latest reading while the drive is held for the user
    #: (:class:`liveshape.control.bringup.MeterReading`), else None.
    bring_up: Any = None
    #: Sine-on-random: each tone's target, measured amplitude and error (see
    #: :meth:`liveshape.control.tonestage.ToneStage.tone_summary`); None without tones.
    tones: Any = None
    #: ``control.kurtosis``: ``{"control": averaged measured, "target", "drive"}``; else None.
    kurtosis: Any = None
    #: Lines held as not caused by the drive (mains hum): ``f_hz``, ``rms_g``...; else None.
    lines: Any = None
    #: Several inputs: per-input figures and notches (see
    #: :meth:`liveshape.control.inputset.InputSet.summary`); None with one input.
    inputs: Any = None


@dataclass(frozen=True)
class RunResult:
    """Outcome of a run.

    Attributes
    ----------
    status : str
        ``completed``, ``aborted`` or ``stopped``.
    abort_reason : str or None
        The trip's message (aborted) or the stop reason (stopped).
    trip : Trip or None
    updates_to_tolerance : int or None
        Equalizer updates after identification until the first decision in tolerance.
    final_* : numbers of the last decision at the final level, or of the latest update
        estimate when no decision was made there (nan/-1 when there was no update at all).
    control_grms_g, target_grms_g : float
        That estimate's grms and the target's at the level it was taken.
    dof : float
        DOF of that estimate (the decision's, or one update's).
    time_at_full_level_s : float
    updates : int
        Updates made in the run.
    verdict : Verdict or None
        The test's verdict against its tolerance (:mod:`liveshape.control.verdict`).
    """

    status: str
    abort_reason: str | None
    trip: Trip | None
    updates_to_tolerance: int | None
    final_rms_error_db: float
    final_max_dev_db: float
    final_lines_outside_alarm: int
    final_lines_outside_abort: int
    control_grms_g: float
    target_grms_g: float
    dof: float
    time_at_full_level_s: float
    updates: int
    verdict: Any = None
    #: The control's kurtosis at full level with ``control.kurtosis``: ``target``,
    #: ``kurtosis``, ``std_error`` (batch means; None below two blocks), ``samples``,
    #: ``samples_for_0_1`` (record length for ±0.1 at 90 %), ``drive_kurtosis``; else None.
    kurtosis: Any = None
    #: Sine-on-random: each tone's ``f_hz``, ``target_g``, ``measured_g`` (peak, averaged),
    #: ``error_db``, ``in_tolerance`` (:mod:`liveshape.control.tonestage`); else None.
    tones: Any = None
    #: Lines in the control not caused by the drive (mains hum) held at the end, each with
    #: ``f_hz``, ``rms_g``, ``first_t_s``: taken out of the control; None: not searched.
    lines: Any = None
    #: Several inputs: per-input figures and notches (see
    #: :meth:`liveshape.control.inputset.InputSet.summary`); None with one input.
    inputs: Any = None

    @property
    def abort_rule(self) -> str | None:
        return None if self.trip is None else self.trip.rule

    @property
    def exit_status(self) -> int:
        """Process exit status (0 completed, 4 completed with a ``fail`` verdict, 130 stopped,
        the rule's status when aborted)."""
        if self.status == "completed" and getattr(self.verdict, "verdict", None) == "fail":
            return VERDICT_FAIL_EXIT
        return exit_status(self.status, self.trip)
