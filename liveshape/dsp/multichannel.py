"""Several control inputs: combined control spectra, their equivalent FRF, the bias of extremal
control, and a check for a control channel that left the others.

Pure numpy/scipy. A fixture measured at ``n`` points gives ``n`` control spectra ``G_i(f)``
(g²/Hz). The controller holds one spectrum on target; three combinations are in use:

``average``
    ``G = Σ w_i G_i / Σ w_i``: the weighted mean of the channels' PSDs line by line (a mean of
    powers, not of dB values).
``maximum`` / ``minimum``
    ``G = max_i G_i`` (``min_i``) on each line: the extreme channel holds the target there, so no
    point is over-tested (``maximum``) or under-tested (``minimum``).

The combination must be applied to the FRF the same way, or the equalizer divides by the wrong
gain: with ``G_i = |H_i|² G_d`` for a drive of PSD ``G_d``, the average is ``Σ w_i |H_i|² G_d /
Σ w_i`` and its equivalent FRF magnitude is ``sqrt(Σ w_i |H_i|² / Σ w_i)``; the extremes take the
FRF of the channel that is extreme on each line (:func:`combine_control` says which).

Extremes of noisy estimates are biased. When every channel reads the same true ``G`` and each
estimate scatters as ``G χ²_ν/ν`` (Bendat & Piersol, *Random Data*, 4th ed., §8.5), the
maximum of ``n`` independent estimates has the expectation

    E[max] = G ∫_0^∞ (1 - F(x)^n) dx,    E[min] = G ∫_0^∞ (1 - F(x))^n dx,

with ``F`` the distribution function of ``χ²_ν/ν`` (for a non-negative variable E[X] = ∫ P(X >
x) dx; ``P(max ≤ x) = F(x)^n`` and ``P(min > x) = (1 - F(x))^n``: order statistics, e.g. David &
Nagaraja, *Order Statistics*, 3rd ed., 2003, §2.1). :func:`extremal_bias_db` evaluates it; four
channels at 120 DOF read +0.55 dB high on average, so a maximum-controlled test under-tests by
that much unless corrected. The estimates of channels driven by one source are correlated, which
makes the true bias smaller; the formula is the upper bound for independent scatter.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import integrate, stats

from liveshape.schema import Where

__all__ = [
    "STRATEGIES",
    "CombinedControl",
    "channel_dropouts",
    "combine_control",
    "extremal_bias",
    "extremal_bias_db",
]

#: The ways several control spectra are combined into one.
STRATEGIES = ("average", "maximum", "minimum")

WHERE = Where("control channels")


@dataclass(frozen=True)
class CombinedControl:
    """Several control channels combined into the one spectrum the loop holds on target.

    Attributes
    ----------
    psd : ndarray
        Combined control PSD on each line, g²/Hz.
    frf_mag : ndarray or None
        Magnitude of the equivalent FRF, g/FS (None when no FRFs were given).
    channel : ndarray of int
        For ``maximum``/``minimum``: the channel (0-based index of the rows given) that is
        extreme on each line; -1 for ``average``.
    strategy : str
        One of :data:`STRATEGIES`.
    """

    psd: np.ndarray
    frf_mag: np.ndarray | None
    channel: np.ndarray
    strategy: str


def combine_control(psds: Any, strategy: str = "average", *, weights: Any = None,
                    frfs: Any = None) -> CombinedControl:
    """Combine the control channels' PSDs (and FRFs) line by line.

    Parameters
    ----------
    psds : array_like, shape (n_channels, n_lines)
        Each channel's control PSD, g²/Hz.
    strategy : {"average", "maximum", "minimum"}
        See the module docstring.
    weights : array_like, shape (n_channels,), optional
        Non-negative weights of ``average`` (default equal); ignored by the extremes.
    frfs : array_like, shape (n_channels, n_lines), optional
        Each channel's FRF (complex or magnitude), g/FS; combined consistently with the PSDs.

    Returns
    -------
    CombinedControl
    """
    g = np.atleast_2d(np.asarray(psds, dtype=float))
    if strategy not in STRATEGIES:
        raise WHERE.key("strategy").fail(repr(strategy), f"must be one of {', '.join(STRATEGIES)}")
    n_ch = g.shape[0]
    mag2 = None
    if frfs is not None:
        mag2 = np.abs(np.atleast_2d(np.asarray(frfs))) ** 2
        if mag2.shape != g.shape:
            raise WHERE.key("frfs").fail(f"shape {mag2.shape}",
                                         f"must match the PSDs' shape {g.shape}")
    if strategy == "average":
        w = np.ones(n_ch) if weights is None else np.asarray(weights, dtype=float).ravel()
        if w.shape != (n_ch,) or not np.all(np.isfinite(w)) or np.any(w < 0) or w.sum() <= 0:
            raise WHERE.key("weights").fail(
                np.array2string(w, precision=3),
                f"must be {n_ch} non-negative finite numbers with a positive sum")
        w = w / w.sum()
        psd = w @ g
        frf = None if mag2 is None else np.sqrt(w @ mag2)
        return CombinedControl(psd, frf, np.full(g.shape[1], -1), strategy)
    pick = np.argmax(g, axis=0) if strategy == "maximum" else np.argmin(g, axis=0)
    lines = np.arange(g.shape[1])
    psd = g[pick, lines]
    frf = None if mag2 is None else np.sqrt(mag2[pick, lines])
    return CombinedControl(psd, frf, pick, strategy)


def extremal_bias(n_channels: int, dof: float, kind: str = "maximum") -> float:
    """Expected extreme of ``n`` independent ``χ²_ν/ν`` estimates of the same PSD, as a ratio.

    Parameters
    ----------
    n_channels : int
        Number of channels (1 gives exactly 1).
    dof : float
        Degrees of freedom ``ν`` of each channel's estimate.
    kind : {"maximum", "minimum"}

    Returns
    -------
    float
        ``E[extreme] / G`` (> 1 for the maximum, < 1 for the minimum); see the module docstring
        for the order-statistics integral.
    """
    n = int(n_channels)
    if n < 1:
        raise WHERE.key("n_channels").fail(str(n_channels), "must be >= 1")
    if not (math.isfinite(dof) and dof > 0):
        raise WHERE.key("dof").fail(str(dof), "must be a positive number")
    if kind not in ("maximum", "minimum"):
        raise WHERE.key("kind").fail(repr(kind), "must be 'maximum' or 'minimum'")
    if n == 1:
        return 1.0
    dist = stats.gamma(a=dof / 2.0, scale=2.0 / dof)  # χ²_ν/ν: mean 1, variance 2/ν

    if kind == "maximum":
        def tail(x: float) -> float:
            return float(-np.expm1(n * dist.logcdf(x)))  # 1 - F^n, accurate where F -> 1
    else:
        def tail(x: float) -> float:
            return float(np.exp(n * dist.logsf(x)))  # (1 - F)^n

    hi = float(dist.isf(1e-14))  # beyond it both integrands are below n·1e-14
    knots = [float(dist.ppf(p)) for p in (0.01, 0.5, 0.99)]
    value, _err = integrate.quad(tail, 0.0, hi, points=knots, limit=200, epsabs=1e-12,
                                 epsrel=1e-10)
    return float(value)


def extremal_bias_db(n_channels: int, dof: float, kind: str = "maximum") -> float:
    """:func:`extremal_bias` in dB: ``10 log10(E[extreme] / G)``."""
    return 10.0 * math.log10(extremal_bias(n_channels, dof, kind))


def channel_dropouts(band_rms_g: Any, *, drop_db: float = 12.0) -> np.ndarray:
    """Control channels that read far below the others (a detached or dead sensor).

    A channel is flagged when its band rms is more than ``drop_db`` below the median of the
    other channels (with two channels, below the other one). An average that kept such a
    channel would read low and drive the rest up; the rule trips on the channel itself.

    Parameters
    ----------
    band_rms_g : array_like, shape (n_channels,)
        Each channel's rms over the test band, g.
    drop_db : float
        How far below the others, dB (12 dB: a quarter of the amplitude; a loose sensor reads
        its noise floor, tens of dB down) [common practice; no published source].

    Returns
    -------
    ndarray of bool, shape (n_channels,)
    """
    r = np.asarray(band_rms_g, dtype=float).ravel()
    out = np.zeros(r.size, dtype=bool)
    if r.size < 2:
        return out
    for i in range(r.size):
        others = np.delete(r, i)
        ref = float(np.median(others))
        if ref > 0 and (r[i] <= 0 or 20.0 * math.log10(r[i] / ref) < -drop_db):
            out[i] = True
    return out
