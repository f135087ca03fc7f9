"""Sine-on-random in the running loop: the tones' drive, their control, and their removal.

Pure. :class:`ToneStage` is a base of :class:`liveshape.control.controller.Controller` (with the
fast loop). With ``tones`` in the test definition, from the start of equalize:

* the drive stream adds the tones of a :class:`~liveshape.control.tonecontrol.ToneLoop` to the
  random *before* the level gain, so the tones follow the level steps and ramps exactly as the
  random does (their amplitudes are kept at full level); the random's rms ceiling leaves the
  tones their share of the peak limit;
* the aligned drive and control are cut into blocks of one update interval; in each block at a
  steady
  level each tone's amplitude is fitted by least squares in the drive and in the control
  (normalized by the level), the tone's drive amplitude is updated toward its target, and the
  fitted tones are subtracted from the control before the random spectrum is estimated
  (docs/methods.md, "Sine tones on random");
* a tone beyond its ``abort_db`` for :data:`TONE_PERSIST` consecutive blocks after it had been
  held within its tolerance trips ``tone_abort``; alarm changes are events; the summary lists each
  tone's target, measured amplitude and error.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from liveshape.control.safety import Trip
from liveshape.control.tonecontrol import ToneLoop, initial_drive_fs

__all__ = ["TONE_PERSIST", "ToneStage"]

#: Consecutive tone blocks beyond ``abort_db`` that trip ``tone_abort`` (about 1 s at the
#: default update interval) [common practice: a persistence of a few estimates].
TONE_PERSIST = 3
#: Weight of the newest block in the reported (averaged) tone amplitude.
REPORT_WEIGHT = 0.3
#: Update gain of the tones' amplitude law: a block's fit scatters by about
#: σ_random(tone line) · √(2 / n) (Cramér-Rao, Kay 1993 §3.7), a dB or so in 0.34 s at the
#: example's levels, so each update moves half way.
TONE_GAMMA = 0.5


class ToneStage:
    """The tones of a sine-on-random test (mixed into the controller)."""

    _tones: ToneLoop | None = None

    def _tones_setup(self) -> None:
        """Start the tones with the identified FRF (fast loop, start of equalize)."""
        spec = self.spec
        if not getattr(spec, "tones", ()):
            return
        cal = self.calibration
        h = np.abs(self._h1)  # g/FS on all lines
        k = [int(round(t.f_hz / self.df_hz)) for t in spec.tones]
        h_fs = np.array([h[i] for i in k]) / cal.g_per_fs  # response FS per drive FS
        h_fs = np.where(np.isfinite(h_fs) & (h_fs > 0), h_fs, 1.0)
        drive = initial_drive_fs([t.amplitude_g for t in spec.tones], cal.g_per_fs, h_fs)
        tl = ToneLoop(spec.tones, self.fs_hz, drive, gamma=TONE_GAMMA,
                      max_step_db=spec.control.max_step_db, averaging=0.5)
        tl.n = self._out.n_out  # the tones' time origin is drive sample 0
        tl._current = np.zeros_like(tl.drive_fs)  # the first block fades them in
        self._tones = tl
        self._out.tones = tl
        self._out.reserve_peak(2.0 * float(np.sum(drive)))  # room for the loop to raise them
        self._tone_buf: list[tuple[np.ndarray, np.ndarray]] = []
        self._tone_n = 0
        self._tone_i0: int | None = None
        self._tone_avg = np.full(len(spec.tones), np.nan)
        self._tone_err = np.full(len(spec.tones), np.nan)
        self._tone_alarm = np.zeros(len(spec.tones), dtype=bool)
        self._tone_held = np.zeros(len(spec.tones), dtype=bool)
        self._tone_beyond = np.zeros(len(spec.tones), dtype=int)
        self._emit("tones", f"{len(spec.tones)} tones on the random, starting at "
                   + ", ".join(f"{a:.3g} FS" for a in drive),
                   {"f_hz": [float(t.f_hz) for t in spec.tones], "drive_fs": drive.tolist()})

    def _tones_feed(self, x: np.ndarray, y: np.ndarray, i0: int) -> list[tuple[np.ndarray, int]]:
        """Aligned drive ``x`` and control ``y`` (FS) from response index ``i0``: the control
        chunks with the tones removed, ready for the random's estimation."""
        if self._tone_i0 is None:
            self._tone_i0 = i0
        rows = None if self._rows_now is None else self._rows_now[0]
        self._tone_buf.append((x, y, rows))
        self._tone_n += y.size
        if self._tone_n < self._m_update * self._hop:  # one update interval per tone block
            return []
        xs = np.concatenate([a for a, _, _ in self._tone_buf])
        ys = np.concatenate([b for _, b, _ in self._tone_buf])
        start = self._tone_i0
        if rows is not None:  # several inputs: the same block of every input, less its tones
            rs = np.concatenate([r for _, _, r in self._tone_buf], axis=1)
            self._rows_now = (self._tone_rows(rs, start), xs, start)
        self._tone_buf, self._tone_n, self._tone_i0 = [], 0, None
        return [(self._tone_block(xs, ys, start), start)]

    def _tone_rows(self, rows: np.ndarray, i0: int) -> np.ndarray:
        """Every input of the block less its own fit of the tones (each input sees them through
        its own FRF); the reference keeps them, as the drive it copies does."""
        n0 = i0 - (self._delay or 0)
        out = np.array(rows, dtype=float)
        for i, r in enumerate(self._roles):
            if r.role != "reference":
                out[i] -= self._tones.fit(out[i], n0).tones_part
        return out

    def _tone_block(self, x: np.ndarray, y: np.ndarray, i0: int) -> np.ndarray:
        tl, out, cal = self._tones, self._out, self.calibration
        n0 = i0 - (self._delay or 0)  # drive stream index of the block's first sample
        g = out.segment_gain(n0, y.size)
        y_g = y * cal.g_per_fs
        if g is None or g <= 0.0:
            fit = tl.fit(y_g, n0)  # a ramp: remove the tones, no update
            return (y_g - fit.tones_part) / cal.g_per_fs
        upd = tl.update(x / g, y_g / g, n0, level_db=0.0)
        fit = tl.fit(y_g, n0)
        self._tone_check(upd, g)
        return (y_g - fit.tones_part) / cal.g_per_fs

    def _tone_check(self, upd: Any, g: float) -> None:
        w = REPORT_WEIGHT
        m = upd.measured_g
        self._tone_avg = np.where(np.isfinite(self._tone_avg), (1 - w) * self._tone_avg + w * m,
                                  m)
        with np.errstate(divide="ignore"):
            self._tone_err = 20.0 * np.log10(self._tone_avg / upd.target_g)
        alarm = np.abs(self._tone_err) > self._tones.tol_db
        self._tone_held |= ~alarm
        for i in np.flatnonzero(alarm != self._tone_alarm):
            f = float(upd.f_hz[i])
            kind = "tone_alarm" if alarm[i] else "tone_clear"
            self._emit(kind, f"tone {f:.1f} Hz: {self._tone_avg[i]:.3g} g against "
                       f"{upd.target_g[i]:.3g} g ({self._tone_err[i]:+.2f} dB)",
                       {"f_hz": f, "measured_g": float(self._tone_avg[i]),
                        "target_g": float(upd.target_g[i]),
                        "error_db": float(self._tone_err[i])})
        self._tone_alarm = alarm
        # the abort rule: a tone once held, now beyond its abort limit block after block (on
        # the averaged amplitude: one block's fit scatters)
        beyond = self._tone_held & (np.abs(self._tone_err) > self._tones.abort_db)
        self._tone_beyond = np.where(beyond, self._tone_beyond + 1, 0)
        if np.any(self._tone_beyond >= TONE_PERSIST) and self._status == "running":
            i = int(np.argmax(self._tone_beyond))
            self._abort(Trip(
                "tone_abort",
                f"tone {float(upd.f_hz[i]):.1f} Hz at {float(self._tone_avg[i]):.3g} g against "
                f"{float(upd.target_g[i]):.3g} g ({float(self._tone_err[i]):+.1f} dB, limit "
                f"±{float(self._tones.abort_db[i]):g} dB) for {TONE_PERSIST} blocks",
                self.t_s, {"f_hz": float(upd.f_hz[i]), "error_db": float(self._tone_err[i]),
                           "abort_db": float(self._tones.abort_db[i]),
                           "blocks": int(self._tone_beyond[i])}))

    def tone_summary(self) -> list[dict[str, Any]] | None:
        """Each tone's target, averaged measured amplitude (g peak) and error, or None."""
        if self._tones is None:
            return None
        out = []
        for i, t in enumerate(self.spec.tones):
            e = float(self._tone_err[i])
            out.append({"f_hz": float(t.f_hz), "f_hi_hz": t.f_hi_hz,
                        "target_g": float(t.amplitude_g),
                        "measured_g": float(self._tone_avg[i]),
                        "error_db": e if math.isfinite(e) else None,
                        "tolerance_db": float(t.tolerance_db),
                        "in_tolerance": bool(abs(e) <= float(t.tolerance_db))
                        if math.isfinite(e) else None})
        return out
