"""Kurtosis in the loop: the control response's kurtosis held on a target by the drive's.

Pure numpy. The drive is the frame-gain non-Gaussian stream of :mod:`liveshape.dsp.nongauss`
(its PSD is kept whatever its kurtosis). A lightly damped plant pulls the response toward
Gaussian (each response sample is a weighted sum of many drive samples, central limit theorem),
so the control's kurtosis is below the drive's; the loop measures the control's kurtosis and
corrects the drive's target.

Law (docs/methods.md, "Kurtosis in the loop"). Per estimate interval (one group of synthesis
frames, whose power is exact, so each interval holds whole bursts), the excess kurtosis
``e = K − 3`` of the control samples played at a steady level is averaged exponentially
(weight ``1/3``) and the drive's excess follows ``e_d ← e_d (e_target / ē_control)^γ``
(γ = 0.5), limited to a factor of 2 per interval and to the kurtosis the clip level leaves
intact (:func:`max_drive_kurtosis`). For a plant that scales the excess by a fixed factor
``r`` (``e_c = r e_d``) the law converges geometrically, as the direct PSD law does in dB.

The full-level kurtosis is reported with its standard error from independent blocks (batch
means, :class:`liveshape.dsp.nongauss.BlockKurtosis`) and the record length a stated accuracy
needs.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from liveshape.dsp.nongauss import (
    GROUP_FRAMES,
    KURTOSIS_MAX,
    BlockKurtosis,
    clip_sigma_needed,
)

__all__ = ["KurtosisLoop", "max_drive_kurtosis"]

#: Update gain of the excess-kurtosis law and the exponential weight of the measured excess.
GAMMA = 0.5
EMA_WEIGHT = 1.0 / 3.0
#: Largest change of the drive's excess kurtosis per interval (factor).
MAX_FACTOR = 2.0


def max_drive_kurtosis(clip_sigma: float | None) -> float:
    """Highest drive kurtosis whose bursts a clip at ``clip_sigma`` × rms leaves intact (2 %)."""
    if clip_sigma is None:
        return KURTOSIS_MAX
    lo, hi = 3.0, KURTOSIS_MAX
    if clip_sigma_needed(hi) <= clip_sigma:
        return hi
    for _ in range(40):
        mid = 0.5 * (lo + hi)
        if clip_sigma_needed(mid) <= clip_sigma:
            lo = mid
        else:
            hi = mid
    return lo


class KurtosisLoop:
    """Drive kurtosis from the measured control kurtosis.

    Parameters
    ----------
    target : float
        Kurtosis target of the control (``m4 / m2²``, > 3).
    clip_sigma : float or None
        The drive's clip level (multiples of rms): caps the drive kurtosis.
    interval_samples : int
        Samples of steady control per estimate (one group of frames: ``GROUP_FRAMES × hop``).
    block_samples : int
        Block length of the full-level batch means.
    """

    def __init__(self, target: float, clip_sigma: float | None, *, interval_samples: int,
                 block_samples: int) -> None:
        self.target = float(target)
        self.drive_max = max_drive_kurtosis(clip_sigma)
        self.drive = min(self.target, self.drive_max)  # open-loop start: the target itself
        self._n_int = int(interval_samples)
        self._sums = np.zeros(5)  # n, Σx, Σx², Σx³, Σx⁴ of the current interval
        self._ema: float | None = None
        self.measured: float = math.nan  # the latest interval's kurtosis
        self.averaged: float = math.nan  # its exponential average
        self.limited = False  # the drive kurtosis wants more than the clip allows
        self._block = int(block_samples)
        self._full = BlockKurtosis(self._block)
        self._full_sums = np.zeros(5)

    @staticmethod
    def interval_for(hop: int) -> int:
        return GROUP_FRAMES * int(hop)

    def push(self, y: np.ndarray, *, full_level: bool) -> bool:
        """Control samples played at a steady level (normalized by it); True when an interval
        completed and the drive kurtosis was updated (read :attr:`drive`)."""
        x = np.asarray(y, dtype=float)
        x2 = x * x
        sums = np.array((x.size, x.sum(), x2.sum(), (x2 * x).sum(), (x2 * x2).sum()))
        if full_level:
            self._full.push(x)
            self._full_sums += sums
        self._sums += sums
        if self._sums[0] < self._n_int:
            return False
        k = _kurtosis(self._sums)
        self._sums[:] = 0.0
        if not math.isfinite(k):
            return False
        self.measured = k
        e = max(k - 3.0, 1e-3)
        self._ema = e if self._ema is None else (1 - EMA_WEIGHT) * self._ema + EMA_WEIGHT * e
        self.averaged = 3.0 + self._ema
        e_d = max(self.drive - 3.0, 1e-3)
        factor = ((self.target - 3.0) / self._ema) ** GAMMA
        factor = min(MAX_FACTOR, max(1.0 / MAX_FACTOR, factor))
        want = 3.0 + e_d * factor
        self.limited = want > self.drive_max
        self.drive = float(min(max(want, 3.0), self.drive_max))
        return True

    def full_level_result(self) -> dict[str, Any] | None:
        """The control's kurtosis at full level: value, standard error, samples, the drive's."""
        n = int(self._full_sums[0])
        if n < 2:
            return None
        out: dict[str, Any] = {"target": self.target, "kurtosis": _kurtosis(self._full_sums),
                               "drive_kurtosis": self.drive, "drive_kurtosis_max": self.drive_max,
                               "samples": n, "std_error": None, "blocks": 0,
                               "samples_for_0_1": None}
        if n >= 2 * self._block:  # two blocks at least: the batch-means error
            r = self._full.result()
            out.update(std_error=r.std_error, blocks=r.n_blocks,
                       samples_for_0_1=r.samples_for(0.1) if r.std_error > 0 else None)
        return out


def _kurtosis(sums: np.ndarray) -> float:
    """``m4 / m2²`` from the power sums ``n, Σx, Σx², Σx³, Σx⁴``."""
    n, s1, s2, s3, s4 = (float(v) for v in sums)
    m = s1 / n
    c2 = s2 / n - m * m
    c4 = s4 / n - 4 * m * s3 / n + 6 * m * m * s2 / n - 3 * m**4
    return c4 / (c2 * c2) if c2 > 0 else math.nan
