"""Random-phase IFFT synthesis with overlap-add: a stationary, continuous drive stream.

Pure, stateful and seeded. :class:`RandomPhaseSynth` turns a one-sided PSD on the lines
``f_hz = k * fs_hz / frame_length`` (``k = 0 .. frame_length // 2``) into a stream of samples of
any length (Smallwood & Paez 1993; Harris' Shock and Vibration Handbook, chapter on digital
control systems for vibration testing, "time-domain randomization"):

1. each frame draws random Fourier coefficients whose mean-square per line is ``psd * delta_f``;
2. ``numpy.fft.irfft`` turns them into ``frame_length`` samples;
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

The DC and Nyquist lines are real: they get a real Gaussian (rayleigh) or a random sign (fixed)
of mean square ``psd * delta_f``, so the variance is ``sum(psd * delta_f)`` over all lines, the
same convention as :func:`scipy.signal.welch` with ``return_onesided=True``.

Gain changes are per-sample ramps (:class:`GainRamp`), never steps. Optional clipping at
``clip_sigma`` times the nominal rms (never below 2.5, the crest-factor floor of IEC 60068-2-64).
Running statistics of everything produced are in :attr:`RandomPhaseSynth.stats`.

References
----------
D. O. Smallwood and T. L. Paez, "A frequency domain method for the generation of partially
coherent normal stationary time domain signals", Shock and Vibration 1(1), 1993.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from liveshape.errors import ConfigError

#: Lowest clip level allowed, in multiples of the rms: IEC 60068-2-64 asks for a drive crest
#: factor of at least 2.5 (secondary summary of the standard; see DOMAIN.md section 5).
CLIP_SIGMA_MIN = 2.5

AMPLITUDES = ("rayleigh", "fixed")


def sine_window(frame_length: int) -> np.ndarray:
    """The power-complementary sine window ``w(n) = sin(pi (n + 1/2) / N)``.

    At 50 % overlap ``w(n)^2 + w(n + N/2)^2 = 1`` for every ``n`` (Princen-Bradley condition).
    """
    n = np.arange(frame_length, dtype=np.float64)
    return np.sin(np.pi * (n + 0.5) / frame_length)


def line_scales(
    psd: np.ndarray,
    delta_f: float,
    amplitudes: str = "rayleigh",
    *,
    out_re: np.ndarray | None = None,
    out_im: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Scales of the real and imaginary parts of the Fourier coefficients of one frame.

    With ``N = 2 (len(psd) - 1)`` and ``x = irfft(X)``, line ``k`` (``0 < k < N/2``) contributes
    ``(2/N) Re(X_k e^{i 2 pi k n / N})``, of variance ``2 E|X_k|^2 / N^2``; setting it to
    ``psd_k * delta_f`` gives ``|X_k| = N sqrt(psd_k delta_f / 2)``. DC and Nyquist are real,
    ``X/N`` of variance ``psd delta_f``, so ``|X| = N sqrt(psd delta_f)``. For ``"rayleigh"`` the
    real and imaginary parts are standard normals times ``|X_k| / sqrt(2)``; for ``"fixed"``
    they are ``|X_k| cos(phi)`` and ``|X_k| sin(phi)``.

    Parameters
    ----------
    psd : ndarray
        One-sided PSD on the lines DC .. Nyquist, units^2/Hz.
    delta_f : float
        Line spacing, Hz.
    amplitudes : {"rayleigh", "fixed"}
    out_re, out_im : ndarray, optional
        Arrays of ``len(psd)`` to write into.

    Returns
    -------
    scale_re, scale_im : ndarray
    """
    p = np.asarray(psd, dtype=np.float64)
    n = 2 * (p.size - 1)
    re = np.empty(p.size) if out_re is None else out_re
    im = np.empty(p.size) if out_im is None else out_im
    np.multiply(p, delta_f / 2.0, out=re)
    np.sqrt(re, out=re)
    re *= n
    for k in (0, p.size - 1):
        re[k] = n * math.sqrt(p[k] * delta_f)
    if amplitudes == "rayleigh":
        re[1:-1] /= math.sqrt(2.0)
    im[:] = re
    im[0] = 0.0
    im[-1] = 0.0
    return re, im


def draw_coefficients(
    rng: np.random.Generator,
    scale_re: np.ndarray,
    scale_im: np.ndarray,
    amplitudes: str = "rayleigh",
    *,
    real_lines: tuple[int, ...] = (0, -1),
    draw: np.ndarray | None = None,
    out: np.ndarray | None = None,
) -> np.ndarray:
    """Random Fourier coefficients of one frame (see :func:`line_scales`).

    ``"rayleigh"``: independent standard normals times the scales (complex Gaussian; the real DC
    and Nyquist lines a real Gaussian). ``"fixed"``: uniform phases, the real lines a random
    sign. ``2 len(scale_re)`` resp. ``len(scale_re)`` numbers are drawn whatever the levels.

    Parameters
    ----------
    rng : numpy.random.Generator
    scale_re, scale_im : ndarray
        From :func:`line_scales` (or a slice of them).
    amplitudes : {"rayleigh", "fixed"}
    real_lines : tuple of int, optional
        Indices (into the arrays given) of the real DC and Nyquist lines, if they are included.
    draw : ndarray, optional
        Work array of shape ``(2, len(scale_re))``.
    out : ndarray, optional
        complex128 array of ``len(scale_re)`` to write into.
    """
    m = scale_re.size
    work = np.empty((2, m)) if draw is None else draw
    coef = np.empty(m, dtype=np.complex128) if out is None else out
    re, im = coef.real, coef.imag
    if amplitudes == "rayleigh":
        rng.standard_normal(out=work)
        np.multiply(work[0], scale_re, out=re)
        np.multiply(work[1], scale_im, out=im)
    else:
        u = work[0]
        rng.random(out=u)
        u *= 2.0 * np.pi
        np.cos(u, out=work[1])
        np.multiply(work[1], scale_re, out=re)
        np.sin(u, out=work[1])
        np.multiply(work[1], scale_im, out=im)
        for k in real_lines:  # real lines: a random sign
            re[k] = scale_re[k] if u[k] < np.pi else -scale_re[k]
    return coef


def random_phase_frame(
    psd: np.ndarray,
    fs_hz: float,
    *,
    seed: int | np.random.Generator | None = None,
    amplitudes: str = "rayleigh",
) -> np.ndarray:
    """One unwindowed random-phase frame of ``N = 2 (len(psd) - 1)`` samples.

    The building block of :class:`RandomPhaseSynth` (which windows and overlap-adds such frames).
    With ``"fixed"`` amplitudes the frame's periodogram equals ``psd`` exactly and its mean square
    is ``sum(psd) * fs_hz / N`` (Parseval).
    """
    if amplitudes not in AMPLITUDES:
        raise ConfigError(
            f"synth: amplitudes = {amplitudes!r} is not one of {', '.join(AMPLITUDES)}"
        )
    p = np.asarray(psd, dtype=np.float64)
    n = 2 * (p.size - 1)
    rng = seed if isinstance(seed, np.random.Generator) else np.random.default_rng(seed)
    re, im = line_scales(p, fs_hz / n, amplitudes)
    return np.fft.irfft(draw_coefficients(rng, re, im, amplitudes), n=n)


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


class RunningMoments:
    """Mean, central moments up to the fourth, mean square and peak of a stream of blocks.

    Blocks are merged with the pairwise update of Chan, Golub & LeVeque (1979) extended to third
    and fourth moments by Pebay (2008, Sandia report SAND2008-6212), which is exact and does not
    suffer the cancellation of raw power sums.
    """

    def __init__(self) -> None:
        self.reset()

    def reset(self) -> None:
        self.n = 0
        self.mean = 0.0
        self.m2 = 0.0
        self.m3 = 0.0
        self.m4 = 0.0
        self.peak = 0.0

    def update(self, x: np.ndarray) -> None:
        nb = x.size
        if nb == 0:
            return
        mb = float(np.mean(x))
        self.peak = max(self.peak, float(np.max(x)), -float(np.min(x)))
        d = x - mb
        d2 = d * d
        m2b = float(np.sum(d2))
        d *= d2  # d^3 (np.dot would be faster in theory but threads badly in OpenBLAS)
        m3b = float(np.sum(d))
        d2 *= d2
        m4b = float(np.sum(d2))
        na = self.n
        if na == 0:
            self.n, self.mean, self.m2, self.m3, self.m4 = nb, mb, m2b, m3b, m4b
            return
        n = na + nb
        delta = mb - self.mean
        dn = delta / n
        m2 = self.m2 + m2b + delta * dn * na * nb
        m3 = (
            self.m3
            + m3b
            + delta * dn * dn * na * nb * (na - nb)
            + 3.0 * dn * (na * m2b - nb * self.m2)
        )
        m4 = (
            self.m4
            + m4b
            + delta * dn**3 * na * nb * (na * na - na * nb + nb * nb)
            + 6.0 * dn * dn * (na * na * m2b + nb * nb * self.m2)
            + 4.0 * dn * (na * m3b - nb * self.m3)
        )
        self.n, self.mean, self.m2, self.m3, self.m4 = n, self.mean + nb * dn, m2, m3, m4

    @property
    def rms(self) -> float:
        if self.n == 0:
            return 0.0
        return math.sqrt(max(self.m2 / self.n + self.mean * self.mean, 0.0))

    @property
    def kurtosis(self) -> float:
        if self.n == 0 or self.m2 <= 0.0:
            return math.nan
        return self.n * self.m4 / (self.m2 * self.m2)


class GainRamp:
    """A per-sample gain that moves to its target smoothly, never in a step.

    Between two non-zero gains the ramp is exponential (straight in dB) at ``rate_db_s``; to or from
    zero it is a raised-cosine fade ``g0 + (g1 - g0) (1 - cos(pi t)) / 2`` over ``duration_s``
    (a dB ramp cannot reach zero). A new target starts a new ramp from the gain reached so far.

    The largest change between two samples is bounded: ``g * (10^(rate / (20 fs)) - 1)`` on the
    dB ramp (the sample-to-sample ratio is at most ``10^(rate / (20 fs))``) and
    ``|g1 - g0| * pi / (2 M)`` on a fade of ``M`` samples (the slope of the raised cosine).

    Parameters
    ----------
    fs_hz : float
        Sample rate in Hz.
    gain : float, optional
        Starting gain (linear, >= 0). Default 1.
    rate_db_s : float, optional
        Default dB rate of a ramp between non-zero gains, dB/s. Default 6.
    fade_s : float, optional
        Default duration of a fade to or from zero, s. Default 0.25.
    """

    def __init__(
        self, fs_hz: float, *, gain: float = 1.0, rate_db_s: float = 6.0, fade_s: float = 0.25
    ) -> None:
        self.fs_hz = _positive(fs_hz, "fs_hz")
        self._rate_db_s = _positive(rate_db_s, "rate_db_s")
        self._fade_s = _positive(fade_s, "fade_s")
        g = _gain_value(gain)
        self._g0 = g  # start of the current ramp
        self._g1 = g  # target
        self._i = 0  # samples done on the current ramp
        self._m = 0  # length of the current ramp in samples (0: no ramp)
        self._fade = False
        self._gain = g  # gain of the last sample produced

    @property
    def gain(self) -> float:
        """Gain applied to the last sample produced (linear)."""
        return self._gain

    @property
    def gain_target(self) -> float:
        """Gain the ramp is heading to (linear)."""
        return self._g1

    @property
    def ramping(self) -> bool:
        """True while the gain has not reached its target."""
        return self._i < self._m

    def remaining_samples(self) -> int:
        """Samples left until the target is reached."""
        return self._m - self._i

    def set(
        self, gain: float, *, rate_db_s: float | None = None, duration_s: float | None = None
    ) -> None:
        """Head for ``gain`` from the current gain.

        Parameters
        ----------
        gain : float
            New target (linear, >= 0).
        rate_db_s : float, optional
            dB rate between non-zero gains (default: the constructor's ``rate_db_s``).
        duration_s : float, optional
            Duration of a fade to or from zero (default: the constructor's ``fade_s``).
        """
        target = _gain_value(gain)
        rate = self._rate_db_s if rate_db_s is None else _positive(rate_db_s, "rate_db_s")
        fade_s = self._fade_s if duration_s is None else _positive(duration_s, "duration_s")
        g = self._gain
        self._g0, self._g1, self._i = g, target, 0
        if target == g:
            self._m = 0
        elif g == 0.0 or target == 0.0:
            self._fade = True
            self._m = max(1, math.ceil(fade_s * self.fs_hz))
        else:
            self._fade = False
            change_db = abs(20.0 * math.log10(target / g))
            self._m = max(1, math.ceil(change_db * self.fs_hz / rate))

    def fill(self, out: np.ndarray) -> None:
        """Write the next ``len(out)`` per-sample gains into ``out`` and advance."""
        n = out.size
        k = min(n, self._m - self._i)
        if k > 0:
            t = np.arange(self._i + 1, self._i + k + 1, dtype=np.float64)
            t /= self._m
            if self._fade:
                np.cos(np.pi * t, out=out[:k])
                out[:k] = self._g0 + (self._g1 - self._g0) * 0.5 * (1.0 - out[:k])
            else:
                out[:k] = self._g0 * np.power(self._g1 / self._g0, t)
            self._i += k
            if self._i == self._m:
                out[k - 1] = self._g1  # land exactly on the target
        else:
            k = 0
        out[k:] = self._g1
        if n:
            self._gain = float(out[n - 1])

    def apply(self, x: np.ndarray) -> None:
        """Multiply ``x`` in place by the next ``len(x)`` gains and advance."""
        n = x.size
        if n == 0:
            return
        if self._i >= self._m:
            if self._g1 != 1.0:
                x *= self._g1
            self._gain = self._g1
            return
        k = min(n, self._m - self._i)
        g = np.empty(k)
        self.fill(g)
        x[:k] *= g
        if k < n:
            self.apply(x[k:])


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
    band far below Nyquist costs little more than the inverse FFT.

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
    ) -> None:
        self._fs_hz = _positive(fs_hz, "fs_hz")
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
        if amplitudes not in AMPLITUDES:
            raise ConfigError(
                f"synth: amplitudes = {amplitudes!r} is not one of {', '.join(AMPLITUDES)}"
            )
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
        self._draw = np.empty(2 * self._n_lines)
        self._span = (0, 0)  # lines drawn: first to last non-zero line of the PSD
        self._coef = np.zeros(self._n_lines, dtype=np.complex128)
        self._tail = np.zeros(self._hop)
        self._block = np.zeros(self._hop)
        self._clipped = np.zeros(self._hop, dtype=bool)
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
    def read(self, n: int, out: np.ndarray | None = None) -> np.ndarray:
        """Return the next ``n`` samples (float64), after clipping and gain.

        Parameters
        ----------
        n : int
            Number of samples, >= 0.
        out : ndarray, optional
            float64 array of length ``n`` to fill (avoids an allocation per call).
        """
        if out is None:
            out = np.empty(int(n), dtype=np.float64)
        elif out.shape != (n,) or out.dtype != np.float64:
            raise ConfigError(f"synth: out must be a float64 array of length {n}")
        if not self._primed:
            self._prime()
        done = 0
        while done < n:
            if self._pos == self._hop:
                self._next_block()
            k = min(n - done, self._hop - self._pos)
            out[done : done + k] = self._block[self._pos : self._pos + k]
            if self._clip_sigma is not None:
                self._n_clipped += int(np.count_nonzero(self._clipped[self._pos : self._pos + k]))
            self._pos += k
            done += k
        self._ramp.apply(out)
        self._moments.update(out)
        return out

    def _update_scales(self) -> None:
        self._psd[:] = self._psd_next
        self._psd_dirty = False
        line_scales(
            self._psd, self.delta_f, self._amplitudes, out_re=self._scale_re, out_im=self._scale_im
        )
        self._var_cur = float(np.sum(self._psd)) * self.delta_f
        nz = np.flatnonzero(self._psd)
        span = (int(nz[0]), int(nz[-1]) + 1) if nz.size else (0, 0)
        if span != self._span:
            self._coef[:] = 0.0
            self._span = span

    def _frame(self) -> np.ndarray:
        """Draw one windowed frame (N samples) from the current PSD."""
        if self._psd_dirty:
            self._update_scales()
        lo, hi = self._span
        if hi > lo:  # only the lines from the first to the last non-zero one are drawn
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
        frame = np.fft.irfft(self._coef, n=self._n)
        frame *= self._window
        return frame

    def _prime(self) -> None:
        frame = self._frame()
        self._tail[:] = frame[self._hop :]
        self._var_tail = self._var_cur
        self._primed = True

    def _next_block(self) -> None:
        var_prev = self._var_tail
        frame = self._frame()
        np.add(self._tail, frame[: self._hop], out=self._block)
        self._tail[:] = frame[self._hop :]
        self._var_tail = self._var_cur
        self._pos = 0
        if self._clip_sigma is not None:
            c = self._clip_sigma
            if var_prev == self._var_cur:
                level = c * math.sqrt(self._var_cur)
                np.greater(np.abs(self._block), level, out=self._clipped)
                np.clip(self._block, -level, level, out=self._block)
            else:  # the block blends two spectra: nominal variance per sample
                lv = self._level
                np.multiply(self._w2_tail, var_prev, out=lv)
                lv += self._w2_head * self._var_cur
                np.sqrt(lv, out=lv)
                lv *= c
                np.greater(np.abs(self._block), lv, out=self._clipped)
                np.clip(self._block, -lv, lv, out=self._block)


def _positive(value: float, name: str) -> float:
    x = float(value)
    if not math.isfinite(x) or x <= 0:
        raise ConfigError(f"synth: {name} = {value!r} must be a finite number > 0")
    return x


def _gain_value(value: float) -> float:
    x = float(value)
    if not math.isfinite(x) or x < 0:
        raise ConfigError(f"synth: gain = {value!r} must be a finite number >= 0")
    return x
