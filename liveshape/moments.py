"""Running mean, central moments, rms, kurtosis and peak of a stream of sample blocks.

Pure numpy, exact merging of block statistics (no raw power sums, so no cancellation):
Chan, Golub & LeVeque (1979) for the second moment, extended to the third and fourth by Pebay
(2008). :class:`liveshape.synth.RandomPhaseSynth` keeps one for its crest-factor and kurtosis
statistics.

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

__all__ = ["RunningMoments"]


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
