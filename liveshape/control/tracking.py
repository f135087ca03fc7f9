"""The fast loop's plant estimate: control per unit drive, line by line, from every segment.

Pure numpy. Each Welch segment of the control gives a periodogram ``P_s`` (g²/Hz per line) and
the drive stream knows the expected drive PSD ``D_s`` that produced it (FS²/Hz, from the
synthesis frames the segment saw, :meth:`~liveshape.control.drivestream.DriveStream.segment_psd`).
For a linear plant ``E[P_s] = T·D_s`` with the power gain ``T`` (g²/FS², including the
windows' smoothing), whatever the drive did. :class:`PowerGainTracker` estimates ``T`` as the
ratio of two averages with the same weights, ``T̂ = Σ w_s P_s / Σ w_s D_s``: the drive may change
at every update without biasing the estimate, and its scatter is that of the weighted control
average alone (``D_s`` is known, not estimated).

Three averages run side by side (docs/methods.md, "Fast update loop"):

* a long exponential average per line, whose DOF is the decision DOF: the update law acts on it,
  so the loop's steady-state scatter stays at or below the block loop's;
* a short one per line, to see a line move (a resonance shifting): where the two differ by more
  than ``change_db`` the long average restarts from the short one on that line;
* a short one of the band sums, for changes of the whole plant gain (a coil heating, a gain
  knob): the ratio ``ρ`` of the band's recent control to what the long estimate predicts for the
  recent drive scales every line at once. A band sum has hundreds of DOF per segment, so ``ρ`` is
  sharp within a few segments.

Averages start "stable": segment ``k`` (from 1) enters with weight ``1 / min(k, n)``, a running
mean for the first ``n`` segments. The DOF of each line's long average is tracked exactly for the
weights applied, with the overlap correlation of consecutive segments (Welch 1967).
"""

from __future__ import annotations

import math

import numpy as np
from scipy import special

from liveshape.dsp.spectral_stats import steady_exp_dof

__all__ = ["PowerGainTracker", "log_bias_db", "n_avg_for_dof"]

_DB = 10.0 / math.log(10.0)
#: Newest segments a moved line's long average restarts from.
RESTART_SEGMENTS = 3


def n_avg_for_dof(dof: float, c2: np.ndarray) -> int:
    """Smallest exponential averaging number whose steady DOF reaches ``dof``."""
    n = 1
    while steady_exp_dof(n, c2) < dof:
        n += 1
    return n


def log_bias_db(dof: np.ndarray) -> np.ndarray:
    """Mean of ``10 log10(Ĝ/G)`` for χ²_ν estimates, dB, per line (``4.343 (ψ(ν/2) − ln(ν/2))``)."""
    nu = np.asarray(dof, dtype=float)
    return _DB * (special.digamma(nu / 2.0) - np.log(nu / 2.0))


class _Weights:
    """Weights of a stable-start exponential average, per line: their DOF for overlapped
    segments with squared correlation ``c1`` between neighbours (Welch 1967).

    ``s2 = Σ w²`` and ``s11 = Σ w_i w_{i+1}`` of the normalized weights are carried along: a new
    segment with weight ``a`` scales the old weights by ``1 − a``.
    """

    def __init__(self, shape: tuple[int, ...], n_avg: int, c1: float) -> None:
        self.n_avg = int(n_avg)
        self.c1 = float(c1)
        self.k = np.zeros(shape)
        self.s2 = np.zeros(shape)
        self.s11 = np.zeros(shape)
        self.last = np.zeros(shape)

    def step(self) -> np.ndarray:
        """Advance by one segment; return the new segment's weight ``a`` per line."""
        self.k += 1.0
        a = 1.0 / np.minimum(self.k, self.n_avg)
        keep = 1.0 - a
        self.s11 = keep * keep * self.s11 + a * keep * self.last
        self.s2 = keep * keep * self.s2 + a * a
        self.last = a
        return a

    def dof(self) -> np.ndarray:
        var = self.s2 + 2.0 * self.c1 * self.s11
        with np.errstate(divide="ignore"):
            return np.where(var > 0, 2.0 / np.where(var > 0, var, 1.0), 0.0)


class PowerGainTracker:
    """Running estimate of the plant's power gain ``T`` per line from segment periodograms.

    Parameters
    ----------
    n_lines : int
        Lines tracked (the band).
    n_long, n_short, n_sum : int
        Averaging numbers (segments) of the long and short per-line averages and of the band
        sums.
    c2 : ndarray
        Squared overlap correlations of consecutive segments
        (:func:`liveshape.dsp.spectral_stats.overlap_correlation_sq`); only the first counts
        at 50 % overlap of a Hann window.
    change_db : float
        A line whose short average departs from the long estimate by more than this restarts
        its long average from the short one, dB.
    """

    def __init__(self, n_lines: int, *, n_long: int, n_short: int, n_sum: int,
                 c2: np.ndarray, change_db: float) -> None:
        c1 = float(c2[0]) if len(c2) else 0.0
        self.change_db = float(change_db)
        self._long = _Weights((n_lines,), n_long, c1)
        self._short = _Weights((), n_short, c1)
        self._sum = _Weights((), n_sum, c1)
        self._pl = np.zeros(n_lines)  # long averages of P and D
        self._dl = np.zeros(n_lines)
        self._ps = np.zeros(n_lines)  # short
        self._ds = np.zeros(n_lines)
        self._pg = np.zeros(n_lines)  # band-sum average (kept per line, summed when read)
        self._dg = np.zeros(n_lines)
        self.restarts = 0  # line restarts so far
        # the newest segments (P and D), from which a moved line's long average restarts
        self._recent_p = np.zeros((RESTART_SEGMENTS, n_lines))
        self._recent_d = np.zeros((RESTART_SEGMENTS, n_lines))
        self._recent_i = 0

    @property
    def ready(self) -> bool:
        return bool(self._long.k.min() > 0)

    def seed(self, p: np.ndarray, d: np.ndarray, dof: float) -> None:
        """Start from an average ``p`` (g²/Hz) of ``dof`` DOF measured with the drive ``d``."""
        self._pl[:] = p
        self._dl[:] = d
        w = self._long
        # count the seed as the equivalent number of independent segments
        k = max(1.0, min(float(w.n_avg), dof / 2.0))
        w.k[:] = k
        w.s2[:] = 2.0 / dof
        w.s11[:] = 0.0
        w.last[:] = 1.0 / k

    def push(self, p: np.ndarray, d: np.ndarray) -> None:
        """One segment: its periodogram ``p`` (g²/Hz) and expected drive PSD ``d`` (FS²/Hz)."""
        a = self._long.step()
        self._pl += a * (p - self._pl)
        self._dl += a * (d - self._dl)
        a = self._short.step()
        self._ps += a * (p - self._ps)
        self._ds += a * (d - self._ds)
        a = self._sum.step()
        self._pg += a * (p - self._pg)
        self._dg += a * (d - self._dg)
        i = self._recent_i % RESTART_SEGMENTS
        self._recent_p[i] = p
        self._recent_d[i] = d
        self._recent_i += 1

    def _long_gain(self) -> np.ndarray:
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(self._dl > 0, self._pl / np.where(self._dl > 0, self._dl, 1.0), 0.0)

    def band_factor(self) -> float:
        """``ρ``: the band's recent control over the long estimate's prediction for it."""
        pred = float(np.dot(self._long_gain(), self._dg))
        got = float(self._pg.sum())
        return got / pred if pred > 0 and got > 0 else 1.0

    def changed(self) -> bool:
        """Some line's short average departs from the long estimate by more than
        ``change_db`` now (the test :meth:`estimate` applies), so an update is due at once."""
        if self._short.k < self._short.n_avg:
            return False
        t = self._long_gain() * self.band_factor()
        with np.errstate(divide="ignore", invalid="ignore"):
            d_db = _DB * np.log(self._ps / (self._ds * t))
        return bool(np.any(np.abs(d_db[np.isfinite(d_db)]) > self.change_db))

    def estimate(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """``(T, dof, restarted)``: power gain per line (g²/Hz per FS²/Hz), the DOF of its
        long average, and the lines whose long average restarted now (change detected)."""
        rho = self.band_factor()
        t = self._long_gain() * rho
        restarted = np.zeros(t.size, dtype=bool)
        if self._short.k >= self._short.n_avg:
            with np.errstate(divide="ignore", invalid="ignore"):
                ts = self._ps / self._ds
                d_db = _DB * np.log(ts / t)
            restarted = np.isfinite(d_db) & (np.abs(d_db) > self.change_db)
            if restarted.any():
                self._restart(restarted)
                t = np.where(restarted, ts, t)
        return t, self._long.dof(), restarted

    def _restart(self, lines: np.ndarray) -> None:
        """The long average of ``lines`` restarts from the newest ``RESTART_SEGMENTS`` segments.

        The short average that saw the change still holds some of the time before it; the
        newest few segments do not (a change is seen a few segments after it happened). The long
        average then goes on as a stable start: weights 1/(r + 1), 1/(r + 2), ... up to 1/n_long.
        """
        self.restarts += int(np.count_nonzero(lines))
        r = min(RESTART_SEGMENTS, self._recent_i)
        rho = self.band_factor()
        w = self._long
        self._pl[lines] = self._recent_p[:r, lines].mean(axis=0) / rho  # ρ applies on top
        self._dl[lines] = self._recent_d[:r, lines].mean(axis=0)
        w.k[lines] = r
        w.s2[lines] = 1.0 / r
        w.s11[lines] = (r - 1) / (r * r)
        w.last[lines] = 1.0 / r
