"""Guided bring-up: hold the drive at the connection level while the user sets the amplifier gain.

Pure numpy/scipy. On a real rig the amplifier gain starts at its minimum, so the control
channel cannot yet answer the drive. Between the connection stage and the identification the
controller (:mod:`liveshape.control.controller`) keeps playing the connection drive (flat noise at
``safety.connect_level_fs`` rms, nothing louder) and :class:`BringUpStage` keeps a live
:class:`MeterReading` of the last connection-length record: the response rms in FS and g, its
SNR over the silent background, the mean coherence over the band, the input headroom and the
drive (in V when the output is calibrated). The user raises the gain until the meter says the
response is usable and confirms; the shell signals that through a flag object (anything with
``is_set()`` and ``clear()``, e.g. :class:`threading.Event`) that the controller polls on every
response block, never waiting on it. A confirmation while the reading is not usable is refused
(and the flag cleared). After a usable confirmation a fresh connection record is taken at the
gain now set, so the delay and the FRF that seed the identification are those of the final gain.

The usable rule is the connection rule (:func:`liveshape.control.connect.connection_trip`):
response rms at or above ``safety.silent_floor_fs`` and mean coherence at or above
``safety.connect_coherence_min``; plus the band SNR that coherence implies for uncorrelated
output noise, ``SNR = γ²/(1 − γ²)`` (docs/methods.md, "Guided bring-up").
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np

from liveshape.control.connect import CONNECT_SEGMENTS, ConnectionCheck, analyse_connection

#: Run time between two meter readings, s.
METER_EVERY_S = 0.25


def snr_min_db(coherence_min: float) -> float:
    """Band SNR implied by a coherence threshold for uncorrelated output noise, dB.

    With noise ``n`` added to the output of a linear system, ``γ² = S / (S + N)`` on each line
    (Bendat & Piersol, *Random Data*, 4th ed., §6.1.4 [from memory]), so ``S/N = γ²/(1 − γ²)``.
    A threshold of 0.5 gives 0 dB; 0 gives −inf; 1 gives +inf.
    """
    c = float(coherence_min)
    if c <= 0.0:
        return -math.inf
    if c >= 1.0:
        return math.inf
    return 10.0 * math.log10(c / (1.0 - c))


@dataclass(frozen=True)
class MeterReading:
    """One reading of the bring-up meter (units in the names).

    Attributes
    ----------
    t_s : float
        Run time of the reading, s.
    response_rms_fs, response_rms_g : float
        Response rms over the record, FS and g (g from the chain calibration).
    background_rms_fs : float
        Response rms while the drive was silent, FS.
    snr_db : float
        Band power of the response over the band power of the background, dB.
    coherence : float
        Mean coherence over the band lines (delay-aligned, Welch, Hann 50 %).
    headroom_db : float
        Input headroom: ``20 log10(1 / peak)`` with ``peak`` the largest ``|response|``, dB.
    drive_rms_fs : float
        Drive rms over the record, FS.
    drive_rms_v : float or None
        Drive rms in volts (None when the output is not calibrated).
    delay_samples : int
        Loop delay found in the record, samples.
    usable : bool
        True when the reading passes the connection rule.
    reason : str
        Why it is not usable (empty when usable).
    """

    t_s: float
    response_rms_fs: float
    response_rms_g: float
    background_rms_fs: float
    snr_db: float
    coherence: float
    headroom_db: float
    drive_rms_fs: float
    drive_rms_v: float | None
    delay_samples: int
    usable: bool
    reason: str

    def to_dict(self) -> dict[str, Any]:
        """Plain data for events (units in the keys)."""
        return asdict(self)


def usable_reason(*, response_rms_fs: float, snr_db: float, coherence: float,
                  silent_floor_fs: float, coherence_min: float) -> str:
    """Why a reading fails the connection rule ("" when it passes)."""
    why = []
    if not response_rms_fs >= silent_floor_fs:
        why.append(f"response {response_rms_fs:.2e} FS rms below the silent floor "
                   f"{silent_floor_fs:.2e} FS")
    if not coherence >= coherence_min:
        why.append(f"coherence {coherence:.2f} < {coherence_min:g}")
    smin = snr_min_db(coherence_min)
    if not snr_db >= smin:
        why.append(f"SNR {snr_db:.1f} dB < {smin:.1f} dB")
    return "; ".join(why)


def meter_reading(chk: ConnectionCheck, x: np.ndarray, y: np.ndarray, *, t_s: float,
                  g_per_fs: float, out_v_per_fs: float | None, silent_floor_fs: float,
                  coherence_min: float) -> MeterReading:
    """The meter's figures from a connection analysis of the drive ``x`` and response ``y``."""
    y = np.asarray(y, dtype=float)
    x = np.asarray(x, dtype=float)
    peak = float(np.max(np.abs(y))) if y.size else 0.0
    headroom = 20.0 * math.log10(1.0 / peak) if peak > 0 else math.inf
    drive_rms = float(np.sqrt(np.mean(x * x))) if x.size else 0.0
    reason = usable_reason(response_rms_fs=chk.response_rms_fs, snr_db=chk.snr_db,
                           coherence=chk.mean_coherence, silent_floor_fs=silent_floor_fs,
                           coherence_min=coherence_min)
    return MeterReading(
        t_s=float(t_s), response_rms_fs=chk.response_rms_fs,
        response_rms_g=chk.response_rms_fs * float(g_per_fs),
        background_rms_fs=chk.background_rms_fs, snr_db=chk.snr_db,
        coherence=chk.mean_coherence, headroom_db=headroom, drive_rms_fs=drive_rms,
        drive_rms_v=None if out_v_per_fs is None else drive_rms * float(out_v_per_fs),
        delay_samples=chk.delay_samples, usable=not reason, reason=reason)


class _Window:
    """The last ``n`` pairs of drive and response samples (preallocated, rolled in place)."""

    def __init__(self, n: int) -> None:
        self.n = int(n)
        self.x = np.zeros(self.n)
        self.y = np.zeros(self.n)
        self.count = 0

    def push(self, x: np.ndarray, y: np.ndarray) -> None:
        k = min(x.size, self.n)
        x, y = x[x.size - k:], y[y.size - k:]
        self.x[: self.n - k] = self.x[k:]
        self.y[: self.n - k] = self.y[k:]
        self.x[self.n - k:] = x
        self.y[self.n - k:] = y
        self.count += k

    @property
    def full(self) -> bool:
        return self.count >= self.n


class BringUpStage:
    """The bring-up hold's live meter and, after a usable confirmation, the fresh record.

    Parameters
    ----------
    fs_hz, nperseg : float, int
        Sample rate and Welch segment length (the control frame length).
    band : ndarray of bool
        Lines under control.
    background : ndarray
        The connection stage's silent response record (the SNR's reference).
    max_lag : int
        Largest loop delay searched, samples.
    g_per_fs : float
        Response g per FS (chain calibration).
    out_v_per_fs : float or None
        Output volts per FS (None: uncalibrated, no volts shown).
    silent_floor_fs, coherence_min : float
        The connection rule (``safety.silent_floor_fs``, ``safety.connect_coherence_min``).
    """

    def __init__(self, *, fs_hz: float, nperseg: int, band: np.ndarray, background: np.ndarray,
                 max_lag: int, g_per_fs: float, out_v_per_fs: float | None,
                 silent_floor_fs: float, coherence_min: float) -> None:
        self.fs_hz = float(fs_hz)
        self.nperseg = int(nperseg)
        self.band = band
        self.background = np.asarray(background, dtype=float)
        self.max_lag = int(max_lag)
        self.g_per_fs = float(g_per_fs)
        self.out_v_per_fs = out_v_per_fs
        self.silent_floor_fs = float(silent_floor_fs)
        self.coherence_min = float(coherence_min)
        self.record_len = (CONNECT_SEGMENTS + 1) * (self.nperseg // 2) + self.max_lag
        self._win = _Window(self.record_len)
        self._every = max(1, int(round(METER_EVERY_S * self.fs_hz)))
        self._since = 0
        self.reading: MeterReading | None = None
        self.confirmed: MeterReading | None = None
        self._fresh = _Window(self.record_len)

    def _analyse(self, x: np.ndarray, y: np.ndarray) -> ConnectionCheck:
        return analyse_connection(x, y, self.background, fs_hz=self.fs_hz, nperseg=self.nperseg,
                                  band=self.band, max_lag=self.max_lag, skip=0)

    def feed(self, x: np.ndarray, y: np.ndarray, t_s: float) -> ConnectionCheck | None:
        """Take drive and response samples (same stream indices, unaligned).

        Before a confirmation: update the meter every :data:`METER_EVERY_S` once a whole record
        is in; returns None. After it: collect a fresh record; returns its connection check once
        complete.
        """
        if self.confirmed is not None:
            self._fresh.push(x, y)
            if not self._fresh.full:
                return None
            return self._analyse(self._fresh.x, self._fresh.y)
        self._win.push(x, y)
        self._since += x.size
        if self._win.full and (self.reading is None or self._since >= self._every):
            self._since = 0
            chk = self._analyse(self._win.x, self._win.y)
            self.reading = meter_reading(
                chk, self._win.x, self._win.y, t_s=t_s, g_per_fs=self.g_per_fs,
                out_v_per_fs=self.out_v_per_fs, silent_floor_fs=self.silent_floor_fs,
                coherence_min=self.coherence_min)
        return None

    def confirm(self) -> tuple[bool, str]:
        """The user confirmed: ``(accepted, reason)``; accepted only on a usable reading."""
        r = self.reading
        if r is None:
            return False, "no meter reading yet"
        if not r.usable:
            return False, r.reason
        self.confirmed = r
        return True, ""
