"""Drive equalization: the first drive from the identified FRF, and the iterative update laws.

Pure numpy. Spectra are one-sided PSDs on the lines ``f_hz = k * fs_hz / frame_length``; the
drive PSD is in FS²/Hz (full scale of the audio output), target and control PSDs in g²/Hz, the
FRF ``h1`` in g/FS (control acceleration per drive full scale). ``band`` is a boolean mask of the
lines under control; lines outside it always get a drive of exactly 0.

Laws (Harris' Shock and Vibration Handbook, chapter "Digital control systems for vibration
testing machines", describes direct and FRF-based equalization; the formulas are the standard
forms):

* initial (FRF-based, indirect) drive: ``D_0 = R / |H|²``;
* direct (error-driven) update: ``D_{k+1} = D_k · (R / Ĉ_k)^γ``, i.e. in dB
  ``ΔD = γ (R_dB − Ĉ_dB)``;
* blended FRF update: ``D_{k+1} = D_k^(1−γ) · (R / |Ĥ|²)^γ``.

For a linear plant the log error of the direct law obeys ``e_{k+1} = (1 − γ) e_k − γ n_k``: a
noiseless error decays as ``(1 − γ)^k`` and the steady-state variance of the true error is
``γ / (2 − γ) · σ²`` for an estimate scatter σ (dB).

Every update is followed by per-line step limits (±``max_step_db``) and an optional ceiling on
the whole drive's mean square (the whole drive is scaled down, keeping its shape).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special

LAWS = ("direct", "blend")


@dataclass(frozen=True)
class DriveResult:
    """A new drive PSD and what was limited to get it.

    Attributes
    ----------
    drive_psd : ndarray
        New drive PSD, FS²/Hz, 0 outside the band (read-only).
    step_db : ndarray
        Applied change per line in dB after the step limit and before the ceiling (0 outside the
        band, on frozen and on held lines). For :func:`initial_drive` this is 0.
    step_limited : ndarray of bool
        Lines whose change was cut to ±``max_step_db`` (initial drive: lines whose boost was cut
        to ``max_boost_db``).
    held : ndarray of bool
        Band lines left unchanged: frozen by the caller, or without a usable estimate
        (control ≤ 0 or not finite, drive 0). For :func:`initial_drive`: lines whose FRF was
        replaced because of low coherence.
    ceiling_scale : float
        Factor (≤ 1) applied to the whole drive PSD by the mean-square ceiling; 1.0 if none.
    drive_ms_fs2 : float
        Mean square of the returned drive, ``Σ D·df`` in FS² (nan when ``df_hz`` was not given).
    """

    drive_psd: np.ndarray
    step_db: np.ndarray
    step_limited: np.ndarray
    held: np.ndarray
    ceiling_scale: float
    drive_ms_fs2: float

    @property
    def ceiling_hit(self) -> bool:
        """True when the mean-square ceiling scaled the drive down."""
        return self.ceiling_scale < 1.0

    @property
    def n_step_limited(self) -> int:
        return int(np.count_nonzero(self.step_limited))

    @property
    def n_held(self) -> int:
        return int(np.count_nonzero(self.held))


def log_bias_db(dof: float) -> float:
    """Mean of ``10 log10(Ĝ/G)`` for a χ²_ν estimate, dB: ``4.343 (ψ(ν/2) − ln(ν/2))``.

    ``ln(χ²_ν/2)`` has mean ψ(ν/2) (digamma); the result is negative, about −4.343/ν.
    """
    if not dof > 0:
        raise ValueError(f"dof must be > 0, got {dof}")
    return float(10.0 / np.log(10.0) * (special.digamma(dof / 2.0) - np.log(dof / 2.0)))


def _readonly(a: np.ndarray) -> np.ndarray:
    a.setflags(write=False)
    return a


def _as_band(band: np.ndarray, n: int) -> np.ndarray:
    band = np.asarray(band, dtype=bool)
    if band.shape != (n,):
        raise ValueError(f"band mask has shape {band.shape}, expected ({n},)")
    if not band.any():
        raise ValueError("band mask selects no line")
    return band


def _apply_ceiling(
    drive: np.ndarray, ceiling_ms_fs2: float | None, df_hz: float | None
) -> tuple[float, float]:
    """Scale ``drive`` in place so that Σ D·df ≤ ceiling; return (scale, mean square)."""
    if ceiling_ms_fs2 is None:
        ms = float(drive.sum() * df_hz) if df_hz is not None else float("nan")
        return 1.0, ms
    if df_hz is None or not df_hz > 0:
        raise ValueError("df_hz > 0 is required with ceiling_ms_fs2")
    if not ceiling_ms_fs2 > 0:
        raise ValueError(f"ceiling_ms_fs2 must be > 0, got {ceiling_ms_fs2}")
    ms = float(drive.sum() * df_hz)
    scale = 1.0
    if ms > ceiling_ms_fs2:
        scale = ceiling_ms_fs2 / ms
        drive *= scale
        ms = float(drive.sum() * df_hz)
    return scale, ms


def fill_low_coherence(values_db: np.ndarray, good: np.ndarray, band: np.ndarray) -> np.ndarray:
    """Replace band lines not in ``good`` by linear interpolation (in dB over line index).

    Lines below the first or above the last good line hold the nearest good value. Returns a
    copy; lines outside ``band`` are returned unchanged. If no band line is good, the band lines
    are set to the median of ``values_db`` over the band (the caller should not get here: the
    connection check refuses a channel without coherence).
    """
    out = np.array(values_db, dtype=float, copy=True)
    idx = np.flatnonzero(band)
    ok = idx[good[idx]]
    bad = idx[~good[idx]]
    if bad.size == 0:
        return out
    if ok.size == 0:
        out[idx] = np.median(values_db[idx])
        return out
    out[bad] = np.interp(bad, ok, values_db[ok])  # np.interp holds the end values
    return out


def initial_drive(
    target_psd: np.ndarray,
    h1: np.ndarray,
    coherence: np.ndarray,
    *,
    max_boost_db: float,
    coherence_min: float,
    band: np.ndarray,
    ceiling_ms_fs2: float | None = None,
    df_hz: float | None = None,
) -> DriveResult:
    """First drive PSD from the identified FRF: ``D = R / |H|²`` with limits.

    Parameters
    ----------
    target_psd : ndarray
        Target control PSD R, g²/Hz, per line.
    h1 : ndarray
        FRF estimate H1 (complex or magnitude), g/FS per line.
    coherence : ndarray
        Ordinary coherence γ² per line (0..1).
    max_boost_db : float
        Boost limit: the correction ``1/|H|²`` of a line may exceed the band median of
        ``1/|H|²`` by at most this many dB. An antiresonance or a dead line therefore cannot
        pull a huge drive; resonances (cuts) are not limited.
    coherence_min : float
        Lines with coherence below this (or with a zero or non-finite |H|) do not trust their
        own |H|: their |H|² in dB is interpolated from the nearest good neighbours (held at
        the end values beyond the first/last good line).
    band : ndarray of bool
        Lines under control; the drive is 0 outside.
    ceiling_ms_fs2, df_hz : float, optional
        Mean-square ceiling ``Σ D·df ≤ ceiling`` (the whole drive is scaled down).

    Returns
    -------
    DriveResult
        ``step_limited`` marks boost-limited lines, ``held`` the interpolated lines.
    """
    target = np.asarray(target_psd, dtype=float)
    n = target.size
    band = _as_band(band, n)
    mag2 = np.abs(np.asarray(h1)) ** 2
    coh = np.asarray(coherence, dtype=float)
    if mag2.shape != (n,) or coh.shape != (n,):
        raise ValueError("target_psd, h1 and coherence must have the same length")
    good = band & np.isfinite(mag2) & (mag2 > 0) & np.isfinite(coh) & (coh >= coherence_min)
    with np.errstate(divide="ignore", invalid="ignore"):
        mag2_db = np.where(good, 10.0 * np.log10(np.where(good, mag2, 1.0)), 0.0)
    mag2_db = fill_low_coherence(mag2_db, good, band)
    corr_db = -mag2_db  # correction 1/|H|² in dB
    med_db = float(np.median(corr_db[band]))
    cap_db = med_db + max_boost_db
    limited = band & (corr_db > cap_db)
    corr_db = np.minimum(corr_db, cap_db)
    drive = np.zeros(n)
    drive[band] = target[band] * 10.0 ** (corr_db[band] / 10.0)
    scale, ms = _apply_ceiling(drive, ceiling_ms_fs2, df_hz)
    return DriveResult(
        drive_psd=_readonly(drive),
        step_db=_readonly(np.zeros(n)),
        step_limited=_readonly(limited),
        held=_readonly(band & ~good),
        ceiling_scale=scale,
        drive_ms_fs2=ms,
    )


def update_drive(
    drive_psd: np.ndarray,
    target_psd: np.ndarray,
    control_psd: np.ndarray,
    *,
    gain: float,
    max_step_db: float,
    band: np.ndarray,
    ceiling_ms_fs2: float | None = None,
    df_hz: float | None = None,
    frozen: np.ndarray | None = None,
    law: str = "direct",
    h1: np.ndarray | None = None,
    control_dof: float | None = None,
) -> DriveResult:
    """One equalization step of the drive PSD.

    Parameters
    ----------
    drive_psd : ndarray
        Current drive PSD D_k, FS²/Hz (the PSD that produced ``control_psd``, at the same level
        scale as ``target_psd``).
    target_psd : ndarray
        Target R, g²/Hz.
    control_psd : ndarray
        Estimated control PSD Ĉ_k, g²/Hz, measured while ``drive_psd`` played.
    gain : float
        Update gain γ, 0 < γ ≤ 1 (the loop diverges for γ ≥ 2, and for γ ≥ 1 with one update
        of delay; docs/methods.md, "Equalizer update laws and their scatter").
    max_step_db : float
        Per-line limit of the change, ±dB per update.
    band : ndarray of bool
        Lines under control; the result is 0 outside.
    ceiling_ms_fs2, df_hz : float, optional
        Mean-square ceiling ``Σ D·df ≤ ceiling_ms_fs2`` (FS²), applied by scaling the whole drive.
    frozen : ndarray of bool, optional
        Lines to hold (e.g. low coherence).
    law : {"direct", "blend"}
        ``direct``: ``ΔD_dB = γ (R_dB − Ĉ_dB)``;
        ``blend``: ``D_{k+1} = D_k^(1−γ) (R/|Ĥ|²)^γ``, needs ``h1`` (g/FS).
    control_dof : float, optional
        DOF ν of ``control_psd``. When given, the direct law removes the mean of the dB error of
        a χ²_ν estimate, ``E[10 log10(χ²_ν/ν)] = 4.343 (ψ(ν/2) − ln(ν/2))`` (≈ −4.343/ν dB),
        so the loop settles on the target in mean square, not on its geometric mean (which
        sits 0.07 dB high at ν = 60).

    Returns
    -------
    DriveResult
    """
    if law not in LAWS:
        raise ValueError(f"law must be one of {LAWS}, got {law!r}")
    if not 0.0 < gain <= 1.0:
        raise ValueError(f"gain must be in (0, 1], got {gain}")
    if not max_step_db > 0:
        raise ValueError(f"max_step_db must be > 0, got {max_step_db}")
    drive = np.asarray(drive_psd, dtype=float)
    target = np.asarray(target_psd, dtype=float)
    control = np.asarray(control_psd, dtype=float)
    n = drive.size
    if target.shape != (n,) or control.shape != (n,):
        raise ValueError("drive_psd, target_psd and control_psd must have the same length")
    band = _as_band(band, n)
    hold = ~np.isfinite(drive) | (drive <= 0) | ~(target > 0)
    if law == "direct":
        hold |= ~np.isfinite(control) | (control <= 0)
    else:
        if h1 is None:
            raise ValueError("law 'blend' needs h1")
        mag2 = np.abs(np.asarray(h1)) ** 2
        if mag2.shape != (n,):
            raise ValueError("h1 must have the length of drive_psd")
        hold |= ~np.isfinite(mag2) | (mag2 <= 0)
    if frozen is not None:
        hold |= np.asarray(frozen, dtype=bool)
    hold &= band
    act = band & ~hold
    step = np.zeros(n)
    bias_db = 0.0
    if control_dof is not None and law == "direct":
        bias_db = log_bias_db(control_dof)
    with np.errstate(divide="ignore", invalid="ignore"):
        if law == "direct":
            step[act] = gain * (10.0 * np.log10(target[act] / control[act]) + bias_db)
        else:
            ideal = target[act] / mag2[act]
            step[act] = gain * 10.0 * np.log10(ideal / drive[act])
    limited = act & (np.abs(step) > max_step_db)
    step = np.clip(step, -max_step_db, max_step_db)
    new = np.zeros(n)
    new[band] = drive[band] * 10.0 ** (step[band] / 10.0)
    new[~np.isfinite(new)] = 0.0
    scale, ms = _apply_ceiling(new, ceiling_ms_fs2, df_hz)
    return DriveResult(
        drive_psd=_readonly(new),
        step_db=_readonly(step),
        step_limited=_readonly(limited),
        held=_readonly(hold),
        ceiling_scale=scale,
        drive_ms_fs2=ms,
    )
