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

What would make an infeasible profile feasible (our own rules, derived in docs/methods.md,
"Feasibility budgets"):

* **Reachable level.** Every budget but the card input scales with the level: a profile
  ``L`` dB below the target has every PSD times ``10^(L/10)`` and every 3-sigma peak times
  ``10^(L/20)``, so its headroom is ``h - L``. The card input also carries the noise floor,
  which does not scale: ``9 (R 10^(L/10) + N) <= 1`` FS². The SNR of every line falls by
  ``L``. The reachable level is the highest ``L <= 0`` that keeps every budget and the SNR rule;
  None when no level does (the SNR already fails at the full level).
* **Binding limit.** The budget (or the SNR rule) with the least headroom at full level.
* **Lowest controllable frequency at full level.** A line ``f_k`` of the band qualifies when
  (1) every line from ``f_k`` up has an SNR of at least ``snr_min_db`` (default 10 dB: noise
  then biases the measured PSD by at most ``10 log10(1.1) = 0.41 dB``, well inside a ±3 dB alarm
  band) and (2) the profile from ``f_k`` up to its top keeps every 3-sigma budget within its
  limit. The lowest qualifying line is reported with the budgets that bind one line lower. It
  answers "how far up must the band start to hold the *full* level": a level problem (a
  budget spread over the whole band) is answered by the reachable level instead, and a profile
  feasible at full level reports its first line. Lines that fail (1), lines below the lowest
  line that meets (2), lines above fs/2 and lines below the first line spacing are listed as
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
    binding: str | None = None
    reachable_level_db: float | None = 0.0
    lowest_limited_by: tuple[str, ...] = ()
    advice: tuple[str, ...] = ()
    #: The card input of every monitor input on the simulated plant (:func:`monitor_budgets`),
    #: with its key (``monitor_<channel>_<name>_input``).
    monitors: tuple[tuple[str, Budget], ...] = ()

    def headrooms_db(self) -> dict[str, float]:
        """Headroom of every limit at full level, dB, by its plain name (``SNR`` is the worst
        line's SNR over ``snr_min_db``); limits the plant does not state are left out."""
        out = {b.name: b.headroom_db for b in self._budgets() if b.headroom_db is not None}
        if math.isfinite(self.snr_worst_db):
            out["SNR"] = self.snr_worst_db - self.snr_min_db
        return out

    def _budgets(self) -> list[Budget]:
        return [b for b in (self.drive, self.amp_voltage, self.amp_current, self.excursion,
                            self.card_input) if b is not None]

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
                   ("card_input", "fs", self.card_input),
                   *((key, "fs", b) for key, b in self.monitors)]
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
            "snr_headroom_db": self.snr_worst_db - self.snr_min_db,
            "binding_limit": self.binding or "none",
            "reachable_level_db": self.reachable_level_db,
            "lowest_limited_by": ", ".join(self.lowest_limited_by) or "none",
            "headroom_left": "; ".join(f"{k} {v:+.1f} dB" for k, v in self.headrooms_db().items()
                                       if k != self.binding) or "none",
            "advice": list(self.advice),
        })
        return d


def monitor_budgets(roles: Any, plant: Plant, profile: Any, *, fs_hz: float,
                    frame_length: int) -> tuple[tuple[str, Budget], ...]:
    """The card input each monitor of ``roles`` would see at full level on the simulated plant.

    A monitor named after a payload resonance or a fixture point reads the control's target
    times that point's transmissibility from the table (:func:`~liveshape.rigs.plantmodel.
    mode_transmissibility_tf`, :func:`~liveshape.rigs.plantmodel.fixture_point_tf`; base
    excitation, Rao, *Mechanical Vibrations*, 5th ed., §3.6), capped by its limit where it has
    one (the loop notches the reference there), plus the noise floor, in FS through the
    accelerometer. Only for a plant controlled on the table; a monitor naming no point is left
    out (the run refuses it in one line).
    """
    import scipy.signal

    from liveshape.rigs.plantmodel import fixture_point_tf, mode_transmissibility_tf

    pl = plant.payload
    if roles is None or pl.control_point != "table":
        return ()
    fs = float(fs_hz)
    df = fs / int(frame_length)
    f = np.arange(int(frame_length) // 2 + 1) * df
    asd = _asd_lines(profile, f)
    band = asd > 0
    fb, ab = f[band], asd[band]
    c = plant.fs_per_g
    noise_ms = (plant.accelerometer.noise_g_rms * c) ** 2 + plant.card.in_noise_fs_rms**2
    modes = [r.name for r in pl.resonances]
    points = [p.name for p in pl.fixture_points]
    out = []
    for r in roles:
        if r.role != "monitor":
            continue
        if r.name in points:
            num, den = fixture_point_tf(plant, points.index(r.name))
        elif r.name in modes:
            num, den = mode_transmissibility_tf(plant, modes.index(r.name))
        else:
            continue
        _, t = scipy.signal.freqs(num, den, worN=2 * np.pi * fb)
        g = ab * np.abs(t) ** 2
        if r.limit is not None:
            lim = np.asarray(r.limit.asd_at(fb), dtype=float)
            g = np.where(lim > 0, np.minimum(g, lim), g)
        out.append((f"monitor_{r.channel}_{r.name}_input",
                    _budget(f"monitor input {r.channel} ({r.name})", "FS",
                            float(g.sum() * df) * c * c + noise_ms, 1.0)))
    return tuple(out)


def with_monitors(feas: Feasibility, monitors: tuple[tuple[str, Budget], ...]) -> Feasibility:
    """``feas`` with the monitors' budgets; infeasible when one is over (the run would trip
    ``input_overload`` on that input)."""
    import dataclasses

    if not monitors:
        return feas
    over = [b.name for _, b in monitors if not b.ok]
    advice = feas.advice + tuple(
        f"{name}: give it a limit in rig.inputs, or lower the level, or its sensor's gain"
        for name in over)
    return dataclasses.replace(feas, monitors=monitors, feasible=feas.feasible and not over,
                               advice=advice)


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
    # the card input carries the noise floor whatever the band
    limited.append(("card_input", resp, 1.0))
    for name, psd, limit in limited:
        if limit is None:
            continue
        extra = noise_ms if name == "card_input" else 0.0
        tail_peak = PEAK_SIGMA * np.sqrt(np.cumsum(psd[::-1])[::-1] * df + extra)
        bad = tail_peak > limit
        fits &= ~bad
        for k in np.flatnonzero(bad):
            over_names[k].append(name)
    snr_ok = snr_db >= snr_min_db
    # every line from k up must meet the SNR rule (suffix "all")
    snr_ok_up = np.cumprod(snr_ok[::-1])[::-1].astype(bool) if fb.size else snr_ok
    good = fits & snr_ok_up
    lowest = float(fb[np.argmax(good)]) if good.any() else None
    limited_by: tuple[str, ...] = ()
    if lowest is not None and np.argmax(good) > 0:
        k = int(np.argmax(good)) - 1
        limited_by = tuple(_LABEL[n] for n in over_names[k]) + (
            ("SNR",) if not snr_ok_up[k] else ())

    unreachable: list[Unreachable] = []
    f_min = float(getattr(profile, "f_min_hz", fb[0] if fb.size else 0.0))
    f_max = float(getattr(profile, "f_max_hz", fb[-1] if fb.size else 0.0))
    if f_min < df:
        unreachable.append(Unreachable(f_min, min(df, f_max), "below the line spacing fs/N"))
    for i, j in _runs(~fits):
        names = sorted({_LABEL[n] for k in range(i, j + 1) for n in over_names[k]})
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
    snr_worst = float(snr_db[worst]) if worst is not None else -math.inf
    reachable = _reachable_level_db(checks, budgets["card_input"], noise_ms, snr_worst,
                                    snr_min_db)
    heads = {b.name: b.headroom_db for b in checks if b.headroom_db is not None}
    if math.isfinite(snr_worst):
        heads["SNR"] = snr_worst - snr_min_db
    binding = min(heads, key=lambda n: heads[n]) if heads and min(heads.values()) < 0 else None
    feasible = bool(fb.size) and all(b.ok for b in checks) and not unreachable
    advice = _advice(heads, binding, reachable, lowest, float(fb[0]) if fb.size else None,
                     limited_by, unreachable, fs, snr_min_db) if not feasible else ()
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
        snr_worst_db=snr_worst,
        snr_worst_hz=float(fb[worst]) if worst is not None else math.nan,
        lowest_controllable_hz=lowest,
        coil_power_w=coil_power,
        coil_rise_k=coil_rise,
        unreachable=tuple(unreachable),
        feasible=feasible,
        binding=binding,
        reachable_level_db=reachable,
        lowest_limited_by=limited_by,
        advice=advice,
    )


#: Plain names of the limits (the keys of ``over_names`` in :func:`assess`).
_LABEL = {"drive": "card output", "amp_voltage": "amplifier voltage", "excursion": "excursion",
          "amp_current": "amplifier current", "card_input": "card input"}


def _reachable_level_db(budgets: list[Budget], card_input: Budget, noise_ms: float,
                        snr_worst_db: float, snr_min_db: float) -> float | None:
    """Highest level ``L <= 0`` dB re the target that keeps every budget and the SNR rule
    (module doc): ``L <= h`` for the budgets that scale with the level, the card input solved
    with its fixed noise, ``L >= snr_min - snr_worst``. None when no such level exists."""
    top = 0.0
    for b in budgets:
        if b is card_input or b.headroom_db is None or b.limit is None:
            continue
        top = min(top, b.headroom_db)
    if card_input.limit is not None:
        room = (card_input.limit / PEAK_SIGMA) ** 2 - noise_ms  # FS² left for the response
        resp_ms = card_input.rms**2 - noise_ms
        if room <= 0:
            return None
        if resp_ms > 0:
            top = min(top, 10.0 * math.log10(room / resp_ms))
    bottom = snr_min_db - snr_worst_db
    if not math.isfinite(top) or top < bottom:
        return None
    return top


def _advice(heads: dict[str, float], binding: str | None, reachable: float | None,
            lowest: float | None, first: float | None, limited_by: tuple[str, ...],
            unreachable: list[Unreachable], fs: float, snr_min_db: float) -> tuple[str, ...]:
    """What would make the profile feasible, one sentence each (see the module doc)."""
    out: list[str] = []
    if reachable is not None and reachable < 0:
        out.append(f"run at {reachable:.1f} dB re the target: every budget then fits "
                   f"({binding or 'none'} binds)")
    out_h, volt_h = heads.get("card output"), heads.get("amplifier voltage")
    if out_h is not None and out_h < 0:
        spare = [h for n, h in heads.items() if n in ("amplifier voltage", "amplifier current")]
        if volt_h is not None and min(spare) >= -out_h:
            out.append(f"or raise the amplifier gain by {-out_h:.1f} to {min(spare):.1f} dB: "
                       "the card output then fits and the amplifier still has headroom")
    in_h = heads.get("card input")
    if in_h is not None and in_h < 0:
        out.append(f"or lower the input or conditioner gain by at least {-in_h:.1f} dB "
                   "(the SNR falls by at most as much)")
    snr_h = heads.get("SNR")
    if snr_h is not None and snr_h < 0:
        out.append(f"raise the SNR by {-snr_h:.1f} dB (a more sensitive sensor, a quieter "
                   f"input, or a higher level): the SNR rule is {snr_min_db:g} dB per line")
    if lowest is not None and first is not None and lowest > first:
        out.append(f"or keep the full level and start the band at {lowest:.6g} Hz "
                   f"(below it {', '.join(limited_by) or 'the budgets'} cannot hold)")
    for u in unreachable:
        if u.reason in ("above fs/2", "below the line spacing fs/N"):
            out.append(f"{u.f_lo_hz:.6g}-{u.f_hi_hz:.6g} Hz is {u.reason}: change the sample "
                       f"rate ({fs:g} Hz) or the frame length")
    return tuple(out)
