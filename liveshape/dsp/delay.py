"""Loop delay of a response behind its reference, from the FFT cross-correlation peak.

Pure numpy/scipy. Used to align :class:`liveshape.dsp.spectra.CrossSpectrum` (its
``delay_samples``) before H1 is estimated: an unaligned delay biases ``|H1|`` low.

References
----------
.. [1] J. S. Bendat and A. G. Piersol, *Random Data: Analysis and Measurement Procedures*,
   Wiley (cross-correlation of a system's input and output).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import scipy.fft as sp_fft

from liveshape.dsp.spectral_stats import WHERE, check_count

__all__ = ["DelayEstimate", "estimate_delay"]


@dataclass(frozen=True)
class DelayEstimate:
    """Delay of a response behind its reference, from the cross-correlation peak.

    Attributes
    ----------
    samples : int
        Integer lag in samples of the largest ``|r|``, within ``0 .. max_lag``.
    fraction : float
        Sub-sample correction in (-0.5, 0.5) from a parabola through the peak and its two
        neighbours; the delay is ``samples + fraction`` samples.
    peak : float
        Normalized correlation at the peak, ``r / sqrt(sum x**2 sum y**2)`` in [-1, 1]
        (negative when the response is inverted).
    """

    samples: int
    fraction: float
    peak: float

    @property
    def delay_samples(self) -> float:
        """Sub-sample delay ``samples + fraction`` in samples."""
        return self.samples + self.fraction


def estimate_delay(x: np.ndarray, y: np.ndarray, *, max_lag: int) -> DelayEstimate:
    """Estimate the delay of response ``y`` behind reference ``x`` by FFT cross-correlation.

    ``r(k) = sum_t x(t) y(t + k)`` for lags ``k = 0 .. max_lag`` (zero-padded FFT, no circular
    wrap); the lag of the largest ``|r(k)|`` is the integer delay, and a parabola through
    ``|r|`` at the peak and its neighbours gives the sub-sample fraction (common practice).
    For a white reference the cross-correlation is the plant's impulse response (Bendat &
    Piersol [1]_), so the peak sits at the pure (loop) delay plus the lag of the impulse
    response's largest sample: exactly the pure delay when that is the first sample, one or a
    few samples more through a band-pass. Aligning :class:`liveshape.dsp.spectra.CrossSpectrum` by
    this lag leaves at most that small residual delay (a linear phase in H1, a negligible
    magnitude bias).

    Parameters
    ----------
    x : array_like
        Reference (drive) samples, 1-D.
    y : array_like
        Response samples, 1-D, same length as ``x``.
    max_lag : int
        Largest lag searched, in samples (``0 <= max_lag < len(x)``).

    Returns
    -------
    DelayEstimate
    """
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    if x.ndim != 1 or y.ndim != 1 or x.size != y.size:
        raise ValueError(
            f"spectra: estimate_delay needs two 1-D records of equal length, "
            f"got {x.shape} and {y.shape}"
        )
    max_lag = check_count(max_lag, "max_lag")
    n = x.size
    if max_lag >= n:
        raise WHERE.key("max_lag").fail(max_lag, f"must be below the record length {n}")
    nfft = sp_fft.next_fast_len(n + max_lag + 2, real=True)
    r = sp_fft.irfft(np.conj(sp_fft.rfft(x, nfft)) * sp_fft.rfft(y, nfft), nfft)
    # einsum, not np.dot: OpenBLAS threads dot products above 10000 elements, and its workers
    # then spin for a while on the CPU the loop shares
    norm = math.sqrt(float(np.einsum("i,i->", x, x)) * float(np.einsum("i,i->", y, y)))
    if norm == 0.0:
        return DelayEstimate(0, 0.0, 0.0)
    lags = r[: max_lag + 2]  # lags 0 .. max_lag + 1; r[-1] is lag -1
    k = int(np.argmax(np.abs(lags[: max_lag + 1])))
    left = abs(r[k - 1]) if k > 0 else abs(r[-1])
    mid, right = abs(lags[k]), abs(lags[k + 1])
    curv = left - 2.0 * mid + right
    fraction = 0.0
    if curv < 0.0:
        fraction = float(np.clip(0.5 * (left - right) / curv, -0.5, 0.5))
    return DelayEstimate(samples=k, fraction=fraction, peak=float(lags[k] / norm))
