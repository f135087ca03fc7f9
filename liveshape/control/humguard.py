"""Lines the drive does not cause (mains hum): found, tracked, and taken out of the control.

Pure numpy/scipy. A control accelerometer on a sound-card rig often carries mains hum, 50 or
60 Hz and harmonics, that the drive did not cause. A loop that took it for response would cut
the drive on those lines and under-test them. :class:`HumGuard`:

1. finds the lines by Thomson's harmonic F-test (:func:`liveshape.dsp.lines.find_extraneous_lines`)
   on blocks of control decimated to a rate that keeps the band, with the drive block as the
   reference: a line present in the drive (a sine-on-random tone) is caused by the drive and is
   never flagged. The silent background record of the connection check is searched the same way
   (no drive: every line there is not caused by the drive) so lines are known before any level;
2. holds a band line once it was found in ``confirm`` consecutive blocks (the F-test's false
   findings per block are bounded by ``false_per_block``; two in a row at the same line are rarer
   still) and releases it after ``release`` blocks without it;
3. fits each held line's complex amplitude by least squares on short blocks (the three-parameter
   sine fit of IEEE Std 1057 at the found frequency) and subtracts the fitted lines from the
   control as it arrives, so every estimate downstream (drive update, decisions, safety rules,
   verdict) sees the control without them. The line frequency is refined by each detection
   block, so a mains frequency drifting by ±0.1 Hz stays removed.

Removal rather than masking keeps the control's lines under control: the random under a hum line
is still measured and equalized (Thomson 1982, §XIII, removes the detected lines from the
spectrum the same way before estimating the continuous part).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import signal

from liveshape.dsp.lines import find_extraneous_lines

__all__ = ["HeldLine", "HumGuard"]

#: Zero-padding of the F-test grid: 1/8 of the block's resolution, 0.15 Hz for 0.8 s blocks; the
#: fits' phase turn takes the rest of a frequency error (see HeldLine.rate_hz).
PAD = 8


@dataclass
class HeldLine:
    """A line held as not caused by the drive."""

    f_hz: float
    first_t_s: float
    coef: complex = 0j  # complex amplitude of the line in the control, FS (peak)
    rms_g: float = math.nan
    blocks: int = 1
    missed: int = 0
    rate_hz: float = 0.0  # frequency offset measured from the fits' phase turn, Hz
    fit_t_s: float | None = None  # time of the last fit's centre, s
    fit_f_hz: float = math.nan  # the frequency the last fit used, Hz

    def as_dict(self) -> dict[str, Any]:
        return {"f_hz": round(self.f_hz + self.rate_hz, 3), "rms_g": self.rms_g,
                "first_t_s": self.first_t_s, "blocks": self.blocks,
                "cause": "not caused by the drive"}


class HumGuard:
    """Find, hold and remove control lines the drive does not cause.

    Parameters
    ----------
    fs_hz : float
        Sample rate, Hz.
    band_hz : (float, float)
        Lines are searched in this band, Hz.
    g_per_fs : float
        g per full scale of the control input (for the reported levels).
    detect_s, fit_s : float
        Length of a detection block and of an amplitude-fit block, s.
    false_per_block : float
        Bound on the mean number of false findings per detection block.
    confirm, release : int
        Consecutive blocks with (without) a line to hold (release) it.
    match_hz : float
        Findings within this distance of a held line are that line, Hz.
    """

    def __init__(self, fs_hz: float, band_hz: tuple[float, float], *, g_per_fs: float,
                 detect_s: float = 1.0, fit_s: float = 0.25, false_per_block: float = 0.01,
                 confirm: int = 2, release: int = 4, match_hz: float = 1.0) -> None:
        self.fs_hz = float(fs_hz)
        self.band_hz = (float(band_hz[0]), float(band_hz[1]))
        self.g_per_fs = float(g_per_fs)
        self._q = max(1, int(self.fs_hz // (2.5 * self.band_hz[1])))
        # a power of two of decimated samples: the padded FFTs of the F-test stay fast
        n_dec = 2 ** max(6, int(round(math.log2(detect_s * self.fs_hz / self._q))))
        self._n_detect = n_dec * self._q
        self._n_fit = max(64, int(round(fit_s * self.fs_hz)))
        self.false_per_block = float(false_per_block)
        self.confirm, self.release = int(confirm), int(release)
        self.match_hz = float(match_hz)
        self.held: list[HeldLine] = []
        self._candidates: dict[float, int] = {}  # f_hz -> consecutive blocks seen
        self._dx: list[np.ndarray] = []
        self._dy: list[np.ndarray] = []
        self._dn = 0
        self._fy: list[np.ndarray] = []
        self._fn = 0
        self._f0: int | None = None  # stream index of the fit buffer's first sample
        self.changes: list[tuple[str, HeldLine]] = []  # ("found" | "gone", line), not drained

    # -- detection -----------------------------------------------------------------------------
    def _search(self, y: np.ndarray, x: np.ndarray | None) -> list[Any]:
        q = self._q
        yd = signal.resample_poly(y, 1, q) if q > 1 else y
        kw = {"false_per_block": self.false_per_block, "band_hz": self.band_hz, "pad": PAD}
        # the control alone first: most blocks have no line, and then the drive need not be
        # decimated and tested at all (the drive test only removes findings)
        found = find_extraneous_lines(yd * self.g_per_fs, None, self.fs_hz / q, **kw)
        if not found or x is None:
            return found
        xd = signal.resample_poly(x, 1, q) if q > 1 else x
        return find_extraneous_lines(yd * self.g_per_fs, xd, self.fs_hz / q, **kw)

    def background(self, y: np.ndarray, t_s: float) -> None:
        """Search the silent background (no drive): each line found is held at once."""
        y = np.asarray(y, dtype=float)
        live = np.flatnonzero(y)  # the stream starts with zeros (before the first response)
        y = y[live[0]:] if live.size else y[:0]
        if y.size < 64 * self._q:
            return
        for f in self._search(y, None):
            self._hold(f.f_hz, t_s)

    def _hold(self, f_hz: float, t_s: float) -> None:
        line = HeldLine(float(f_hz), float(t_s))
        self.held.append(line)
        self.changes.append(("found", line))

    def _detect(self, x: np.ndarray, y: np.ndarray, t_s: float) -> None:
        found = [f.f_hz for f in self._search(y, x)]
        for line in self.held:
            near = [f for f in found if abs(f - line.f_hz) <= self.match_hz]
            if near:
                # the frequency stays the one found first: a drift is followed by the fits'
                # phase turn (rate_hz), which a change of the model's frequency would reset
                line.blocks += 1
                line.missed = 0
                found = [f for f in found if f not in near]
            else:
                line.missed += 1
        for line in [ln for ln in self.held if ln.missed >= self.release]:
            self.held.remove(line)
            self.changes.append(("gone", line))
        counts: dict[float, int] = {}
        for f in found:
            prev = next((c for c in self._candidates if abs(c - f) <= self.match_hz), None)
            n = self._candidates.get(prev, 0) + 1 if prev is not None else 1
            if n >= self.confirm:
                self._hold(f, t_s)
            else:
                counts[f] = n
        self._candidates = counts

    # -- removal -------------------------------------------------------------------------------
    def _lines_part(self, n0: int, n: int) -> np.ndarray:
        t = (n0 + np.arange(n)) / self.fs_hz
        out = np.zeros(n)
        for line in self.held:
            if line.coef and line.fit_t_s is not None:
                # the fitted phase extrapolated at the measured frequency offset
                c = line.coef * np.exp(-2j * np.pi * line.rate_hz * line.fit_t_s)
                out += np.real(c * np.exp(2j * np.pi * (line.f_hz + line.rate_hz) * t))
        return out

    def _fit(self, y: np.ndarray, n0: int) -> None:
        if not self.held:
            return
        t = (n0 + np.arange(y.size)) / self.fs_hz
        cols = [np.ones_like(t)]
        for line in self.held:
            w = 2 * np.pi * line.f_hz * t
            cols += [np.cos(w), np.sin(w)]
        c, *_ = np.linalg.lstsq(np.column_stack(cols), y, rcond=None)
        for i, line in enumerate(self.held):
            a, b = c[1 + 2 * i], c[2 + 2 * i]
            coef = complex(a, -b)  # a cos + b sin = Re((a − i b) e^{iwt})
            t_c = (n0 + 0.5 * y.size) / self.fs_hz
            if line.coef and line.fit_t_s is not None and line.fit_f_hz == line.f_hz:
                # a frequency error δf turns the fitted phase by 2π δf per second (the model
                # keeps the found frequency): the turn between two fits measures it
                turn = float(np.angle(coef / line.coef))
                line.rate_hz = turn / (2 * np.pi * (t_c - line.fit_t_s))
            elif line.fit_f_hz != line.f_hz:
                line.rate_hz = 0.0
            line.fit_f_hz = line.f_hz
            line.fit_t_s = t_c
            line.coef = coef
            line.rms_g = float(math.hypot(a, b) / math.sqrt(2.0) * self.g_per_fs)

    def push(self, x: np.ndarray, y: np.ndarray, n0: int, t_s: float) -> np.ndarray:
        """Aligned drive ``x`` and control ``y`` (FS) from stream index ``n0``: returns ``y``
        less the held lines (fitted on the blocks before; the first fit block passes as is)."""
        x = np.asarray(x, dtype=float)
        y = np.asarray(y, dtype=float)
        out = y - self._lines_part(n0, y.size) if self.held else y
        self._dx.append(x)
        self._dy.append(y)
        self._dn += y.size
        if self._dn >= self._n_detect:
            xs, ys = np.concatenate(self._dx), np.concatenate(self._dy)
            n = self._n_detect
            self._detect(xs[:n], ys[:n], t_s)
            self._dx, self._dy, self._dn = [xs[n:]], [ys[n:]], xs.size - n
        if self._f0 is None:
            self._f0 = n0
        self._fy.append(y)
        self._fn += y.size
        if self._fn >= self._n_fit:
            ys = np.concatenate(self._fy)
            self._fit(ys, self._f0)
            self._fy, self._fn, self._f0 = [], 0, None
        return out

    def drain(self) -> list[tuple[str, HeldLine]]:
        """Lines found or gone since the last call."""
        out, self.changes = self.changes, []
        return out

    def mask(self, f_hz: np.ndarray, df_hz: float) -> np.ndarray | None:
        """Lines of ``f_hz`` within 1.5 line spacings of a held line (the Hann window spreads
        the residue of its removal over three lines), or None when no line is held."""
        if not self.held:
            return None
        f = np.asarray(f_hz, dtype=float)
        out = np.zeros(f.size, dtype=bool)
        for line in self.held:
            out |= np.abs(f - (line.f_hz + line.rate_hz)) <= 1.5 * df_hz
        return out

    def summary(self) -> list[dict[str, Any]]:
        return [line.as_dict() for line in self.held]
