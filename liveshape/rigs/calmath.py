"""Chain calibration arithmetic: sine fits, volts per full scale, loop delay, corner, sensor.

Pure (numpy, scipy): arrays in, frozen results out. The procedures that play and record these
signals through a rig are in :mod:`liveshape.rigs.calibration`; the calibration file in
:mod:`liveshape.rigs.calfile`.

References: least-squares sine fits with three and four parameters, IEEE Std 1057 (digitizing
waveform recorders) and IEEE Std 1241 (ADC testing); comparison calibration of vibration
transducers, ISO 16063-21; H1 and its delay alignment, Bendat & Piersol, *Random Data*.

Plausibility limits (each a one-line :class:`ConfigError`, so a command writes no file):
volts per full scale within :data:`V_PER_FS_RANGE`; a sensor sensitivity within
:data:`SENSITIVITY_RANGE_MV_PER_G` and within :data:`DATASHEET_TOLERANCE_PCT` of the datasheet
value unless the user confirms the deviation; a recorded sine whose fit has an SNR of at least
:data:`MIN_SINE_SNR_DB` and a frequency within :data:`SINE_F_TOLERANCE` of the nominal one;
a loop delay whose spread over the bursts is at most :data:`MAX_DELAY_SPREAD_SAMPLES`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import optimize

from liveshape.dsp.profile import G0_M_S2
from liveshape.errors import ConfigError
from liveshape.schema import Where, as_float

#: The handheld reference exciter: omega = 1000 rad/s, 10 m/s² rms (10 mm/s, 10 µm rms).
REFERENCE_F_HZ = 1000.0 / (2.0 * math.pi)
REFERENCE_ACCEL_M_S2_RMS = 10.0
#: Tone for the voltmeter reading: well above AC-coupling corners, inside the flat band of
#: ordinary true-rms multimeters (about 40 Hz to 1 kHz; from memory).
VOLTMETER_F_HZ = 400.0

#: Volts per full scale a sound-card output or input can plausibly have: line outputs give
#: about 1-10 V peak at full scale, inputs with their gain span about 0.05-20 V (our bounds,
#: a decade beyond each end). A reading outside is a unit slip (mV typed as V) or no signal.
V_PER_FS_RANGE = (0.01, 100.0)
#: Accelerometer sensitivities (with conditioner) that exist: about 0.1 mV/g (shock sensors)
#: to 10 V/g (seismic sensors) [from memory; common practice].
SENSITIVITY_RANGE_MV_PER_G = (0.1, 10000.0)
#: Deviation from the datasheet sensitivity accepted without confirmation, percent. Datasheets
#: state sensitivity to about ±5-10 %, a reference exciter about ±3 % [from memory]; beyond
#: ±20 % the sensor, its conditioner gain or its cable is more likely wrong than the sheet.
DATASHEET_TOLERANCE_PCT = 20.0
#: Least SNR (SINAD) of a recorded calibration sine, dB. The fit's residual is everything that
#: is not the sine (noise, hum, distortion); at 20 dB it is 10 % of the sine's rms, far more
#: than a working calibration chain shows (> 40 dB), so less means the sine is not there or not
#: alone (our rule).
MIN_SINE_SNR_DB = 20.0
#: Largest relative distance of the fitted frequency from the nominal one: reference exciters
#: hold their frequency to about ±1 % [from memory], so 2 %.
SINE_F_TOLERANCE = 0.02
#: Largest spread (max - min) of the per-burst loop delays, samples: one stream's delay is
#: fixed to the sample, so a larger spread means the bursts were not found (our rule).
MAX_DELAY_SPREAD_SAMPLES = 3


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

    @property
    def snr_db(self) -> float:
        """Signal to noise-and-distortion ratio of the fit, dB: ``20 log10(rms / residual_rms)``.

        The residual of a least-squares sine fit is the record's noise and distortion; the
        ratio of the fitted sine's rms to it is the SINAD of IEEE Std 1241-2010 (ADC testing,
        the SINAD defined on the residual of the sine fit) and IEEE Std 1057-2017 (waveform
        recorders, the same fit) [section numbers not quoted: from memory]. ``inf`` for a
        noiseless record, ``-inf`` when the fitted amplitude is zero or not finite.
        """
        if not (math.isfinite(self.amplitude) and self.amplitude > 0):
            return -math.inf
        if self.residual_rms <= 0:
            return math.inf
        return 20.0 * math.log10(self.rms / self.residual_rms)


def require_sine(fit: SineFit, f_nominal_hz: float, where: str) -> SineFit:
    """Refuse a fit that says no sine of ``f_nominal_hz`` is in the record.

    ``where`` names the input (``"input 1"``). Raises a one-line :class:`ConfigError` when the
    fit's SNR is below :data:`MIN_SINE_SNR_DB` or its frequency is more than
    :data:`SINE_F_TOLERANCE` away from the nominal one.
    """
    snr = fit.snr_db
    f_ok = math.isfinite(fit.f_hz) and abs(fit.f_hz / f_nominal_hz - 1.0) <= SINE_F_TOLERANCE
    if snr >= MIN_SINE_SNR_DB and f_ok:
        return fit
    snr_text = f"{snr:.0f} dB" if math.isfinite(snr) else "none"
    why = (f"SNR {snr_text} (a calibration sine needs >= {MIN_SINE_SNR_DB:g} dB)"
           if snr < MIN_SINE_SNR_DB else
           f"the fit found {fit.f_hz:.5g} Hz, not within {100 * SINE_F_TOLERANCE:g} %")
    raise ConfigError(f"no {f_nominal_hz:.1f} Hz signal found on {where}: {why}")


def require_v_per_fs(v_per_fs: float, what: str) -> float:
    """Refuse a converter scale outside :data:`V_PER_FS_RANGE` (one line naming ``what``)."""
    lo, hi = V_PER_FS_RANGE
    if not (math.isfinite(v_per_fs) and lo <= v_per_fs <= hi):
        raise ConfigError(
            f"{what} = {v_per_fs:.4g} V/FS is outside {lo:g}-{hi:g} V/FS: no sound card has "
            "that scale (a reading in mV typed as V, a wrong level, or no signal?)")
    return v_per_fs


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
    v = require_v_per_fs(reading * math.sqrt(2.0) / level,
                         f"output calibration: {reading:g} V rms at {level:g} FS gives v_per_fs")
    return VoltsPerFs(v, float(f_hz), level, reading, "voltmeter")


def input_v_per_fs(
    fit: SineFit, known_v_rms: float, *, method: str = "known voltage"
) -> VoltsPerFs:
    """Input scale from a recorded sine whose true rms voltage at the input is ``known_v_rms``."""
    v = as_float(known_v_rms, Where("input calibration").key("known_v_rms"), gt=0.0)
    if fit.amplitude <= 0.0:
        raise ConfigError("input calibration: the recorded sine has zero amplitude")
    scale = require_v_per_fs(v * math.sqrt(2.0) / fit.amplitude,
                             f"input calibration: {v:g} V rms recorded as "
                             f"{fit.amplitude:.3g} FS peak gives v_per_fs")
    return VoltsPerFs(scale, fit.f_hz, fit.amplitude, v, method)


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
    records goes to :func:`liveshape.dsp.spectra.estimate_delay` (FFT cross-correlation, peak of
    ``|r|``). The median over bursts is the delay; ``spread_samples`` (max - min) shows whether
    the delay was stable.
    """
    from liveshape.dsp.spectra import estimate_delay

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


def require_steady_delay(delay: LoopDelay, where: str) -> LoopDelay:
    """Refuse a delay whose per-burst estimates spread more than
    :data:`MAX_DELAY_SPREAD_SAMPLES` (the bursts were not found on ``where``)."""
    if delay.spread_samples > MAX_DELAY_SPREAD_SAMPLES:
        raise ConfigError(
            f"loop delay on {where}: the bursts gave {min(delay.per_burst)}-"
            f"{max(delay.per_burst)} samples (spread {delay.spread_samples} > "
            f"{MAX_DELAY_SPREAD_SAMPLES}; correlation peak {delay.min_peak:.2f}): the bursts "
            "did not come back (cable, channel or level?)")
    return delay


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
    where: str = "the control input",
    accept_deviation: bool = False,
) -> AccelCheck:
    """Sensitivity in mV/g from the sine the sensor gives on the reference exciter.

    ``V_rms = fit.rms * in_v_per_fs``; ``a = accel_m_s2_rms / g0`` g rms (g0 = 9.80665 m/s²);
    ``S = 1000 V_rms / a`` mV/g; deviation from the datasheet value in percent.

    Refused (one-line :class:`ConfigError`): no sine at ``f_hz`` on ``where``
    (:func:`require_sine`); ``S`` outside :data:`SENSITIVITY_RANGE_MV_PER_G`; ``S`` more than
    :data:`DATASHEET_TOLERANCE_PCT` from the datasheet value unless ``accept_deviation``.
    """
    fit = require_sine(sine_fit(recorded_fs, fs_hz, f_hz), f_hz, where)
    a_g = accel_m_s2_rms / G0_M_S2
    sens = 1e3 * fit.rms * in_v_per_fs / a_g
    lo, hi = SENSITIVITY_RANGE_MV_PER_G
    if not lo <= sens <= hi:
        raise ConfigError(
            f"sensor sensitivity = {sens:.4g} mV/g on {where} is outside {lo:g}-{hi:g} mV/g: "
            "no accelerometer has it (exciter on, sensor on it, input scale right?)")
    dev = None if datasheet_mv_per_g is None else 100.0 * (sens / datasheet_mv_per_g - 1.0)
    if dev is not None and abs(dev) > DATASHEET_TOLERANCE_PCT and not accept_deviation:
        raise ConfigError(
            f"sensor sensitivity = {sens:.4g} mV/g is {dev:+.1f} % from the datasheet's "
            f"{datasheet_mv_per_g:g} mV/g (more than ±{DATASHEET_TOLERANCE_PCT:g} %): check "
            "the conditioner gain and the cable, or confirm with --accept-deviation")
    return AccelCheck(sens, datasheet_mv_per_g, dev, a_g, fit)
