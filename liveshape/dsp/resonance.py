"""Resonances and antiresonances of a measured FRF, and their change between two surveys.

Pure numpy/scipy. :func:`find_resonances` picks the peaks (resonances) and dips
(antiresonances) of ``|H|`` on the lines where the coherence is good, refines each frequency by
a parabola through the log magnitude at the extreme line and its neighbours, measures the
quality factor Q from the half-power (−3 dB) points and attaches the confidence that the
estimate's DOF gives. :func:`compare_resonances` pairs the features of two surveys and flags
shifts beyond thresholds that are also beyond the estimates' own scatter.

Methods (docs/methods.md, "Resonance survey"):

* random error of an H1 magnitude estimate from ``n_d`` averages at coherence γ²:
  ``ε = √(1 − γ²) / (|γ| √(2 n_d))`` (Bendat & Piersol, *Random Data*, 4th ed., Table 9.6);
* peak frequency between lines: quadratic interpolation of the log magnitude (common practice;
  e.g. Jacobsen & Kootsookos, IEEE Signal Processing Magazine 24(3), 2007, for spectral peaks);
* Q by the half-power bandwidth, ``Q = f0 / (f2 − f1)`` (Ewins, *Modal Testing*, 2nd ed., §4.3);
* on a shaker table with a payload mode, the table's acceleration FRF has an antiresonance at
  the payload's fixed-base natural frequency (the dynamic-absorber zero; Den Hartog,
  *Mechanical Vibrations*, 4th ed., §3.2): a dip tracks the test item itself.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.signal import find_peaks

__all__ = ["Resonance", "ResonanceChange", "compare_resonances", "find_resonances",
           "h1_magnitude_error"]

_DB20 = 20.0 / math.log(10.0)


def h1_magnitude_error(coherence: np.ndarray, dof: float) -> np.ndarray:
    """Normalized random error of ``|H1|`` (fraction, 1σ) at each line.

    ``ε = √(1 − γ²) / (|γ| √(2 n_d))`` with ``n_d = dof / 2`` averages (Bendat & Piersol,
    *Random Data*, 4th ed., Table 9.6). Lines with zero coherence get infinity.
    """
    g2 = np.clip(np.asarray(coherence, dtype=float), 0.0, 1.0)
    n_d = max(float(dof) / 2.0, 1.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        eps = np.sqrt(1.0 - g2) / (np.sqrt(g2) * math.sqrt(2.0 * n_d))
    return np.where(g2 > 0, eps, np.inf)


@dataclass(frozen=True)
class Resonance:
    """One resonance (``kind = "peak"``) or antiresonance (``kind = "dip"``) of ``|H|``.

    Attributes
    ----------
    kind : str
        ``peak`` or ``dip``.
    f_hz : float
        Frequency, Hz (interpolated between lines).
    level_db : float
        ``20 log10 |H|`` at the extreme, dB re the FRF's unit (g/FS).
    q : float
        Quality factor from the half-power (peak) or half-depth (dip, the −3 dB points of
        ``1/|H|``) bandwidth; nan when a point lies outside the good lines.
    f_sigma_hz : float
        1σ of ``f_hz`` from the magnitude scatter through the parabola.
    level_sigma_db : float
        1σ of ``level_db`` (the H1 magnitude's random error).
    prominence_db : float
        How far the extreme stands out from its surroundings, dB.
    """

    kind: str
    f_hz: float
    level_db: float
    q: float
    f_sigma_hz: float
    level_sigma_db: float
    prominence_db: float


def _parabola(a: float, b: float, c: float) -> tuple[float, float]:
    """Vertex offset (lines, in (−1, 1)) and value of the parabola through (−1, a), (0, b),
    (1, c)."""
    den = a - 2.0 * b + c
    if den == 0:
        return 0.0, b
    d = 0.5 * (a - c) / den
    d = float(np.clip(d, -1.0, 1.0))
    return d, b - 0.25 * (a - c) * d


def _crossing(f: np.ndarray, y: np.ndarray, i: int, level: float, step: int) -> float:
    """Frequency where ``y`` first falls to ``level`` walking from line ``i`` by ``step``."""
    j = i
    while 0 <= j + step < y.size:
        if y[j + step] <= level:
            y0, y1 = y[j], y[j + step]
            t = (y0 - level) / (y0 - y1) if y0 != y1 else 0.0
            return float(f[j] + t * (f[j + step] - f[j]))
        j += step
    return math.nan


def find_resonances(
    f_hz: np.ndarray,
    h: np.ndarray,
    coherence: np.ndarray,
    dof: float,
    *,
    min_prominence_db: float = 3.0,
    min_coherence: float = 0.8,
    band_hz: tuple[float, float] | None = None,
) -> tuple[Resonance, ...]:
    """The peaks and dips of ``|h|`` on the lines with good coherence, in frequency order.

    Parameters
    ----------
    f_hz : ndarray
        Line frequencies, Hz, evenly spaced.
    h : ndarray, complex
        FRF estimate on those lines.
    coherence : ndarray
        Ordinary coherence on those lines.
    dof : float
        DOF of the estimate (2 per averaged segment, Welch-corrected for overlap).
    min_prominence_db : float
        Smallest prominence (:func:`scipy.signal.find_peaks`) of a feature, dB.
    min_coherence : float
        Lines below this coherence are left out (a dip's own lines may fall below it: the
        response is small there, so the dip's neighbours are required to be good instead).
    band_hz : (float, float), optional
        Only features inside this band.
    """
    f = np.asarray(f_hz, dtype=float)
    mag = np.abs(np.asarray(h, dtype=complex))
    coh = np.asarray(coherence, dtype=float)
    eps = h1_magnitude_error(coh, dof)
    with np.errstate(divide="ignore"):
        db = _DB20 * np.log(np.maximum(mag, 1e-300))
    good = (coh >= min_coherence) & np.isfinite(db) & (mag > 0)
    if band_hz is not None:
        good &= (f >= band_hz[0]) & (f <= band_hz[1])
    idx = np.flatnonzero(good)
    if idx.size < 5:
        return ()
    # work on the longest runs of good lines: a feature needs its neighbours measured
    out: list[Resonance] = []
    runs = np.split(idx, np.flatnonzero(np.diff(idx) > 2) + 1)
    for run in runs:
        if run.size < 5:
            continue
        lo, hi = int(run[0]), int(run[-1]) + 1
        fr, dr, er = f[lo:hi], db[lo:hi], eps[lo:hi]
        for kind, sign in (("peak", 1.0), ("dip", -1.0)):
            y = sign * dr
            pk, props = find_peaks(y, prominence=min_prominence_db)
            for j, prom in zip(pk, props["prominences"], strict=True):
                if j == 0 or j == y.size - 1:
                    continue
                a, b, c = y[j - 1], y[j], y[j + 1]
                d, top = _parabola(a, b, c)
                df = fr[1] - fr[0]
                # scatter of the vertex: propagate the 1σ dB errors of a, b, c (independent)
                s = [_DB20 * float(np.log1p(min(er[k], 10.0))) for k in (j - 1, j, j + 1)]
                grads = []
                for k in range(3):
                    v = [a, b, c]
                    v[k] += 1e-3
                    grads.append((_parabola(*v)[0] - d) / 1e-3)
                f_sigma = df * math.sqrt(sum((g * sk) ** 2 for g, sk in zip(grads, s, strict=True)))
                f0 = float(fr[j] + d * df)
                half = top - 3.0103  # half power (peak) or half depth (dip), dB
                f1 = _crossing(fr, y, j, half, -1)
                f2 = _crossing(fr, y, j, half, +1)
                ok = math.isfinite(f1) and math.isfinite(f2) and f2 > f1
                q = f0 / (f2 - f1) if ok else math.nan
                out.append(Resonance(kind=kind, f_hz=f0, level_db=float(sign * top), q=float(q),
                                     f_sigma_hz=float(f_sigma), level_sigma_db=s[1],
                                     prominence_db=float(prom)))
    return tuple(sorted(out, key=lambda r: r.f_hz))


@dataclass(frozen=True)
class ResonanceChange:
    """A feature of the first survey and its partner in the second.

    ``shift_pct`` is ``100 (f_after − f_before) / f_before``; ``level_change_db`` the change of
    ``level_db``; ``z_f`` and ``z_level`` those changes in units of their combined 1σ;
    ``flagged`` holds the reasons this change counts (empty when it does not), ``after`` is
    None when no partner was found (itself a reason).
    """

    before: Resonance
    after: Resonance | None
    shift_pct: float
    level_change_db: float
    z_f: float
    z_level: float
    flagged: tuple[str, ...]


def compare_resonances(
    before: tuple[Resonance, ...],
    after: tuple[Resonance, ...],
    *,
    shift_pct: float = 2.0,
    peak_drop_db: float = 0.92,
    z_min: float = 3.0,
    pair_within_pct: float = 15.0,
) -> tuple[ResonanceChange, ...]:
    """Pair the features of two surveys (same kind, nearest frequency) and flag changes.

    A change is flagged when the frequency moved by more than ``shift_pct`` % and by more than
    ``z_min`` times its combined 1σ, or a peak dropped by more than ``peak_drop_db`` (0.92 dB is
    a 10 % drop of the peak magnitude) and by more than ``z_min`` σ. The 2 % and 10 % figures are
    common practice for a damage check after a vibration test, with no published source. A
    feature with no partner within ``pair_within_pct`` % is flagged as gone.
    """
    out: list[ResonanceChange] = []
    used: set[int] = set()
    for b in before:
        best, best_d = None, math.inf
        for k, a in enumerate(after):
            if a.kind != b.kind or k in used:
                continue
            d = abs(a.f_hz - b.f_hz) / b.f_hz * 100.0
            if d < best_d and d <= pair_within_pct:
                best, best_d = k, d
        if best is None:
            out.append(ResonanceChange(b, None, math.nan, math.nan, math.nan, math.nan,
                                       ("not found in the second survey",)))
            continue
        used.add(best)
        a = after[best]
        shift = 100.0 * (a.f_hz - b.f_hz) / b.f_hz
        dl = a.level_db - b.level_db
        sf = math.hypot(a.f_sigma_hz, b.f_sigma_hz)
        sl = math.hypot(a.level_sigma_db, b.level_sigma_db)
        z_f = abs(a.f_hz - b.f_hz) / sf if sf > 0 else math.inf
        z_l = abs(dl) / sl if sl > 0 else math.inf
        why = []
        if abs(shift) > shift_pct and z_f > z_min:
            why.append(f"frequency moved {shift:+.1f} % (limit ±{shift_pct:g} %)")
        if b.kind == "peak" and -dl > peak_drop_db and z_l > z_min:
            why.append(f"peak dropped {dl:.2f} dB (limit -{peak_drop_db:g} dB)")
        out.append(ResonanceChange(b, a, shift, dl, z_f, z_l, tuple(why)))
    return tuple(out)
