"""Chain calibration: volts per full scale out and in, loop delay, low-frequency corner, sensor.

Two layers:

* pure computations (arrays in, frozen results out): :func:`sine_fit`,
  :func:`output_v_per_fs`, :func:`input_v_per_fs`, :func:`estimate_loop_delay`,
  :func:`fit_highpass`, :func:`accel_sensitivity`;
* procedures that drive a rig (anything with ``fs_hz``, ``block_size``, ``play_record``,
  ``start``, ``request_stop`` and ``wait``, i.e. :class:`liveshape.rigs.audio.AudioRig`):
  :func:`calibrate_output`, :func:`calibrate_input`, :func:`measure_loop_delay`,
  :func:`measure_lowfreq_corner`, :func:`check_accelerometer`.

The calibration file (schema in ``calibration/README.md``) is written with
:func:`write_calibration` and read with :func:`load_calibration` into a
:class:`liveshape.chain.ChainCalibration`; :func:`resolve_calibration` applies the rule that a run
refuses a missing or malformed file unless the user declared the run uncalibrated.

References: least-squares sine fits with three and four parameters, IEEE Std 1057 (digitizing
waveform recorders) and IEEE Std 1241 (ADC testing); comparison calibration of vibration
transducers, ISO 16063-21; H1 and its delay alignment, Bendat & Piersol, *Random Data*.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import optimize

from liveshape.chain import ChainCalibration
from liveshape.errors import ConfigError
from liveshape.profile import G0_M_S2
from liveshape.schema import Where, as_float, as_int, as_str, check_keys

#: The handheld reference exciter: omega = 1000 rad/s, 10 m/s² rms (10 mm/s, 10 µm rms).
REFERENCE_F_HZ = 1000.0 / (2.0 * math.pi)
REFERENCE_ACCEL_M_S2_RMS = 10.0
#: Tone for the voltmeter reading: well above AC-coupling corners, inside the flat band of
#: ordinary true-rms multimeters (about 40 Hz to 1 kHz; from memory).
VOLTMETER_F_HZ = 400.0
SCHEMA_VERSION = 1


# -- sine fit ---------------------------------------------------------------------------------
@dataclass(frozen=True)
class SineFit:
    """``x(n) ~ amplitude * cos(2 pi f_hz n / fs + phase_rad) + offset`` by least squares."""

    f_hz: float
    amplitude: float
    phase_rad: float
    offset: float
    residual_rms: float
    n_samples: int

    @property
    def rms(self) -> float:
        """Rms of the sine component, ``amplitude / sqrt(2)``."""
        return self.amplitude / math.sqrt(2.0)


def sine_fit(
    x: np.ndarray, fs_hz: float, f_hz: float, *, fit_frequency: bool = True, iterations: int = 20
) -> SineFit:
    """Least-squares sine fit (IEEE Std 1057 three-parameter, then four-parameter).

    The three-parameter fit solves ``A cos wt + B sin wt + C`` at the given frequency; with
    ``fit_frequency`` the four-parameter fit then refines ``w`` by Gauss–Newton (linearizing in
    ``dw``). No bin centring is needed (159.2 Hz is not a bin at 48 kHz). Time is centred on the
    record for conditioning; the phase is referred to the first sample.
    """
    y = np.asarray(x, dtype=float).ravel()
    n = y.size
    if n < 8:
        raise ValueError(f"sine_fit needs at least 8 samples, got {n}")
    t = (np.arange(n) - (n - 1) / 2.0) / fs_hz
    w = 2.0 * math.pi * float(f_hz)
    coef = np.zeros(3)
    for _ in range(max(1, iterations) if fit_frequency else 1):
        c, s = np.cos(w * t), np.sin(w * t)
        coef = np.linalg.lstsq(np.column_stack([c, s, np.ones(n)]), y, rcond=None)[0]
        if not fit_frequency:
            break
        a, b = coef[0], coef[1]
        d = np.column_stack([c, s, np.ones(n), t * (b * c - a * s)])
        sol = np.linalg.lstsq(d, y, rcond=None)[0]
        w += sol[3]
        if abs(sol[3]) <= 1e-12 * w:
            break
    c, s = np.cos(w * t), np.sin(w * t)
    coef = np.linalg.lstsq(np.column_stack([c, s, np.ones(n)]), y, rcond=None)[0]
    a, b, off = (float(v) for v in coef)
    resid = y - (a * c + b * s + off)
    phase_c = math.atan2(-b, a)
    phase0 = (phase_c - w * (n - 1) / 2.0 / fs_hz + math.pi) % (2 * math.pi) - math.pi
    return SineFit(
        f_hz=w / (2.0 * math.pi),
        amplitude=math.hypot(a, b),
        phase_rad=phase0,
        offset=off,
        residual_rms=float(np.sqrt(np.mean(resid**2))),
        n_samples=n,
    )


def tone(fs_hz: float, f_hz: float, level_fs: float, n: int, *, ramp_s: float = 0.05) -> np.ndarray:
    """A sine of amplitude ``level_fs`` with raised-cosine ramps of ``ramp_s`` at both ends."""
    k = np.arange(n)
    x = level_fs * np.sin(2.0 * math.pi * f_hz * k / fs_hz)
    r = min(n // 2, int(round(ramp_s * fs_hz)))
    if r:
        g = 0.5 - 0.5 * np.cos(np.pi * np.arange(r) / r)
        x[:r] *= g
        x[n - r :] *= g[::-1]
    return x.astype(np.float32)


# -- volts per full scale ---------------------------------------------------------------------
@dataclass(frozen=True)
class VoltsPerFs:
    """One converter scale: ``v_per_fs`` volts (instantaneous) per unit full scale."""

    v_per_fs: float
    f_hz: float
    level_fs: float
    v_rms: float
    method: str


def output_v_per_fs(
    level_fs: float, reading_v_rms: float, f_hz: float = VOLTMETER_F_HZ
) -> VoltsPerFs:
    """Output scale from a steady sine of amplitude ``level_fs`` read as ``reading_v_rms``.

    A sine of peak ``A`` FS is ``A * v_per_fs`` volts peak, ``A * v_per_fs / sqrt(2)`` rms.
    """
    where = Where("output calibration")
    level = as_float(level_fs, where.key("level_fs"), gt=0.0, le=1.0)
    reading = as_float(reading_v_rms, where.key("voltmeter reading (V rms)"), gt=0.0)
    return VoltsPerFs(reading * math.sqrt(2.0) / level, float(f_hz), level, reading, "voltmeter")


def input_v_per_fs(
    fit: SineFit, known_v_rms: float, *, method: str = "known voltage"
) -> VoltsPerFs:
    """Input scale from a recorded sine whose true rms voltage at the input is ``known_v_rms``."""
    v = as_float(known_v_rms, Where("input calibration").key("known_v_rms"), gt=0.0)
    if fit.amplitude <= 0.0:
        raise ConfigError("input calibration: the recorded sine has zero amplitude")
    return VoltsPerFs(v * math.sqrt(2.0) / fit.amplitude, fit.f_hz, fit.amplitude, v, method)


# -- loop delay -------------------------------------------------------------------------------
@dataclass(frozen=True)
class LoopDelay:
    """Round-trip delay from repeated noise bursts: median, spread and every estimate."""

    samples: int
    ms: float
    spread_samples: int
    per_burst: tuple[int, ...]
    min_peak: float


def burst_train(
    fs_hz: float,
    *,
    repeats: int = 5,
    burst_s: float = 0.1,
    gap_s: float = 0.2,
    level_fs: float = 0.1,
    seed: int = 0,
) -> tuple[np.ndarray, tuple[int, ...], int]:
    """Noise bursts (Gaussian, rms ``level_fs``, 2 ms raised-cosine edges) separated by silence.

    Returns ``(signal, starts, burst_length)``: burst ``k`` occupies
    ``signal[starts[k] : starts[k] + burst_length]``.
    """
    rng = np.random.default_rng(seed)
    n_b, n_g = int(round(burst_s * fs_hz)), int(round(gap_s * fs_hz))
    r = max(1, int(round(0.002 * fs_hz)))
    edge = 0.5 - 0.5 * np.cos(np.pi * np.arange(r) / r)
    out = np.zeros(repeats * (n_b + n_g) + n_g, np.float32)
    starts = []
    for k in range(repeats):
        b = np.clip(level_fs * rng.standard_normal(n_b), -4 * level_fs, 4 * level_fs)
        b[:r] *= edge
        b[n_b - r :] *= edge[::-1]
        s = n_g + k * (n_b + n_g)
        out[s : s + n_b] = b
        starts.append(s)
    return out, tuple(starts), n_b


def estimate_loop_delay(
    drive: np.ndarray,
    response: np.ndarray,
    fs_hz: float,
    *,
    starts: tuple[int, ...],
    burst_length: int,
    max_delay: int,
) -> LoopDelay:
    """Delay of ``response`` behind ``drive`` by cross-correlating each burst separately.

    For burst ``k`` the window ``[starts[k], starts[k] + burst_length + max_delay)`` of both
    records goes to :func:`liveshape.spectra.estimate_delay` (FFT cross-correlation, peak of
    ``|r|``). The median over bursts is the delay; ``spread_samples`` (max - min) shows whether
    the delay was stable.
    """
    from liveshape.spectra import estimate_delay

    x = np.asarray(drive, float).ravel()
    y = np.asarray(response, float).ravel()
    per, peaks = [], []
    for s in starts:
        e = s + burst_length + max_delay
        if e > min(x.size, y.size):
            raise ValueError(f"burst at {s} plus max_delay {max_delay} runs past the record")
        est = estimate_delay(x[s:e], y[s:e], max_lag=max_delay)
        per.append(int(est.samples))
        peaks.append(abs(float(est.peak)))
    med = int(np.median(per))
    return LoopDelay(med, 1e3 * med / fs_hz, int(max(per) - min(per)), tuple(per), min(peaks))


# -- low-frequency corner ---------------------------------------------------------------------
@dataclass(frozen=True)
class HighpassFit:
    """A fitted high-pass ``g (s/w0)^n / D(s/w0)``: order 1 ``D = 1 + s``; order 2
    ``D = 1 + s/Q + s²``. ``f_3db_hz`` is where the fitted magnitude is 3 dB below ``gain``."""

    order: int
    corner_hz: float
    q: float | None
    gain: float
    f_3db_hz: float
    rms_error_db: float
    n_lines: int


def highpass_response(f_hz: np.ndarray, corner_hz: float, order: int, q: float | None = None,
                      gain: float = 1.0) -> np.ndarray:
    """Complex response of the model of :class:`HighpassFit` at ``f_hz``."""
    s = 1j * np.asarray(f_hz, float) / corner_hz
    if order == 1:
        return gain * s / (1.0 + s)
    return gain * s**2 / (1.0 + s / q + s**2)


def _fit_order(f: np.ndarray, h: np.ndarray, w: np.ndarray, order: int, fc0: float):
    def resid(p: np.ndarray) -> np.ndarray:
        fc, g = math.exp(p[0]), math.exp(p[-1])
        q = math.exp(p[1]) if order == 2 else None
        r = h / highpass_response(f, fc, order, q, g)
        return np.concatenate([w * np.log(np.abs(r)), w * np.angle(r)])

    p0 = [math.log(fc0)] + ([math.log(0.6)] if order == 2 else []) + [0.0]
    sol = optimize.least_squares(resid, p0, xtol=1e-12, ftol=1e-12, gtol=1e-12)
    fc, g = math.exp(sol.x[0]), math.exp(sol.x[-1])
    q = math.exp(sol.x[1]) if order == 2 else None
    err_db = 20 / math.log(10) * float(np.sqrt(np.mean((sol.fun[: f.size] / w) ** 2)))
    return fc, q, g, err_db


def fit_highpass(
    f_hz: np.ndarray, h: np.ndarray, *, order: int | None = None, f_max_hz: float | None = None
) -> HighpassFit:
    """Fit a first- or second-order high-pass to a measured (loopback) FRF.

    Least squares on ``log(H / H_model)`` (log-magnitude and phase), each line weighted by
    ``1/sqrt(f)`` so every octave counts about equally on linearly spaced lines. Lines above
    ``f_max_hz`` (default 40 x the first guess of the corner) and at 0 Hz are not used. With
    ``order=None`` both orders are fitted and order 2 is kept when it halves the rms error
    (two stacked AC couplings look like one second-order section with Q < 0.5).
    """
    f = np.asarray(f_hz, float).ravel()
    hh = np.asarray(h, complex).ravel()
    ok = (f > 0) & np.isfinite(hh) & (np.abs(hh) > 0)
    f, hh = f[ok], hh[ok]
    if f.size < 6:
        raise ValueError("fit_highpass needs at least 6 lines with a finite, non-zero response")
    mag = np.abs(hh)
    top = float(np.median(mag[f >= np.quantile(f, 0.75)]))
    below = np.flatnonzero(mag < top / math.sqrt(2.0))
    fc0 = float(f[below[-1]]) if below.size else float(f[0])
    f_max = f_max_hz if f_max_hz is not None else 40.0 * max(fc0, f[1])
    use = f <= f_max
    f, hh = f[use], hh[use]
    w = 1.0 / np.sqrt(f)
    orders = (order,) if order is not None else (1, 2)
    fits = {k: _fit_order(f, hh, w, k, fc0) for k in orders}
    best = orders[0]
    if order is None and fits[2][3] < 0.5 * fits[1][3]:
        best = 2
    fc, q, g, err = fits[best]
    target = 1.0 / math.sqrt(2.0)

    def excess(logf: float) -> float:
        return abs(highpass_response(np.array([math.exp(logf)]), fc, best, q, 1.0)[0]) - target

    f3 = math.exp(optimize.brentq(excess, math.log(fc) - 5.0, math.log(fc) + 5.0))
    return HighpassFit(best, fc, q, g, f3, err, int(f.size))


# -- accelerometer ----------------------------------------------------------------------------
@dataclass(frozen=True)
class AccelCheck:
    """Accelerometer sensitivity measured on the handheld reference exciter."""

    sensitivity_mv_per_g: float
    datasheet_mv_per_g: float | None
    deviation_pct: float | None
    reference_g_rms: float
    fit: SineFit


def accel_sensitivity(
    recorded_fs: np.ndarray,
    fs_hz: float,
    *,
    in_v_per_fs: float,
    datasheet_mv_per_g: float | None = None,
    f_hz: float = REFERENCE_F_HZ,
    accel_m_s2_rms: float = REFERENCE_ACCEL_M_S2_RMS,
) -> AccelCheck:
    """Sensitivity in mV/g from the sine the sensor gives on the reference exciter.

    ``V_rms = fit.rms * in_v_per_fs``; ``a = accel_m_s2_rms / g0`` g rms (g0 = 9.80665 m/s²);
    ``S = 1000 V_rms / a`` mV/g; deviation from the datasheet value in percent.
    """
    fit = sine_fit(recorded_fs, fs_hz, f_hz)
    a_g = accel_m_s2_rms / G0_M_S2
    sens = 1e3 * fit.rms * in_v_per_fs / a_g
    dev = None if datasheet_mv_per_g is None else 100.0 * (sens / datasheet_mv_per_g - 1.0)
    return AccelCheck(sens, datasheet_mv_per_g, dev, a_g, fit)


# -- procedures that drive a rig --------------------------------------------------------------
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
    ``delay_samples`` (Welch, Hann, 50 % overlap via :class:`liveshape.spectra.CrossSpectrum`).

    Lines with coherence below ``coherence_min`` are left out: where the response falls
    steeply the Hann window's leakage from higher lines biases H1 up and lowers the coherence.
    """
    from liveshape.spectra import CrossSpectrum

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


# -- the calibration file ---------------------------------------------------------------------
_TOP = ("liveshape_calibration", "device", "fs_hz", "date", "output", "input",
        "accelerometer", "loop_delay", "lowfreq_corner", "notes")


def calibration_mapping(
    cal: ChainCalibration,
    *,
    device: str | None = None,
    fs_hz: float | None = None,
    date: str | None = None,
    datasheet_mv_per_g: float | None = None,
    loop_delay: LoopDelay | None = None,
    corner: HighpassFit | None = None,
    notes: str | None = None,
) -> dict[str, Any]:
    """Plain data for the calibration file (see ``calibration/README.md``)."""
    d: dict[str, Any] = {"liveshape_calibration": SCHEMA_VERSION}
    if device:
        d["device"] = device
    if fs_hz:
        d["fs_hz"] = float(fs_hz)
    if date:
        d["date"] = date
    d["output"] = {"v_per_fs": float(cal.out_v_per_fs)}
    d["input"] = {"v_per_fs": float(cal.in_v_per_fs)}
    acc: dict[str, Any] = {"mv_per_g": float(cal.accel_mv_per_g)}
    if datasheet_mv_per_g is not None:
        acc["datasheet_mv_per_g"] = float(datasheet_mv_per_g)
    d["accelerometer"] = acc
    ld: dict[str, Any] = {"samples": cal.loop_delay_samples}
    if loop_delay is not None:
        ld["spread_samples"] = loop_delay.spread_samples
    d["loop_delay"] = ld
    if corner is not None:
        d["lowfreq_corner"] = {"order": corner.order, "corner_hz": round(corner.corner_hz, 4),
                               "q": None if corner.q is None else round(corner.q, 4),
                               "f_3db_hz": round(corner.f_3db_hz, 4)}
    if notes:
        d["notes"] = notes
    return d


def write_calibration(path: Any, cal: ChainCalibration, **info: Any) -> None:
    """Write ``cal`` (plus the optional facts of :func:`calibration_mapping`) as YAML."""
    from liveshape.config import write_yaml_file

    write_yaml_file(path, calibration_mapping(cal, **info))


def calibration_from_mapping(data: Any, where: Where) -> ChainCalibration:
    """Strictly read the calibration mapping (unknown keys and bad values are one-line errors)."""
    d = check_keys(data, _TOP, where, required=("liveshape_calibration", "output", "input",
                                                 "accelerometer"))
    as_int(d["liveshape_calibration"], where.key("liveshape_calibration"), ge=SCHEMA_VERSION,
           le=SCHEMA_VERSION)
    for key in ("device", "date", "notes"):
        if d.get(key) is not None:
            as_str(d[key], where.key(key))
    if d.get("fs_hz") is not None:
        as_float(d["fs_hz"], where.key("fs_hz"), gt=0.0)
    wo, wi, wa = where.key("output"), where.key("input"), where.key("accelerometer")
    out = check_keys(d["output"], ("v_per_fs", "method"), wo, required=("v_per_fs",))
    inp = check_keys(d["input"], ("v_per_fs", "method"), wi, required=("v_per_fs",))
    acc = check_keys(d["accelerometer"], ("mv_per_g", "datasheet_mv_per_g"), wa,
                     required=("mv_per_g",))
    if acc.get("datasheet_mv_per_g") is not None:
        as_float(acc["datasheet_mv_per_g"], wa.key("datasheet_mv_per_g"), gt=0.0)
    delay = None
    if d.get("loop_delay") is not None:
        wl = where.key("loop_delay")
        ld = check_keys(d["loop_delay"], ("samples", "spread_samples"), wl)
        if ld.get("samples") is not None:
            delay = as_int(ld["samples"], wl.key("samples"), ge=0)
        if ld.get("spread_samples") is not None:
            as_int(ld["spread_samples"], wl.key("spread_samples"), ge=0)
    if d.get("lowfreq_corner") is not None:
        wc = where.key("lowfreq_corner")
        lc = check_keys(d["lowfreq_corner"], ("order", "corner_hz", "q", "f_3db_hz"), wc)
        for key in ("corner_hz", "q", "f_3db_hz"):
            if lc.get(key) is not None:
                as_float(lc[key], wc.key(key), gt=0.0)
    return ChainCalibration(
        out_v_per_fs=as_float(out["v_per_fs"], wo.key("v_per_fs"), gt=0.0),
        in_v_per_fs=as_float(inp["v_per_fs"], wi.key("v_per_fs"), gt=0.0),
        accel_mv_per_g=as_float(acc["mv_per_g"], wa.key("mv_per_g"), gt=0.0),
        loop_delay_samples=delay,
        calibrated=True,
        source=where.source,
    )


def load_calibration(path: Any) -> ChainCalibration:
    """Read a calibration file; every problem is a one-line :class:`ConfigError`."""
    from liveshape.config import read_yaml_file

    return calibration_from_mapping(read_yaml_file(path), Where(str(path)))


#: What an uncalibrated run uses: 1 V per FS both ways and 1000 mV/g, so 1 g reads as 1 FS.
UNCALIBRATED = ChainCalibration(out_v_per_fs=1.0, in_v_per_fs=1.0, accel_mv_per_g=1000.0,
                                loop_delay_samples=None, calibrated=False, source="uncalibrated")


def resolve_calibration(path: Any, uncalibrated: bool) -> ChainCalibration:
    """The calibration an audio run uses.

    ``uncalibrated=True`` (the user's explicit declaration) gives :data:`UNCALIBRATED` whatever
    ``path`` is; otherwise ``path`` must name a readable, well-formed calibration file.

    Raises
    ------
    ConfigError
        No path, or a missing or malformed file, without the uncalibrated declaration.
    """
    if uncalibrated:
        return UNCALIBRATED
    if path is None or (isinstance(path, str) and not path.strip()):
        raise ConfigError(
            "rig.calibration: missing; an audio run needs a calibration file "
            "(see calibration/README.md) or rig.uncalibrated: true to run with levels in full "
            "scale (1 g reads as 1 FS)"
        )
    try:
        return load_calibration(path)
    except ConfigError as exc:
        raise ConfigError(f"{exc} (rig.calibration; or set rig.uncalibrated: true)") from None
