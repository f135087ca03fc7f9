"""Random-phase IFFT synthesis with overlap-add: a stationary, continuous drive stream.

Pure, stateful and seeded. :class:`RandomPhaseSynth` turns a one-sided PSD on the lines
``f_hz = k * fs_hz / frame_length`` (``k = 0 .. frame_length // 2``) into a stream of samples of
any length (Smallwood & Paez 1993; Harris' Shock and Vibration Handbook, chapter on digital
control systems for vibration testing, "time-domain randomization"):

1. each frame draws random Fourier coefficients whose mean-square per line is ``psd * delta_f``;
2. an inverse real FFT turns them into ``frame_length`` samples (when every non-zero line is
   below ``N / (2 D)`` for a power of two ``D``, as D interleaved transforms of ``N / D`` points,
   see :meth:`RandomPhaseSynth._frame`: the same frame to rounding, several times fewer
   operations);
3. the frame is multiplied by the sine window ``w(n) = sin(pi (n + 1/2) / N)`` and overlap-added
   at 50 % (hop ``N / 2``).

Independent frames give the output variance ``sigma^2 * sum_k w^2(t - k N/2)``: the window's
*squares* must sum to a constant. The sine window is power-complementary at 50 % overlap,
``sin^2 + cos^2 = 1`` at every sample, so the variance is the same at frame seams and mid-frame and
the output is continuous (every frame fades in and out). A Hann window at 50 % sums to one in
amplitude, not in power: its variance ripples between 1 and 1/2 of the target (mean -1.25 dB) and
the record is no longer stationary. The output PSD is the line spectrum smoothed by the sine
window's ``|W(f)|^2`` (about three lines wide), so breakpoints are rounded over a few lines.

Amplitude choice (decided: ``"rayleigh"`` is the default)
---------------------------------------------------------
``amplitudes="rayleigh"``
    Complex-Gaussian coefficients (Rayleigh amplitude, uniform phase). Each frame is exactly
    Gaussian and so is the overlap-added stream (a sum of independent Gaussian frames): kurtosis 3,
    ``P(|x| > 3 sigma) = 0.27 %``, the normal crest-factor statistics test standards assume. The
    price is chi-square scatter of each frame's periodogram (2 DOF per line per frame); a control
    loop averages many frames anyway, so the scatter only adds to the estimate's own.
``amplitudes="fixed"``
    Fixed amplitudes ``sqrt(2 psd delta_f)`` (times ``N/2``) with uniform random phase. The
    periodogram of one unwindowed frame equals the target exactly, but the signal is
    sub-Gaussian: one frame's kurtosis is ``3 - 1.5 sum a^4 / (sum a^2)^2`` (a sum of independent
    random-phase sines). After overlap-add with the sine window the stream's kurtosis is
    ``3 - 1.125 sum a^4 / (sum a^2)^2`` (fourth cumulants of independent frames add with weights
    ``w^4``; the mean of ``sin^4 + cos^4`` over a hop is 3/4). With few lines (a narrow band) the
    peaks are too low for a random test, and the overlap cross terms make the stream's spectrum
    scatter anyway, so the exactness is smaller than it looks.

Gain changes are per-sample ramps (:class:`liveshape.dsp.ramp.GainRamp`), never steps. Optional
clipping at ``clip_sigma`` times the nominal rms (never below 2.5, the crest-factor floor of
IEC 60068-2-64). Running statistics of everything produced are in
:attr:`RandomPhaseSynth.stats`. The frame building blocks (window, line scales, coefficients,
real DC and Nyquist lines) are in :mod:`liveshape.dsp.frames`; both modules' public names are
re-exported here.

References
----------
D. O. Smallwood and T. L. Paez, "A frequency domain method for the generation of partially
coherent normal stationary time domain signals", Shock and Vibration 1(1), 1993.
"""

from __future__ import annotations

import math
from collections import deque
from dataclasses import dataclass

import numpy as np

from liveshape.dsp.frames import (  # re-exported: AMPLITUDES .. sine_window
    AMPLITUDES,
    check_amplitudes,
    draw_coefficients,
    irfft_into,
    line_scales,
    random_phase_frame,
    sine_window,
)
from liveshape.dsp.moments import RunningMoments  # re-exported
from liveshape.dsp.nongauss import FrameGains, check_kurtosis
from liveshape.dsp.ramp import GainRamp, check_positive  # re-exported: GainRamp
from liveshape.errors import ConfigError

__all__ = [
    "AMPLITUDES",
    "CLIP_SIGMA_MIN",
    "GainRamp",
    "RandomPhaseSynth",
    "RunningMoments",
    "SynthStats",
    "draw_coefficients",
    "line_scales",
    "random_phase_frame",
    "sine_window",
]

#: Polyphase inverse FFT of band-limited frames: at most this many phases (short transforms),
#: and at least this many (1 is the plain inverse FFT of N points).
_MAX_PHASES = 64
_MIN_PHASES = 2

#: Lowest clip level allowed, in multiples of the rms: IEC 60068-2-64 (Test Fh) asks for a drive
#: crest factor of at least 2.5 (from a secondary summary of the standard; docs/methods.md,
#: "Gaussian drive: crest factor, kurtosis and clipping").
CLIP_SIGMA_MIN = 2.5


@dataclass(frozen=True)
class SynthStats:
    """Statistics of every sample a synthesizer has produced (after gain and clipping).

    Attributes
    ----------
    n_samples : int
        Samples produced.
    rms : float
        Root mean square (same units as the output, e.g. FS).
    peak : float
        Largest absolute sample.
    crest_factor : float
        ``peak / rms`` (nan before any non-zero sample).
    kurtosis : float
        ``m4 / m2^2`` of the central moments (3 for a Gaussian; nan before any variance).
    clipped_fraction : float
        Fraction of samples that were clipped (0 with clipping off).
    """

    n_samples: int
    rms: float
    peak: float
    crest_factor: float
    kurtosis: float
    clipped_fraction: float


class RandomPhaseSynth:
    """Stationary random stream by random-phase IFFT frames overlap-added with a sine window.

    Parameters
    ----------
    fs_hz : float
        Sample rate in Hz.
    frame_length : int
        Frame length ``N`` in samples (even, >= 4); lines are ``k * fs_hz / N``.
    seed : int or numpy.random.Generator, optional
        Seed of :func:`numpy.random.default_rng`, or a generator to draw from.
    amplitudes : {"rayleigh", "fixed"}
        Complex-Gaussian (true Gaussian output, default) or fixed amplitudes with random phase
        (exact per-frame periodogram, sub-Gaussian). See the module docstring.
    clip_sigma : float, optional
        Clip the unit-gain signal at ``clip_sigma`` times its nominal rms (before the gain). None
        (default) does not clip. Values below 2.5 are refused (IEC 60068-2-64 crest-factor floor).
    gain : float, optional
        Starting gain (linear). Default 1; a controller starts at 0 and fades in with
        :meth:`set_gain`.
    rate_db_s : float, optional
        Default dB rate of gain ramps between non-zero gains, dB/s. Default 6.
    fade_s : float, optional
        Default duration of fades to or from zero gain, s. Default 0.25.

    Notes
    -----
    The PSD is zero until :meth:`set_psd` is called. The first :meth:`read` primes the overlap
    with the tail of one frame, so the output is stationary from its first sample. Memory is
    constant: the frame, block and coefficient buffers are allocated once. Each frame draws
    random numbers only for the lines from the first to the last non-zero line of the PSD, so a
    new PSD on the same span (a drive update) continues the same random sequence, and a narrow
    band far below Nyquist costs little more than the inverse FFT, itself made of short
    interleaved transforms. The statistics gather whole 8192-sample chunks
    (:class:`liveshape.dsp.moments.RunningMoments`) and are merged when :attr:`stats` is read.

    Examples
    --------
    >>> synth = RandomPhaseSynth(8000.0, 1024, seed=1)
    >>> psd = np.where((synth.f_hz >= 20) & (synth.f_hz <= 2000), 1e-4, 0.0)
    >>> synth.set_psd(psd)
    >>> x = synth.read(80000)
    >>> round(float(np.std(x)) / math.sqrt(psd.sum() * synth.delta_f), 1)
    1.0
    """

    def __init__(
        self,
        fs_hz: float,
        frame_length: int,
        *,
        seed: int | np.random.Generator | None = None,
        amplitudes: str = "rayleigh",
        clip_sigma: float | None = None,
        gain: float = 1.0,
        rate_db_s: float = 6.0,
        fade_s: float = 0.25,
        kurtosis: float | None = None,
    ) -> None:
        self._fs_hz = check_positive(fs_hz, "fs_hz")
        if (
            isinstance(frame_length, bool)
            or not isinstance(frame_length, (int, np.integer))
            or frame_length < 4
            or frame_length % 2
        ):
            raise ConfigError(
                f"synth: frame_length = {frame_length!r} must be an even integer >= 4"
            )
        n = int(frame_length)
        check_amplitudes(amplitudes)
        if clip_sigma is not None:
            c = float(clip_sigma)
            if not math.isfinite(c) or c < CLIP_SIGMA_MIN:
                raise ConfigError(
                    f"synth: clip_sigma = {clip_sigma!r} must be >= {CLIP_SIGMA_MIN} "
                    f"(IEC 60068-2-64 drive crest-factor floor of {CLIP_SIGMA_MIN})"
                )
            clip_sigma = c
        self._n = n
        self._hop = n // 2
        self._n_lines = n // 2 + 1
        self._amplitudes = amplitudes
        self._clip_sigma = clip_sigma
        self._rng = seed if isinstance(seed, np.random.Generator) else np.random.default_rng(seed)
        self._gains: FrameGains | None = None
        if kurtosis is not None and check_kurtosis(kurtosis, "synth: kurtosis") > 3.0:
            self._gains = FrameGains(kurtosis, self._rng)
        self._frame_index = -2  # the priming frame is number -1, the first block's frame 0
        #: The per-sample gains of the last :meth:`read` while the gain ramped (None: steady,
        #: at :attr:`gain`).
        self.last_gains: np.ndarray | None = None
        self._gain2_log: deque[tuple[int, float]] = deque(maxlen=64)  # (frame, a²) when ≠ 1
        self._ramp = GainRamp(self._fs_hz, gain=gain, rate_db_s=rate_db_s, fade_s=fade_s)
        self._moments = RunningMoments()
        self._n_clipped = 0

        self._window = sine_window(n)
        self._w2_head = self._window[: self._hop] ** 2  # weight of the newest frame in a block
        self._w2_tail = self._window[self._hop :] ** 2  # weight of the previous frame
        self._psd = np.zeros(self._n_lines)  # PSD of the frames being made
        self._psd_next = np.zeros(self._n_lines)  # set by set_psd, used from the next frame
        self._psd_dirty = False
        self._scale_re = np.zeros(self._n_lines)
        self._scale_im = np.zeros(self._n_lines)
        self._scale_ri = np.zeros(2 * self._n_lines)  # re, im scales interleaved as in _coef
        self._draw = np.empty(2 * self._n_lines)
        self._span = (0, 0)  # lines drawn: first to last non-zero line of the PSD
        self._coef = np.zeros(self._n_lines, dtype=np.complex128)
        self._coef_ri = self._coef.view(np.float64)  # re, im interleaved
        self._frame_buf = np.empty(n)  # the newest unwindowed frame
        # polyphase inverse FFT of a band below fs / (2 D): coefficients and phase factors
        self._poly: tuple | None = None  # views for the polyphase transform (None: one of N)
        self._draw_views = (self._coef_ri[:0], self._scale_ri[:0])  # drawn lines, their scales
        self._poly_coef = np.zeros(n // 2 + _MAX_PHASES, dtype=np.complex128)
        self._poly_mod = np.zeros(n // 2, dtype=np.complex128)
        self._tail = np.zeros(self._hop)
        self._block = np.zeros(self._hop)
        self._clipped = np.zeros(self._hop, dtype=bool)  # samples of the block clipped
        self._any_clipped = False  # False: none in the block (_clipped is then stale)
        self._level = np.empty(self._hop)
        self._pos = self._hop  # read position in the block (hop: block used up)
        self._var_tail = 0.0  # nominal variance of the frame in the tail
        self._var_cur = 0.0  # nominal variance of the frames being made
        self._primed = False

    # ----------------------------------------------------------------------- properties
    @property
    def fs_hz(self) -> float:
        """Sample rate, Hz."""
        return self._fs_hz

    @property
    def frame_length(self) -> int:
        """Frame length ``N``, samples."""
        return self._n

    @property
    def hop(self) -> int:
        """Hop between frames, ``N / 2`` samples."""
        return self._hop

    @property
    def delta_f(self) -> float:
        """Line spacing ``fs_hz / N``, Hz."""
        return self._fs_hz / self._n

    @property
    def n_lines(self) -> int:
        """Number of lines, ``N / 2 + 1`` (DC to Nyquist)."""
        return self._n_lines

    @property
    def f_hz(self) -> np.ndarray:
        """Line frequencies ``k * delta_f``, Hz (a new array)."""
        return np.arange(self._n_lines) * self.delta_f

    @property
    def amplitudes(self) -> str:
        """``"rayleigh"`` or ``"fixed"``."""
        return self._amplitudes

    @property
    def clip_sigma(self) -> float | None:
        """Clip level in multiples of the nominal rms, or None."""
        return self._clip_sigma

    @property
    def psd(self) -> np.ndarray:
        """The PSD the next frame will use (a copy), units^2/Hz."""
        return self._psd_next.copy()

    @property
    def nominal_rms(self) -> float:
        """``sqrt(sum(psd * delta_f))`` of the PSD the next frame will use (unit gain)."""
        return math.sqrt(float(np.sum(self._psd_next)) * self.delta_f)

    @property
    def gain(self) -> float:
        """Gain of the last sample produced (linear)."""
        return self._ramp.gain

    @property
    def gain_target(self) -> float:
        """Gain the ramp is heading to (linear)."""
        return self._ramp.gain_target

    @property
    def ramping(self) -> bool:
        """True while the gain is still moving to its target."""
        return self._ramp.ramping

    @property
    def ramp_remaining_samples(self) -> int:
        """Samples until the gain reaches its target (0 when steady)."""
        return self._ramp.remaining_samples()

    @property
    def window(self) -> np.ndarray:
        """The synthesis window (sine, power-complementary at 50 % overlap), a copy."""
        return self._window.copy()

    @property
    def stats(self) -> SynthStats:
        """Statistics of every sample produced so far (after gain and clipping)."""
        m = self._moments
        rms = m.rms
        return SynthStats(
            n_samples=m.n,
            rms=rms,
            peak=m.peak,
            crest_factor=m.peak / rms if rms > 0 else math.nan,
            kurtosis=m.kurtosis,
            clipped_fraction=self._n_clipped / m.n if m.n else 0.0,
        )

    # ----------------------------------------------------------------------- controls
    def set_psd(self, psd: np.ndarray) -> None:
        """Set the one-sided PSD (units^2/Hz, e.g. FS^2/Hz) on the ``n_lines`` lines.

        It takes effect from the next frame made; the samples already in the overlap keep the old
        spectrum, so the change blends in over one hop (no step).
        """
        p = np.asarray(psd, dtype=np.float64)
        if p.shape != (self._n_lines,):
            raise ConfigError(
                f"synth: psd has shape {p.shape}, expected ({self._n_lines},) lines "
                f"for frame_length = {self._n}"
            )
        if not np.all(np.isfinite(p)) or np.any(p < 0):
            raise ConfigError("synth: psd must be finite and >= 0 on every line")
        self._psd_next[:] = p
        self._psd_dirty = True

    def set_gain(
        self, gain: float, *, rate_db_s: float | None = None, duration_s: float | None = None
    ) -> None:
        """Ramp the output gain to ``gain`` (linear), per sample, never in a step.

        Between non-zero gains the ramp is straight in dB at ``rate_db_s`` (dB/s); to or from zero
        it is a raised-cosine fade over ``duration_s`` (s). None uses the constructor's defaults.
        """
        self._ramp.set(gain, rate_db_s=rate_db_s, duration_s=duration_s)

    def reset_stats(self) -> None:
        """Forget the statistics gathered so far (the stream itself continues)."""
        self._moments.reset()
        self._n_clipped = 0

    # ----------------------------------------------------------------------- output
    def read(self, n: int, out: np.ndarray | None = None,
             add: np.ndarray | None = None) -> np.ndarray:
        """Return the next ``n`` samples (float64), after clipping and gain.

        Parameters
        ----------
        n : int
            Number of samples, >= 0.
        out : ndarray, optional
            float64 array of length ``n`` to fill (avoids an allocation per call).
        add : ndarray, optional
            ``n`` samples added to the random before the gain (not clipped with it): sine tones
            that follow the level like the random does.
        """
        if out is None:
            out = np.empty(int(n), dtype=np.float64)
        elif out.shape != (n,) or out.dtype != np.float64:
            raise ConfigError(f"synth: out must be a float64 array of length {n}")
        if not self._primed:
            self._prime()
        ramp = self._ramp
        g = None if ramp.ramping else ramp.gain_target  # a steady gain is applied in the copy
        if add is not None:
            g = None  # the gain comes after the tones are added
        block, hop, clip = self._block, self._hop, self._clip_sigma is not None
        pos = self._pos
        done = 0
        while done < n:
            if pos == hop:
                self._next_block()
                pos = 0
            k = min(n - done, hop - pos)
            if g is None or g == 1.0:
                out[done : done + k] = block[pos : pos + k]
            else:
                np.multiply(block[pos : pos + k], g, out=out[done : done + k])
            if clip and self._any_clipped:
                self._n_clipped += int(np.count_nonzero(self._clipped[pos : pos + k]))
            pos += k
            done += k
        self._pos = pos
        if add is not None:
            out += add
        if add is not None or g is None:
            if ramp.ramping:
                gains = np.empty(out.size)
                ramp.fill(gains)  # the per-sample gains of this block, kept for the caller
                out *= gains
                self.last_gains = gains
            else:
                if ramp.gain_target != 1.0:
                    out *= ramp.gain_target
                self.last_gains = None
        else:
            self.last_gains = None
        self._moments.update(out)
        return out

    def _update_scales(self) -> None:
        self._psd[:] = self._psd_next
        self._psd_dirty = False
        line_scales(
            self._psd, self.delta_f, self._amplitudes, out_re=self._scale_re, out_im=self._scale_im
        )
        self._scale_ri[0::2] = self._scale_re
        self._scale_ri[1::2] = self._scale_im
        self._var_cur = float(np.sum(self._psd)) * self.delta_f
        nz = np.flatnonzero(self._psd)
        span = (int(nz[0]), int(nz[-1]) + 1) if nz.size else (0, 0)
        if span != self._span:
            self._coef[:] = 0.0
            self._span = span
            self._set_phases(*span)

    def _set_phases(self, lo: int, hi: int) -> None:
        """Choose the polyphase split for the lines ``lo .. hi - 1`` (see :meth:`_frame`)."""
        n, d = self._n, 1
        while 2 * d <= _MAX_PHASES and n % (4 * d) == 0 and n // (2 * d) >= 2 * hi:
            d *= 2
        # views used by every frame, made once per span
        self._draw_views = (self._coef_ri[2 * lo: 2 * hi], self._scale_ri[2 * lo: 2 * hi])
        self._poly = None
        if d >= _MIN_PHASES and hi > lo:
            m = n // d
            self._poly_coef[:] = 0.0
            coef = self._poly_coef[: (m // 2 + 1) * d].reshape(m // 2 + 1, d)
            mod = self._poly_mod[: (hi - lo) * d].reshape(hi - lo, d)
            k = np.arange(lo, hi, dtype=np.float64)[:, np.newaxis]
            np.exp((2j * np.pi / n) * k * np.arange(d), out=mod)
            mod /= d
            lines = self._coef[lo:hi, np.newaxis]
            self._poly = (mod, lines, coef[lo:hi], coef, m, self._frame_buf.reshape(m, d))

    def _frame(self) -> np.ndarray:
        """Draw one unwindowed frame (N samples) from the current PSD."""
        if self._psd_dirty:
            self._update_scales()
        lo, hi = self._span
        if hi > lo:  # only the lines from the first to the last non-zero one are drawn
            if self._amplitudes == "rayleigh":
                # the same draws as draw_coefficients: standard normals, re and im interleaved
                ri, scale = self._draw_views
                self._rng.standard_normal(out=ri)
                np.multiply(ri, scale, out=ri)
            else:
                real = tuple(k - lo for k in (0, self._n_lines - 1) if lo <= k < hi)
                draw_coefficients(
                    self._rng,
                    self._scale_re[lo:hi],
                    self._scale_im[lo:hi],
                    self._amplitudes,
                    real_lines=real,
                    draw=self._draw[: 2 * (hi - lo)].reshape(2, hi - lo),
                    out=self._coef[lo:hi],
                )
        if self._poly is None:
            return irfft_into(self._coef, self._n, self._frame_buf)
        # Polyphase: with every line below M / 2, M = N / D, sample D j + r of the frame is
        # sample j of the M-point inverse FFT of the lines times exp(2 pi i k r / N) / D: D short
        # transforms side by side (vectorized over r) instead of one long one; equal to rounding.
        mod, lines, rows, coef, m, frame = self._poly
        np.multiply(mod, lines, out=rows)
        irfft_into(coef, m, frame, axis=0)
        return self._frame_buf

    def _modulated_frame(self) -> np.ndarray:
        frame = self._frame()
        self._frame_index += 1
        if self._gains is not None:
            a = self._gains.next()
            frame *= a
            self._gain2_log.append((self._frame_index, a * a))
        return frame

    def set_kurtosis(self, kurtosis: float) -> None:
        """A new kurtosis target of the stream (3: Gaussian), from the next group of frames.

        The frame gains keep ``E[a²] = 1`` (the PSD is kept); switching from Gaussian starts the
        gains with the next frame.
        """
        k = check_kurtosis(kurtosis, "synth: kurtosis")
        if self._gains is None:
            if k > 3.0:
                self._gains = FrameGains(k, self._rng)
        else:
            self._gains.retarget(k)

    @property
    def kurtosis_target(self) -> float:
        """The stream's kurtosis target (3.0 without frame gains)."""
        return 3.0 if self._gains is None else self._gains.kurtosis

    def frame_gain2(self, frame: int) -> float:
        """``a²`` of synthesis frame ``frame`` (frame ``j`` starts at sample ``j·hop``); 1.0 for
        a Gaussian frame or one no longer kept (the newest 64 are)."""
        for j, g2 in reversed(self._gain2_log):
            if j == frame:
                return g2
            if j < frame:
                break
        return 1.0

    def _prime(self) -> None:
        frame = self._modulated_frame()
        np.multiply(frame[self._hop :], self._window[self._hop :], out=self._tail)
        self._var_tail = self._var_cur
        self._primed = True

    def _next_block(self) -> None:
        var_prev = self._var_tail
        frame = self._modulated_frame()
        hop, w, block = self._hop, self._window, self._block
        np.multiply(frame[:hop], w[:hop], out=block)
        block += self._tail
        np.multiply(frame[hop:], w[hop:], out=self._tail)
        self._var_tail = self._var_cur
        self._pos = 0
        if self._clip_sigma is not None:
            c = self._clip_sigma
            if var_prev == self._var_cur:
                level = c * math.sqrt(self._var_cur)
                mag = np.abs(block, out=self._level)
                # few blocks reach a clip level of several sigma: look before clipping
                self._any_clipped = bool(np.maximum.reduce(mag) > level)
                if self._any_clipped:
                    np.greater(mag, level, out=self._clipped)
                    np.clip(block, -level, level, out=block)
            else:  # the block blends two spectra: nominal variance per sample
                self._any_clipped = True
                lv = self._level
                np.multiply(self._w2_tail, var_prev, out=lv)
                lv += self._w2_head * self._var_cur
                np.sqrt(lv, out=lv)
                lv *= c
                np.greater(np.abs(block), lv, out=self._clipped)
                np.clip(block, -lv, lv, out=block)
