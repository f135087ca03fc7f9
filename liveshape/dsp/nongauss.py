"""Non-Gaussian drive with a kurtosis target: random frame gains that keep the PSD.

Method (decided: random amplitude modulation of the IFFT frames, renormalized in groups)
------------------------------------------------------------------------------------------
Each random-phase frame of :class:`liveshape.dsp.synth.RandomPhaseSynth` is multiplied by its own
random gain ``a`` before windowing and overlap-add. The frames are independent and zero-mean, so
the expected PSD of the stream is ``E[a^2]`` times the Gaussian one, line by line: with
``E[a^2] = 1`` the spectrum's *shape and level* are untouched (no nonlinearity acts on the
samples, so no harmonics or intermodulation leak out of the band). A Gaussian frame scaled by an
independent gain is a Gaussian scale mixture (Andrews & Mallows 1974) with kurtosis
``3 E[a^4] / E[a^2]^2``; bursts of high level give the heavy tails of road and terrain records.
This is the amplitude-modulation family of non-Gaussian random testing (a Gaussian signal of
the PSD times a slowly varying modulation signal; e.g. Xu, Yang, Ahlin & Chen 2024, who draw the
modulation from Beta and Weibull laws) with the modulation made piecewise constant per frame, so
the sine-window overlap-add smooths the envelope. With a gamma law for ``a^2`` the samples follow
the symmetric generalized Laplace law (Kotz, Kozubowski & Podgorski 2001); kurtosis 6 is the
Laplace law itself. Chosen over phase selection (Steinwolf) and zero-memory nonlinear transforms
(Smallwood 2005) because it needs no iteration, keeps the expected PSD exactly (a transform
leaks power out of the band and needs a spectral correction; phase selection keeps the
per-frame spectrum but its kurtosis is limited by the number of lines and needs a search), and
is a one-line change to the frame loop, cheap enough to run in real time.

Stream kurtosis. Two frames overlap at every sample with weights ``w1^2 + w2^2 = 1`` (sine
window). Fourth cumulants of independent frames add with weights ``w^4`` and the mean of
``w1^4 + w2^4`` over a hop is 3/4, so with ``E[a^2] = 1`` and frame kurtosis ``K_f``
(3 for Rayleigh amplitudes)::

    K = 3 + (3/4) (K_f E[a^4] - 3)   =>   E[a^4] = (3 + 4 (K - 3) / 3) / K_f.

Gains. ``a^2 = M G_i / sum_j G_j`` over groups of ``M`` frames, ``G_i`` independent gamma
variates of shape ``s``: the power of every group of ``M`` frames is exactly that of the
Gaussian drive (the "spectrum-preserving correction": the level of a long record does not wander
with the random gains), and ``a^2 / M`` is Beta(s, (M - 1) s), so
``E[a^4] = M (s + 1) / (M s + 1)``, solved for ``s`` in closed form.

The price is estimation scatter: each frame's periodogram is scaled by ``a^2``, so a PSD estimate
from a finite record scatters more than for Gaussian data of the same length, and the kurtosis
estimate needs long records (see :func:`kurtosis_confidence`).

References
----------
D. F. Andrews and C. L. Mallows, "Scale mixtures of normal distributions", J. R. Stat. Soc. B
36(1), 1974. D. O. Smallwood, "Generating non-Gaussian vibration for testing purposes", Sound and
Vibration 39(10), 2005. F. Xu, H. Yang, K. Ahlin and Z. Chen, "Kurtosis control of
amplitude-modulated non-Gaussian signals for fatigue test", Strojniski vestnik - J. Mech. Eng.
70(9-10), 2024. S. Kotz, T. J. Kozubowski and K. Podgorski, The Laplace Distribution and
Generalizations, Birkhauser 2001. A. Steinwolf, "Random vibration testing beyond PSD
limitations", Sound and Vibration 40(9), 2006 [issue from memory].
D. N. Joanes and C. A. Gill, "Comparing measures of sample skewness and
kurtosis", The Statistician 47(1), 1998 (standard error sqrt(24/N) of the kurtosis of normal data).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from liveshape.errors import ConfigError

__all__ = [
    "GROUP_FRAMES",
    "KURTOSIS_MAX",
    "BlockKurtosis",
    "FrameGains",
    "KurtosisConfidence",
    "check_kurtosis",
    "clip_sigma_needed",
    "clipped_kurtosis",
    "kurtosis_confidence",
    "required_crest_factor",
]

#: Frames per renormalized group (power of each group of this many frames is exact).
GROUP_FRAMES = 64
#: Samples per step of the block moments (keeps their temporaries small and constant).
_CHUNK = 4096
#: Largest kurtosis target accepted (the gamma shape then gets small and bursts very rare).
KURTOSIS_MAX = 20.0


def check_kurtosis(kurtosis: float, name: str = "kurtosis") -> float:
    """Validate a kurtosis target (``m4 / m2^2``; 3 is Gaussian); return it as float."""
    try:
        k = float(kurtosis)
    except (TypeError, ValueError):
        raise ConfigError(f"{name} = {kurtosis!r} is not a number") from None
    if not math.isfinite(k) or k < 3.0 or k > KURTOSIS_MAX:
        raise ConfigError(
            f"{name} = {kurtosis!r} must be >= 3 (Gaussian) and <= {KURTOSIS_MAX:g} "
            "(m4 / m2^2, not the excess kurtosis)"
        )
    return k


def gain_fourth_moment(kurtosis: float, frame_kurtosis: float = 3.0) -> float:
    """``E[a^4]`` (with ``E[a^2] = 1``) giving stream kurtosis ``kurtosis`` (module docstring)."""
    return (3.0 + 4.0 * (kurtosis - 3.0) / 3.0) / frame_kurtosis


class FrameGains:
    """Random per-frame amplitude gains ``a`` with ``E[a^2] = 1`` and a kurtosis target.

    Parameters
    ----------
    kurtosis : float
        Target kurtosis of the overlap-added stream (>= 3).
    rng : numpy.random.Generator
        Generator to draw from.
    frame_kurtosis : float, optional
        Kurtosis of one unmodulated frame (3 for complex-Gaussian lines).
    group : int, optional
        Frames per renormalized group.
    """

    def __init__(
        self,
        kurtosis: float,
        rng: np.random.Generator,
        *,
        frame_kurtosis: float = 3.0,
        group: int = GROUP_FRAMES,
    ) -> None:
        self._frame_kurtosis = float(frame_kurtosis)
        self._group = int(group)
        self.retarget(kurtosis)
        self._rng = rng
        self._gains = np.ones(self._group)
        self._i = self._group

    def retarget(self, kurtosis: float) -> None:
        """A new kurtosis target, used from the next group of frames on."""
        k = check_kurtosis(kurtosis)
        m = float(self._group)
        self.kurtosis = k
        self._m4 = gain_fourth_moment(k, self._frame_kurtosis)
        if not 1.0 < self._m4 < m:  # E[a^4] = M (s + 1) / (M s + 1) lies in (1, M)
            self._shape = math.inf
        else:
            self._shape = (m - self._m4) / (m * (self._m4 - 1.0))

    @property
    def shape(self) -> float:
        """Gamma shape ``s`` of the group draws (inf: no modulation, the Gaussian case)."""
        return self._shape

    @property
    def fourth_moment(self) -> float:
        """``E[a^4]`` the gains are drawn for."""
        return self._m4

    def next(self) -> float:
        """The gain of the next frame."""
        if self._i == self._group:
            self._i = 0
            if math.isfinite(self._shape):
                g = self._rng.standard_gamma(self._shape, self._group)
                self._gains[:] = np.sqrt(g * (self._group / float(np.sum(g))))
        a = float(self._gains[self._i])
        self._i += 1
        return a


def required_crest_factor(kurtosis: float, n_samples: int) -> float:
    """Peak / rms a record of ``n_samples`` reaches with probability 1/2, for the gain model.

    The samples are a Gaussian scale mixture ``x = a g`` (the stream level ``sqrt(w1^2 a1^2 +
    w2^2 a2^2)`` approximated by one gain with ``E[a^4] = K / 3``, the stream's kurtosis).
    ``P(|x| > c) = E[2 Q(c / a)]``; the median
    peak of ``n`` nearly independent samples is where ``n P(|x| > c) = ln 2`` (extreme value of
    independent samples [common practice]). ``E[.]`` over ``a^2`` ~ gamma(s) / s by 64-point
    Gauss-Laguerre quadrature; kurtosis 3 gives the Gaussian crest factor.
    """
    from scipy import special, stats

    k = check_kurtosis(kurtosis)
    m4 = k / 3.0  # one gamma scale mixture with the stream's kurtosis
    p_target = math.log(2.0) / max(int(n_samples), 1)

    if m4 <= 1.0 + 1e-12:
        return float(stats.norm.isf(p_target / 2.0))
    s = 1.0 / (m4 - 1.0)  # large-group limit: E[a^4] = 1 + 1/s
    x, w = special.roots_genlaguerre(64, s - 1.0)
    w = w / special.gamma(s)
    a = np.sqrt(x / s)

    def tail(c: float) -> float:
        return float(np.sum(w * 2.0 * stats.norm.sf(c / a)))

    lo, hi = 0.5, 200.0
    for _ in range(200):
        mid = 0.5 * (lo + hi)
        if tail(mid) > p_target:
            lo = mid
        else:
            hi = mid
    return 0.5 * (lo + hi)


def clipped_kurtosis(kurtosis: float, clip_sigma: float) -> float:
    """Kurtosis left after clipping the frame-gain drive at ``clip_sigma`` times its rms.

    For ``x = a g`` (``g`` standard normal, ``u = c / a``, ``P = 2 Phi(u) - 1``) the clipped
    moments are ``E[min(|x|, c)^2] = a^2 (P - 2 u phi(u)) + c^2 (1 - P)`` and
    ``E[min(|x|, c)^4] = a^4 (3 P - 2 phi(u) (u^3 + 3 u)) + c^4 (1 - P)`` (moments of the
    truncated normal, Johnson, Kotz & Balakrishnan, Continuous Univariate Distributions 1,
    2nd ed., ch. 13 [from memory]), averaged over ``a^2`` ~ gamma(s) / s by Gauss-Laguerre
    quadrature (``E[a^4] = 1 + 1/s = K / 3``: one mixture with the stream's kurtosis).
    """
    from scipy import special, stats

    k = check_kurtosis(kurtosis)
    c = float(clip_sigma)
    m4 = k / 3.0  # one gamma scale mixture with the stream's kurtosis
    if m4 <= 1.0 + 1e-12:
        a = np.ones(1)
        w = np.ones(1)
    else:
        s = 1.0 / (m4 - 1.0)
        x, w = special.roots_genlaguerre(96, s - 1.0)
        w = w / special.gamma(s)
        a = np.sqrt(x / s)
    u = c / a
    p = 2.0 * stats.norm.cdf(u) - 1.0
    phi = stats.norm.pdf(u)
    e2 = np.sum(w * (a**2 * (p - 2.0 * u * phi) + c**2 * (1.0 - p)))
    e4 = np.sum(w * (a**4 * (3.0 * p - 2.0 * phi * (u**3 + 3.0 * u)) + c**4 * (1.0 - p)))
    return float(e4 / e2**2)


def clip_sigma_needed(kurtosis: float, loss: float = 0.02) -> float:
    """Lowest clip level (multiples of rms) that lowers the kurtosis by at most ``loss`` (relative).

    Bisection on :func:`clipped_kurtosis`; 2 % keeps a target of 6 within 0.12 of itself.
    """
    k = check_kurtosis(kurtosis)
    lo, hi = 1.0, 60.0
    for _ in range(60):
        mid = 0.5 * (lo + hi)
        if clipped_kurtosis(k, mid) < k * (1.0 - loss):
            lo = mid
        else:
            hi = mid
    return hi


@dataclass(frozen=True)
class KurtosisConfidence:
    """Kurtosis of a record with its confidence from independent blocks.

    Attributes
    ----------
    kurtosis : float
        ``m4 / m2^2`` of the whole record.
    n_blocks : int
        Independent blocks used for the scatter.
    block_std : float
        Standard deviation of the blocks' kurtosis.
    std_error : float
        Standard error of the whole-record kurtosis, ``block_std / sqrt(n_blocks)``.
    gaussian_std_error : float
        ``sqrt(24 / N)``, the standard error for N independent normal samples (Joanes & Gill).
    n_samples : int
        Samples in the record.
    """

    kurtosis: float
    n_blocks: int
    block_std: float
    std_error: float
    gaussian_std_error: float
    n_samples: int

    def samples_for(self, accuracy: float, z: float = 1.645) -> int:
        """Record length (samples) for a ``z``-sigma half-width of ``accuracy`` (90 %: 1.645).

        The variance of the kurtosis estimate falls as ``1 / N`` once blocks are independent, so
        ``N = n_samples (z std_error / accuracy)^2``.
        """
        if not accuracy > 0:
            raise ConfigError(f"accuracy = {accuracy!r} must be > 0")
        return int(math.ceil(self.n_samples * (z * self.std_error / accuracy) ** 2))

    def to_dict(self) -> dict:
        return {
            "kurtosis": self.kurtosis,
            "n_blocks": self.n_blocks,
            "block_std": self.block_std,
            "std_error": self.std_error,
            "gaussian_std_error": self.gaussian_std_error,
            "n_samples": self.n_samples,
        }


class BlockKurtosis:
    """Streaming kurtosis of consecutive blocks of ``block_samples`` samples, and of the whole.

    Power sums ``sum x^p`` (p = 1..4) per block, central moments from them at the end (the drive
    is zero-mean, so the power sums lose no precision that matters here).
    """

    def __init__(self, block_samples: int) -> None:
        self._len = int(block_samples)
        if self._len < 2:
            raise ConfigError(f"block_samples = {block_samples!r} must be >= 2")
        self._sums: list[np.ndarray] = []
        self._cur = np.zeros(4)
        self._fill = 0

    def push(self, x: np.ndarray) -> None:
        """Add the next samples."""
        x = np.asarray(x, dtype=float)
        i = 0
        while i < x.size:
            k = min(x.size - i, self._len - self._fill, _CHUNK)  # bounded temporaries
            c = x[i : i + k]
            c2 = c * c
            self._cur += (c.sum(), c2.sum(), (c2 * c).sum(), (c2 * c2).sum())
            self._fill += k
            i += k
            if self._fill == self._len:
                self._sums.append(self._cur.copy())
                self._cur[:] = 0.0
                self._fill = 0

    @staticmethod
    def _kurt(s: np.ndarray, n: float) -> np.ndarray:
        m = s[..., 0] / n
        e2, e3, e4 = s[..., 1] / n, s[..., 2] / n, s[..., 3] / n
        c2 = e2 - m * m
        c4 = e4 - 4 * m * e3 + 6 * m * m * e2 - 3 * m**4
        return c4 / c2**2

    def result(self) -> KurtosisConfidence:
        """Kurtosis of the whole record and its standard error from the block scatter."""
        b = len(self._sums)
        if b < 2:
            n = b * self._len + self._fill
            raise ConfigError(
                f"kurtosis confidence: {n} samples give fewer than 2 blocks of {self._len}"
            )
        sums = np.array(self._sums)
        kb = self._kurt(sums, float(self._len))
        n = b * self._len + self._fill
        k = float(self._kurt(sums.sum(axis=0) + self._cur, float(n)))
        sd = float(np.std(kb, ddof=1))
        return KurtosisConfidence(
            kurtosis=k,
            n_blocks=b,
            block_std=sd,
            std_error=sd / math.sqrt(b),
            gaussian_std_error=math.sqrt(24.0 / n),
            n_samples=n,
        )


def kurtosis_confidence(x: np.ndarray, block_samples: int) -> KurtosisConfidence:
    """Kurtosis of ``x`` and its standard error from the scatter of independent blocks.

    Parameters
    ----------
    x : ndarray
        The record.
    block_samples : int
        Block length, samples; make it many times the correlation length (for the frame-gain
        drive, several groups of frames: a block must hold many bursts to be representative).

    Notes
    -----
    Batch means: the kurtosis of ``B`` disjoint blocks of ``L`` samples scatter with a standard
    deviation ``sigma_L``; the whole record's estimate has standard error ``sigma_L / sqrt(B)``
    when blocks are much longer than the correlation (batch-means method [common practice]).
    For independent normal samples the standard error is ``sqrt(24 / N)`` (Joanes & Gill 1998).
    """
    acc = BlockKurtosis(block_samples)
    acc.push(x)
    return acc.result()
