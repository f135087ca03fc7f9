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
from dataclasses import dataclass
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
    DATASHEET_TOLERANCE_PCT,
    MAX_DELAY_SPREAD_SAMPLES,
    MIN_SINE_SNR_DB,
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
    require_sine,
    require_steady_delay,
    require_v_per_fs,
    sine_fit,
    tone,
)

__all__ = [
    "DATASHEET_TOLERANCE_PCT", "MAX_DELAY_SPREAD_SAMPLES", "MIN_SINE_SNR_DB", "StepNotice",
    "describe_step", "require_sine", "require_steady_delay", "require_v_per_fs",
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
    where: str = "the input",
) -> VoltsPerFs:
    """Input scale, either through a cable from the output (``out_v_per_fs`` known) or from an
    external sine of ``known_v_rms`` at the input (the drive stays silent).

    ``channel`` is the input to fit: ``"loopback"`` (the rig's loopback input) or ``"control"``.
    The first and last 0.2 s of the recorded tone are left out (ramps, settling). A record
    without the sine (:func:`require_sine`, ``where`` names the input) or a scale outside
    :data:`~liveshape.rigs.calmath.V_PER_FS_RANGE` is a one-line :class:`ConfigError`.
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
    fit = require_sine(sine_fit(seg, rig.fs_hz, f_hz), f_hz, where)
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
    where: str = "the input",
) -> LoopDelay:
    """Loop delay through the rig from ``repeats`` noise bursts (the gap bounds the delay).

    A spread of the per-burst delays above
    :data:`~liveshape.rigs.calmath.MAX_DELAY_SPREAD_SAMPLES` is a one-line
    :class:`ConfigError` naming ``where`` (:func:`require_steady_delay`)."""
    x, starts, n_b = burst_train(rig.fs_hz, repeats=repeats, burst_s=burst_s, gap_s=gap_s,
                                 level_fs=level_fs, seed=seed)
    rec = rig.play_record(x, pad_s=0.0, tail_s=gap_s)
    y = rec.loopback_fs if channel == "loopback" else rec.response_fs
    if y is None:
        raise ConfigError("loop delay: channel = 'loopback' but the rig has no loopback")
    max_delay = int(round(gap_s * rig.fs_hz)) - 1
    return require_steady_delay(
        estimate_loop_delay(rec.drive_fs, y, rig.fs_hz, starts=starts, burst_length=n_b,
                            max_delay=max_delay), where)


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
    where: str = "the control input",
    accept_deviation: bool = False,
) -> AccelCheck:
    """Record the control channel (drive silent) while the sensor sits on the reference exciter.

    The plausibility limits of :func:`~liveshape.rigs.calmath.accel_sensitivity` apply."""
    rec = rig.play_record(np.zeros(int(round(duration_s * rig.fs_hz)), np.float32), pad_s=0.0,
                          tail_s=0.0)
    return accel_sensitivity(rec.response_fs, rig.fs_hz, in_v_per_fs=in_v_per_fs,
                             datasheet_mv_per_g=datasheet_mv_per_g, where=where,
                             accept_deviation=accept_deviation)


# -- what each step plays, and what to do before ----------------------------------------------
@dataclass(frozen=True)
class StepNotice:
    """What a calibration step will do, in words, shown before anything plays.

    ``plays`` is None when the step plays nothing (it only records); ``before`` is what to
    connect and disconnect first; ``records`` what is recorded, and ``writes`` what the step
    writes into the calibration file.
    """

    step: str
    plays: str | None
    before: str
    records: str
    writes: str

    def lines(self) -> list[str]:
        """The notice as the lines the command prints."""
        out = [f"calibrate {self.step}:"]
        out.append(f"  plays:   {self.plays}" if self.plays else "  plays:   nothing")
        out += [f"  first:   {self.before}", f"  records: {self.records}",
                f"  writes:  {self.writes}"]
        return out


def _peak_text(level_fs: float, out_v_per_fs: float | None) -> str:
    db = 20.0 * math.log10(level_fs)
    volts = "" if out_v_per_fs is None else f", about {level_fs * out_v_per_fs:.3g} V peak"
    return f"{level_fs:g} FS peak ({db:+.1f} dBFS{volts})"


def describe_step(
    step: str,
    *,
    device: str,
    level_fs: float = 0.5,
    loopback: tuple[int, int] | None = None,
    out_v_per_fs: float | None = None,
    known_v_rms: float | None = None,
    repeats: int = 5,
    datasheet_mv_per_g: float | None = None,
    sensor_input: int = 1,
) -> StepNotice:
    """The :class:`StepNotice` of one ``liveshape calibrate`` step (``sensor_input``: the input
    the sensor step reads, counted from 1).

    Channels are numbered from 1 as printed on interfaces: output 1 carries the drive, input 1
    the control accelerometer; ``loopback = (out, in)`` is a cable from output ``out`` to input
    ``in`` (``(1, 1)``: the drive output straight into the control input). ``out_v_per_fs``,
    when known, turns the level into volts.
    """
    amp_off = "amplifier input unplugged from output 1 (or the amplifier off)"
    outs = "output 1" if loopback is None or loopback[0] == 1 else f"outputs 1 and {loopback[0]}"
    cable = ("" if loopback is None else
             f"; a cable from output {loopback[0]} to input {loopback[1]}"
             + ("" if loopback[1] != 1 else " (the conditioner unplugged from input 1)"))
    rec_in = 1 if loopback is None else loopback[1]
    if step == "output":
        return StepNotice(
            step, f"a steady {VOLTMETER_F_HZ:g} Hz sine, {_peak_text(level_fs, None)}, on "
            f"output 1 of {device} until you type the voltmeter reading",
            f"{amp_off}; a true-rms AC voltmeter across output 1",
            "your voltmeter reading (V rms)", "output.v_per_fs, output.channel: 1")
    if step == "input" and known_v_rms is not None:
        return StepNotice(
            step, None, f"a signal generator on input 1 of {device}: a {VOLTMETER_F_HZ:g} Hz "
            f"sine (within 2 %) of {known_v_rms:g} V rms (read on your voltmeter)",
            "1 s on input 1", "input.v_per_fs, input.channel: 1")
    if step == "input":
        return StepNotice(
            step, f"a {VOLTMETER_F_HZ:g} Hz sine, {_peak_text(level_fs, out_v_per_fs)}, for "
            f"1 s on {outs} of {device}", amp_off + cable, f"1 s on input {rec_in}",
            f"input.v_per_fs, input.channel: {rec_in}")
    if step == "delay":
        bursts = (f"{repeats} noise bursts of 0.1 s, 0.1 FS rms (peaks up to 0.4 FS), "
                  f"0.2 s apart, on {outs} of {device}")
        if loopback is None:
            return StepNotice(
                step, bursts + " through the amplifier to the shaker",
                "amplifier gain low (the bursts drive the shaker); the accelerometer on the "
                "shaker, its conditioner on input 1",
                f"{0.3 * repeats + 0.2:.1f} s on input 1",
                "loop_delay.samples, loop_delay.spread_samples")
        return StepNotice(step, bursts, amp_off + cable,
                          f"{0.3 * repeats + 0.2:.1f} s on input {rec_in}",
                          "loop_delay.samples, loop_delay.spread_samples")
    if step == "corner":
        return StepNotice(
            step, f"white noise, 0.1 FS rms (peaks up to 0.4 FS), for 6 s on {outs} of {device}",
            amp_off + cable, f"6 s on input {rec_in}",
            "lowfreq_corner (order, corner_hz, q, f_3db_hz)")
    if step == "sensor":
        sheet = ("" if datasheet_mv_per_g is None else
                 f"; compared with the datasheet's {datasheet_mv_per_g:g} mV/g")
        return StepNotice(
            step, None, f"the accelerometer on the reference exciter ({REFERENCE_F_HZ:.1f} Hz, "
            f"{REFERENCE_ACCEL_M_S2_RMS:g} m/s² rms), the exciter on, the conditioner on input "
            f"{sensor_input} of {device}; nothing plays on the outputs",
            f"2 s on input {sensor_input}" + sheet,
            "accelerometer.mv_per_g" if sensor_input == 1 else
            f"inputs: channel {sensor_input}, v_per_fs, mv_per_g")
    raise ValueError(f"unknown calibration step {step!r}")
