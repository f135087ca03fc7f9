"""Several inputs in the fast loop: combined control, monitors, limits with notches,
transmissibility and the loopback reference.

Pure numpy. A rig with ``rig.inputs`` (:mod:`liveshape.testdef.inputs`) hands the controller a
block of shape ``(samples, inputs)``, the columns in the order of the roles. The controller keeps
doing everything one-channel (connection check, identification, silence, hum, kurtosis) on the
*primary* control input, the first ``control`` in the list, and :class:`InputSet` adds the rest,
segment by segment, on exactly the Welch segments of the primary:

Combined control (``control.strategy``)
    ``average``: the weighted mean of the control inputs' periodograms, which is exactly the
    periodogram-level average of :func:`liveshape.dsp.multichannel.combine_control`; the
    plant estimate downstream then tracks ``Σ w_i |H_i|²``. ``maximum``/``minimum``: on each line
    the periodogram of the channel whose long running average (the decision DOF) is extreme.
    Picking by the averages rather than by each segment keeps every segment an unbiased
    periodogram of one channel; the pick itself still prefers a channel that reads high by
    chance, which is the extremal bias of :func:`liveshape.dsp.multichannel.extremal_bias_db`
    at the decision DOF (an upper bound: the channels are correlated), stated in the summary.
Input lost (rule ``input_lost``)
    A control input whose band power in a segment reads ``drop_db`` below the others
    (:func:`liveshape.dsp.multichannel.channel_dropouts`) for :data:`DROP_SEGMENTS` segments in
    a row trips its own rule: an average that kept it would read low and drive the other points
    up. A monitor with a limit trips the same rule when its band power over the control's falls
    ``drop_db`` below its own running mean for as long: a limit only protects while its sensor
    reads.
Monitors and limits
    Each monitor's periodogram, normalized to full level like the control's, goes into a decision
    window of the same length as the control's. Where a monitor has a limit, the power
    transmissibility ``|T|² = G_mon / G_ctrl`` of the two windows (a property of the structure,
    not of the level or of the drive's recent changes) says how far the reference must go down
    on each line for the monitor to stay at its limit at full level::

        notch = min(0, 10 log10(limit / (target |T|²))) − margin

    spread to ``±NOTCH_SPREAD_LINES`` neighbours (the deepest wins) and rate-limited per drive
    update (down by at most ``NOTCH_DOWN_DB``, back up by at most ``NOTCH_UP_DB``). Notched lines
    are the deliberate ones: the tolerance statistics leave them out and the verdict counts them
    as ``tolerance.notches`` says.
Transmissibility
    Monitor over the primary control, H1-style: ``T = G_cm / G_cc`` with the coherence
    ``|G_cm|² / (G_cc G_mm)`` (Bendat & Piersol, *Random Data*, 4th ed., §9.1), per update block
    and over the whole time at full level.
Reference
    A loopback of the drive, read back in drive full scale: the FRF from the drive as it left the
    card, ``H_ref = G_rc / G_rr``, its coherence, and the card's output gain per line, the H1
    from the digital drive to the reference, ``G_dr / G_dd`` (a drifting DAC shows there and
    not in ``H_ref``).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from liveshape.control.safety import Trip
from liveshape.dsp.multichannel import channel_dropouts, extremal_bias_db
from liveshape.dsp.segments import SegmentSpectra
from liveshape.dsp.spectra import welch_dof

__all__ = ["DROP_SEGMENTS", "NOTCH_MARK_DB", "InputRows", "InputSet", "primary_column"]

#: Segments in a row a control input must read low for the input-lost rule (0.34 s at
#: 8192/48 kHz; a band sum of one segment has hundreds of DOF, so one segment is already sharp)
#: [common practice: a short confirmation against a single bad segment].
DROP_SEGMENTS = 4
#: Segments the windows need before the first notch (0.7 s at 8192/48 kHz): both channels see
#: the same drive, so their ratio |T|² scatters only by the incoherent part and is usable long
#: before the decision DOF; a limit acts as early as it can.
NOTCH_MIN_SEGMENTS = 8
#: A line notched deeper than this (dB) counts as notched.
NOTCH_MARK_DB = 0.25
#: Neighbours on each side a notch spreads to (a limit peak is a resonance a few lines wide).
NOTCH_SPREAD_LINES = 2
#: Largest notch change per drive update, dB: down fast (the limit protects the item), up slowly.
NOTCH_DOWN_DB = 2.0
NOTCH_UP_DB = 0.5
#: The notch aims this far below the limit, dB (the window estimate scatters by about 0.4 dB
#: at 120 DOF) [common practice].
NOTCH_MARGIN_DB = 0.5


def primary_column(roles: Any) -> int:
    """Column of the first control input among ``roles``."""
    return next(i for i, r in enumerate(roles) if r.role == "control")


class InputRows:
    """The other inputs' samples, handed out in step with the primary's response queue."""

    def __init__(self, n_inputs: int) -> None:
        self._k = int(n_inputs)
        self._pending: list[np.ndarray] = []

    def push(self, rows: np.ndarray) -> None:
        """One block, ``(n_inputs, n)``."""
        self._pending.append(rows)

    def take(self, n: int) -> np.ndarray:
        """The next ``n`` samples of every input, ``(n_inputs, n)``."""
        if not self._pending:
            return np.zeros((self._k, 0))
        rows = np.concatenate(self._pending, axis=1) if len(self._pending) > 1 else \
            self._pending[0]
        out, rest = rows[:, :n], rows[:, n:]
        self._pending = [rest] if rest.shape[1] else []
        return out


@dataclass
class _Sums:
    """Linear sums over segments (per input and line)."""

    psd: np.ndarray      # normalized periodograms, per input and the drive (k + 1, lines)
    cross: np.ndarray    # conj(X_primary) X_i, normalized (k + 1, lines)
    xr: np.ndarray       # conj(X_drive) X_reference, normalized (lines)
    n: int = 0

    @classmethod
    def zeros(cls, k: int, n_lines: int) -> _Sums:
        return cls(np.zeros((k, n_lines)), np.zeros((k, n_lines), complex),
                   np.zeros(n_lines, complex))

    def add(self, p: np.ndarray, c: np.ndarray, xr: np.ndarray) -> None:
        self.psd += p
        self.cross += c
        self.xr += xr
        self.n += 1


class InputSet:
    """The inputs beyond the primary control, on the primary's segments (module docstring).

    Parameters
    ----------
    roles : sequence of InputRole
        The rig's inputs, in column order.
    calibration : ChainCalibration
        Per-input factors (``g_per_fs_at``, ``drive_fs_per_input_fs``).
    fs_hz, nperseg : float, int
        The control's Welch segments.
    band : ndarray of bool
        The control lines among all ``nperseg // 2 + 1`` lines.
    f_hz : ndarray
        Frequencies of the band lines, Hz.
    target_psd : ndarray
        Target on the band lines at full level, g²/Hz.
    strategy : str
        ``control.strategy``.
    window_segments, long_segments : int
        Decision window length and the long average of the extreme pick, segments.
    """

    def __init__(self, roles: Any, calibration: Any, *, fs_hz: float, nperseg: int,
                 band: np.ndarray, f_hz: np.ndarray, target_psd: np.ndarray, strategy: str,
                 window_segments: int, long_segments: int,
                 drop_db: float = 12.0) -> None:
        self.roles = tuple(roles)
        self.primary = primary_column(self.roles)
        self.control = tuple(i for i, r in enumerate(self.roles) if r.role == "control")
        self.monitor = tuple(i for i, r in enumerate(self.roles) if r.role == "monitor")
        self.reference = next((i for i, r in enumerate(self.roles) if r.role == "reference"),
                              None)
        k = len(self.roles)
        self._drive_col = k  # the digital drive, aligned, rides along as the last row
        scale = np.ones(k + 1)
        for i, r in enumerate(self.roles):
            scale[i] = calibration.drive_fs_per_input_fs(r.channel) if r.role == "reference" \
                else calibration.g_per_fs_at(r.channel)
        self._scale2 = scale ** 2
        self._scale = scale
        self.strategy = strategy
        w = np.array([self.roles[i].weight for i in self.control], dtype=float)
        self._w = w / w.sum()
        self.f_hz = np.asarray(f_hz, dtype=float)
        self.df_hz = float(fs_hz) / int(nperseg)
        n_lines = self.f_hz.size
        self._target = np.asarray(target_psd, dtype=float)
        self._segs = SegmentSpectra(fs_hz, nperseg, band, k + 1)
        self._win_k = int(window_segments)
        self._win = np.zeros((self._win_k, k + 1, n_lines))  # normalized periodograms, a ring
        self._win_c = np.zeros((self._win_k, n_lines))   # combined control, normalized
        self._win_n = 0
        self._long = long_segments
        self._ema = np.zeros((len(self.control), n_lines))
        self._ema_k = 0
        self._pick = np.zeros(n_lines, dtype=int)  # index into self.control
        self._low_run = np.zeros(len(self.control), dtype=int)
        self._mon_ratio: dict[int, tuple[int, float]] = {}  # limited monitor: (count, mean dB)
        self._mon_low: dict[int, int] = {}
        self._drop_db = float(drop_db)
        self.limits = {i: _limit_lines(self.roles[i].limit, self.f_hz) for i in self.monitor
                       if self.roles[i].limit is not None}
        self.notch_db = np.zeros(n_lines)
        self.notch_deepest_db = np.zeros(n_lines)  # deepest notch at full level, per line
        self._blk = _Sums.zeros(k + 1, n_lines)
        self._full = _Sums.zeros(k + 1, n_lines)

    # ------------------------------------------------------------------ segments
    def reset(self) -> None:
        """Drop the partial segments (a dropout of the primary)."""
        self._segs.reset()

    def push(self, rows: np.ndarray, drive: np.ndarray) -> None:
        """Every input's samples from the primary's segment start on, ``(n_inputs, n)`` FS,
        and the digital drive that produced them (delay-aligned, FS)."""
        self._segs.push(np.vstack([rows, drive[np.newaxis]]))

    def pop(self) -> np.ndarray:
        """The coefficients of the segments completed, ``(segments, inputs, lines)``."""
        return self._segs.pop()[1]

    def segment(self, x: np.ndarray, p_primary: np.ndarray, norm: float, *, steady_full: bool,
                t_s: float) -> tuple[np.ndarray, Trip | None]:
        """One segment: the combined control periodogram (g²/Hz) and a trip, if any.

        Parameters
        ----------
        x : ndarray, complex, shape (inputs + 1, lines)
            The segment's coefficients (input FS, density-scaled), the drive's last.
        p_primary : ndarray
            The primary's periodogram as the loop uses it (g²/Hz, hum removed).
        norm : float
            The segment's expected power relative to full level (level² × burst factor).
        steady_full : bool
            The segment played all at full level (it counts for the full-level figures).
        """
        xs = x * self._scale[:, None]
        p = xs.real ** 2 + xs.imag ** 2
        p[self.primary] = p_primary
        pc = p[list(self.control)]
        trip = self._dropouts(pc, t_s)
        a = 1.0 / min(self._ema_k + 1, self._long)
        self._ema += a * (pc / norm - self._ema)
        self._ema_k += 1
        if len(self.control) == 1:
            comb = pc[0]
        elif self.strategy == "average":
            comb = self._w @ pc
        else:
            comb = pc[self._pick, np.arange(pc.shape[1])]
        if trip is None:
            trip = self._limit_lost(p, comb, t_s)
        i = self._win_n % self._win_k
        self._win[i] = p / norm
        self._win_c[i] = comb / norm
        self._win_n += 1
        cross = np.conj(xs[self.primary]) * xs / norm
        r = self.reference
        xr = 0.0 if r is None else np.conj(xs[self._drive_col]) * xs[r] / norm
        self._blk.add(p / norm, cross, xr)
        if steady_full:
            self._full.add(p / norm, cross, xr)
            self.notch_deepest_db = np.minimum(self.notch_deepest_db, self.notch_db)
        return comb, trip

    def _dropouts(self, pc: np.ndarray, t_s: float) -> Trip | None:
        """The input-lost rule on the control inputs' band powers."""
        if len(self.control) < 2:
            return None
        rms = np.sqrt(np.maximum(pc.sum(axis=1) * self.df_hz, 0.0))
        low = channel_dropouts(rms, drop_db=self._drop_db)
        self._low_run = np.where(low, self._low_run + 1, 0)
        if not np.any(self._low_run >= DROP_SEGMENTS):
            return None
        j = int(np.argmax(self._low_run))
        r = self.roles[self.control[j]]
        others = float(np.median(np.delete(rms, j)))
        lost_db = 20.0 * math.log10(max(rms[j], 1e-300) / others) if others > 0 else -math.inf
        return Trip("input_lost",
                    f"control input {r.channel} ({r.name}) reads {lost_db:.1f} dB below the "
                    f"other control inputs (limit −{self._drop_db:g} dB): sensor loose or "
                    "cable off", t_s,
                    {"input": r.channel, "name": r.name, "band_rms_g": float(rms[j]),
                     "others_rms_g": others, "drop_db": self._drop_db})

    def _limit_lost(self, p: np.ndarray, comb: np.ndarray, t_s: float) -> Trip | None:
        """The input-lost rule on the monitors with a limit: a limit protects the item only
        while its sensor reads. The band power of the monitor over the control's is a property
        of the structure; a monitor whose ratio falls ``drop_db`` below its own running mean
        for :data:`DROP_SEGMENTS` segments in a row has come loose."""
        if not self.limits:
            return None
        c = float(comb.sum())
        for i in self.limits:
            if c <= 0.0:
                return None
            m = float(p[i].sum())
            ratio_db = 10.0 * math.log10(max(m, 1e-300) / c)
            k, ref = self._mon_ratio.get(i, (0, 0.0))
            low = k >= NOTCH_MIN_SEGMENTS and ratio_db < ref - self._drop_db
            run = self._mon_low.get(i, 0) + 1 if low else 0
            self._mon_low[i] = run
            if not low:  # the running mean of the normal readings (at most a window long)
                k += 1
                ref += (ratio_db - ref) / min(k, self._win_k)
                self._mon_ratio[i] = (k, ref)
            if run >= DROP_SEGMENTS:
                r = self.roles[i]
                return Trip("input_lost",
                            f"monitor input {r.channel} ({r.name}) with a limit reads "
                            f"{ratio_db - ref:.1f} dB below its usual level against the control "
                            f"(limit −{self._drop_db:g} dB): its sensor is loose or its cable "
                            "off, and the limit no longer protects the item", t_s,
                            {"input": r.channel, "name": r.name, "drop_db": self._drop_db,
                             "ratio_change_db": ratio_db - ref})
        return None

    # ------------------------------------------------------------------ updates
    @property
    def window_full(self) -> bool:
        return self._win_n >= self._win_k

    def _window(self) -> tuple[np.ndarray, np.ndarray]:
        """Window means: every input (k, lines) and the combined control (lines), normalized."""
        m = min(self._win_n, self._win_k)
        return self._win[:m].mean(axis=0), self._win_c[:m].mean(axis=0)

    def on_update(self) -> np.ndarray:
        """At each drive update: the extreme pick and the notches. Returns the notch (dB ≤ 0,
        band lines) the reference carries now."""
        if self.strategy != "average" and len(self.control) > 1:
            self._pick = (np.argmax if self.strategy == "maximum" else np.argmin)(self._ema,
                                                                                   axis=0)
        if not self.limits or self._win_n < NOTCH_MIN_SEGMENTS:
            return self.notch_db
        win, ctrl = self._window()
        need = np.zeros(self.notch_db.size)
        for i, lim in self.limits.items():
            t2 = win[i] / np.maximum(ctrl, 1e-300)
            with np.errstate(divide="ignore"):
                n_i = 10.0 * np.log10(lim / np.maximum(self._target * t2, 1e-300))
            need = np.minimum(need, n_i - NOTCH_MARGIN_DB)
        need = np.where(need < -NOTCH_MARGIN_DB, need, 0.0)  # below the limit: no notch
        need = _spread_min(need, NOTCH_SPREAD_LINES)
        self.notch_db = np.clip(need, self.notch_db - NOTCH_DOWN_DB, self.notch_db + NOTCH_UP_DB)
        self.notch_db = np.minimum(self.notch_db, 0.0)
        return self.notch_db

    @property
    def notched(self) -> np.ndarray:
        """Band lines notched now (deeper than :data:`NOTCH_MARK_DB`)."""
        return self.notch_db < -NOTCH_MARK_DB

    @property
    def notched_full(self) -> np.ndarray:
        """Band lines notched at any time at full level."""
        return self.notch_deepest_db < -NOTCH_MARK_DB

    # ------------------------------------------------------------------ figures
    def _figures(self, s: _Sums, scale: float) -> dict[str, np.ndarray]:
        """Per-line arrays of a sum: each monitor's PSD and transmissibility, the reference's
        FRF and output gain, and the notch."""
        out: dict[str, np.ndarray] = {}
        if s.n == 0:
            return out
        g = s.psd / s.n * scale
        c = s.cross / s.n * scale
        gcc = np.maximum(g[self.primary], 1e-300)
        for i in self.control + self.monitor:
            name = self.roles[i].name
            out[f"input_{name}_psd_g2_hz"] = g[i]
        for i in self.monitor:
            name = self.roles[i].name
            t = c[i] / gcc
            out[f"input_{name}_trans_mag"] = np.abs(t)
            out[f"input_{name}_trans_phase_deg"] = np.degrees(np.angle(t))
            out[f"input_{name}_trans_coherence"] = np.abs(c[i]) ** 2 / (gcc * np.maximum(g[i],
                                                                                      1e-300))
        if self.reference is not None:
            gr = np.maximum(g[self.reference], 1e-300)
            h = np.conj(c[self.reference]) / gr  # G_rc / G_rr with G_rc = conj(G_cr)
            out["reference_h1_g_per_fs"] = h
            out["reference_coherence"] = np.abs(c[self.reference]) ** 2 / (gcc * gr)
            gd = np.maximum(g[self._drive_col], 1e-300)
            xr = s.xr / s.n * scale
            out["output_gain_db"] = 20.0 * np.log10(np.maximum(np.abs(xr) / gd, 1e-300))
            out["output_coherence"] = np.abs(xr) ** 2 / (gd * gr)
        if self.limits:
            out["notch_db"] = self.notch_db.copy()
        return out

    def block_arrays(self) -> dict[str, np.ndarray]:
        """The figures of the segments since the last call (one update record), normalized to
        full level; the block sums restart."""
        out = self._figures(self._blk, 1.0)
        self._blk = _Sums.zeros(*self._blk.psd.shape)
        return out

    def full_arrays(self) -> dict[str, np.ndarray]:
        """The figures of all the time at full level (empty before)."""
        out = self._figures(self._full, 1.0)
        if out and self.limits:
            out["notch_deepest_db"] = self.notch_deepest_db.copy()
        return out

    @property
    def full_dof(self) -> float:
        """Welch DOF of the full-level figures."""
        return welch_dof(self._full.n) if self._full.n else 0.0

    def summary(self, *, dof: float, level_gain: float = 1.0,
                full: bool = False) -> dict[str, Any]:
        """Per-input figures for screens and the record.

        ``full``: of the whole time at full level (the record's); otherwise of the decision
        window at the level ``level_gain`` playing now.
        """
        if full:
            if self._full.n == 0:
                return {}
            g = self._full.psd / self._full.n
        else:
            if self._win_n == 0:
                return {}
            g = self._window()[0] * level_gain ** 2
        rows = []
        for i, r in enumerate(self.roles):
            if r.role == "reference":
                continue
            row: dict[str, Any] = {"channel": r.channel, "name": r.name, "role": r.role,
                                   "grms_g": math.sqrt(max(float(g[i].sum()) * self.df_hz, 0.0))}
            if i in self.limits:
                with np.errstate(divide="ignore"):
                    over = 10.0 * np.log10(np.maximum(g[i], 1e-300) / self.limits[i])
                j = int(np.argmax(over))
                row.update(limit_margin_db=float(over[j]), limit_f_hz=float(self.f_hz[j]))
            rows.append(row)
        notched = self.notched_full if full else self.notched
        depth = self.notch_deepest_db if full else self.notch_db
        out: dict[str, Any] = {"strategy": self.strategy, "inputs": rows}
        if self.limits:
            out["notched_lines"] = int(np.count_nonzero(notched))
            out["notch_deepest_db"] = float(depth.min()) if depth.size else 0.0
            if np.any(notched):
                f = self.f_hz[notched]
                out["notch_f_hz"] = [float(f.min()), float(f.max())]
        if len(self.control) > 1 and self.strategy != "average" and dof > 0:
            out["extremal_bias_db"] = extremal_bias_db(len(self.control), dof, self.strategy)
        return out


def _limit_lines(limit: Any, f_hz: np.ndarray) -> np.ndarray:
    """A limit profile on the band lines, g²/Hz; no limit (inf) outside its breakpoints."""
    lim = np.asarray(limit.asd_at(f_hz), dtype=float)
    return np.where(lim > 0, lim, np.inf)


def _spread_min(x: np.ndarray, k: int) -> np.ndarray:
    """Each line's minimum over itself and ``k`` neighbours on each side."""
    if k <= 0 or x.size == 0:
        return x
    pad = np.concatenate([np.zeros(k), x, np.zeros(k)])
    win = np.lib.stride_tricks.sliding_window_view(pad, 2 * k + 1)
    return win.min(axis=1)
