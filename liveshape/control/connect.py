"""The connection stage: a silent look, then very-low-level flat noise, analysed once.

Pure numpy/scipy. The controller (:mod:`liveshape.control.controller`) plays nothing for the
background time, then flat band-limited noise at ``safety.connect_level_fs`` rms
(:func:`flat_drive_psd`) for :data:`CONNECT_SEGMENTS` Welch segments plus the longest delay
searched. :class:`ConnectStage` collects the records (:class:`ConnectRecorder`) and, once they
are complete, :func:`analyse_connection` finds the loop delay by cross-correlation
(:func:`liveshape.dsp.spectra.estimate_delay`), then coherence and H1 on the delay-aligned record.
:func:`connection_trip` stops the run *before any real level* when the control channel is
silent (``response_silent``) or does not respond to the drive (``connect_check``);
otherwise :func:`identification_drive` gives the first identification drive, the target
through the connection's H1.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from liveshape.control import equalizer
from liveshape.control.safety import Trip
from liveshape.dsp.spectra import CrossSpectrum, PsdAverager, estimate_delay

#: Welch segments of the connection check (coherence bias for no response ≈ 1/16).
CONNECT_SEGMENTS = 16
#: A short piece of the connection record whose band gain (response over drive power) is this
#: far below the early pieces' means the response stopped following the drive inside the
#: window (a sensor come loose, an amplifier that tripped, a dropout), dB; a margin of common
#: practice over the scatter of a piece's gain (docs/methods.md, "Connection check windows").
CONNECT_DROP_DB = 6.0
#: The drop check's segments are this many times shorter than the control frame ...
SUB_SEGMENT_DIVISOR = 8
#: ... and at least this long, samples ...
SUB_SEGMENT_MIN = 256
#: ... and long enough to hold this many lines of the band.
PIECE_MIN_LINES = 32


@dataclass(frozen=True)
class ConnectionCheck:
    """Result of the connection look (all FS units, band lines only where arrays).

    Attributes
    ----------
    delay_samples : int
        Loop delay from the drive stream to the response stream, samples.
    delay_peak : float
        Normalized cross-correlation at the delay (−1..1).
    h1 : ndarray
        H1 (FS/FS) on all lines, delay-aligned.
    coherence : ndarray
        Coherence on all lines.
    mean_coherence : float
        Mean coherence over the band lines.
    response_rms_fs : float
        Response rms during the connection drive, FS.
    background_rms_fs : float
        Response rms while silent, FS.
    snr_db : float
        Band power of the response with drive over the band power while silent, dB.
    segment_gain_db : ndarray
        Band power of the response over that of the drive in short Hann segments of the
        aligned record laid back from its end (the last one ends with the record), dB re the
        early segments (:func:`segment_gains_db`).
    segment_end_s : ndarray
        End of each of those segments, s after the start of the aligned record.
    """

    delay_samples: int
    delay_peak: float
    h1: np.ndarray
    coherence: np.ndarray
    mean_coherence: float
    response_rms_fs: float
    background_rms_fs: float
    snr_db: float
    segment_gain_db: np.ndarray = dataclasses.field(default_factory=lambda: np.zeros(0))
    segment_end_s: np.ndarray = dataclasses.field(default_factory=lambda: np.zeros(0))
    #: Absolute band gain of the early pieces (their median), dB: the reference of the drop.
    reference_gain_db: float = 0.0

    @property
    def worst_drop_db(self) -> float:
        """How far the weakest segment's gain lies below the median, dB (0 when none)."""
        g = self.segment_gain_db
        return float(max(0.0, -np.min(g))) if g.size else 0.0


def segment_gains_db(x: np.ndarray, y: np.ndarray, nperseg: int, band: np.ndarray
                     ) -> tuple[np.ndarray, np.ndarray]:
    """Band gain of short Hann segments laid back from the end of the record.

    The segments are :data:`SUB_SEGMENT_DIVISOR` times shorter than ``nperseg`` (at least
    :data:`SUB_SEGMENT_MIN` samples), hop half a segment, the last one ending with the record,
    so a fault in the last few tens of milliseconds fills a segment. Returns ``(gain_db,
    end_index)``: ``10 log10(Σ_band |Y|² / Σ_band |X|²)`` per segment (the band is taken at the
    short segment's resolution) re the median of the first third of the segments (the loop
    before any fault), and the index one past each segment's last sample; a segment whose
    response is all zeros reads −300 dB.
    """
    n = piece_length(nperseg, band)
    hop = n // 2
    if x.size < n:
        return np.zeros(0), np.zeros(0, dtype=int)
    ends = np.arange(x.size, n - 1, -hop)[::-1]
    g = piece_gains_db(x, y, ends, nperseg, band)
    first = g[: max(1, g.size // 3)]
    return g - float(np.median(first)), ends


def piece_length(nperseg: int, band: np.ndarray) -> int:
    """Length of the drop check's pieces, samples (see :func:`segment_gains_db`).

    An eighth of the frame, at least :data:`SUB_SEGMENT_MIN`, and long enough that the band
    holds :data:`PIECE_MIN_LINES` lines at the piece's resolution (a power of two, at most the
    frame): the band power of K lines of Gaussian noise scatters as χ² with 2K DOF, 0.77 dB
    (1σ) for K = 32 (Bendat & Piersol, Random Data, 4th ed., §8.5), so the 6 dB limit is
    about 8σ of that scatter.
    """
    n_full = int(nperseg)
    lines = max(int(np.count_nonzero(band)), 1)
    need = int(2 ** math.ceil(math.log2(max(PIECE_MIN_LINES * n_full / lines, 1.0))))
    return min(n_full, max(SUB_SEGMENT_MIN, n_full // SUB_SEGMENT_DIVISOR, need))


def piece_gains_db(x: np.ndarray, y: np.ndarray, ends: np.ndarray, nperseg: int,
                   band: np.ndarray) -> np.ndarray:
    """Absolute band gain, dB, of the Hann pieces of :func:`piece_length` ending at ``ends``."""
    n_full, n = int(nperseg), piece_length(nperseg, band)
    idx = np.asarray(ends)[:, None] - n + np.arange(n)[None, :]
    # the band at the short piece's resolution: lines whose frequency lies in the full band
    f_full = np.flatnonzero(band) / n_full
    f_short = np.arange(n // 2 + 1) / n
    sub = (f_short >= f_full.min()) & (f_short <= f_full.max()) if f_full.size else f_short > 0
    w = np.hanning(n + 2)[1:-1]  # symmetric Hann without the zero end points
    px = np.sum(np.abs(np.fft.rfft(x[idx] * w, axis=1)[:, sub]) ** 2, axis=1)
    py = np.sum(np.abs(np.fft.rfft(y[idx] * w, axis=1)[:, sub]) ** 2, axis=1)
    return 10.0 * np.log10(np.maximum(py, 1e-30 * px + 1e-300) / np.maximum(px, 1e-300))


class ConfirmWatch:
    """After the connection check passed: the drop check on the response still in flight.

    The check's record ends a loop latency before its decision; the connection drive goes on
    until the response to every drive sample up to the decision (drive index ``until``) has
    been looked at in pieces, each against the connection's own gain ``reference_db``.
    """

    def __init__(self, *, until: int, reference_db: float, nperseg: int,
                 band: np.ndarray) -> None:
        self.until = int(until)
        self.reference_db = float(reference_db)
        self.nperseg, self.band = int(nperseg), band
        self.n = piece_length(nperseg, band)
        self._x = np.zeros(0)
        self._y = np.zeros(0)
        self.covered = None  # response index (aligned drive index) looked at so far

    def feed(self, x: np.ndarray, y: np.ndarray, i0: int) -> tuple[bool, float]:
        """Aligned drive and response from drive index ``i0``: ``(done, worst drop dB)``."""
        self._x = np.concatenate((self._x, np.asarray(x, float)))
        self._y = np.concatenate((self._y, np.asarray(y, float)))
        end = i0 + len(x)
        worst = 0.0
        k = self._x.size // self.n
        if k:
            ends = (np.arange(k) + 1) * self.n
            g = piece_gains_db(self._x, self._y, ends, self.nperseg, self.band)
            worst = float(max(0.0, self.reference_db - float(np.min(g))))
            self._x, self._y = self._x[k * self.n:], self._y[k * self.n:]
        self.covered = end
        return end >= self.until, worst


def connection_data(chk: ConnectionCheck) -> dict[str, float]:
    """The connection check's numbers for events and trips (units in the keys)."""
    return {"loop_delay_samples": chk.delay_samples, "delay_peak": chk.delay_peak,
            "mean_coherence": chk.mean_coherence, "response_rms_fs": chk.response_rms_fs,
            "background_rms_fs": chk.background_rms_fs, "snr_db": chk.snr_db,
            "worst_segment_drop_db": chk.worst_drop_db}


def connection_trip(chk: ConnectionCheck, safety: Any, t_s: float) -> Trip | None:
    """``response_silent`` or ``connect_check`` when the control channel fails the check.

    Silent: response rms below ``safety.silent_floor_fs``. No response: mean coherence over the
    band below ``safety.connect_coherence_min``.
    """
    data = connection_data(chk)
    floor = float(safety.silent_floor_fs)
    if chk.response_rms_fs < floor:
        return Trip("response_silent",
                    f"control channel silent during the connection check: rms "
                    f"{chk.response_rms_fs:.2e} FS < {floor:.2e} FS", t_s, data)
    cmin = float(safety.connect_coherence_min)
    if chk.mean_coherence < cmin:
        return Trip("connect_check",
                    f"control channel does not respond to the drive: mean coherence "
                    f"{chk.mean_coherence:.2f} < {cmin:g}", t_s, data)
    if chk.worst_drop_db > CONNECT_DROP_DB:
        k = int(np.flatnonzero(chk.segment_gain_db < -CONNECT_DROP_DB)[0])  # the first one
        drop = "all" if chk.worst_drop_db > 200 else f"{chk.worst_drop_db:.1f} dB"
        return Trip("connect_check",
                    f"control channel stopped following the drive inside the connection check: "
                    f"from {chk.segment_end_s[k]:.2f} s into it the response lost up to {drop} "
                    f"of its gain re the start (limit {CONNECT_DROP_DB:g} dB)", t_s,
                    {**data, "segment_end_s": float(chk.segment_end_s[k])})
    return None


def analyse_connection(
    x: np.ndarray,
    y: np.ndarray,
    background: np.ndarray,
    *,
    fs_hz: float,
    nperseg: int,
    band: np.ndarray,
    max_lag: int,
    skip: int,
) -> ConnectionCheck:
    """Delay, coherence and H1 of the connection record.

    Parameters
    ----------
    x, y : ndarray
        Drive and response streams over the same sample indices (response not yet aligned).
    background : ndarray
        Response while the drive was silent.
    fs_hz, nperseg : float, int
        Sample rate and segment length.
    band : ndarray of bool
        Lines under control.
    max_lag : int
        Largest delay searched, samples.
    skip : int
        Samples at the start of the aligned record to leave out (the fade-in).
    """
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    est = estimate_delay(x, y, max_lag=max_lag)
    d = est.samples
    xa, ya = x[: x.size - d], y[d:]
    xa, ya = xa[skip:], ya[skip:]
    cs = CrossSpectrum(fs_hz, nperseg, averaging="linear")
    cs.push(xa, ya)
    coh = cs.coherence
    cb = coh[band]
    mean_coh = float(np.mean(np.where(np.isfinite(cb), cb, 0.0)))
    gains, ends = segment_gains_db(xa, ya, nperseg, band)
    ref_db = 0.0
    if ends.size:
        absolute = piece_gains_db(xa, ya, ends, nperseg, band)
        ref_db = float(np.median(absolute[: max(1, absolute.size // 3)]))
    bg = PsdAverager(fs_hz, nperseg, averaging="linear")
    bg.push(np.asarray(background, dtype=float))
    p_sig = float(np.sum(cs.gyy[band]))
    p_bg = float(np.sum(bg.psd[band])) if bg.n_segments else 0.0
    if p_sig > 0 and p_bg > 0:
        snr_db = 10.0 * math.log10(p_sig / p_bg)
    else:
        snr_db = math.inf if p_sig > 0 else -math.inf
    return ConnectionCheck(
        delay_samples=int(d),
        delay_peak=float(est.peak),
        h1=cs.h1,
        coherence=coh,
        mean_coherence=mean_coh,
        response_rms_fs=float(np.sqrt(np.mean(ya * ya))) if ya.size else 0.0,
        background_rms_fs=float(np.sqrt(np.mean(np.square(background)))) if len(background)
        else 0.0,
        snr_db=snr_db,
        segment_gain_db=gains,
        segment_end_s=ends / float(fs_hz),
        reference_gain_db=ref_db,
    )


class ConnectRecorder:
    """Collects the connection stage's records: the silent background, then the drive record.

    :meth:`feed` takes pairs of (unaligned) drive and response samples by stream index;
    :meth:`start_drive` marks the stream index where the connection drive starts.
    :attr:`complete` turns True once ``record_len`` samples from there are in.
    """

    def __init__(self, background_len: int, record_len: int) -> None:
        self.background_len = int(background_len)
        self.record_len = int(record_len)
        self.start: int | None = None
        self._bg: list[np.ndarray] = []
        self._x: list[np.ndarray] = []
        self._y: list[np.ndarray] = []
        self._have = 0

    def start_drive(self, index: int) -> None:
        self.start = int(index)

    @property
    def complete(self) -> bool:
        return self.start is not None and self._have >= self.record_len

    def feed(self, x: np.ndarray, y: np.ndarray, i0: int) -> None:
        self._bg.append(y[: max(0, self.background_len - i0)])
        if self.start is None or self.complete:
            return
        a = max(i0, self.start)
        if a < i0 + y.size:
            self._x.append(x[a - i0:])
            self._y.append(y[a - i0:])
            self._have += i0 + y.size - a

    def records(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """``(x, y, background)``: the drive record, its response, the silent response."""
        n = self.record_len
        bg = np.concatenate(self._bg) if self._bg else np.zeros(0)
        return np.concatenate(self._x)[:n], np.concatenate(self._y)[:n], bg


def flat_drive_psd(band: np.ndarray, level_fs: float, df_hz: float) -> np.ndarray:
    """Flat drive PSD on the ``band`` lines with a total of ``level_fs`` rms, FS²/Hz."""
    return np.where(band, level_fs**2 / (np.count_nonzero(band) * df_hz), 0.0)


class ConnectStage:
    """The connection stage's records and their one analysis.

    Parameters
    ----------
    fs_hz, nperseg : float, int
        Sample rate and Welch segment length (the control frame length).
    band : ndarray of bool
        Lines under control.
    background_len : int
        Silent samples before the connection drive starts.
    max_lag : int
        Largest loop delay searched, samples.
    skip : int
        Samples of the drive's fade-in left out of the analysis.
    """

    def __init__(self, *, fs_hz: float, nperseg: int, band: np.ndarray, background_len: int,
                 max_lag: int, skip: int) -> None:
        self.fs_hz = float(fs_hz)
        self.nperseg = int(nperseg)
        self.band = band
        self.max_lag = int(max_lag)
        self.skip = int(skip)
        self.recorder = ConnectRecorder(
            background_len, skip + (CONNECT_SEGMENTS + 1) * (self.nperseg // 2) + max_lag)

    def drive_due(self, n_out: int) -> bool:
        """True once ``n_out`` drive samples covered the background and the drive is not on."""
        rec = self.recorder
        return rec.start is None and n_out >= rec.background_len

    def start_drive(self, n_out: int) -> None:
        """The connection drive starts at drive stream index ``n_out``."""
        self.recorder.start_drive(n_out)

    def feed(self, x: np.ndarray, y: np.ndarray, i0: int) -> ConnectionCheck | None:
        """Take drive and response samples from stream index ``i0``; the check once complete."""
        rec = self.recorder
        rec.feed(x, y, i0)
        if not rec.complete:
            return None
        xr, yr, bg = rec.records()
        return analyse_connection(xr, yr, bg, fs_hz=self.fs_hz, nperseg=self.nperseg,
                                  band=self.band, max_lag=self.max_lag, skip=self.skip)


def connection_message(chk: ConnectionCheck) -> str:
    """One line for the connection event."""
    return (f"connect: loop delay {chk.delay_samples} samples, mean coherence "
            f"{chk.mean_coherence:.2f}, SNR {chk.snr_db:.1f} dB")


def identification_drive(
    chk: ConnectionCheck,
    target_psd: np.ndarray,
    *,
    g_per_fs: float,
    max_boost_db: float,
    coherence_min: float,
    band: np.ndarray,
    ceiling_ms_fs2: float,
    df_hz: float,
) -> tuple[np.ndarray, np.ndarray]:
    """The identification drive: the target through the connection's H1.

    Returns ``(h1, drive_psd)``: H1 in g/FS on all lines (non-finite lines set to 0, the
    controller's FRF until the identification replaces it) and the full-level drive PSD of
    :func:`liveshape.control.equalizer.initial_drive` (FS²/Hz), with ``coherence_min`` the
    connection threshold.
    """
    h = chk.h1 * g_per_fs
    res = equalizer.initial_drive(target_psd, h, chk.coherence, max_boost_db=max_boost_db,
                                  coherence_min=coherence_min, band=band,
                                  ceiling_ms_fs2=ceiling_ms_fs2, df_hz=df_hz)
    return np.where(np.isfinite(h), h, 0.0), np.array(res.drive_psd)
