"""The controller's drive output: synthesis, level, limits and the recent history.

Pure. :class:`DriveStream` wraps :class:`liveshape.dsp.synth.RandomPhaseSynth` with what the control
loop needs on the drive side:

* the drive PSD is held at *full level* (FS²/Hz); the test level is the synthesizer's gain
  ``10^(level_db/20)``, moved by per-sample ramps only (dB ramps between levels, raised-cosine
  fades to and from zero);
* the rms ceiling: ``drive_rms_max_fs`` and, with clipping at ``clip_sigma``·rms,
  ``drive_peak_max_fs / clip_sigma``, so the clipped peaks stay inside the peak limit;
  :meth:`ceiling_ms` is the mean-square ceiling of the full-level PSD at a given gain;
* a hard limit at ``±drive_peak_max_fs`` on every sample, counted (the ceiling should keep it
  from acting);
* the recent samples by stream index (:class:`liveshape.control.stages.DriveHistory`) for the delay
  alignment of the response, which :class:`ResponseQueue` pairs with the drive it answers.
"""

from __future__ import annotations

import math
from collections import deque

import numpy as np

from liveshape.control.stages import DriveHistory
from liveshape.dsp.synth import RandomPhaseSynth


class DriveStream:
    """Drive samples for the control loop.

    Parameters
    ----------
    fs_hz, frame_length : float, int
        Sample rate and synthesis frame length (lines ``k fs / frame_length``).
    seed : int, optional
        Seed of the synthesis.
    clip_sigma : float, optional
        Clip level of the synthesizer in multiples of the rms (None: no clipping).
    rms_max_fs, peak_max_fs : float
        Drive rms and peak limits, FS.
    rate_db_s : float
        Default dB rate of level ramps, dB/s.
    fade_s : float
        Default fade duration to and from zero, s.
    history : int
        Initial capacity of the sample history.
    """

    def __init__(self, fs_hz: float, frame_length: int, *, seed: int | None,
                 clip_sigma: float | None, rms_max_fs: float, peak_max_fs: float,
                 rate_db_s: float, fade_s: float, history: int,
                 kurtosis: float | None = None) -> None:
        self.fs_hz = float(fs_hz)
        self.df_hz = self.fs_hz / frame_length
        self.rms_limit_fs = float(rms_max_fs)
        if clip_sigma is not None:
            self.rms_limit_fs = min(self.rms_limit_fs, float(peak_max_fs) / clip_sigma)
        self.peak_limit_fs = float(peak_max_fs)
        self.rate_db_s = float(rate_db_s)
        self.synth = RandomPhaseSynth(self.fs_hz, frame_length, seed=seed, clip_sigma=clip_sigma,
                                      gain=0.0, rate_db_s=rate_db_s, fade_s=fade_s,
                                      kurtosis=kurtosis)
        self.psd = np.zeros(frame_length // 2 + 1)  # full-level drive PSD, FS²/Hz
        self.history = DriveHistory(history)
        self.gain2_history = DriveHistory(history)  # the squared gain of every sample
        self.gain2_margin = 4 * frame_length  # kept behind the drive history's horizon
        self.n_out = 0  # samples produced
        self.ceiling_hit = False  # the last PSD set was cut by the ceiling
        self.clipped = 0  # samples hard-limited since reset_counters
        self.peak_fs = 0.0  # largest |sample| since reset_counters
        self._hop = frame_length // 2
        # (first synthesis frame, full-level PSD) of every PSD set, newest last; frame j starts
        # at drive sample j·hop (the frame before the first, j = −1, primes the overlap)
        self._psd_log: deque[tuple[int, np.ndarray]] = deque([(-1, self.psd)], maxlen=64)
        # (first sample, end sample, gain reached) of every gain ramp, newest last
        self._ramp_log: deque[tuple[int, int, float]] = deque([(0, 0, 0.0)], maxlen=64)
        self._weights: dict[int, np.ndarray] = {}
        self._h2: np.ndarray | None = None
        #: Sine tones on the random (``read(n)`` → full-level samples, FS), or None.
        self.tones = None
        self._rms_max_fs = float(rms_max_fs)
        self._peak_max_fs = float(peak_max_fs)
        self._clip_sigma = clip_sigma

    # -- level ---------------------------------------------------------------------------
    @property
    def gain(self) -> float:
        return self.synth.gain

    @property
    def gain_target(self) -> float:
        return self.synth.gain_target

    @property
    def ramping(self) -> bool:
        return self.synth.ramping

    @property
    def silent(self) -> bool:
        """At zero gain with no ramp under way."""
        return self.synth.gain == 0.0 and not self.synth.ramping

    def go_to(self, gain: float) -> int:
        """dB ramp from the current gain to ``gain`` (both > 0); returns its length, samples."""
        g_now = self.synth.gain_target
        n = 0 if g_now <= 0 else int(math.ceil(abs(20 * math.log10(gain / g_now))
                                                * self.fs_hz / self.rate_db_s))
        self.synth.set_gain(gain, rate_db_s=self.rate_db_s)
        self._log_ramp(gain)
        return n

    def fade(self, gain: float, duration_s: float) -> None:
        """Raised-cosine fade to ``gain`` (to or from zero) over ``duration_s``."""
        self.synth.set_gain(gain, duration_s=duration_s)
        self._log_ramp(gain)

    def _log_ramp(self, gain: float) -> None:
        end = self.n_out + self.synth.ramp_remaining_samples
        self._ramp_log.append((self.n_out, end, float(gain)))

    # -- spectrum ------------------------------------------------------------------------
    def ceiling_ms(self, gain: float) -> float:
        """Mean-square ceiling of the full-level drive PSD when played at ``gain``, FS²."""
        return (self.rms_limit_fs / gain) ** 2

    def set_psd(self, psd: np.ndarray, *, ceiling_hit: bool = False) -> None:
        """New full-level drive PSD (from the next synthesis frame on)."""
        self.psd = np.array(psd, dtype=float)
        self.ceiling_hit = bool(ceiling_hit)
        self.synth.set_psd(self.psd)
        first = -(-self.n_out // self._hop)  # the next frame made
        if self._psd_log[-1][0] == first:
            self._psd_log.pop()
        self._psd_log.append((first, self.psd))

    def reserve_peak(self, peak_fs: float) -> None:
        """Leave ``peak_fs`` of the peak limit to tones: the random's rms ceiling becomes
        ``(drive_peak_max_fs − peak_fs) / clip_sigma`` (with clipping) and at most its limit."""
        room = max(self._peak_max_fs - float(peak_fs), 0.0)
        rms = self._rms_max_fs
        if self._clip_sigma is not None:
            rms = min(rms, room / self._clip_sigma)
        self.rms_limit_fs = rms

    def rescale_for(self, gain: float) -> float:
        """Scale the PSD down so that it fits the ceiling at ``gain``; returns the factor."""
        ms = float(self.psd.sum()) * self.df_hz
        cap = self.ceiling_ms(gain)
        if ms <= cap:
            return 1.0
        scale = cap / ms
        self.set_psd(self.psd * scale, ceiling_hit=True)
        return scale

    def played_psd(self, band: np.ndarray, gain: float | None = None) -> np.ndarray:
        """The PSD on ``band`` as played at ``gain`` (default: the current gain), FS²/Hz."""
        g = self.synth.gain if gain is None else gain
        return self.psd[band] * g * g

    # -- what a segment of the drive held ------------------------------------------------
    def segment_psd(self, start: int, band: np.ndarray) -> np.ndarray:
        """Expected full-level PSD on ``band`` of the drive samples ``start .. start + N − 1``.

        A Hann-windowed segment of the overlap-added stream sees the (independent) synthesis
        frames overlapping it, each in proportion to the product of the two windows' powers,
        ``w_j = Σ_t h²(t − start) s²(t − j·hop) / Σ_t h²`` (the weights sum to 1 because the
        sine window is power-complementary): the expected periodogram is ``Σ_j w_j D_j`` for
        PSDs that are smooth over the window's kernel (Welch 1967). The level (gain) is not
        included: see :meth:`segment_gain`.
        """
        hop = self._hop
        q, o = divmod(int(start), hop)
        w = self._weights.get(o)
        if w is None:
            w = self._weights[o] = self._frame_weights(o)
        out = np.zeros(int(np.count_nonzero(band)))
        for r in range(4):
            if w[r] > 0.0:
                j = q - 1 + r
                # a non-Gaussian drive scales each frame by its gain a (E[a²] = 1): that frame's
                # power is a² times its PSD, known to the synthesizer
                out += (w[r] * self.synth.frame_gain2(j)) * self._frame_psd(j)[band]
        return out

    def segment_burst(self, start: int) -> float:
        """``Σ_j w_j a_j²``: the drive power of the segment from ``start`` relative to its PSD.

        1.0 for a Gaussian drive; for the frame-gain (non-Gaussian) drive the known burst factor
        of that segment, by which its expected control power is scaled.
        """
        hop = self._hop
        q, o = divmod(int(start), hop)
        w = self._weights.get(o)
        if w is None:
            w = self._weights[o] = self._frame_weights(o)
        return float(sum(w[r] * self.synth.frame_gain2(q - 1 + r) for r in range(4) if w[r] > 0))

    def _frame_psd(self, j: int) -> np.ndarray:
        for first, psd in reversed(self._psd_log):
            if first <= j:
                return psd
        return self._psd_log[0][1]

    def _frame_weights(self, o: int) -> np.ndarray:
        n, hop = 2 * self._hop, self._hop
        t = np.arange(n)
        h2 = (0.5 - 0.5 * np.cos(2 * np.pi * t / n)) ** 2
        s2 = self.synth.window ** 2
        w = np.zeros(4)
        for r in range(4):
            k = t - ((r - 1) * hop - o)  # sample index inside frame q − 1 + r
            ok = (k >= 0) & (k < n)
            w[r] = float(np.dot(h2[ok], s2[k[ok]]))
        return w / float(h2.sum())

    def segment_gain(self, start: int, length: int) -> float | None:
        """The gain over drive samples ``start .. start + length − 1``; None if it moved."""
        end = start + length
        for a, b, g in reversed(self._ramp_log):
            if a >= end:
                continue  # began after the span
            return g if b <= start else None  # None: the gain moved inside the span
        return None

    # -- samples -------------------------------------------------------------------------
    def reset_counters(self) -> None:
        self.clipped = 0
        self.peak_fs = 0.0

    def read(self, n: int) -> np.ndarray:
        """The next ``n`` drive samples, hard-limited to ``±peak_limit_fs``."""
        add = None if self.tones is None else self.tones.read(n)
        out = self.synth.read(n, add=add)
        peak = float(np.max(np.abs(out))) if n else 0.0
        lim = self.peak_limit_fs
        if peak >= lim:
            np.clip(out, -lim, lim, out=out)
            self.clipped += int(np.count_nonzero(np.abs(out) >= lim))
            peak = lim
        self.peak_fs = max(self.peak_fs, peak)
        g = self.synth.last_gains
        self.gain2_history.append(np.full(n, self.synth.gain ** 2) if g is None else g * g)
        self.push(out, gains_pushed=True)
        return out

    def push(self, out: np.ndarray, *, gains_pushed: bool = False) -> None:
        """Record samples sent without the synthesizer (zeros after the end)."""
        self.history.append(out)
        if not gains_pushed:
            self.gain2_history.append(np.zeros(out.size))
        self.n_out += out.size

    def segment_gain2(self, start: int, length: int) -> float:
        """Mean square of the level gain over drive samples ``start .. start + length − 1``,
        weighted by the Hann window's power (the weight each sample has in the segment's
        periodogram), so a segment during a level ramp is normalized by what it played."""
        if self._h2 is None or self._h2.size != length:
            t = np.arange(length)
            self._h2 = (0.5 - 0.5 * np.cos(2 * np.pi * t / length)) ** 2
            self._h2 /= self._h2.sum()
        return float(np.dot(self._h2, self.gain2_history.get(start, start + length)))


class ResponseQueue:
    """Response samples waiting for the drive samples they answer.

    The response stream is everything the rig returned; sample ``i`` answers drive sample
    ``i − lag``. :meth:`take` hands out the samples whose drive has been produced, paired with
    that drive (zeros before the stream), and lets the drive history forget what is no longer
    needed.
    """

    def __init__(self) -> None:
        self.n_in = 0  # response samples received
        self.next = 0  # next response sample to hand out
        self._pending: list[np.ndarray] = []

    def push(self, y: np.ndarray) -> None:
        self._pending.append(y)
        self.n_in += y.size

    def take(self, drive: DriveStream, lag: int,
             keep: int) -> tuple[np.ndarray, np.ndarray, int] | None:
        """``(x, y, i0)``: the drive and the response from response index ``i0``, or None.

        ``keep`` drive samples before the last one handed out stay in the history (the largest
        lag still searched).
        """
        end = min(self.n_in, drive.n_out + lag)
        if end <= self.next:
            return None
        ys = np.concatenate(self._pending) if len(self._pending) > 1 else self._pending[0]
        k = end - self.next
        y, rest = ys[:k], ys[k:]
        self._pending = [rest] if rest.size else []
        i0 = self.next
        x = drive.history.get(i0 - lag, end - lag)
        self.next = end
        drive.history.forget_before(end - keep)
        # a segment looks a frame and more behind the newest response sample
        drive.gain2_history.forget_before(end - keep - drive.gain2_margin)
        return x, y, i0
