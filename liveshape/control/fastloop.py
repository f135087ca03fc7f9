"""The fast loop's transitions: every Welch segment tracked, a drive update every few segments.

Pure. :class:`FastLoop` is a base of :class:`liveshape.control.controller.Controller`; it runs the
``equalize`` and ``full_level`` stages when ``control.loop`` is ``fast`` (docs/methods.md,
"Fast update loop"). Every new control segment (one hop, 85 ms at 8192 points and 48 kHz):

1. is paired with the expected drive PSD and the level it was played at
   (:meth:`~liveshape.control.drivestream.DriveStream.segment_psd`, ``segment_gain``); a segment
   during a level ramp counts for the fast rms rule only;
2. goes through the per-segment safety rules (rms above target, loop open against the identified
   FRF);
3. enters the plant estimate (:class:`~liveshape.control.tracking.PowerGainTracker`), the decision
   window (a linear average of the last segments whose DOF reaches ``control.target_dof``, the
   control normalized to full level) and the current safety block.

Every ``update_interval_s`` the drive is updated from the plant estimate with the direct law,
``D ← D (R / (T̂ D))^γ``, limited per line by ``max_step_db`` and by the ceiling. Then, once the
window holds its DOF and the level is steady, the decision: tolerance, alarm and the level
schedule (a step is taken after ``hold_s`` in tolerance at the new level; the drive is already
pre-scaled, the level moves by the synthesizer's gain only).

Safety blocks are independent: ``update_dof`` DOF of consecutive clean segments, a new block after
each. Each goes through every rule of :class:`~liveshape.control.safety.Supervisor` (persistence
counts blocks, as the block loop counts updates), is the run's update record, and at full level
enters the full-level average of the verdict.
"""

from __future__ import annotations

import math

import numpy as np

from liveshape.control import equalizer
from liveshape.control.safety import UpdateVerdict
from liveshape.control.stages import judge, segments_for_dof
from liveshape.control.tracking import PowerGainTracker, log_bias_db, n_avg_for_dof
from liveshape.dsp.segments import SegmentPowers
from liveshape.dsp.spectra import welch_dof
from liveshape.dsp.spectral_stats import overlap_correlation_sq

__all__ = ["CHANGE_DB", "SHORT_SEGMENTS", "SUM_SEGMENTS", "DecisionWindow", "FastLoop",
           "fast_update_segments"]

#: Averaging numbers (segments) of the short per-line and band-sum averages.
SHORT_SEGMENTS = 6
SUM_SEGMENTS = 3
#: A block closed early (at the start of full level) needs at least this many segments; a
#: shorter one goes on into the next block.
MIN_BLOCK_SEGMENTS = 8
#: A line's short and long estimates this far apart (dB) restart its long average.
CHANGE_DB = 4.0


class DecisionWindow:
    """Linear average of the last ``k`` rows pushed (a ring), with its Welch DOF."""

    def __init__(self, k: int, n_lines: int) -> None:
        self.k = int(k)
        self._rows = np.zeros((self.k, n_lines))
        self._sum = np.zeros(n_lines)
        self._n = 0
        self._i = 0
        self.dof = welch_dof(self.k)

    @property
    def full(self) -> bool:
        return self._n >= self.k

    def push(self, row: np.ndarray) -> None:
        old = self._rows[self._i]
        self._sum -= old
        old[:] = row
        self._sum += row
        self._i = (self._i + 1) % self.k
        self._n += 1
        if self._i == 0:  # refresh the running sum once per turn (no drift of round-off)
            self._sum = self._rows.sum(axis=0)

    @property
    def psd(self) -> np.ndarray:
        return self._sum / min(self._n, self.k)


class FastLoop:
    """Equalize and full level with the fast loop (mixed into the controller)."""

    def _fast_setup(self, id_psd: np.ndarray, id_gain: float, id_control: np.ndarray,
                    id_dof: float, *, window_seed: int = 0) -> None:
        """Start the fast estimators after identification.

        ``id_control`` (g²/Hz, band) was measured with the full-level drive ``id_psd`` played at
        ``id_gain``: the plant estimate starts from it. With ``window_seed`` > 0 (a confirmed warm
        start: the identification played the drive the loop starts with) it also counts as that
        many segments of the decision window (its linear average, so the window's mean is the
        linear average of all the segments it then holds).
        """
        c = self.spec.control
        band, n = self._band, self.frame_length
        c2 = overlap_correlation_sq("hann", 0.5, n)
        n_lines = int(np.count_nonzero(band))
        self._tracker = PowerGainTracker(
            n_lines, n_long=n_avg_for_dof(float(c.target_dof), c2), n_short=SHORT_SEGMENTS,
            n_sum=SUM_SEGMENTS, c2=c2, change_db=CHANGE_DB)
        self._tracker.seed(id_control, id_psd[band] * id_gain**2, id_dof)
        self._segs = SegmentPowers(self.fs_hz, n, band)
        self._seg_from = self._out.n_out + (self._delay or 0)  # response index of segment 0
        self._window = DecisionWindow(segments_for_dof(float(c.target_dof)), n_lines)
        for _ in range(min(window_seed, self._window.k - 1)):
            self._window.push(id_control / id_gain**2)
        self._h2_id = np.abs(self._h1[band]) ** 2  # identified |H|², g²/FS²
        self._blk = np.zeros(n_lines)
        self._blk_d = np.zeros(n_lines)
        self._blk_n = 0
        self._blk_full = True
        self._since_update = 0
        if self._kurt is not None:  # the non-Gaussian drive starts with equalize
            self._out.synth.set_kurtosis(self._kurt.drive)
        self._tones_setup()
        self._fast_res: equalizer.DriveResult | None = None
        self._last_clean = False

    def _fast_restart(self) -> None:
        """Drop the partial segments (a dropout): segments count again from the next sample."""
        self._segs.reset()
        if self._inputs is not None:
            self._inputs.reset()
        self._seg_from = self._resp.next
        self._since_update = 0

    def _fast_feed(self, x: np.ndarray, y: np.ndarray, i0: int) -> None:
        if self._tones is None:
            self._fast_feed_clean(y, i0)
            return
        for yc, ic in self._tones_feed(x, y, i0):  # the control less its tones
            self._fast_feed_clean(yc, ic)
            if self._status != "running":
                return

    def _fast_feed_clean(self, y: np.ndarray, i0: int) -> None:
        j = self._seg_from - i0
        if j >= y.size:
            return
        if self._kurt is not None:
            self._kurtosis_feed(y[max(0, j):], i0 + max(0, j))
        self._segs.push(y[max(0, j):])
        first, rows = self._segs.pop()
        xin = None
        if self._inputs is not None:  # the other inputs, on the same samples and segments
            all_rows, x, r0 = self._rows_now
            off = i0 + max(0, j) - r0
            sl = slice(off, off + y.size - max(0, j))
            self._inputs.push(all_rows[:, sl], x[sl])
            xin = self._inputs.pop()
        hop, n, delay = self._hop, self.frame_length, self._delay or 0
        for r in range(rows.shape[0]):
            start = self._seg_from + (first + r) * hop
            self._fast_segment(rows[r] * self._gpf2, start - delay, (start + n) / self.fs_hz,
                               None if xin is None else xin[r])
            if self._status != "running":
                return

    def _kurtosis_feed(self, y: np.ndarray, i0: int) -> None:
        """Control samples played at a steady level go to the kurtosis loop (normalized)."""
        out = self._out
        g = out.segment_gain(i0 - (self._delay or 0), y.size)
        if g is None or g <= 0.0 or g != out.gain_target:
            return
        k = self._kurt
        if k.push(y / g, full_level=self._stage == "full_level" and g == 1.0):
            out.synth.set_kurtosis(k.drive)
            self._emit("kurtosis", f"control kurtosis {k.measured:.2f} (averaged "
                       f"{k.averaged:.2f}, target {k.target:g}): drive kurtosis {k.drive:.2f}"
                       + (" (the clip level allows no more)" if k.limited else ""),
                       {"control_kurtosis": k.measured, "control_kurtosis_avg": k.averaged,
                        "target": k.target, "drive_kurtosis": k.drive,
                        "drive_kurtosis_max": k.drive_max, "clip_limited": k.limited})

    def _fast_segment(self, p: np.ndarray, drive_start: int, t: float,
                      xin: np.ndarray | None = None) -> None:
        """One control segment ``p`` (g²/Hz) answering the drive from ``drive_start`` on;
        ``xin``: every input's coefficients of the same segment (several inputs)."""
        out, band = self._out, self._band
        g = out.segment_gain(drive_start, self.frame_length)
        self._last_clean = g is not None and g == out.gain_target
        # the level the segment played: steady, or the Hann-weighted mean square of a ramp's
        # per-sample gains (its expected power scales with exactly that)
        g2 = g * g if g is not None else out.segment_gain2(drive_start, self.frame_length)
        if g2 <= 1e-12:
            return
        # a non-Gaussian drive plays bursts by design: each segment's expected control power
        # is its known burst factor times the target's (1 for a Gaussian drive)
        burst = out.segment_burst(drive_start)
        d_full = out.segment_psd(drive_start, band)  # bursts included
        steady_full = self._stage == "full_level" and g is not None and g == 1.0
        primary = p
        if xin is not None:  # the control inputs combined; monitors, limits, reference
            p, trip = self._inputs.segment(xin, p, g2 * burst, steady_full=steady_full, t_s=t)
            if trip is not None:
                self._abort(trip)
                return
        # the rms rule on the control held on target; loop open on the input identified
        trip = self.supervisor.check_segment(
            t, control_sum=float(primary.sum()), target_sum=self._target_sum * g2 * burst,
            band_dof=self._seg_band_dof, predicted_sum=float(np.dot(self._h2_id, d_full)) * g2,
            rms_sum=None if xin is None else float(p.sum()))
        if trip is not None:
            self._abort(trip)
            return
        self._tracker.push(p, d_full * g2)
        norm = p / (g2 * burst)  # the control per unit of the PSD the drive is made of
        self._window.push(norm)
        if steady_full and self._blk_n and not self._blk_full:
            # the first segment all at full level: full-level blocks hold full-level data only
            self._fast_stage_change(t, completed=False)
        self._blk += norm
        self._blk_d += d_full / burst
        self._blk_n += 1
        self._blk_full &= steady_full
        self._since_update += 1
        # a line that moved is corrected at once, not at the next scheduled update
        if self._since_update >= self._m_update or self._tracker.changed():
            self._since_update = 0
            self._fast_update(t)
        if self._status == "running":
            self._fast_decide(t)
        if self._blk_n >= self._k_update and self._status == "running":
            self._fast_block(t)  # after the update: the record carries the newest decision

    def _fast_update(self, t: float) -> None:
        """A drive update from the plant estimate, then a decision when one is due."""
        c, band = self.spec.control, self._band
        gain_t, dof, restarted = self._tracker.estimate()
        if restarted.any():
            self._emit("track", f"{int(np.count_nonzero(restarted))} lines moved: their "
                       "estimate restarted", {"lines_restarted": int(np.count_nonzero(restarted)),
                                              "f_hz": [float(f) for f in self.f_hz[restarted]]})
        old = self._out.psd
        target = self._target
        if self._inputs is not None:  # the extreme pick; monitors at their limits: notches
            notch = self._inputs.on_update()
            if np.any(notch < 0.0):
                target = target.copy()
                target[band] *= 10.0 ** (notch / 10.0)
        pred = np.zeros(old.size)
        # the control this drive gives at full level, with the mean dB bias of the estimate
        # removed (its DOF per line)
        pred[band] = gain_t * old[band] * 10.0 ** (-log_bias_db(dof) / 10.0)
        if restarted.any():
            # a line that moved is corrected in full at once (gain 1 instead of γ, still within
            # max_step_db): R (C/R)^(1/γ) makes the law's step γ·log(R/·) equal to log(R/C)
            lines = np.flatnonzero(band)[restarted]
            r = target[lines]
            pred[lines] = r * (pred[lines] / r) ** (1.0 / self._gamma)
        g = self._est_gain
        hum = self._hum_mask()
        frozen = self._frozen
        if hum is not None:  # the drive holds on lines the drive does not cause
            frozen = frozen.copy()
            frozen[np.flatnonzero(band)[hum]] = True
        res = equalizer.update_drive(
            old, target, pred, gain=self._gamma, max_step_db=c.max_step_db, band=band,
            ceiling_ms_fs2=self._out.ceiling_ms(g), df_hz=self.df_hz, frozen=frozen,
            law="direct")
        new = res.drive_psd
        if hum is not None:
            new = self._hum_drive(new, hum)
        if self._pending:
            new = np.minimum(new, old)
        self._out.set_psd(new, ceiling_hit=res.ceiling_hit)
        self._fast_res = res
        self._drive_updates.append(t)

    def _fast_decide(self, t: float) -> None:
        """A tolerance decision on the window (every clean segment at a steady level)."""
        if not (self._window.full and self._last_clean and not self._out.ramping):
            return
        g, band = self._est_gain, self._band
        d = judge(self._window.psd * g * g, self._target[band] * g * g,
                  alarm_db=self._alarm_db, abort_db=self._abort_db,
                  rms_alarm_db=self.spec.tolerance.rms_alarm_db, dof=self._window.dof,
                  df_hz=self.df_hz, exclude=self._excluded())
        self._on_decision(d, t)

    def _hum_drive(self, drive: np.ndarray, hum: np.ndarray) -> np.ndarray:
        """The drive on lines the drive does not cause: interpolated in dB over line index from
        the neighbouring lines' drive. The equalized drive is smooth where the plant is, and
        neither the control nor the FRF is trustworthy on those lines (the hum, or what is left
        of it, swamps a low-level identification there)."""
        band = self._band
        full = np.zeros(band.size, dtype=bool)
        full[np.flatnonzero(band)[hum]] = True
        ok = band & (drive > 0) & ~full
        if not np.any(ok):
            return drive
        with np.errstate(divide="ignore"):
            d_db = np.where(drive > 0, 10.0 * np.log10(np.where(drive > 0, drive, 1.0)), 0.0)
        d_db = equalizer.fill_low_coherence(d_db, ok, band)
        out = np.array(drive, dtype=float)
        out[full] = 10.0 ** (d_db[full] / 10.0)
        return out

    def _fast_block(self, t: float, *, final: bool = False) -> None:
        """An independent safety block: every rule, the update record, the full-level average.

        A block is normally ``update_dof`` DOF of segments; a shorter one is closed when full
        level starts (so that full-level blocks hold full-level data only) and, with
        ``final``, when the test time is complete (no rule is checked then: the run is over).
        """
        band, g = self._band, self._est_gain
        k = self._blk_n
        dof = self._nu_update if k == self._k_update else welch_dof(k)
        ctrl_norm = self._blk / k
        ctrl, target_b = ctrl_norm * g * g, self._target[band] * g * g
        played = self._out.played_psd(band, g)
        predicted = self._h2_id * (self._blk_d / k) * g * g  # identified FRF, drive the block saw
        at_limit = self._out.ceiling_hit or self._out.clipped > 0
        keep = self._excluded()  # lines the drive does not cause, notched lines: out
        keep = slice(None) if keep is None else ~keep
        if final:
            verdict = UpdateVerdict(None, (), _rms_db(ctrl[keep], target_b[keep]), 0, math.nan,
                                    math.nan, math.nan)
        else:
            verdict = self.supervisor.check_update(
                t, control_psd=ctrl[keep], target_psd=target_b[keep], dof=dof,
                abort_db=self._abort_db[keep], predicted_psd=predicted[keep],
                drive_at_limit=at_limit)
        self._updates += 1
        full = self._blk_full
        self._blk_reset()
        self._out.reset_counters()
        if verdict.trip is not None:
            self._record_update(t, ctrl, target_b, played, None, verdict.rms_error_db, None,
                                applied=False, dof=dof)
            self._abort(verdict.trip)
            return
        self._note_converging(verdict)
        if verdict.pending and not self._pending:
            self._emit("hold", f"drive may only go down while {', '.join(verdict.pending)} is "
                       "pending", {"update": self._updates, "pending": list(verdict.pending)})
        self._pending = tuple(verdict.pending)
        if full:
            self._full.push(ctrl_norm, dof, t)
        d = self._decision
        self._recorded_decision = d  # the run's final figures are those of the last record
        self._record_update(t, ctrl, target_b, played, self._fast_res, verdict.rms_error_db,
                            None if d is None else d.in_tolerance, applied=not verdict.pending,
                            dof=dof)

    def _blk_reset(self) -> None:
        self._blk = np.zeros_like(self._blk)
        self._blk_d = np.zeros_like(self._blk_d)
        self._blk_n, self._blk_full = 0, True

    def _fast_stage_change(self, t: float, *, completed: bool) -> None:
        """Close the current block at the start of full level, or with the end of the test.

        A block of at least half the usual segments becomes an update record (with the end
        of the test: no rule is checked, the run is over). A shorter one at the end only joins
        the full-level average: its few DOF would show as large line deviations in the record.
        """
        if not self._fast or self._blk_n == 0:
            return
        least = max(MIN_BLOCK_SEGMENTS, self._k_update // 2)
        if not completed:
            # full level starts: its blocks must hold full-level data only
            if self._blk_n >= least:
                self._fast_block(t)
            else:  # too few segments for a record (each was checked on its own already)
                self._blk_reset()
            return
        if self._blk_n >= least:
            self._fast_block(t, final=True)
        elif self._blk_full:
            self._full.push(self._blk / self._blk_n, welch_dof(self._blk_n), t)

    @property
    def drive_update_times_s(self) -> tuple[float, ...]:
        """Run times of the drive updates so far, s (fast loop; the block loop: its updates)."""
        return tuple(self._drive_updates)



def _rms_db(ctrl: np.ndarray, target: np.ndarray) -> float:
    c, r = float(ctrl.sum()), float(target.sum())
    return 10.0 * math.log10(c / r) if c > 0 and r > 0 else -math.inf


def fast_update_segments(update_interval_s: float, fs_hz: float, hop: int) -> int:
    """Segments between two drive updates for a wanted interval (at least 1)."""
    return max(1, int(round(update_interval_s * fs_hz / hop)))


