"""Chain calibration procedures: drive a rig, record, and hand the records to the arithmetic.

The procedures take a rig (anything with ``fs_hz``, ``block_size``, ``play_record``,
``start``, ``request_stop`` and ``wait``, i.e. :class:`liveshape.rigs.audio.AudioRig`):
:func:`calibrate_output`, :func:`calibrate_input`, :func:`measure_loop_delay`,
:func:`measure_lowfreq_corner`, :func:`check_accelerometer`; :class:`ToneSource` is the steady
sine they play. The pure computations (:func:`sine_fit`, :func:`output_v_per_fs`,
:func:`input_v_per_fs`, :func:`burst_train`, :func:`estimate_loop_delay`, :func:`fit_highpass`,
:func:`accel_sensitivity`) live in :mod:`liveshape.rigs.calmath` and the calibration file
(:func:`write_calibration`, :func:`load_calibration`, :func:`resolve_calibration`,
:data:`UNCALIBRATED`) in :mod:`liveshape.rigs.calfile`; both are re-exported here, so every
name stays importable from this module.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import Any

import numpy as np

from liveshape.errors import ConfigError
from liveshape.rigs.calfile import (
    SCHEMA_VERSION,
    UNCALIBRATED,
    calibration_from_mapping,
    calibration_mapping,
    load_calibration,
    resolve_calibration,
    write_calibration,
)
from liveshape.rigs.calmath import (
    REFERENCE_ACCEL_M_S2_RMS,
    REFERENCE_F_HZ,
    VOLTMETER_F_HZ,
    AccelCheck,
    HighpassFit,
    LoopDelay,
    SineFit,
    VoltsPerFs,
    accel_sensitivity,
    burst_train,
    estimate_loop_delay,
    fit_highpass,
    highpass_response,
    input_v_per_fs,
    output_v_per_fs,
    sine_fit,
    tone,
)

__all__ = [
    "REFERENCE_ACCEL_M_S2_RMS", "REFERENCE_F_HZ", "SCHEMA_VERSION", "UNCALIBRATED",
    "VOLTMETER_F_HZ", "AccelCheck", "HighpassFit", "LoopDelay", "SineFit", "ToneSource",
    "VoltsPerFs", "accel_sensitivity", "burst_train", "calibrate_input", "calibrate_output",
    "calibration_from_mapping", "calibration_mapping", "check_accelerometer",
    "estimate_loop_delay", "fit_highpass", "highpass_response", "input_v_per_fs",
    "load_calibration", "measure_loop_delay", "measure_lowfreq_corner", "output_v_per_fs",
    "resolve_calibration", "sine_fit", "tone", "write_calibration",
]


class ToneSource:
    """Block source (the controller's protocol): a steady sine with raised-cosine ramps.

    Plays until :meth:`request_stop`, then ramps down over ``ramp_s`` and finishes.
    """

    def __init__(self, fs_hz: float, block_size: int, f_hz: float, level_fs: float, *,
                 ramp_s: float = 0.2) -> None:
        self.fs_hz, self.block, self.f_hz, self.level = fs_hz, block_size, f_hz, level_fs
        self._n = 0
        self._ramp = max(1, int(round(ramp_s * fs_hz)))
        self._stop_at: int | None = None
        self.underflows = 0

    def exchange(self, response_fs: np.ndarray) -> np.ndarray:
        k = self._n + np.arange(self.block)
        g = 0.5 - 0.5 * np.cos(np.pi * np.clip(k / self._ramp, 0.0, 1.0))
        if self._stop_at is not None:
            g = g * (0.5 + 0.5 * np.cos(np.pi * np.clip((k - self._stop_at) / self._ramp, 0, 1)))
        self._n += self.block
        return (self.level * g * np.sin(2 * math.pi * self.f_hz * k / self.fs_hz)).astype(
            np.float32)

    def request_stop(self, reason: str = "") -> None:
        if self._stop_at is None:
            self._stop_at = self._n

    @property
    def finished(self) -> bool:
        return self._stop_at is not None and self._n >= self._stop_at + self._ramp + self.block

    def report_underflow(self, count: int) -> None:
        self.underflows += int(count)


def calibrate_output(
    rig: Any,
    read_voltmeter: Callable[[float, float], float],
    *,
    f_hz: float = VOLTMETER_F_HZ,
    level_fs: float = 0.5,
) -> VoltsPerFs:
    """Play a steady sine on the drive output while ``read_voltmeter(f_hz, level_fs)`` returns
    the voltmeter's reading in V rms (the user reads an AC voltmeter on the output)."""
    src = ToneSource(rig.fs_hz, rig.block_size, f_hz, level_fs)
    rig.start(src)
    try:
        reading = read_voltmeter(f_hz, level_fs)
    finally:
        rig.request_stop("output calibration done")
        rig.wait()
    return output_v_per_fs(level_fs, reading, f_hz)


def calibrate_input(
    rig: Any,
    *,
    out_v_per_fs: float | None = None,
    known_v_rms: float | None = None,
    channel: str = "loopback",
    f_hz: float = VOLTMETER_F_HZ,
    level_fs: float = 0.5,
    duration_s: float = 1.0,
) -> VoltsPerFs:
    """Input scale, either through a cable from the output (``out_v_per_fs`` known) or from an
    external sine of ``known_v_rms`` at the input (the drive stays silent).

    ``channel`` is the input to fit: ``"loopback"`` (the rig's loopback input) or ``"control"``.
    The first and last 0.2 s of the recorded tone are left out (ramps, settling).
    """
    if (out_v_per_fs is None) == (known_v_rms is None):
        raise ConfigError("input calibration: give exactly one of out_v_per_fs or known_v_rms")
    n = int(round(duration_s * rig.fs_hz))
    level = level_fs if out_v_per_fs is not None else 0.0
    rec = rig.play_record(tone(rig.fs_hz, f_hz, level, n) if level else np.zeros(n, np.float32))
    y = rec.loopback_fs if channel == "loopback" else rec.response_fs
    if y is None:
        raise ConfigError("input calibration: channel = 'loopback' but the rig has no loopback")
    pad = int(round(0.1 * rig.fs_hz))  # play_record's leading silence
    edge = int(round(0.2 * rig.fs_hz))
    seg = y[pad + edge : pad + n - edge] if level else y[pad:]
    fit = sine_fit(seg, rig.fs_hz, f_hz)
    if out_v_per_fs is not None:
        v_rms = level_fs * out_v_per_fs / math.sqrt(2.0)
        return input_v_per_fs(fit, v_rms, method="loopback")
    return input_v_per_fs(fit, known_v_rms)


def measure_loop_delay(
    rig: Any,
    *,
    repeats: int = 5,
    burst_s: float = 0.1,
    gap_s: float = 0.2,
    level_fs: float = 0.1,
    channel: str = "control",
    seed: int = 0,
) -> LoopDelay:
    """Loop delay through the rig from ``repeats`` noise bursts (the gap bounds the delay)."""
    x, starts, n_b = burst_train(rig.fs_hz, repeats=repeats, burst_s=burst_s, gap_s=gap_s,
                                 level_fs=level_fs, seed=seed)
    rec = rig.play_record(x, pad_s=0.0, tail_s=gap_s)
    y = rec.loopback_fs if channel == "loopback" else rec.response_fs
    if y is None:
        raise ConfigError("loop delay: channel = 'loopback' but the rig has no loopback")
    max_delay = int(round(gap_s * rig.fs_hz)) - 1
    return estimate_loop_delay(rec.drive_fs, y, rig.fs_hz, starts=starts, burst_length=n_b,
                               max_delay=max_delay)


def measure_lowfreq_corner(
    rig: Any,
    *,
    delay_samples: int,
    duration_s: float = 6.0,
    level_fs: float = 0.1,
    nperseg: int = 65536,
    channel: str = "loopback",
    order: int | None = None,
    coherence_min: float = 0.99,
    seed: int = 0,
) -> HighpassFit:
    """The chain's low-frequency corner from H1 of white noise through a loopback, aligned by
    ``delay_samples`` (Welch, Hann, 50 % overlap via :class:`liveshape.dsp.spectra.CrossSpectrum`).

    Lines with coherence below ``coherence_min`` are left out: where the response falls
    steeply the Hann window's leakage from higher lines biases H1 up and lowers the coherence.
    """
    from liveshape.dsp.spectra import CrossSpectrum

    rng = np.random.default_rng(seed)
    n = int(round(duration_s * rig.fs_hz))
    x = np.clip(level_fs * rng.standard_normal(n), -4 * level_fs, 4 * level_fs)
    r = int(round(0.01 * rig.fs_hz))
    x[:r] *= 0.5 - 0.5 * np.cos(np.pi * np.arange(r) / r)  # no click at the start
    x[n - r :] *= 0.5 + 0.5 * np.cos(np.pi * np.arange(r) / r)
    x = x.astype(np.float32)
    rec = rig.play_record(x, pad_s=0.0, tail_s=delay_samples / rig.fs_hz + 0.1)
    y = rec.loopback_fs if channel == "loopback" else rec.response_fs
    if y is None:
        raise ConfigError("low-frequency corner: channel = 'loopback' but the rig has no loopback")
    cs = CrossSpectrum(rig.fs_hz, nperseg, delay_samples=delay_samples)
    m = min(rec.drive_fs.size, y.size)
    cs.push(rec.drive_fs[:m], y[:m])
    keep = cs.coherence >= coherence_min
    return fit_highpass(cs.f_hz[keep], cs.h1[keep], order=order)


def check_accelerometer(
    rig: Any,
    *,
    in_v_per_fs: float,
    datasheet_mv_per_g: float | None = None,
    duration_s: float = 2.0,
) -> AccelCheck:
    """Record the control channel (drive silent) while the sensor sits on the reference exciter."""
    rec = rig.play_record(np.zeros(int(round(duration_s * rig.fs_hz)), np.float32), pad_s=0.0,
                          tail_s=0.0)
    return accel_sensitivity(rec.response_fs, rig.fs_hz, in_v_per_fs=in_v_per_fs,
                             datasheet_mv_per_g=datasheet_mv_per_g)
