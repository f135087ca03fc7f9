"""Pure pieces of the control loop's estimation: update estimates and the decision estimate.

Pure numpy/scipy, no state beyond the small estimators. The controller
(:mod:`liveshape.control.controller`) strings these together; the connection stage's pieces are in
:mod:`liveshape.control.connect` (re-exported here).

* :func:`control_lines` finds the lines under control, their target and their limits.
* :func:`segments_for_dof` turns a DOF requirement into a number of Welch segments (Welch 1967
  equivalent DOF of Hann segments at 50 % overlap, :func:`liveshape.dsp.spectra.welch_dof`);
  :func:`update_dof_for` gives the DOF of one update estimate.
* :class:`ControlEstimate` is one fresh update estimate of the control spectrum.
* :class:`DecisionPool` combines whole, independent update estimates into the estimate used for
  decisions (tolerance, display) with at least the target DOF; :func:`judge` holds an estimate
  against the target and the tolerance.
* :class:`DriveHistory` keeps the recent drive samples for the delay alignment.

Estimation design
    Update estimates are independent: each starts after the last drive change has arrived and
    holds one drive only, so consecutive updates are independent χ² estimates (what the
    persistence of the abort rules relies on). Their DOF ν_u is half the decision DOF: the
    equalizer's steady-state true error γ/(2−γ)·σ²(ν_u) (docs/methods.md, "Equalizer update
    laws and their scatter") stays below the display scatter σ²(ν_d), and the first tolerance
    decision after a drive or level change needs two updates. The direct law removes the mean
    dB bias of a χ²_ν estimate (≈ −4.343/ν dB), so it settles on the target's mean square.
    The decision pool restarts at every level change.
"""

from __future__ import annotations

import math
from collections import deque
from dataclasses import dataclass
from typing import Any

import numpy as np

from liveshape.control.connect import (  # noqa: F401 - re-exported: the connection stage's pieces
    CONNECT_SEGMENTS,
    ConnectionCheck,
    ConnectRecorder,
    analyse_connection,
    connection_data,
    connection_trip,
)
from liveshape.control.runstate import frozen_array
from liveshape.dsp.spectra import CrossSpectrum, PsdAverager, welch_dof
from liveshape.errors import ConfigError


@dataclass(frozen=True)
class ControlLines:
    """The spectral lines of a test: which are under control, the target and the limits.

    ``band`` (bool) and ``target_psd`` (g²/Hz at full level) are on all lines
    ``k fs / frame_length``; ``f_hz``, ``alarm_db`` and ``abort_db`` on the band lines only
    (read-only arrays).
    """

    band: np.ndarray
    target_psd: np.ndarray
    f_hz: np.ndarray
    alarm_db: np.ndarray
    abort_db: np.ndarray


def control_lines(spec: Any) -> ControlLines:
    """The lines under control of ``spec`` (a :class:`~liveshape.testdef.spec.TestSpec`).

    A line is under control where the profile's ASD is above zero, except 0 Hz and Nyquist.

    Raises
    ------
    ConfigError
        The profile's band holds no line at the control settings' resolution.
    """
    fs, n = float(spec.control.fs_hz), int(spec.control.frame_length)
    df = fs / n
    target = np.asarray(spec.profile.lines(fs, n), dtype=float)
    band = target > 0
    band[0] = band[-1] = False
    if not band.any():
        raise ConfigError(
            f"{spec.source or spec.name}: profile {spec.profile.f_min_hz:g}-"
            f"{spec.profile.f_max_hz:g} Hz has no line at df = {df:g} Hz "
            f"(control.frame_length = {n})"
        )
    f_hz = frozen_array((np.arange(n // 2 + 1) * df)[band])
    return ControlLines(band=band, target_psd=target, f_hz=f_hz,
                        alarm_db=frozen_array(spec.tolerance.alarm_db_at(f_hz)),
                        abort_db=frozen_array(spec.tolerance.abort_db_at(f_hz)))


def segments_for_dof(dof: float) -> int:
    """Smallest number of Hann 50 %-overlap segments whose Welch DOF reaches ``dof``."""
    k = max(1, int(math.ceil(dof / 2.0)))
    while welch_dof(k) < dof:
        k += 1
    return k


def update_dof_for(target_dof: float) -> float:
    """DOF of one equalizer update estimate: half the decision DOF, at least 16.

    Two independent update estimates pool to the decision DOF, so the first tolerance decision
    after a drive change needs two updates. The equalizer's own steady-state true error,
    ``γ/(2−γ)·σ²(ν_u)`` (docs/methods.md, "Equalizer update laws and their scatter"), is then
    ``σ²(ν_u)/3`` at γ = 0.5, below the display scatter σ²(ν_d) of the decision estimate.
    """
    return max(16.0, 0.5 * float(target_dof))


@dataclass(frozen=True)
class Judgement:
    """A control estimate held against the target and the tolerance (band lines).

    ``dev_db`` per line, ``rms_error_db`` of the band sums, counts beyond the alarm and abort
    limits, ``in_tolerance`` (every line within alarm and the rms within the rms alarm),
    ``control_grms_g``/``target_grms_g`` and the estimate's ``dof``.
    """

    control_psd: np.ndarray
    target_psd: np.ndarray
    dev_db: np.ndarray
    rms_error_db: float
    lines_outside_alarm: int
    lines_outside_abort: int
    in_tolerance: bool
    control_grms_g: float
    target_grms_g: float
    dof: float

    @property
    def max_dev_db(self) -> float:
        return float(np.nanmax(self.dev_db))

    @property
    def min_dev_db(self) -> float:
        return float(np.nanmin(self.dev_db))

    @property
    def lines_judged(self) -> int:
        """Lines the judgement counts (NaN in ``dev_db``: left out, e.g. a hum line)."""
        return int(np.count_nonzero(np.isfinite(self.dev_db)))


def judge(control_psd: np.ndarray, target_psd: np.ndarray, *, alarm_db: np.ndarray,
          abort_db: np.ndarray, rms_alarm_db: float, dof: float, df_hz: float,
          exclude: np.ndarray | None = None) -> Judgement:
    """Hold a control PSD (g²/Hz) against the target with per-line limits (± dB).

    ``exclude`` (bool per line): lines left out of every figure (their ``dev_db`` is NaN), e.g.
    lines the drive does not cause (:mod:`liveshape.control.humguard`).
    """
    ctrl = np.asarray(control_psd, dtype=float)
    tgt = np.asarray(target_psd, dtype=float)
    dev = 10.0 * np.log10(np.maximum(ctrl, 1e-300) / tgt)
    keep = np.ones(dev.size, dtype=bool) if exclude is None else ~np.asarray(exclude, bool)
    if exclude is not None:
        dev = np.where(keep, dev, np.nan)
    c, r = float(ctrl[keep].sum()), float(tgt[keep].sum())
    rms_err = 10.0 * math.log10(c / r) if c > 0 else -math.inf
    with np.errstate(invalid="ignore"):
        n_alarm = int(np.count_nonzero(np.abs(dev) > alarm_db))
        n_abort = int(np.count_nonzero(np.abs(dev) > abort_db))
    return Judgement(
        control_psd=ctrl, target_psd=tgt, dev_db=dev, rms_error_db=rms_err,
        lines_outside_alarm=n_alarm, lines_outside_abort=n_abort,
        in_tolerance=n_alarm == 0 and abs(rms_err) <= rms_alarm_db,
        control_grms_g=math.sqrt(c * df_hz), target_grms_g=math.sqrt(r * df_hz), dof=float(dof))


class ControlEstimate:
    """A fresh linear Welch estimate of the control (and, if asked, of H1 and coherence).

    Data count only from response index :attr:`valid_from` on (set by :meth:`restart` after a
    drive change). :meth:`feed` returns how many new segments came in; :attr:`newest_sum` is the
    band sum of the newest segments' periodograms alone (the difference of the running sums,
    exact for a linear average), for the fast per-segment rules.

    Parameters
    ----------
    fs_hz, nperseg : float, int
    band : ndarray of bool
    g2_per_fs2 : float
        (g per FS)², converting the response PSD to g²/Hz.
    cross : bool
        Keep the cross spectrum (H1, coherence) or only the response autospectrum (half the
        FFT work).
    """

    def __init__(self, fs_hz: float, nperseg: int, band: np.ndarray, g2_per_fs2: float, *,
                 cross: bool) -> None:
        self.cross = bool(cross)
        if self.cross:
            self._w: CrossSpectrum | PsdAverager = CrossSpectrum(fs_hz, nperseg)
        else:
            self._w = PsdAverager(fs_hz, nperseg)
        self._band = band
        self._g2 = float(g2_per_fs2)
        self.valid_from: float = math.inf
        self._k = 0
        self._total = 0.0
        self.newest_sum = 0.0

    @property
    def active(self) -> bool:
        return self.valid_from < math.inf

    @property
    def n_segments(self) -> int:
        return self._k

    def restart(self, valid_from: float) -> None:
        self._w.reset()
        self._k = 0
        self._total = 0.0
        self.valid_from = valid_from

    def feed(self, x: np.ndarray, y: np.ndarray, i0: int) -> int:
        """Push the aligned drive ``x`` and response ``y`` starting at response index ``i0``."""
        if self.valid_from >= i0 + y.size:
            return 0
        j = int(max(0, self.valid_from - i0))
        if self.cross:
            self._w.push(x[j:], y[j:])
        else:
            self._w.push(y[j:])
        k = self._w.n_segments
        m = k - self._k
        if m:
            total = float(self.control_psd().sum()) * k
            self.newest_sum = (total - self._total) / m
            self._total = total
            self._k = k
        return m

    def control_psd(self) -> np.ndarray:
        """Control PSD on the band lines, g²/Hz."""
        g = self._w.gyy if self.cross else self._w.psd
        return g[self._band] * self._g2

    def h1_coherence(self) -> tuple[np.ndarray, np.ndarray]:
        """H1 (response FS per drive FS) and coherence on all lines (cross estimates only)."""
        return self._w.h1, np.nan_to_num(self._w.coherence, nan=0.0)


class DriveHistory:
    """The recent drive samples by absolute stream index, for delay alignment.

    A preallocated buffer: :meth:`append` writes at the end, :meth:`forget_before` marks what is
    no longer needed (dropped lazily when the buffer is full), :meth:`get` returns samples
    ``a .. b-1`` with zeros for indices before the stream or already forgotten.
    """

    def __init__(self, capacity: int) -> None:
        self._buf = np.zeros(max(16, int(capacity)))
        self._start = 0  # stream index of _buf[0]
        self._n = 0  # valid samples in _buf
        self._keep = 0  # stream index from which samples are still needed

    @property
    def end(self) -> int:
        """Stream index after the last sample appended."""
        return self._start + self._n

    def forget_before(self, index: int) -> None:
        self._keep = max(self._keep, int(index))

    def append(self, x: np.ndarray) -> None:
        m = x.size
        if self._n + m > self._buf.size:
            drop = min(max(0, self._keep - self._start), self._n)
            if drop:
                self._buf[: self._n - drop] = self._buf[drop: self._n]
                self._start += drop
                self._n -= drop
            if self._n + m > self._buf.size:
                grown = np.zeros(max(2 * self._buf.size, self._n + m))
                grown[: self._n] = self._buf[: self._n]
                self._buf = grown
        self._buf[self._n: self._n + m] = x
        self._n += m

    def get(self, a: int, b: int) -> np.ndarray:
        out = np.zeros(b - a)
        lo, hi = max(a, self._start), min(b, self._start + self._n)
        if hi > lo:
            out[lo - a: hi - a] = self._buf[lo - self._start: hi - self._start]
        return out


class DecisionPool:
    """Decision estimate from whole update estimates (each independent, one drive each).

    ``"linear"``: the mean of the last ``n_avg`` update estimates. ``"exponential"``: the first
    ``n_avg`` estimates are averaged with equal weights, then each new one enters with weight
    ``1/n_avg`` (the same "stable" exponential start as
    :class:`liveshape.dsp.spectra.CrossSpectrum`). ``n_avg = ceil(target_dof / update_dof)``, so
    the DOF reaches the target after ``n_avg`` updates in both modes. The DOF is tracked exactly
    for independent χ² estimates: with weights ``w_i`` (summing to 1) ``2/ν = Σ w_i² · 2/ν_i``.

    Parameters
    ----------
    target_dof, update_dof : float
        Decision DOF and DOF of one update estimate.
    averaging : {"linear", "exponential"}
    """

    def __init__(self, target_dof: float, update_dof: float, averaging: str) -> None:
        if averaging not in ("linear", "exponential"):
            raise ValueError(f"averaging must be linear or exponential, got {averaging!r}")
        self.target_dof = float(target_dof)
        self.averaging = averaging
        self.n_avg = max(1, int(math.ceil(target_dof / update_dof - 1e-9)))
        self._items: deque[tuple[np.ndarray, float]] = deque(maxlen=self.n_avg)
        self._mean: np.ndarray | None = None
        self._var = 0.0  # Σ w² · 2/ν
        self._k = 0

    def reset(self) -> None:
        self._items.clear()
        self._mean = None
        self._var = 0.0
        self._k = 0

    @property
    def count(self) -> int:
        return self._k

    def push(self, psd: np.ndarray, dof: float) -> None:
        p = np.asarray(psd, dtype=float)
        self._k += 1
        if self.averaging == "linear":
            self._items.append((p.copy(), float(dof)))
            return
        a = 1.0 / min(self._k, self.n_avg)
        if self._mean is None:
            self._mean = p.copy()
            self._var = 2.0 / dof
        else:
            self._mean = (1.0 - a) * self._mean + a * p
            self._var = (1.0 - a) ** 2 * self._var + a * a * 2.0 / dof

    @property
    def psd(self) -> np.ndarray | None:
        """Decision PSD (a copy), or None before the first update."""
        if self.averaging == "linear":
            if not self._items:
                return None
            return np.mean([p for p, _ in self._items], axis=0)
        return None if self._mean is None else self._mean.copy()

    @property
    def dof(self) -> float:
        """Equivalent DOF of :attr:`psd` (0 before the first update)."""
        if self.averaging == "linear":
            m = len(self._items)
            if not m:
                return 0.0
            var = sum(2.0 / nu for _, nu in self._items) / (m * m)
            return 2.0 / var
        return 2.0 / self._var if self._var > 0 else 0.0

    @property
    def ready(self) -> bool:
        """True when the DOF reaches the target (to rounding)."""
        return self.dof >= self.target_dof * (1.0 - 1e-9)
