"""Drive headroom of sine-on-random: the tones' peaks add to the random's clip level. Pure.

The drive of a sine-on-random test is the random (clipped at ``clip_sigma`` times its rms
``σ``, or judged at 3σ without clipping) plus the tones. In the worst case every tone peaks at
the random's peak, so the drive's peak is bounded by

    peak = k σ + Σ_i a_i,   a_i = amplitude_g_i / (g_per_fs · |H(f_i)|)

(``k = clip_sigma``; ``|H|`` the chain's drive-FS → response-FS gain at the tone; 1 without an
FRF; a swept tone takes the least ``|H|`` over its range). This must stay under
``safety.drive_peak_max_fs``. The binding figure is the largest term. docs/methods.md, "Sine
tones on random".
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

__all__ = ["ToneHeadroom", "tone_drive_headroom"]

#: Peak of an unclipped Gaussian drive in multiples of its rms (3-sigma basis; as in
#: :mod:`liveshape.rigs.feasibility`).
PEAK_SIGMA_UNCLIPPED = 3.0


@dataclass(frozen=True)
class ToneHeadroom:
    """The drive's peak budget with tones.

    Attributes
    ----------
    random_peak_fs : float
        ``k σ`` of the random drive, FS.
    tone_drive_fs : tuple of float
        Drive amplitude of each tone, FS (peak).
    peak_fs : float
        ``random_peak_fs + Σ tone_drive_fs``, FS.
    limit_fs : float
        ``safety.drive_peak_max_fs``, FS.
    headroom_db : float
        ``20 log10(limit / peak)``, dB (positive: margin).
    binding : str
        The largest term: ``"random"`` or ``"tone i (F Hz)"``.
    ok : bool
        ``peak_fs <= limit_fs``.
    """

    random_peak_fs: float
    tone_drive_fs: tuple[float, ...]
    peak_fs: float
    limit_fs: float
    headroom_db: float
    binding: str
    ok: bool

    def to_dict(self) -> dict[str, Any]:
        """Flat plain data with units in the keys (the tones' drive amplitudes as one text)."""
        return {"random_peak_fs": self.random_peak_fs,
                "tone_drive_fs": ", ".join(f"{a:.4g}" for a in self.tone_drive_fs),
                "drive_peak_fs": self.peak_fs,
                "drive_peak_limit_fs": self.limit_fs, "drive_peak_headroom_db": self.headroom_db,
                "drive_peak_binding": self.binding, "drive_peak_ok": self.ok}


def tone_drive_headroom(
    tones: Sequence[Any],
    random_rms_fs: float,
    *,
    g_per_fs: float,
    limit_fs: float,
    clip_sigma: float | None,
    h_abs: Callable[[np.ndarray], np.ndarray] | None = None,
) -> ToneHeadroom:
    """Worst-case drive peak of random plus tones against the peak limit.

    Parameters
    ----------
    tones : sequence
        Tones with ``f_hz``, ``f_hi_hz`` (None: fixed) and ``amplitude_g`` (peak, g).
    random_rms_fs : float
        Rms of the random drive, FS.
    g_per_fs : float
        Response g per FS of the control input.
    limit_fs : float
        Peak limit of the drive, FS (``safety.drive_peak_max_fs``).
    clip_sigma : float or None
        Clip level of the random in multiples of its rms (None: judged at 3σ).
    h_abs : callable, optional
        ``|H|(f_hz)``, response FS per drive FS; None: 1 at every frequency.

    Returns
    -------
    ToneHeadroom
    """
    k = PEAK_SIGMA_UNCLIPPED if clip_sigma is None else float(clip_sigma)
    random_peak = k * float(random_rms_fs)
    drives = []
    for t in tones:
        if h_abs is None:
            h = 1.0
        else:
            top = t.f_hi_hz if t.f_hi_hz is not None else t.f_hz
            f = np.geomspace(t.f_hz, top, 64) if top > t.f_hz else np.array([t.f_hz])
            h = float(np.min(np.asarray(h_abs(f), dtype=float)))
        drives.append(float(t.amplitude_g) / (float(g_per_fs) * h))
    peak = random_peak + sum(drives)
    head = math.inf if peak == 0 else 20.0 * math.log10(limit_fs / peak)
    terms = {"random": random_peak}
    terms.update({f"tone {i} ({t.f_hz:g} Hz)": d for i, (t, d) in
                  enumerate(zip(tones, drives, strict=True))})
    binding = max(terms, key=lambda n: terms[n])
    return ToneHeadroom(random_peak, tuple(drives), peak, float(limit_fs), head, binding,
                        peak <= limit_fs)
