"""Warm start: begin a test from an earlier run's equalized drive on the same rig.

Pure. An earlier run on the same rig and calibration left its last equalized drive (full-level
PSD, FS²/Hz) and its FRF (g/FS) in the record. A warm start
(:class:`~liveshape.control.controller.Controller` with ``warm``):

1. makes the connection check as always;
2. identifies at the identification level with the stored drive's shape (not the target through
   the connection FRF), for the update DOF only;
3. confirms that the plant is the one the drive was equalized on: over the band lines of good
   coherence, 95 % of ``|20 log10(|Ĥ_now| / |Ĥ_stored|)|`` must be at most :data:`CONFIRM_DB`
   (a percentile, not the median, so that a resonance that moved, a few lines only, is seen).
   Then the stored drive is the first drive, and the identification's control, played with
   that very drive shape, fills the first part of the decision window, so the first
   level step waits only for the rest of the window and ``hold_s``. Otherwise the run goes on as a
   cold start (the stored drive is not used; an event says why).

What must match before anything is driven (:func:`mismatch`) is the shell's to check: the rig,
the calibration, the sample rate and the lines.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

__all__ = ["CONFIRM_DB", "WarmStart", "confirm", "mismatch"]

#: Change of |H| (dB) that 95 % of the good band lines must stay within for the stored drive to
#: be used (two thirds of the usual ±3 dB alarm band; [common practice margin], no standard
#: figure).
CONFIRM_DB = 2.0
#: The percentile of the lines' |H| changes held against :data:`CONFIRM_DB`.
CONFIRM_PERCENTILE = 95.0
#: Calibration figures that must be equal for a warm start.
CAL_KEYS = ("out_v_per_fs", "in_v_per_fs", "accel_mv_per_g", "calibrated")
#: Keys of an audio rig's record that name the hardware (block sizes may differ).
AUDIO_RIG_KEYS = ("kind", "device", "host_api", "fs_hz", "drive_output", "control_input",
                  "loopback_input")


@dataclass(frozen=True)
class WarmStart:
    """An earlier run's equalized drive and FRF.

    Attributes
    ----------
    drive_psd : ndarray
        Full-level drive PSD on all ``frame_length / 2 + 1`` lines, FS²/Hz (0 off the band).
    h1 : ndarray
        FRF on the band lines, g/FS (complex).
    coherence : ndarray
        Coherence on the band lines.
    source : str
        The run folder it came from.
    update : int
        The update number of the drive in that run.
    """

    drive_psd: np.ndarray
    h1: np.ndarray
    coherence: np.ndarray
    source: str
    update: int


def _first_difference(a: Any, b: Any, path: str = "") -> str | None:
    """The first key path where two mappings differ, with both values; None if equal."""
    if isinstance(a, Mapping) and isinstance(b, Mapping):
        # plain values first (a plant's name before its accelerometer's settings)
        def order(k: Any) -> tuple[bool, str]:
            return isinstance(a.get(k), Mapping) or isinstance(b.get(k), Mapping), str(k)

        for k in sorted(set(a) | set(b), key=order):
            d = _first_difference(a.get(k), b.get(k), f"{path}.{k}" if path else str(k))
            if d is not None:
                return d
        return None
    if isinstance(a, (int, float)) and isinstance(b, (int, float)) and not isinstance(a, bool):
        if math.isclose(float(a), float(b), rel_tol=1e-9, abs_tol=0.0):
            return None
    elif a == b:
        return None
    return f"{path} = {b!r} there, {a!r} now"


def mismatch(*, rig_now: Mapping, rig_then: Mapping, cal_now: Mapping, cal_then: Mapping,
             fs_now: float, fs_then: float, f_hz_now: np.ndarray,
             f_hz_then: np.ndarray) -> str | None:
    """Why an earlier run's drive cannot start this one (one phrase), or None when it can."""
    if not math.isclose(float(fs_now), float(fs_then), rel_tol=1e-12):
        return f"the sample rate differs ({fs_then:g} Hz there, {fs_now:g} Hz now)"
    a, b = np.asarray(f_hz_now, float), np.asarray(f_hz_then, float)
    if a.shape != b.shape or not np.allclose(a, b, rtol=1e-9, atol=0.0):
        return (f"the control lines differ ({b.size} lines {b[0]:g}-{b[-1]:g} Hz there, "
                f"{a.size} lines {a[0]:g}-{a[-1]:g} Hz now)" if a.size and b.size else
                "the control lines differ")
    if rig_now.get("kind") == "audio" or rig_then.get("kind") == "audio":
        rig_now = {k: rig_now.get(k) for k in AUDIO_RIG_KEYS}
        rig_then = {k: rig_then.get(k) for k in AUDIO_RIG_KEYS}
    d = _first_difference(dict(rig_now), dict(rig_then))
    if d is not None:
        return f"the rig differs (rig.{d})"
    d = _first_difference({k: cal_now.get(k) for k in CAL_KEYS},
                          {k: cal_then.get(k) for k in CAL_KEYS})
    if d is not None:
        return f"the calibration differs ({d})"
    return None


def confirm(h1_now: np.ndarray, coh_now: np.ndarray, warm: WarmStart, *,
            coherence_min: float) -> tuple[bool, float, int]:
    """``(ok, change_db, lines)``: does the plant identified now match the stored FRF?

    ``change_db`` is the :data:`CONFIRM_PERCENTILE` percentile over the band lines where both
    coherences reach ``coherence_min`` of ``|20 log10(|Ĥ_now| / |Ĥ_stored|)|``; ``lines`` how
    many lines counted.
    """
    a, b = np.abs(np.asarray(h1_now)), np.abs(np.asarray(warm.h1))
    good = ((np.asarray(coh_now) >= coherence_min) & (np.asarray(warm.coherence) >= coherence_min)
            & (a > 0) & (b > 0) & np.isfinite(a) & np.isfinite(b))
    n = int(np.count_nonzero(good))
    if n == 0:
        return False, math.inf, 0
    change = float(np.percentile(np.abs(20.0 * np.log10(a[good] / b[good])), CONFIRM_PERCENTILE))
    return change <= CONFIRM_DB, change, n
