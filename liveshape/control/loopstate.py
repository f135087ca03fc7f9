"""The controller's state: its settings from the test, the loop's variables, and its views.

Pure. :class:`LoopState` is the base of :class:`liveshape.control.controller.Controller`: it turns
the test definition into the loop's settings and starting state, and answers what the shell asks
(run time, stage, status, events, :meth:`~LoopState.snapshot`, :meth:`~LoopState.result`)
without changing the loop. What each response block does, the transitions from stage to stage,
is the controller's.
"""

from __future__ import annotations

import dataclasses
import math
from collections import deque
from typing import Any

import numpy as np

from liveshape.control.connect import ConnectionCheck, ConnectStage
from liveshape.control.drivestream import DriveStream, ResponseQueue
from liveshape.control.fastloop import fast_update_segments
from liveshape.control.humguard import HumGuard
from liveshape.control.inputset import InputRows, InputSet, primary_column
from liveshape.control.kurtosisloop import KurtosisLoop
from liveshape.control.runplan import check_max_step, max_step_s
from liveshape.control.runstate import ControlSnapshot, Event, RunResult, UpdateRecord, frozen_array
from liveshape.control.safety import LevelSchedule, Supervisor, Trip, band_sum_dof
from liveshape.control.stages import (
    ControlEstimate,
    DecisionPool,
    Judgement,
    control_lines,
    judge,
    segments_for_dof,
    update_dof_for,
)
from liveshape.control.verdict import FullLevelAverage, Verdict, decide_verdict
from liveshape.dsp.spectra import chi2_interval_db, welch_dof
from liveshape.testdef.chain import ChainCalibration

#: Fade in of the connection and identification drives, s.
FADE_IN_S = 0.1
#: The identification level below the first schedule step, dB.
IDENTIFY_BELOW_DB = 6.0

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


class LoopState:
    """Settings, state and views of the control loop (parameters: see
    :class:`~liveshape.control.controller.Controller`)."""

    def __init__(self, spec: Any, calibration: ChainCalibration, *, seed: int | None = None,
                 update_dof: float | None = None, end_ramp_s: float = 1.0,
                 background_s: float = 0.5, max_delay_s: float = 0.5) -> None:
        c, s = spec.control, spec.safety
        self.spec = spec
        # several inputs (rig.inputs): the loop's one-channel work reads the first control
        # input, with its own calibration (liveshape.control.inputset)
        roles = spec.rig.input_roles() if getattr(spec.rig, "inputs", None) is not None \
            else None
        self._roles = roles if roles is not None and len(roles) > 1 else None
        if self._roles is not None:
            calibration = calibration.for_input(self._roles[primary_column(self._roles)].channel)
        self.calibration = calibration
        self.fs_hz = fs = float(c.fs_hz)
        self.frame_length = n = int(c.frame_length)
        self.df_hz = fs / n
        self._hop = n // 2
        lines = control_lines(spec)
        self._band = band = lines.band
        self._target = target = lines.target_psd  # g²/Hz at full level, all lines
        self.f_hz, self._alarm_db, self._abort_db = lines.f_hz, lines.alarm_db, lines.abort_db
        self._gpf2 = calibration.g_per_fs ** 2
        self._gamma = float(c.update_gain)
        rate = min(float(spec.schedule.rate_db_s), float(s.max_rate_db_s))
        self._abort_ramp_s = float(s.abort_ramp_s)
        self._end_ramp_s = float(end_ramp_s)
        check_max_step(spec)
        self.schedule = LevelSchedule(spec.schedule, max_step_s=max_step_s(spec))
        self.supervisor = Supervisor(s, spec.tolerance, fs_hz=fs, silent_window=self._hop)
        self._update_dof_target = float(update_dof or update_dof_for(c.target_dof))
        self._k_update = segments_for_dof(self._update_dof_target)
        self._k_identify = segments_for_dof(float(c.target_dof))
        self._nu_update = welch_dof(self._k_update)
        #: the fast loop (control.loop = fast): a drive update every ``_m_update`` segments, and
        #: an identification of half the update DOF only (the loop's plant estimate goes on
        #: from it at once; coherent lines need few segments for H1)
        self._fast = getattr(c, "loop", "block") == "fast"
        self._m_update = fast_update_segments(getattr(c, "update_interval_s", 0.35), fs, self._hop)
        if self._fast:
            self._k_identify = segments_for_dof(max(16.0, self._update_dof_target / 2))
        elif getattr(spec, "tones", ()):
            from liveshape.errors import ConfigError

            raise ConfigError(f"{spec.source or spec.name}: tones need control.loop = fast "
                              "(the block loop has no tone control)")
        if self._roles is not None:
            from liveshape.errors import ConfigError

            where = spec.source or spec.name
            if not self._fast:
                raise ConfigError(f"{where}: rig.inputs with {len(self._roles)} inputs need "
                                  "control.loop = fast (the block loop reads one input)")
        #: the other inputs (None: one input): combined control, monitors, limits, reference
        self._inputs: InputSet | None = None
        self._rows: InputRows | None = None
        self._rows_now: tuple[np.ndarray, np.ndarray, int] | None = None
        if self._roles is not None:
            from liveshape.control.tracking import n_avg_for_dof
            from liveshape.dsp.spectral_stats import overlap_correlation_sq

            c2 = overlap_correlation_sq("hann", 0.5, n)
            self._inputs = InputSet(
                self._roles, calibration, fs_hz=fs, nperseg=n, band=band,
                f_hz=self.f_hz, target_psd=target[band], strategy=c.strategy,
                window_segments=segments_for_dof(float(c.target_dof)),
                long_segments=n_avg_for_dof(float(c.target_dof), c2))
            self._rows = InputRows(len(self._roles))
        self._drive_updates: list[float] = []  # run time of every drive update, s
        #: lines the drive does not cause (mains hum), found and taken out of the control
        #: (fast loop; :mod:`liveshape.control.humguard`)
        self._hum: HumGuard | None = None
        if self._fast:
            self._hum = HumGuard(fs, (float(self.f_hz[0]), float(self.f_hz[-1])),
                                 g_per_fs=calibration.g_per_fs)
        self._pool = DecisionPool(float(c.target_dof), self._nu_update, c.averaging)
        self._settle = self._hop  # plant settling after a drive change, samples
        self._max_lag = max(1, int(round(max_delay_s * fs)))
        self._bg_len = max(int(round(background_s * fs)), 2 * n)
        self._fade_in = max(1, int(math.ceil(FADE_IN_S * fs)))
        self._out = DriveStream(
            fs, n, seed=spec.seed if seed is None else seed, clip_sigma=s.clip_sigma,
            rms_max_fs=s.drive_rms_max_fs, peak_max_fs=s.drive_peak_max_fs, rate_db_s=rate,
            fade_s=self._abort_ramp_s, history=self._max_lag + 8 * n)
        # kurtosis control (control.kurtosis > 3): the drive stays Gaussian until equalize
        k_target = getattr(c, "kurtosis", None)
        self._kurt: KurtosisLoop | None = None
        if k_target is not None and k_target > 3.0:
            interval = KurtosisLoop.interval_for(self._hop)
            self._kurt = KurtosisLoop(k_target, s.clip_sigma, interval_samples=interval,
                                      block_samples=2 * interval)

        # streams
        self._resp = ResponseQueue()
        self._delay: int | None = None
        # state
        self._stage = "connect"
        self._status = "running"
        self._trip: Trip | None = None
        self._stop_reason: str | None = None
        self._log = EventLog()
        self._confirm: Any = None  # the drop check after the connection check (controller)
        self._conn: ConnectStage | None = ConnectStage(
            fs_hz=fs, nperseg=n, band=band, background_len=self._bg_len, max_lag=self._max_lag,
            skip=self._fade_in)
        self._connection = None
        self._h1 = np.full(target.size, np.nan + 0j)  # g/FS
        self._coh = np.zeros(target.size)
        self._frozen = np.zeros(target.size, dtype=bool)
        # identification (and the blend law) need the cross spectrum; the direct law only the
        # control's autospectrum, at half the FFT work
        self._est = ControlEstimate(fs, n, band, self._gpf2, cross=True)
        self._est_gain = 0.0  # gain the estimate's data was played at
        self._target_sum = float(target[band].sum())
        self._predicted_sum = 0.0
        self._live_from = math.inf  # response index from which silence is a fault
        self._seg_band_dof = band_sum_dof(target[band], 2.0)  # one periodogram: 2 DOF a line
        self._switch_to: tuple[np.ndarray, float] | None = None
        self._tail_left: int | None = None
        self._updates = 0
        self._updates_to_tol: int | None = None
        self._last_update: UpdateRecord | None = None
        self._decision: Judgement | None = None
        self._alarm_on = False
        self._pending: tuple[str, ...] = ()  # abort rules counting towards a trip
        self._full = FullLevelAverage(int(np.count_nonzero(band)))
        self._emit("stage", "connect: looking at the background noise", {"stage": "connect"})

    # ------------------------------------------------------------------ public properties
    @property
    def t_s(self) -> float:
        """Run time, s: response samples received / fs."""
        return self._resp.n_in / self.fs_hz

    @property
    def stage(self) -> str:
        return self._stage

    @property
    def status(self) -> str:
        """``running``, then ``completed``, ``aborted`` or ``stopped``."""
        return self._status

    @property
    def finished(self) -> bool:
        return self._stage == "done"

    @property
    def trip(self) -> Trip | None:
        return self._trip

    @property
    def alarm_db(self) -> np.ndarray:
        """Alarm limit per band line, ± dB."""
        return self._alarm_db

    @property
    def abort_db(self) -> np.ndarray:
        """Abort limit per band line, ± dB."""
        return self._abort_db

    @property
    def loop_delay_samples(self) -> int | None:
        return self._delay

    @property
    def last_update(self) -> UpdateRecord | None:
        return self._last_update

    @property
    def connection(self) -> ConnectionCheck | None:
        """The :class:`~liveshape.control.connect.ConnectionCheck`, once made."""
        return self._connection

    @property
    def update_interval_s(self) -> float:
        """Run time between two equalizer updates, s: the drive change's transition (one
        frame), plant settling (half a frame) and loop delay, then the update's segments (the
        fast loop: ``control.update_interval_s`` rounded to whole segments)."""
        if self._fast:
            return self._m_update * self._hop / self.fs_hz
        n = self.frame_length + self._settle + (self._delay or 0) + (self._k_update + 1) * self._hop
        return n / self.fs_hz

    @property
    def safety_estimate_s(self) -> float:
        """Run time between two estimates of the persistent safety rules, s (block loop: one
        update; fast loop: a block of update DOF)."""
        if self._fast:
            return self._k_update * self._hop / self.fs_hz
        return self.update_interval_s

    @property
    def drive_rms_limit_fs(self) -> float:
        """Effective drive rms ceiling, FS."""
        return self._out.rms_limit_fs

    def drain_events(self) -> list[Event]:
        """Events since the last call, oldest first."""
        return self._log.drain()

    @property
    def events(self) -> tuple[Event, ...]:
        """Every event of the run so far, oldest first."""
        return self._log.all

    # ------------------------------------------------------------------ events and views
    def _record_update(self, t, ctrl, target_b, played, res, rms_err, in_tol, *,
                       applied: bool, dof: float | None = None) -> None:
        with np.errstate(divide="ignore"):
            dev = _DB * np.log(np.maximum(ctrl, 1e-300) / target_b)
        d = self._decision if in_tol is not None else None
        decision_psd = np.full(ctrl.size, np.nan) if d is None else d.control_psd
        rec = UpdateRecord(
            index=self._updates, t_s=t, stage=self._stage, level_db=self.schedule.level_db,
            dof=self._nu_update if dof is None else float(dof), f_hz=self.f_hz,
            control_psd=frozen_array(ctrl),
            target_psd=frozen_array(target_b), drive_psd=frozen_array(played),
            new_drive_psd=frozen_array(self._out.psd[self._band]),
            h1=frozen_array(self._h1[self._band], complex),
            coherence=frozen_array(self._coh[self._band]), rms_error_db=float(rms_err),
            max_dev_db=float(dev.max()), min_dev_db=float(dev.min()), applied=applied,
            lines_step_limited=0 if res is None else res.n_step_limited,
            lines_held=0 if res is None else res.n_held,
            ceiling_scale=1.0 if res is None else res.ceiling_scale,
            decision_psd=frozen_array(decision_psd),
            decision_dof=0.0 if d is None else float(d.dof),
            inputs=None if self._inputs is None else self._inputs.block_arrays())
        self._last_update = rec
        self._emit("update", f"update {rec.index}: rms {rec.rms_error_db:+.2f} dB, lines "
                   f"{rec.min_dev_db:+.1f}..{rec.max_dev_db:+.1f} dB",
                   {"update": rec.index, "rms_error_db": rec.rms_error_db,
                    "max_dev_db": rec.max_dev_db, "min_dev_db": rec.min_dev_db,
                    "dof": rec.dof, "applied": rec.applied, "level_db": rec.level_db,
                    "lines_step_limited": rec.lines_step_limited,
                    "ceiling_scale": rec.ceiling_scale, "in_tolerance": in_tol,
                    "drive_rms_fs": math.sqrt(float(played.sum()) * self.df_hz)})

    def _note_converging(self, verdict: Any) -> None:
        """The event of an update whose lines beyond abort came back (both loops)."""
        if verdict.converging:
            self._emit("converging", f"{verdict.lines_beyond_abort} lines beyond abort, coming "
                       "back by more than their scatter: lines_abort holds its count",
                       {"update": self._updates, "lines_beyond_abort": verdict.lines_beyond_abort})

    def _set_stage(self, stage: str, message: str) -> None:
        self._stage = stage
        self._emit("stage", message, {"stage": stage})

    def _emit(self, kind: str, message: str, data: dict[str, Any]) -> None:
        self._log.add(self.t_s, kind, message, data)

    def _judgement(self) -> Judgement | None:
        """The decision at the current level, else the latest update estimate judged alike."""
        if self._decision is not None or self._last_update is None:
            return self._decision
        u = self._last_update
        return judge(u.control_psd, u.target_psd, alarm_db=self._alarm_db,
                     abort_db=self._abort_db, rms_alarm_db=self.spec.tolerance.rms_alarm_db,
                     dof=u.dof, df_hz=self.df_hz, exclude=self._excluded())

    def snapshot(self) -> ControlSnapshot:
        """A frozen view of the loop now."""
        band = self._band
        g = self._out.gain
        d = self._judgement()
        ctrl = None if d is None else d.control_psd
        dof = 0.0 if d is None else d.dof
        if self._stage in ("equalize", "full_level", "ramp_down"):
            # The target at the level playing now: it follows the level as it ramps, while the
            # judged figures (deviations, lines outside) stay those of the estimate's own level.
            target_b = self._target[band] * g ** 2
        elif d is not None:
            target_b = d.target_psd
        else:
            target_b = self._target[band] * g ** 2
        lo, hi = chi2_interval_db(dof) if dof > 0 else (math.nan, math.nan)
        drive_b = self._out.played_psd(band)
        return ControlSnapshot(
            t_s=self.t_s, stage=self._stage, status=self._status,
            level_db=self.schedule.level_db,
            gain_db=20 * math.log10(g) if g > 0 else -math.inf,
            step_index=self.schedule.index, n_steps=len(self.schedule.steps_db),
            elapsed_s=self.t_s, remaining_s=self.schedule.remaining_s,
            time_at_full_level_s=self.schedule.time_at_full_level_s,
            full_level_s=self.schedule.full_level_s,
            control_grms_g=math.nan if d is None else d.control_grms_g,
            target_grms_g=math.sqrt(float(np.sum(target_b)) * self.df_hz),
            drive_rms_fs=math.sqrt(float(np.sum(drive_b)) * self.df_hz),
            drive_rms_limit_fs=self._out.rms_limit_fs, drive_peak_fs=self._out.peak_fs,
            drive_peak_limit_fs=self._out.peak_limit_fs, f_hz=self.f_hz,
            control_psd=None if ctrl is None else frozen_array(ctrl),
            target_psd=frozen_array(target_b), drive_psd=frozen_array(drive_b),
            alarm_db=self._alarm_db, abort_db=self._abort_db,
            max_dev_db=math.nan if d is None else d.max_dev_db,
            min_dev_db=math.nan if d is None else d.min_dev_db,
            lines_outside_alarm=-1 if d is None else d.lines_outside_alarm,
            lines_outside_abort=-1 if d is None else d.lines_outside_abort,
            rms_error_db=math.nan if d is None else d.rms_error_db,
            dof=float(dof), chi2_lo_db=float(lo), chi2_hi_db=float(hi), updates=self._updates,
            loop_delay_samples=self._delay, trip=self._trip, recent_events=tuple(self._log.recent),
            tolerance_state=self._tolerance_state(d),
            tones=getattr(self, "tone_summary", lambda: None)(),
            kurtosis=None if self._kurt is None else {
                "control": self._kurt.averaged, "target": self._kurt.target,
                "drive": self._kurt.drive},
            lines=None if self._hum is None or not self._hum.held else self._hum.summary(),
            inputs=None if self._inputs is None else
            self._inputs.summary(dof=float(dof), level_gain=g) or None)

    def _tolerance_state(self, d: Judgement | None) -> str:
        if self._pending:
            return "abort pending"
        if d is None:
            return ""
        return "in tolerance" if d.in_tolerance else "alarm"

    def verdict(self) -> Verdict:
        """The test's verdict so far (final once :attr:`finished`).

        Lines a monitor's limit notched are left out of the tolerance figures; with
        ``control.notches: fail`` a pass with notched lines becomes a fail that says so.
        """
        tol = self.spec.tolerance
        v = self._verdict_lines(tol)
        inp = self._inputs
        if inp is None or not inp.limits or not np.any(inp.notched_full):
            return v
        f = self.f_hz[inp.notched_full]
        line = (f"{int(np.count_nonzero(inp.notched_full))} lines notched by monitor limits "
                f"({f.min():.1f}-{f.max():.1f} Hz, deepest {inp.notch_deepest_db.min():.1f} dB)")
        if getattr(self.spec.control, "notches", "allowed") == "fail" and v.verdict == "pass":
            return dataclasses.replace(v, verdict="fail",
                                       reasons=(f"{line}; control.notches = fail",))
        return dataclasses.replace(v, rule=f"{v.rule}; {line}, left out (control.notches = "
                                   f"{getattr(self.spec.control, 'notches', 'allowed')})")

    def _verdict_lines(self, tol: Any) -> Verdict:
        return decide_verdict(
            self._status, self._full, self._target[self._band], alarm_db=self._alarm_db,
            abort_db=self._abort_db, rms_alarm_db=tol.rms_alarm_db,
            max_alarm_fraction=tol.max_alarm_fraction, df_hz=self.df_hz,
            status_reason=self._trip.message if self._trip is not None else self._stop_reason,
            exclude=self._excluded(full=True))

    def _hum_mask(self) -> np.ndarray | None:
        """Band lines held as not caused by the drive (None: none)."""
        return None if self._hum is None else self._hum.mask(self.f_hz, self.df_hz)

    def _excluded(self, *, full: bool = False) -> np.ndarray | None:
        """Band lines out of the tolerance statistics: hum lines, and lines a monitor's limit
        notches (deliberately low; ``full``: notched at any time at full level)."""
        hum = self._hum_mask()
        if self._inputs is None or not self._inputs.limits:
            return hum
        notched = self._inputs.notched_full if full else self._inputs.notched
        return notched if hum is None else hum | notched

    def full_level_arrays(self) -> dict[str, Any] | None:
        """The full-level average as arrays with units in their names, or None without one.

        Keys: ``f_hz``, ``control_psd_g2_hz`` (time-averaged control), ``target_psd_g2_hz``,
        ``alarm_db``, ``abort_db`` (± limits), ``dof``, ``estimates`` (update estimates
        pooled), ``decisions``, ``decisions_in_alarm``, ``first_t_s``/``last_t_s`` (run time of
        the first and last estimate pooled).
        """
        psd = self._full.psd
        if psd is None:
            return None
        f = self._full
        return {"f_hz": np.asarray(self.f_hz), "control_psd_g2_hz": np.asarray(psd),
                "target_psd_g2_hz": self._target[self._band].copy(),
                "alarm_db": np.asarray(self._alarm_db), "abort_db": np.asarray(self._abort_db),
                "dof": f.dof, "estimates": f.n_estimates, "decisions": f.n_decisions,
                "decisions_in_alarm": f.n_alarm, "first_t_s": f.first_t_s,
                "last_t_s": f.last_t_s,
                **({} if self._inputs is None else self._inputs.full_arrays())}

    def result(self) -> RunResult:
        """Outcome so far (final once :attr:`finished`).

        The fast loop decides every update but records every safety block: its final figures
        are those of the decision stored with the last record (``decision_psd``), so that the
        summary and the record agree.
        """
        d = self._judgement()
        if self._fast and getattr(self, "_recorded_decision", None) is not None:
            d = self._recorded_decision
        reason = self._trip.message if self._trip is not None else self._stop_reason
        nan = math.nan
        return RunResult(
            status=self._status, abort_reason=reason, trip=self._trip,
            updates_to_tolerance=self._updates_to_tol,
            final_rms_error_db=nan if d is None else d.rms_error_db,
            final_max_dev_db=nan if d is None else float(np.nanmax(np.abs(d.dev_db))),
            final_lines_outside_alarm=-1 if d is None else d.lines_outside_alarm,
            final_lines_outside_abort=-1 if d is None else d.lines_outside_abort,
            control_grms_g=nan if d is None else d.control_grms_g,
            target_grms_g=nan if d is None else d.target_grms_g,
            dof=0.0 if d is None else d.dof,
            time_at_full_level_s=self.schedule.time_at_full_level_s, updates=self._updates,
            verdict=self.verdict(),
            kurtosis=None if self._kurt is None else self._kurt.full_level_result(),
            tones=getattr(self, "tone_summary", lambda: None)(),
            lines=None if self._hum is None else self._hum.summary(),
            inputs=None if self._inputs is None else
            self._inputs.summary(dof=0.0 if d is None else d.dof, full=True) or None)
