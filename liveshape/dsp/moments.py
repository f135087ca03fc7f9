"""Running mean, central moments, rms, kurtosis and peak of a stream of sample blocks.

Pure numpy, exact merging of block statistics (no raw power sums, so no cancellation):
Chan, Golub & LeVeque (1979) for the second moment, extended to the third and fourth by Pebay
(2008). :class:`liveshape.dsp.synth.RandomPhaseSynth` keeps one for its crest-factor and kurtosis
statistics.

Blocks are gathered in a preallocated buffer of :data:`CHUNK` samples and their statistics are
computed a whole chunk at a time, when the buffer is full and more samples come or when a result
is read: a few passes over 8192 samples cost little more than over 1024, so gathering small
blocks saves most of the per-block work. Each chunk's central sums are taken about the chunk's
own mean (two passes) and merged exactly; when the results are read does not change them beyond
rounding. A chunk is at most 8192 samples so that ``numpy.dot`` stays single-threaded (OpenBLAS
threads dot products above 10000 elements, which is slow on a shared machine).

References
----------
T. F. Chan, G. H. Golub and R. J. LeVeque, "Updating formulae and a pairwise algorithm for
computing sample variances", Stanford University technical report, 1979.
P. Pebay, "Formulas for robust, one-pass parallel computation of covariances and arbitrary-order
statistical moments", Sandia report SAND2008-6212, 2008.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["CHUNK", "RunningMoments"]

#: Samples per chunk whose central sums are computed together (<= 10000: single-threaded dot).
CHUNK = 8192


class RunningMoments:
    """Mean, central moments up to the fourth, mean square and peak of a stream of blocks.

    Chunks are merged with the pairwise update of Chan, Golub & LeVeque (1979) extended to third
    and fourth moments by Pebay (2008, Sandia report SAND2008-6212), which is exact and does not
    suffer the cancellation of raw power sums.

    Attributes (read-only properties)
    ---------------------------------
    n : int
        Samples seen.
    mean : float
        Their mean.
    m2, m3, m4 : float
        Sums of the second, third and fourth powers of the deviations from the mean.
    peak : float
        Largest absolute sample (0 before any sample).
    rms, kurtosis : float
        Root mean square; ``n m4 / m2^2`` (nan without variance).
    """

    def __init__(self) -> None:
        self._buf = np.empty(CHUNK)  # samples not merged yet
        self._sq = np.empty(CHUNK)  # work: squared deviations
        self._fill = 0
        self.reset()

    def reset(self) -> None:
        """Forget every sample."""
        self._fill = 0
        self._n = 0
        self._mean = 0.0
        self._m2 = 0.0
        self._m3 = 0.0
        self._m4 = 0.0
        self._peak = 0.0

    def update(self, x: np.ndarray) -> None:
        """Add the samples of ``x`` (any shape; taken as float64)."""
        x = np.asarray(x, dtype=np.float64).reshape(-1)
        nb = x.size
        pos = 0
        buf, cap = self._buf, CHUNK
        while pos < nb:
            fill = self._fill
            if fill == cap:  # full and more to come: merge it (so fill > 0 after an update)
                self._merge(buf)
                fill = 0
            k = min(nb - pos, cap - fill)
            buf[fill: fill + k] = x[pos: pos + k]
            self._fill = fill + k
            pos += k

    def _flush(self) -> None:
        if self._fill:
            self._merge(self._buf[: self._fill])
            self._fill = 0

    def _merge(self, c: np.ndarray) -> None:
        """Merge the chunk ``c`` (a view of the buffer, overwritten) into the totals."""
        nb = c.size
        self._peak = max(self._peak, float(np.maximum.reduce(c)), -float(np.minimum.reduce(c)))
        mb = float(np.add.reduce(c)) / nb
        d = np.subtract(c, mb, out=c)
        d2 = np.multiply(d, d, out=self._sq[:nb])
        m2b = float(np.add.reduce(d2))
        m3b = float(np.dot(d2, d))
        m4b = float(np.dot(d2, d2))
        na = self._n
        if na == 0:
            self._n, self._mean, self._m2, self._m3, self._m4 = nb, mb, m2b, m3b, m4b
            return
        n = na + nb
        delta = mb - self._mean
        dn = delta / n
        m2a, m3a = self._m2, self._m3
        m2 = m2a + m2b + delta * dn * na * nb
        m3 = m3a + m3b + delta * dn * dn * na * nb * (na - nb) + 3.0 * dn * (na * m2b - nb * m2a)
        m4 = (
            self._m4
            + m4b
            + delta * dn**3 * na * nb * (na * na - na * nb + nb * nb)
            + 6.0 * dn * dn * (na * na * m2b + nb * nb * m2a)
            + 4.0 * dn * (na * m3b - nb * m3a)
        )
        self._n, self._mean, self._m2, self._m3, self._m4 = n, self._mean + nb * dn, m2, m3, m4

    @property
    def n(self) -> int:
        """Samples seen."""
        return self._n + self._fill

    @property
    def mean(self) -> float:
        """Mean of the samples (0 before any)."""
        self._flush()
        return self._mean

    @property
    def m2(self) -> float:
        """Sum of squared deviations from the mean."""
        self._flush()
        return self._m2

    @property
    def m3(self) -> float:
        """Sum of cubed deviations from the mean."""
        self._flush()
        return self._m3

    @property
    def m4(self) -> float:
        """Sum of fourth powers of the deviations from the mean."""
        self._flush()
        return self._m4

    @property
    def peak(self) -> float:
        """Largest absolute sample (0 before any)."""
        self._flush()
        return self._peak

    @property
    def rms(self) -> float:
        """Root mean square (0 before any sample)."""
        self._flush()
        if self._n == 0:
            return 0.0
        return math.sqrt(max(self._m2 / self._n + self._mean * self._mean, 0.0))

    @property
    def kurtosis(self) -> float:
        """``n m4 / m2^2`` (3 for a Gaussian; nan before any variance)."""
        self._flush()
        if self._n == 0 or self._m2 <= 0.0:
            return math.nan
        return self._n * self._m4 / (self._m2 * self._m2)
