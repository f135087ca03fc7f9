"""The block-driven control loop: response block in, drive block out.

Pure of I/O: no files, no printing, no clock (time is samples / fs). The same
:class:`Controller` drives the simulated rig, the JACK virtual rig and a real card; the shell
calls :meth:`Controller.exchange` with each response block and plays what it returns.

Streams and alignment
    The drive stream is everything :meth:`~Controller.exchange` returned, the response stream
    everything it was given (the first call's zeros included). Both grow by the same count per
    call, so the response sample ``i`` belongs to the drive sample ``i − L`` where the loop
    delay ``L`` (exchange latency plus the rig's own) is measured in the ``connect`` stage;
    :class:`~liveshape.control.drivestream.ResponseQueue` pairs them.

Stages (``connect → [bring_up] → identify → equalize → full_level → ramp_down → done``)
    connect
        A silent look at the background, then flat noise at ``safety.connect_level_fs`` rms:
        loop delay, coherence and H1 (:mod:`liveshape.control.connect`). A silent or unresponsive
        control channel stops the run *before any real level*.
    bring_up (real rigs, unless the user runs unattended)
        The connection drive stays on, nothing louder, while the user raises the amplifier
        gain and watches a live meter (:mod:`liveshape.control.bringup`). The controller only
        polls the shell's confirmation flag on each response block (it never waits); a
        confirmation is taken only while the meter passes the connection rule, and then a fresh
        connection record at the gain now set replaces the first one.
    identify
        The drive fades out, then in again at 6 dB below the first schedule step with the
        spectrum ``target / |H_connect|²``. H1 and coherence (aligned) are estimated with
        ``control.target_dof`` DOF; the initial drive is
        :func:`liveshape.control.equalizer.initial_drive` for the target.
    equalize / full_level
        The synthesizer holds the drive PSD at full level, the level itself is its gain
        ``10^(step_db/20)``; steps are dB ramps at ``schedule.rate_db_s`` (per sample, never a
        step). Each update estimate is a fresh linear Welch average of
        :func:`~liveshape.control.stages.update_dof_for` DOF, started only after a drive change has
        fully arrived: one frame for the overlap-add transition, half a frame for the plant to
        settle, and the loop delay (the design: :mod:`liveshape.control.stages`). The update law
        (``control.law``) acts on it, limited by ``max_step_db`` and the drive ceiling
        (:mod:`liveshape.control.drivestream`). Decisions (tolerance, level steps, display) use the
        :class:`~liveshape.control.stages.DecisionPool` of whole update estimates, with at least
        ``target_dof`` DOF. Time at full level counts only at 0 dB with the gain settled.
    ramp_down → done
        At the end a 1 s cosine fade, then zeros. On a safety trip or a stop request the fade
        lasts ``safety.abort_ramp_s``.

Safety
    Every response block is checked for non-finite samples and input overload before anything
    else; the delay-aligned block for silence while the drive is up (a dropout shorter than the
    rule's window restarts the update estimate so its zeros never pull the drive up). Each new
    Welch segment is checked on its own (rms above target, control far below the FRF prediction)
    with a 5σ statistical allowance, so a jump trips within a segment; each update estimate goes
    through all rules of :class:`~liveshape.control.safety.Supervisor`. While a persistent rule is
    pending the drive may only go down (the update law's increases are dropped). On a trip the
    drive fades to zero within ``abort_ramp_s`` and the run ends ``aborted`` with the
    :class:`~liveshape.control.safety.Trip`.

This module holds the transitions. The loop's settings and variables and everything that only
reads them (the properties, events, :meth:`~Controller.snapshot`, :meth:`~Controller.result`)
are in :class:`liveshape.control.loopstate.LoopState`, the base of :class:`Controller`.
"""

from __future__ import annotations

import dataclasses
import math
from typing import Any

import numpy as np

from liveshape.control import equalizer
from liveshape.control.bringup import BringUpStage, MeterReading
from liveshape.control.connect import (
    CONNECT_DROP_DB,
    ConfirmWatch,
    ConnectionCheck,
    connection_data,
    connection_message,
    connection_trip,
    flat_drive_psd,
    identification_drive,
)
from liveshape.control.fastloop import FastLoop
from liveshape.control.loopstate import FADE_IN_S, IDENTIFY_BELOW_DB, LoopState
from liveshape.control.runstate import RunResult
from liveshape.control.safety import Trip
from liveshape.control.stages import ControlEstimate, judge
from liveshape.control.tonestage import ToneStage
from liveshape.control.warmstart import CONFIRM_DB, WarmStart, confirm
from liveshape.dsp.spectra import chi2_interval_db, welch_dof

__all__ = ["FADE_IN_S", "IDENTIFY_BELOW_DB", "Controller", "run_offline"]


class Controller(ToneStage, FastLoop, LoopState):
    """Closed-loop random-vibration controller, one block at a time.

    Parameters
    ----------
    spec : spec.TestSpec
    calibration : ChainCalibration
        Units of the chain (``g_per_fs`` converts the response to g).
    seed : int, optional
        Seed of the drive synthesis (default ``spec.seed``). The same seed and the same
        responses give a bit-identical drive.
    update_dof : float, optional
        DOF of one update estimate (default :func:`~liveshape.control.stages.update_dof_for`).
    end_ramp_s : float
        Duration of the cosine fade at the end of a completed test, s.
    background_s : float
        Duration of the silent look at the start, s (at least two frames).
    max_delay_s : float
        Largest loop delay searched, s.
    """

    def __init__(self, spec: Any, calibration: Any, *, bring_up: Any = None,
                 warm: WarmStart | None = None, **kwargs: Any) -> None:
        super().__init__(spec, calibration, **kwargs)
        #: An earlier run's equalized drive to start from (:mod:`liveshape.control.warmstart`).
        self._warm = warm
        if warm is not None and self._fast:
            # the confirming identification plays the stored drive: all of it counts towards
            # the first decision, so it runs for the update DOF
            self._k_identify = self._k_update
        #: The shell's confirmation flag (``is_set()``/``clear()``, e.g. threading.Event) for
        #: the bring-up hold; None: no hold (the simulated rig, ``run --unattended``).
        self._bring_up_flag = bring_up
        self._bring: BringUpStage | None = None

    # ------------------------------------------------------------------ control from the shell
    def request_stop(self, reason: str = "stop requested") -> None:
        """Ramp the drive down within ``abort_ramp_s`` and finish with status ``stopped``."""
        if self._status != "running":
            return
        self._status = "stopped"
        self._stop_reason = reason
        self._emit("stop", f"stop: {reason}", {"reason": reason})
        self._begin_ramp_down(self._abort_ramp_s)

    def request_abort(self, rule: str, message: str, detail: dict[str, Any] | None = None) -> None:
        """Trip ``rule`` from the shell (e.g. ``disk_space``): ramp down, status ``aborted``.

        Parameters
        ----------
        rule : str
            A rule of :data:`liveshape.control.safety.EXIT_STATUS` (its exit status is the run's).
        message : str
            One line a person reads, with the numbers.
        detail : dict, optional
            The numbers, units in the key names.
        """
        if self._status != "running":
            return
        self._abort(Trip(rule, message, self.t_s, dict(detail or {})))

    def report_underflow(self, count: int) -> None:
        """The rig's output ran dry ``count`` times: trips ``controller_late``."""
        if count > 0:
            self._emit("underflow", f"{count} drive underflows", {"underflows": int(count)})
        trip = self.supervisor.report_underflow(self.t_s, count)
        if trip is not None:
            self._abort(trip)

    # ------------------------------------------------------------------ the exchange
    def exchange(self, response_fs: Any) -> np.ndarray:
        """Take the response recorded while the previous drive block played; return the next.

        Parameters
        ----------
        response_fs : array_like
            Response block, FS (first call: zeros of the wanted block length).

        Returns
        -------
        ndarray
            Drive block of the same length, FS, within ``±drive_peak_max_fs``.
        """
        raw = np.array(response_fs, dtype=float)
        t0 = self.t_s
        if self._rows is None:
            y = raw.reshape(-1)
            rows = None
        else:
            k = len(self._roles)
            if raw.ndim != 2 or raw.shape[1] != k:
                raise ValueError(f"exchange: a rig with {k} inputs gives (samples, {k}) blocks, "
                                 f"got shape {raw.shape}")
            rows = np.ascontiguousarray(raw.T)
            y = rows[self._inputs.primary]  # a view: zeroing rows zeroes it too
        n = y.size
        if self._stage != "done" and self._status != "aborted":
            trip = self._check_inputs(t0, y, rows)
            if trip is not None:
                self._abort(trip)
        if self._trip is not None and self._trip.rule == "non_finite":
            buf = y if rows is None else rows  # y is a view of rows
            buf[~np.isfinite(buf)] = 0.0  # keep the estimators finite while ramping down
        self._resp.push(y)
        if rows is not None:
            self._rows.push(rows)
        self._process()
        return self._make_drive(n)

    def _check_inputs(self, t0: float, y: np.ndarray, rows: np.ndarray | None) -> Trip | None:
        """Sample-level rules (non-finite, overload) on the control and on every other input
        (a trip on another input names it)."""
        trip = self.supervisor.check_block(t0, y, drive_up=None)
        if trip is not None or rows is None:
            return trip
        for i, r in enumerate(self._roles):
            if i == self._inputs.primary:
                continue
            trip = self.supervisor.check_block(t0, rows[i], drive_up=None)
            if trip is not None:
                msg = trip.message.replace("control input ", "")
                return dataclasses.replace(
                    trip, message=f"{r.role} input {r.channel} ({r.name}): {msg}",
                    detail={**trip.detail, "input": r.channel, "name": r.name})
        return None

    # ------------------------------------------------------------------ processing
    def _process(self) -> None:
        lag = self._delay if self._delay is not None else 0
        got = self._resp.take(self._out, lag, self._max_lag if self._delay is None else lag)
        if got is None:
            return
        x, y, i0 = got
        if self._rows is not None:  # the other inputs' same samples
            self._rows_now = (self._rows.take(y.size), x, i0)
        if self._status != "running":
            return  # ramping down: nothing more to learn from the response
        if self._confirm is not None and self._stage in ("connect", "bring_up"):
            self._confirm_connection(x, y, i0)
        elif self._stage == "connect":
            self._connect(x, y, i0)
        elif self._stage == "bring_up":
            self._hold(x, y)
        elif self._stage in ("identify", "equalize", "full_level"):
            # silence counts once the identification drive has faded in (the fades to and from
            # zero around the switch of spectrum are no dropout)
            j = self._live_from - i0
            if j < y.size:
                j = int(max(0, j))
                trip = self.supervisor.check_silence(i0 / self.fs_hz, y[j:], drive_up=True)
            else:
                trip = self.supervisor.check_silence(i0 / self.fs_hz, y, drive_up=False)
            if trip is not None:
                self._abort(trip)
                return
            if self._hum is not None:  # lines the drive does not cause leave the control here
                y = self._hum.push(x, y, i0 - (self._delay or 0), self.t_s)
                self._hum_events()
            fast = self._fast and self._stage != "identify"
            if self.supervisor.silent_in_last_block and (fast or self._est.active):
                # a dropout shorter than the rule's window: its data must not enter an
                # estimate (it would read as low control and pull the drive up)
                if fast:
                    self._fast_restart()
                else:
                    self._restart_estimate(after=self._out.n_out)
                self._emit("dropout", "response silent: estimate restarted",
                           {"silent_samples": self.supervisor.silent_run_samples})
            if fast:
                self._fast_feed(x, y, i0)
            else:
                self._estimate(x, y, i0)

    # ------------------------------------------------------------------ connect
    def _connect(self, x: np.ndarray, y: np.ndarray, i0: int) -> None:
        conn = self._conn
        chk = conn.feed(x, y, i0)
        if chk is None:
            return
        self._connection, self._conn = chk, None
        if self._hum is not None:  # the silent background: every line there is not the drive's
            self._hum.background(conn.recorder.records()[2], self.t_s)
            self._hum_events()
        self._emit("connect", connection_message(chk), {
            **connection_data(chk),
            "calibration_delay_samples": self.calibration.loop_delay_samples})
        if self._bring_up_flag is not None:
            self._start_hold(conn.recorder.records()[2])
            return
        self._connected(chk)

    # ------------------------------------------------------------------ bring-up hold
    def _start_hold(self, background: np.ndarray) -> None:
        """Keep the connection drive on and meter the response until the user confirms."""
        s, cal = self.spec.safety, self.calibration
        self._bring = BringUpStage(
            fs_hz=self.fs_hz, nperseg=self.frame_length, band=self._band, background=background,
            max_lag=self._max_lag, g_per_fs=cal.g_per_fs,
            out_v_per_fs=cal.out_v_per_fs if cal.calibrated else None,
            silent_floor_fs=s.silent_floor_fs, coherence_min=s.connect_coherence_min)
        self._bring_up_flag.clear()  # only an Enter pressed from now on counts
        self._set_stage("bring_up", f"bring-up: drive held at {s.connect_level_fs:g} FS rms "
                        "until the user confirms")

    def _hold(self, x: np.ndarray, y: np.ndarray) -> None:
        """One response chunk in the hold: meter, poll the flag (never wait), recheck."""
        b = self._bring
        chk = b.feed(x, y, self.t_s)
        if chk is not None:  # the fresh record at the confirmed gain
            self._bring, self._connection = None, chk
            self._emit("connect", f"{connection_message(chk)} (at the confirmed gain)",
                       {**connection_data(chk), "after_bring_up": True})
            self._connected(chk)
            return
        if b.confirmed is None and self._bring_up_flag.is_set():
            self._bring_up_flag.clear()
            ok, why = b.confirm()
            r = b.reading
            data = {} if r is None else r.to_dict()
            if ok:
                self._emit("bring_up_confirmed",
                           f"bring-up confirmed: response {r.response_rms_fs:.3g} FS rms "
                           f"({r.response_rms_g:.3g} g), SNR {r.snr_db:.1f} dB, coherence "
                           f"{r.coherence:.2f}", data)
            else:
                self._emit("bring_up_refused", f"Enter refused: {why}", data)

    @property
    def bring_up_reading(self) -> MeterReading | None:
        """The bring-up meter's latest reading (None outside the hold)."""
        return None if self._bring is None else self._bring.reading

    def snapshot(self) -> Any:
        """:meth:`LoopState.snapshot` with the bring-up meter's reading while it holds."""
        snap = super().snapshot()
        if self._stage != "bring_up":
            return snap
        return dataclasses.replace(snap, bring_up=self.bring_up_reading)

    def _connected(self, chk: Any) -> None:
        s = self.spec.safety
        trip = connection_trip(chk, s, self.t_s)
        if trip is not None:
            self._abort(trip)
            return
        self._delay = chk.delay_samples
        # The check's record ended a loop latency ago: keep the connection drive until the
        # response to every drive sample up to now has passed the drop check too.
        self._confirm = ConfirmWatch(until=self._out.n_out, reference_db=chk.reference_gain_db,
                                     nperseg=self.frame_length, band=self._band)

    def _confirm_connection(self, x: np.ndarray, y: np.ndarray, i0: int) -> None:
        done, worst = self._confirm.feed(x, y, i0 - (self._delay or 0))
        if worst > CONNECT_DROP_DB:
            self._abort(Trip(
                "connect_check",
                f"control channel stopped following the drive at the end of the connection "
                f"check: the response lost {min(worst, 300.0):.1f} dB of its gain (limit "
                f"{CONNECT_DROP_DB:g} dB), before any louder drive", self.t_s,
                {"drop_db": min(worst, 300.0), "confirm_until_sample": self._confirm.until}))
            return
        if done:
            self._confirm = None
            self._start_identification(self._connection)

    def _start_identification(self, chk: ConnectionCheck) -> None:
        s, c = self.spec.safety, self.spec.control
        # identification drive: the target shape through the connection FRF, 6 dB below step 1
        g_id = 10.0 ** ((self.schedule.steps_db[0] - IDENTIFY_BELOW_DB) / 20.0)
        self._h1, psd = identification_drive(
            chk, self._target, g_per_fs=self.calibration.g_per_fs, max_boost_db=c.max_boost_db,
            coherence_min=s.connect_coherence_min, band=self._band,
            ceiling_ms_fs2=self._out.ceiling_ms(g_id), df_hz=self.df_hz)
        how = ""
        if self._warm is not None:  # the stored drive's shape: the plant is confirmed with it
            psd = np.array(self._warm.drive_psd, dtype=float)
            how = f" with the drive of {self._warm.source} (update {self._warm.update})"
        self._switch_to = (psd, g_id)
        self._set_stage("identify", f"identify: H1 at {20 * math.log10(g_id):.1f} dB{how}")
        self._out.fade(0.0, FADE_IN_S)

    # ------------------------------------------------------------------ estimation
    def _estimate(self, x: np.ndarray, y: np.ndarray, i0: int) -> None:
        m = self._est.feed(x, y, i0)
        if not m:
            return
        t = self.t_s
        # fast rules on the newest segment(s) alone
        g_ref = self._est_gain
        if self._stage == "identify":  # the identification runs 6 dB below the first step
            g_ref = 10.0 ** (self.schedule.steps_db[0] / 20.0)
        trip = self.supervisor.check_segment(
            t, control_sum=self._est.newest_sum, target_sum=self._target_sum * g_ref**2,
            band_dof=self._seg_band_dof * m, predicted_sum=self._predicted_sum)
        if trip is not None:
            self._abort(trip)
            return
        k = self._est.n_segments
        if self._stage == "identify" and k >= self._k_identify:
            self._identified()
        elif self._stage in ("equalize", "full_level") and k >= self._k_update:
            self._update(self._est.control_psd())

    def _restart_estimate(self, *, after: int) -> None:
        """New estimate from drive sample ``after`` on (plus transition, settling and delay)."""
        self._est.restart(after + self._settle + (self._delay or 0))
        self._out.reset_counters()
        # band sum of the control the FRF predicts for the drive the estimate will see
        b = self._band
        self._predicted_sum = float(np.sum(np.abs(self._h1[b]) ** 2 * self._out.played_psd(
            b, self._est_gain)))

    def _identified(self) -> None:
        c = self.spec.control
        h1, self._coh = self._est.h1_coherence()
        self._h1 = h1 * self.calibration.g_per_fs
        self._frozen = self._band & (self._coh < c.coherence_min)
        g1 = 10.0 ** (self.schedule.level_db / 20.0)
        id_psd, id_gain, id_ctrl = self._out.psd.copy(), self._est_gain, self._est.control_psd()
        res = equalizer.initial_drive(self._target, self._h1, self._coh,
                                      max_boost_db=c.max_boost_db, coherence_min=c.coherence_min,
                                      band=self._band, ceiling_ms_fs2=self._out.ceiling_ms(g1),
                                      df_hz=self.df_hz)
        warm_ok = self._warm is not None and self._confirm_warm()
        if warm_ok:
            self._out.set_psd(self._warm.drive_psd)
            self._out.rescale_for(g1)
        else:
            self._out.set_psd(res.drive_psd, ceiling_hit=res.ceiling_hit)
        coh_b = self._coh[self._band]
        self._emit("identify", f"identified: mean coherence {float(np.mean(coh_b)):.3f}, "
                   f"{int(np.count_nonzero(self._frozen))} lines frozen, "
                   f"{res.n_step_limited} boost-limited",
                   {"mean_coherence": float(np.mean(coh_b)), "min_coherence": float(coh_b.min()),
                    "lines_frozen": int(np.count_nonzero(self._frozen)),
                    "lines_boost_limited": res.n_step_limited, "dof": welch_dof(self._k_identify),
                    "ceiling_scale": res.ceiling_scale})
        if self._fast:
            # a confirmed warm start identified with the drive it now plays: that control is
            # already evidence for the first decision (normalized to full level)
            self._fast_setup(id_psd, id_gain, id_ctrl, welch_dof(self._k_identify),
                             window_seed=self._k_identify if warm_ok else 0)
        elif c.law == "direct":
            self._est = ControlEstimate(self.fs_hz, self.frame_length, self._band, self._gpf2,
                                        cross=False)
        self._set_stage("equalize", "equalize")
        self._go_to_level(self.schedule.level_db)

    def _hum_events(self) -> None:
        for kind, line in self._hum.drain():
            d = line.as_dict()
            if kind == "found":
                self._emit("line_found", f"line at {d['f_hz']:.2f} Hz not caused by the drive: "
                           "taken out of the control", d)
            else:
                self._emit("line_gone", f"line at {d['f_hz']:.2f} Hz gone", d)

    def _confirm_warm(self) -> bool:
        """Compare the FRF just identified with the stored one; emit the outcome."""
        w, band = self._warm, self._band
        ok, med, n = confirm(self._h1[band], self._coh[band], w,
                             coherence_min=self.spec.control.coherence_min)
        data = {"from_run": w.source, "update": w.update, "h_change_p95_db": med,
                "lines_compared": n, "limit_db": CONFIRM_DB}
        if ok:
            self._emit("warm_start", f"warm start: the plant matches {w.source} (95 % of "
                       f"{n} lines within {med:.2f} dB of its |H|); its drive is the first drive",
                       data)
        else:
            self._emit("warm_start_rejected", f"warm start not used: the plant changed since "
                       f"{w.source} (95 % of {n} lines within {med:.2f} dB of its |H|, limit "
                       f"{CONFIRM_DB:g} dB); equalizing from the identified FRF", data)
        return ok

    def _go_to_level(self, level_db: float) -> None:
        deciding = self._decision if self.schedule.index > 0 else None
        g = 10.0 ** (level_db / 20.0)
        ramp = self._out.go_to(g)
        self._est_gain = g
        self.supervisor.reset_persistence()
        if not self._fast:  # the fast loop's window holds the control normalized to full level
            self._pool.reset()
            self._decision = None  # decisions restart at the new level
            self._restart_estimate(after=self._out.n_out + max(ramp, self.frame_length))
        self.schedule.start_step(self.t_s)
        self._emit("level", f"level {level_db:+.1f} dB (ramp {ramp / self.fs_hz:.2f} s)",
                   {"level_db": level_db, "step_index": self.schedule.index,
                    "ramp_s": ramp / self.fs_hz,
                    # the DOF of the decision that took the step (None: the first level)
                    "decision_dof": None if deciding is None else float(deciding.dof)})

    def _update(self, ctrl: np.ndarray) -> None:
        c = self.spec.control
        t = self.t_s
        g = self._est_gain
        band = self._band
        target_b = self._target[band] * g * g
        played = self._out.played_psd(band, g)
        predicted = np.abs(self._h1[band]) ** 2 * played
        at_limit = self._out.ceiling_hit or self._out.clipped > 0
        verdict = self.supervisor.check_update(
            t, control_psd=ctrl, target_psd=target_b, dof=self._nu_update,
            abort_db=self._abort_db, predicted_psd=predicted, drive_at_limit=at_limit)
        self._updates += 1
        if verdict.trip is not None:
            self._record_update(t, ctrl, target_b, played, None, verdict.rms_error_db, None,
                                applied=False)
            self._abort(verdict.trip)
            return
        self._pool.push(ctrl, self._nu_update)
        self._pending = tuple(verdict.pending)
        self._note_converging(verdict)
        if self._stage == "full_level" and g == 1.0:
            self._full.push(ctrl, self._nu_update, t)
        if self._est.cross:  # blend law: refresh the FRF where the coherence is good
            h1, coh = self._est.h1_coherence()
            good = band & (coh >= c.coherence_min)
            self._h1 = np.where(good, h1 * self.calibration.g_per_fs, self._h1)
            self._coh = np.where(good, coh, self._coh)
        full = np.zeros(self._target.size)
        full[band] = ctrl / (g * g)
        old = self._out.psd
        res = equalizer.update_drive(
            old, self._target, full, gain=self._gamma, max_step_db=c.max_step_db,
            band=band, ceiling_ms_fs2=self._out.ceiling_ms(g), df_hz=self.df_hz,
            frozen=self._frozen, law=c.law, h1=self._h1, control_dof=self._nu_update)
        new = res.drive_psd
        if verdict.pending:
            # a rule is pending: the drive may go down, never up, until it clears or trips
            new = np.minimum(new, old)
            self._emit("hold", f"update {self._updates}: drive may only go down while "
                       f"{', '.join(verdict.pending)} is pending",
                       {"update": self._updates, "pending": list(verdict.pending)})
        self._out.set_psd(new, ceiling_hit=res.ceiling_hit)
        self._drive_updates.append(t)
        self._restart_estimate(after=self._out.n_out + self.frame_length)
        decision = self._decide(t)
        self._record_update(t, ctrl, target_b, played, res, verdict.rms_error_db, decision,
                            applied=not verdict.pending)

    def _decide(self, t: float) -> bool | None:
        """Tolerance decision on the pool; steps the level when due. None: not enough DOF."""
        if not self._pool.ready:
            return None
        g = self._est_gain
        d = judge(self._pool.psd, self._target[self._band] * g * g, alarm_db=self._alarm_db,
                  abort_db=self._abort_db, rms_alarm_db=self.spec.tolerance.rms_alarm_db,
                  dof=self._pool.dof, df_hz=self.df_hz)
        return self._on_decision(d, t)

    def _on_decision(self, d: Any, t: float) -> bool:
        """Act on a tolerance decision ``d`` (a Judgement): alarm, full-level count, steps."""
        g = self._est_gain
        self._decision = d
        in_tol, n_alarm, rms_err = d.in_tolerance, d.lines_outside_alarm, d.rms_error_db
        if self._stage == "full_level" and g == 1.0:
            self._full.count_decision(in_tol)
        if in_tol and self._updates_to_tol is None:
            self._updates_to_tol = self._updates
        if not in_tol and not self._alarm_on:
            self._alarm_on = True
            self._emit("alarm", f"alarm: {n_alarm} lines outside the alarm limits, rms "
                       f"{rms_err:+.2f} dB", {"lines_outside_alarm": n_alarm,
                                              "rms_error_db": rms_err})
        elif in_tol and self._alarm_on:
            self._alarm_on = False
            self._emit("alarm_clear", "control back inside tolerance", {"rms_error_db": rms_err})
        if self.schedule.observe(t, in_tol) and self._status == "running":
            level, _ = self.schedule.step_up()
            g_new = 10.0 ** (level / 20.0)
            scale = self._out.rescale_for(g_new)
            self._go_to_level(level)
            if scale < 1.0:
                self._emit("ceiling", f"drive scaled by {scale:.3f} to stay within the ceiling",
                           {"ceiling_scale": scale})
        return in_tol

    # ------------------------------------------------------------------ drive generation
    def _make_drive(self, n: int) -> np.ndarray:
        out_ = self._out
        conn = self._conn
        if conn is not None and conn.drive_due(out_.n_out) and self._status == "running":
            level = self.spec.safety.connect_level_fs
            out_.set_psd(flat_drive_psd(self._band, level, self.df_hz))
            out_.fade(1.0, FADE_IN_S)
            conn.start_drive(out_.n_out)
            self._emit("stage", f"connect: flat noise at {level:g} FS rms",
                       {"stage": "connect", "connect_level_fs": level})
        if self._switch_to is not None and out_.silent:
            psd, g = self._switch_to
            self._switch_to = None
            if self._status == "running":
                out_.set_psd(psd)
                out_.fade(g, FADE_IN_S)
                self._est_gain = g
                self._live_from = out_.n_out + self._fade_in + (self._delay or 0)
                self._restart_estimate(after=out_.n_out + max(self._fade_in, self.frame_length))
        if self._stage == "done":
            out = np.zeros(n)
            out_.push(out)
            return out
        settled_before = not out_.ramping and out_.gain == 1.0
        out = out_.read(n)
        self._after_read(n, settled_before and not out_.ramping)
        return out

    def _after_read(self, n: int, settled_full: bool) -> None:
        if (self._status == "running" and self._stage == "equalize"
                and self.schedule.overdue(self.t_s)):
            self._abort(self._unreachable_trip())
        if self._status == "running" and self._stage in ("equalize", "full_level"):
            if self._stage == "equalize" and self.schedule.at_last_step and settled_full:
                self._set_stage("full_level", "full level: counting test time")
                self._fast_stage_change(self.t_s, completed=False)
            if self._stage == "full_level":
                self.schedule.count_full_level(n / self.fs_hz, settled=settled_full)
                if self.schedule.complete:
                    self._fast_stage_change(self.t_s, completed=True)
                    self._status = "completed"
                    self._begin_ramp_down(self._end_ramp_s)
        if self._stage == "ramp_down" and self._out.silent:
            if self._tail_left is None:
                self._tail_left = (self._delay or self._max_lag) + self.frame_length
            self._tail_left -= n
            if self._tail_left <= 0:
                self._set_stage("done", f"done: {self._status}")

    def _unreachable_trip(self) -> Trip:
        """``level_unreachable``: why the control never held tolerance for ``hold_s`` here."""
        sch, tol = self.schedule, self.spec.tolerance
        d = self._decision
        detail: dict[str, Any] = {
            "level_db": sch.level_db, "step_index": sch.index,
            "time_at_step_s": sch.time_at_step_s(self.t_s), "max_step_s": sch.max_step_s,
            "hold_s": sch.hold_s, "drive_at_ceiling": bool(self._out.ceiling_hit),
        }
        if d is None:
            why = "no tolerance decision was reached at this level"
        else:
            parts = []
            if d.lines_outside_alarm:
                parts.append(f"{d.lines_outside_alarm} lines outside the alarm limits "
                             f"(max {d.max_dev_db:+.2f} / min {d.min_dev_db:+.2f} dB)")
            if abs(d.rms_error_db) > tol.rms_alarm_db:
                parts.append(f"rms error {d.rms_error_db:+.2f} dB beyond ±{tol.rms_alarm_db:g} dB")
            why = "last decision: " + ("; ".join(parts) if parts else "in tolerance, but not "
                                       f"for {sch.hold_s:g} s in a row")
            detail.update(lines_outside_alarm=d.lines_outside_alarm,
                          rms_error_db=d.rms_error_db, max_dev_db=d.max_dev_db,
                          min_dev_db=d.min_dev_db, dof=d.dof)
            lo, hi = chi2_interval_db(d.dof)
            narrowest = float(np.min(self._alarm_db))
            if d.lines_outside_alarm and max(-lo, hi) > narrowest:
                why += (f"; at {d.dof:.0f} DOF the estimate's own 90 % χ² band is "
                        f"{lo:+.2f}/{hi:+.2f} dB, wider than the ±{narrowest:g} dB alarm limit, "
                        "so scatter alone keeps lines outside (raise control.target_dof or "
                        "widen tolerance.alarm_db)")
        if self._out.ceiling_hit:
            why += "; the drive is at its rms ceiling (safety.drive_rms_max_fs)"
        msg = (f"level {sch.level_db:+.1f} dB held for {sch.time_at_step_s(self.t_s):.1f} s "
               f"without {sch.hold_s:g} s in tolerance (schedule.max_step_s = "
               f"{sch.max_step_s:g} s); {why}")
        return Trip("level_unreachable", msg, self.t_s, detail)

    def _begin_ramp_down(self, duration_s: float) -> None:
        self._switch_to = None
        self._out.fade(0.0, duration_s)
        if self._stage not in ("ramp_down", "done"):
            self._set_stage("ramp_down", f"ramp down in {duration_s:g} s")

    def _abort(self, trip: Trip) -> None:
        if self._status == "aborted":
            self._emit("trip", f"also tripped: {trip.message}", {"rule": trip.rule})
            return
        self._trip = trip
        self._status = "aborted"
        self._emit("trip", f"ABORT {trip.rule}: {trip.message}",
                   {"rule": trip.rule, **trip.detail})
        if self._stage != "done":
            self._begin_ramp_down(self._abort_ramp_s)

def run_offline(controller: Controller, rig: Any, block_size: int, *,
                max_s: float | None = None) -> RunResult:
    """Step ``controller`` and ``rig`` (``process(drive) -> response``) as fast as possible.

    The first exchange gets zeros; each drive block goes through ``rig.process`` and its
    response is the next exchange's input. After ``max_s`` of run time (default: a generous
    bound from the schedule) the controller is asked to stop.
    """
    if max_s is None:
        sch = controller.spec.schedule
        max_s = 120.0 + 4.0 * sch.full_level_s + 60.0 * len(sch.steps_db)
    n_in = len(getattr(rig, "input_channels", ())) or 1
    response = np.zeros(int(block_size)) if n_in == 1 else np.zeros((int(block_size), n_in))
    stopped = False
    while not controller.finished:
        drive = controller.exchange(response)
        response = rig.process(drive) if n_in == 1 else rig.process_inputs(drive).T
        if not stopped and controller.t_s >= max_s:
            controller.request_stop(f"run_offline time limit of {max_s:g} s")
            stopped = True
    return controller.result()
