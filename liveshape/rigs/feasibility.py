"""Can this rig honestly produce this profile? Drive, amplifier, stroke and input budgets.

Pure (numpy). :func:`assess` works on the control lines ``f_k = k fs/N`` (``k = 0 .. N/2``, line
spacing ``df = fs/N``), the same lines the controller synthesizes and measures. For the target ASD
``A_k`` (g²/Hz) and the plant's drive-FS -> response-FS transfer function ``H_k``
(:func:`~liveshape.rigs.plantmodel.analytic_frf`), the equalized drive must have the PSD
``D_k = A_k c² / |H_k|²`` (FS²/Hz, ``c`` = response FS per g), so that the measured response
meets the target. From it follow, line by line through the plant's transfer functions, the
amplifier voltage, the coil current and the table excursion; each rms is ``sqrt(sum PSD df)``.

Peaks are judged on a 3-sigma basis, ``peak = 3 rms`` (common practice for stroke and drive
checks; MIL-STD-810H 514.8 Annex C tabulates peak displacement on a 3-sigma basis), against:
the converter's ±1 FS (card output and input), the amplifier's ``v_out_max_v`` and ``i_max_a``, and
the shaker's ``xmax_m``. Headroom is ``20 log10(limit / peak)`` in dB (positive = margin).

Noise floor at the card input: sensor noise ``(noise_g_rms c)² / (fs/2)`` plus card noise
``in_noise_fs_rms² / (fs/2)`` FS²/Hz, both white over 0 .. fs/2 as in the simulated rig. The SNR of
a line is the target's measured PSD ``A_k c²`` over this floor.

Rule for the lowest frequency the rig can honestly control (our own rule, documented here):
a line ``f_k`` of the band qualifies when (1) its SNR is at least ``snr_min_db`` (default 10 dB:
noise then biases the measured PSD by at most ``10 log10(1.1) = 0.41 dB``, well inside a ±3 dB
alarm band) and (2) the profile from ``f_k`` up to its top keeps every 3-sigma budget within its
limit. The lowest qualifying line is reported. Lines that fail (1), lines below the lowest line
that meets (2), lines above fs/2 and lines below the first line spacing are listed as
unreachable bands with their reasons.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from liveshape.errors import ConfigError
from liveshape.rigs.plant import IdealShaker, Plant
from liveshape.rigs.plantmodel import analytic_frf, drive_to_volts_tf, evaluate_tf, voltage_frf

#: Peaks are this many standard deviations (3-sigma basis, see the module doc).
PEAK_SIGMA = 3.0


@dataclass(frozen=True)
class Budget:
    """One quantity against its limit: rms, 3-sigma peak, limit (peak), headroom in dB.

    ``limit`` is None when the plant states none (then ``headroom_db`` is None and ``ok`` True).
    """

    name: str
    unit: str
    rms: float
    peak_3sigma: float
    limit: float | None
    headroom_db: float | None
    ok: bool


@dataclass(frozen=True)
class Unreachable:
    """A band of the profile the rig cannot honestly control, and why."""

    f_lo_hz: float
    f_hi_hz: float
    reason: str


@dataclass(frozen=True)
class Feasibility:
    """Result of :func:`assess`; ``to_dict()`` gives plain data for records and the screen."""

    plant: str
    profile: str
    fs_hz: float
    frame_length: int
    grms: float
    drive: Budget
    amp_voltage: Budget
    amp_current: Budget | None
    excursion: Budget
    card_input: Budget
    snr_min_db: float
    snr_worst_db: float
    snr_worst_hz: float
    lowest_controllable_hz: float | None
    coil_power_w: float | None
    coil_rise_k: float | None
    unreachable: tuple[Unreachable, ...]
    feasible: bool

    def to_dict(self) -> dict[str, Any]:
        """Flat plain data with units in the key names (for records, JSON and the screen).

        Budgets appear as ``<name>_rms_<unit>``, ``<name>_peak_3sigma_<unit>``,
        ``<name>_limit_<unit>`` and ``<name>_headroom_db``; ``unreachable`` is one line of text
        (``"none"`` when empty); ``limits_exceeded`` names the budgets over their limit.
        """
        d: dict[str, Any] = {
            "feasible": self.feasible,
            "plant": self.plant,
            "profile": self.profile,
            "grms_g": self.grms,
        }
        budgets = [("drive", "fs", self.drive), ("amp_voltage", "v", self.amp_voltage),
                   ("amp_current", "a", self.amp_current), ("excursion", "m", self.excursion),
                   ("card_input", "fs", self.card_input)]
        for key, unit, b in budgets:
            if b is None:
                continue
            d[f"{key}_rms_{unit}"] = b.rms
            d[f"{key}_peak_3sigma_{unit}"] = b.peak_3sigma
            d[f"{key}_limit_{unit}"] = b.limit
            d[f"{key}_headroom_db"] = b.headroom_db
        over = [key for key, _, b in budgets if b is not None and not b.ok]
        d["limits_exceeded"] = ", ".join(over) if over else "none"
        d.update({
            "snr_worst_db": self.snr_worst_db,
            "snr_worst_f_hz": self.snr_worst_hz,
            "snr_min_db": self.snr_min_db,
            "lowest_controllable_hz": self.lowest_controllable_hz,
            "coil_power_w": self.coil_power_w,
            "coil_rise_k": self.coil_rise_k,
            "fs_hz": self.fs_hz,
            "frame_length": self.frame_length,
            "unreachable": "; ".join(
                f"{u.f_lo_hz:.6g}-{u.f_hi_hz:.6g} Hz: {u.reason}" for u in self.unreachable
            ) or "none",
        })
        return d


def _budget(name: str, unit: str, ms: float, limit: float | None) -> Budget:
    rms = math.sqrt(max(ms, 0.0))
    peak = PEAK_SIGMA * rms
    if limit is None:
        return Budget(name, unit, rms, peak, None, None, True)
    head = math.inf if peak == 0 else 20.0 * math.log10(limit / peak)
    return Budget(name, unit, rms, peak, limit, head, peak <= limit)


def _runs(mask: np.ndarray) -> list[tuple[int, int]]:
    """Index ranges ``[i, j]`` (inclusive) of contiguous True runs."""
    out, i, n = [], 0, mask.size
    while i < n:
        if mask[i]:
            j = i
            while j + 1 < n and mask[j + 1]:
                j += 1
            out.append((i, j))
            i = j + 1
        else:
            i += 1
    return out


def _asd_lines(profile: Any, f: np.ndarray) -> np.ndarray:
    try:
        a = np.asarray(profile.asd_at(f), dtype=float)
        if a.shape == f.shape:
            return a
    except (TypeError, ValueError):
        pass
    return np.array([float(profile.asd_at(float(x))) for x in f])


def assess(
    profile: Any,
    plant: Plant,
    *,
    fs_hz: float,
    frame_length: int,
    snr_min_db: float = 10.0,
) -> Feasibility:
    """Check a target profile against a plant's limits on the control lines.

    Parameters
    ----------
    profile : Profile
        Target ASD (anything with ``asd_at(f_hz)`` in g²/Hz, 0 outside its band, and
        ``f_min_hz``, ``f_max_hz``; ``grms`` and ``name`` are used when present).
    plant : Plant
        The rig description.
    fs_hz : float
        Sample rate in Hz.
    frame_length : int
        Control frame length; the line spacing is ``fs_hz / frame_length``.
    snr_min_db : float
        Least SNR of a line over the input noise floor that counts as controllable.

    Returns
    -------
    Feasibility
        Budgets (3-sigma peaks vs limits), SNR, the lowest controllable frequency, the
        unreachable bands with reasons, and an overall verdict (see the module doc).
    """
    fs = float(fs_hz)
    if not (math.isfinite(fs) and fs > 0):
        raise ConfigError(f"feasibility: fs_hz = {fs_hz!r} must be a finite number > 0")
    if isinstance(frame_length, bool) or not isinstance(frame_length, int) or frame_length < 2:
        raise ConfigError(
            f"feasibility: frame_length = {frame_length!r} must be a whole number >= 2")
    df = fs / frame_length
    f = np.arange(frame_length // 2 + 1) * df
    asd = _asd_lines(profile, f)
    band = asd > 0
    fb, ab = f[band], asd[band]
    c = plant.fs_per_g
    s = 2j * math.pi * fb
    h = analytic_frf(plant, fb, fs_hz=fs)
    resp = ab * c * c                      # measured response PSD, FS²/Hz
    drive = resp / np.abs(h) ** 2          # FS²/Hz
    volts = drive * np.abs(evaluate_tf(drive_to_volts_tf(plant), s)) ** 2
    x_psd = volts * np.abs(voltage_frf(plant, fb, "displacement_m_per_v")) ** 2
    motor = not isinstance(plant.shaker, IdealShaker)
    i_psd = volts * np.abs(voltage_frf(plant, fb, "current_a_per_v")) ** 2 if motor else None
    # Noise floor at the card input (FS²/Hz): sensor and card noise, white over 0 .. fs/2.
    noise_ms = (plant.accelerometer.noise_g_rms * c) ** 2 + plant.card.in_noise_fs_rms**2
    floor = noise_ms / (fs / 2)
    with np.errstate(divide="ignore"):
        snr_db = 10.0 * np.log10(resp / floor) if fb.size else np.zeros(0)

    amp, sh = plant.amplifier, plant.shaker
    limited = [("drive", drive, 1.0), ("amp_voltage", volts, amp.v_out_max_v),
               ("excursion", x_psd, sh.xmax_m)]
    if motor:
        limited.append(("amp_current", i_psd, amp.i_max_a))
    budgets = {
        "drive": _budget("card output", "FS", float(drive.sum() * df), 1.0),
        "amp_voltage": _budget("amplifier voltage", "V", float(volts.sum() * df),
                               amp.v_out_max_v),
        "excursion": _budget("excursion", "m", float(x_psd.sum() * df), sh.xmax_m),
        "card_input": _budget("card input", "FS", float(resp.sum() * df) + noise_ms, 1.0),
        "amp_current": _budget("amplifier current", "A", float(i_psd.sum() * df), amp.i_max_a)
        if motor else None,
    }

    # Lowest line from which the rest of the band keeps every budget (suffix sums).
    fits = np.ones(fb.size, bool)
    over_names: list[list[str]] = [[] for _ in range(fb.size)]
    for name, psd, limit in limited:
        if limit is None:
            continue
        tail_peak = PEAK_SIGMA * np.sqrt(np.cumsum(psd[::-1])[::-1] * df)
        bad = tail_peak > limit
        fits &= ~bad
        for k in np.flatnonzero(bad):
            over_names[k].append(name)
    snr_ok = snr_db >= snr_min_db
    good = fits & snr_ok
    lowest = float(fb[np.argmax(good)]) if good.any() else None

    unreachable: list[Unreachable] = []
    f_min = float(getattr(profile, "f_min_hz", fb[0] if fb.size else 0.0))
    f_max = float(getattr(profile, "f_max_hz", fb[-1] if fb.size else 0.0))
    if f_min < df:
        unreachable.append(Unreachable(f_min, min(df, f_max), "below the line spacing fs/N"))
    for i, j in _runs(~fits):
        names = sorted({n for k in range(i, j + 1) for n in over_names[k]})
        unreachable.append(Unreachable(
            float(fb[i]), float(fb[j]),
            f"3-sigma {', '.join(names)} of the band from here up exceeds its limit"))
    for i, j in _runs(~snr_ok):
        worst = float(np.min(snr_db[i:j + 1]))
        unreachable.append(Unreachable(
            float(fb[i]), float(fb[j]),
            f"SNR {worst:.1f} dB over the input noise floor is below {snr_min_db:g} dB"))
    if f_max > fs / 2:
        unreachable.append(Unreachable(max(fs / 2, f_min), f_max, "above fs/2"))
    unreachable.sort(key=lambda u: u.f_lo_hz)

    coil_power = coil_rise = None
    if motor:
        coil_power = float(i_psd.sum() * df) * sh.re_ohm
        if sh.coil_heating is not None:
            coil_rise = coil_power * sh.coil_heating.thermal_resistance_k_per_w
    worst = int(np.argmin(snr_db)) if fb.size else None
    checks = [b for b in budgets.values() if b is not None]
    return Feasibility(
        plant=plant.name,
        profile=str(getattr(profile, "name", "") or ""),
        fs_hz=fs,
        frame_length=frame_length,
        grms=float(getattr(profile, "grms", math.sqrt(float(ab.sum() * df)))),
        drive=budgets["drive"],
        amp_voltage=budgets["amp_voltage"],
        amp_current=budgets["amp_current"],
        excursion=budgets["excursion"],
        card_input=budgets["card_input"],
        snr_min_db=float(snr_min_db),
        snr_worst_db=float(snr_db[worst]) if worst is not None else -math.inf,
        snr_worst_hz=float(fb[worst]) if worst is not None else math.nan,
        lowest_controllable_hz=lowest,
        coil_power_w=coil_power,
        coil_rise_k=coil_rise,
        unreachable=tuple(unreachable),
        feasible=bool(fb.size) and all(b.ok for b in checks) and not unreachable,
    )
