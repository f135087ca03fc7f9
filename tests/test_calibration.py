"""Chain calibration: sine fit, volts per FS, loop delay, LF corner, sensor, the file (no JACK).

Outside references: the Cramér–Rao bounds of sinusoid parameter estimation (S. M. Kay,
Fundamentals of Statistical Signal Processing: Estimation Theory, 1993, example 3.14 — from
memory: var(A) >= 2 sigma²/N, var(w) >= 12 sigma² / (A² N³) rad²/sample²); analog filter responses
from scipy.signal.butter/freqs; the -3 dB point of two stacked first-order high-passes from the
closed-form root of |H|² = 1/2; g0 = 9.80665 m/s² (CGPM 1901).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import signal

from liveshape.errors import ConfigError
from liveshape.rigs import calibration as cal
from liveshape.rigs.jackrig import CableModel
from liveshape.rigs.plant import load_plant
from liveshape.rigs.ring import Recording
from liveshape.rigs.sim import SimRig
from liveshape.testdef.chain import ChainCalibration

FS = 48000.0


def noisy_sine(n, f_hz, amp, phase, offset, sigma, seed):
    rng = np.random.default_rng(seed)
    k = np.arange(n)
    return amp * np.cos(2 * np.pi * f_hz * k / FS + phase) + offset + sigma * rng.standard_normal(n)


# -- sine fit ---------------------------------------------------------------------------------


def test_sine_fit_at_the_reference_frequency_meets_the_cramer_rao_bound() -> None:
    n, amp, sigma = 48000, 0.3, 0.01
    x = noisy_sine(n, cal.REFERENCE_F_HZ, amp, 0.7, 0.01, sigma, seed=1)
    fit = cal.sine_fit(x, FS, 159.2)  # nominal frequency as printed on an exciter
    sd_amp = sigma * math.sqrt(2.0 / n)  # Kay ex. 3.14 (from memory): var(A) >= 2 sigma^2 / N
    sd_f = FS / (2 * np.pi) * math.sqrt(12 * sigma**2 / (amp**2 * n**3))  # same example
    assert abs(fit.amplitude - amp) < 5 * sd_amp  # 5 sigma: P(false fail) < 6e-7
    assert abs(fit.f_hz - cal.REFERENCE_F_HZ) < 5 * sd_f
    assert abs(fit.offset - 0.01) < 5 * sigma / math.sqrt(n)
    assert abs(fit.phase_rad - 0.7) < 5 * sd_amp / amp * math.sqrt(2) * 2  # phase sd ~ sd_A/A
    assert fit.residual_rms == pytest.approx(sigma, rel=0.02)  # chi2, 48000 dof: sd 0.3 %


def test_three_parameter_fit_is_biased_off_frequency_four_parameter_is_not() -> None:
    """A 0.3 Hz error over 1 s loses ~15 % (amplitude ~ sinc(df T)); 4 parameters fix it."""
    x = noisy_sine(48000, 158.9, 0.25, 0.0, 0.0, 0.0, seed=0)
    fixed = cal.sine_fit(x, FS, 159.2, fit_frequency=False)
    assert fixed.amplitude < 0.25 * 0.95
    free = cal.sine_fit(x, FS, 159.2)
    assert free.amplitude == pytest.approx(0.25, rel=1e-9)
    assert free.f_hz == pytest.approx(158.9, rel=1e-9)


def test_accelerometer_sensitivity_on_the_reference_exciter() -> None:
    """10 m/s² rms is 10/9.80665 = 1.01972 g rms (g0 by definition); S = V_rms / a."""
    s_true, in_v_per_fs, sigma = 98.7, 1.5, 2e-4
    v_rms = s_true * 1e-3 * 10.0 / 9.80665
    amp_fs = v_rms * math.sqrt(2) / in_v_per_fs
    x = noisy_sine(96000, cal.REFERENCE_F_HZ, amp_fs, 1.1, 0.0, sigma, seed=4)
    chk = cal.accel_sensitivity(x, FS, in_v_per_fs=in_v_per_fs, datasheet_mv_per_g=100.0)
    assert chk.reference_g_rms == pytest.approx(1.019716, abs=1e-6)
    tol = 5 * sigma * math.sqrt(2 / 96000) / amp_fs  # relative, from the amplitude CRB
    assert chk.sensitivity_mv_per_g == pytest.approx(s_true, rel=tol)
    assert chk.deviation_pct == pytest.approx(-1.3, abs=100 * tol)


# -- volts per full scale ---------------------------------------------------------------------


def test_output_scale_from_the_voltmeter_reading() -> None:
    r = cal.output_v_per_fs(0.5, 1.0)  # 0.5 FS peak reading 1.0 V rms -> 1.414 V peak
    assert r.v_per_fs == pytest.approx(2 * math.sqrt(2))
    with pytest.raises(ConfigError, match=r"voltmeter reading \(V rms\) = -1.0 must be > 0"):
        cal.output_v_per_fs(0.5, -1.0)
    with pytest.raises(ConfigError, match="level_fs"):
        cal.output_v_per_fs(1.5, 1.0)


def test_input_scale_from_a_known_voltage() -> None:
    x = noisy_sine(24000, 400.0, 0.4, 0.2, 0.0, 0.0, seed=0)  # 0.4 FS peak for 1.0 V rms
    r = cal.input_v_per_fs(cal.sine_fit(x, FS, 400.0), 1.0)
    assert r.v_per_fs == pytest.approx(math.sqrt(2) / 0.4, rel=1e-9)


# -- loop delay -------------------------------------------------------------------------------


@pytest.mark.parametrize("delay", [0, 1, 1234, 9000])
def test_loop_delay_from_repeated_bursts_through_an_ac_coupled_chain(delay: int) -> None:
    x, starts, n_b = cal.burst_train(FS, repeats=5, seed=3)
    sos = signal.butter(1, 5.0, "highpass", fs=FS, output="sos")
    rng = np.random.default_rng(9)
    y = 0.7 * signal.sosfilt(sos, np.concatenate([np.zeros(delay), x])[: x.size])
    y += 1e-4 * rng.standard_normal(y.size)
    est = cal.estimate_loop_delay(x, y, FS, starts=starts, burst_length=n_b, max_delay=9600)
    assert est.per_burst == (delay,) * 5 and est.spread_samples == 0
    assert est.ms == pytest.approx(1e3 * delay / FS)
    # independent check: the peak of scipy's full cross-correlation of the whole record
    c = signal.correlate(y, x, mode="full", method="fft")
    lags = signal.correlation_lags(y.size, x.size, mode="full")
    assert lags[np.argmax(np.abs(c))] == delay


# -- low-frequency corner ---------------------------------------------------------------------

LINES = np.arange(1, 2000) * FS / 65536


def analog_h(b, a) -> np.ndarray:
    return signal.freqs(b, a, worN=2 * np.pi * LINES)[1]


def test_first_order_corner_matches_scipy_butter() -> None:
    fit = cal.fit_highpass(LINES, 0.8 * analog_h(*signal.butter(1, 2 * np.pi * 8.0, "highpass",
                                                                analog=True)))
    assert fit.order == 1
    assert fit.corner_hz == pytest.approx(8.0, rel=1e-6)  # exact data: optimizer tolerance
    assert fit.f_3db_hz == pytest.approx(8.0, rel=1e-6)  # first order: -3 dB at the corner
    assert fit.gain == pytest.approx(0.8, rel=1e-6)


def test_second_order_butterworth_corner_and_q() -> None:
    fit = cal.fit_highpass(LINES, analog_h(*signal.butter(2, 2 * np.pi * 12.0, "highpass",
                                                          analog=True)))
    assert fit.order == 2
    assert fit.corner_hz == pytest.approx(12.0, rel=1e-6)
    assert fit.q == pytest.approx(1 / math.sqrt(2), rel=1e-6)  # Butterworth Q
    assert fit.f_3db_hz == pytest.approx(12.0, rel=1e-6)  # Butterworth: -3 dB at the corner


def test_two_stacked_ac_couplings_are_found_as_one_second_order_section() -> None:
    a, b = 7.0, 5.0
    h = analog_h(*signal.butter(1, 2 * np.pi * a, "highpass", analog=True)) * analog_h(
        *signal.butter(1, 2 * np.pi * b, "highpass", analog=True))
    fit = cal.fit_highpass(LINES, h)
    assert fit.order == 2
    assert fit.corner_hz == pytest.approx(math.sqrt(a * b), rel=1e-6)  # w0² = wa wb
    assert fit.q == pytest.approx(math.sqrt(a * b) / (a + b), rel=1e-6)  # Q = sqrt(wa wb)/(wa+wb)
    u = ((a * a + b * b) + math.sqrt((a * a + b * b) ** 2 + 4 * a * a * b * b)) / 2
    assert fit.f_3db_hz == pytest.approx(math.sqrt(u), rel=1e-6)  # root of |H|^2 = 1/2


# -- procedures against an offline rig --------------------------------------------------------


class OfflineRig:
    """The rig protocol of the procedures, run offline: SimRig on the control channel and the
    card's loopback cable (jackrig.CableModel) on the loopback channel."""

    block_size = 1024

    def __init__(self, plant) -> None:
        self.plant = load_plant(plant)
        self.fs_hz = FS
        self.sim = SimRig(self.plant, FS, seed=1)
        self.cable = CableModel(self.plant.card, FS, seed=2)
        self.played: list[np.ndarray] = []

    def play_record(self, x, *, pad_s=0.1, tail_s=0.25):
        pad = np.zeros(int(round(pad_s * FS)))
        d = np.concatenate([pad, np.asarray(x, float), np.zeros(int(tail_s * FS))])
        return Recording(FS, d.astype(np.float32), self.sim.process(d).astype(np.float32),
                         self.cable.process(d).astype(np.float32), None)

    def start(self, source) -> None:
        self.source = source
        self.played = [source.exchange(np.zeros(self.block_size)) for _ in range(60)]

    def request_stop(self, reason) -> None:
        self.source.request_stop(reason)

    def wait(self) -> None:
        while not self.source.finished:
            self.played.append(self.source.exchange(np.zeros(self.block_size)))


def test_output_procedure_plays_a_steady_tone_while_the_meter_is_read() -> None:
    rig = OfflineRig("bench")
    true_v = rig.plant.card.out_v_per_fs

    def meter(f_hz, level_fs):
        steady = np.concatenate(rig.played)[int(0.5 * FS) :]  # after the 0.2 s ramp
        return float(np.sqrt(np.mean(steady.astype(float) ** 2))) * true_v

    r = cal.calibrate_output(rig, meter, level_fs=0.5)
    # the rms of whole and part periods of a 400 Hz tone: error < 1 / (samples per period ...)
    assert r.v_per_fs == pytest.approx(true_v, rel=1e-3)
    tail = np.concatenate(rig.played)[-rig.block_size :]
    assert np.all(tail == 0.0)  # ramped down and finished


def test_input_procedure_through_the_loopback_cable() -> None:
    rig = OfflineRig("bench")
    r = cal.calibrate_input(rig, out_v_per_fs=rig.plant.card.out_v_per_fs)
    # 400 Hz through the card's 3 Hz and 2 Hz first-order corners loses
    # 1 - 1/sqrt((1+(3/400)^2)(1+(2/400)^2)) = 4.1e-5 of the amplitude
    assert r.v_per_fs == pytest.approx(rig.plant.card.in_v_per_fs, rel=1e-4)


def test_loop_delay_procedure_finds_the_card_delay() -> None:
    for plant in ("ideal", "bench"):
        rig = OfflineRig(plant)
        d = cal.measure_loop_delay(rig, channel="loopback")
        assert d.samples == rig.plant.card.delay_samples and d.spread_samples == 0


def test_lowfreq_corner_procedure_through_the_loudspeaker_card() -> None:
    rig = OfflineRig("loudspeaker")  # card corners 7 Hz (out) and 5 Hz (in), first order
    fit = cal.measure_lowfreq_corner(rig, delay_samples=rig.plant.card.delay_samples)
    a, b = 7.0, 5.0
    assert fit.order == 2
    # the random error of H1 at coherence > 0.99 over 8 segments is < 0.5 % per line and
    # averages out over ~400 lines; what is left is the Hann window's leakage bias at the
    # lowest kept lines (about +2.7 % in |H| at 5.9 Hz, falling as (df/f)^2), which moves the
    # fitted corner by well under 1 % (estimate)
    assert fit.corner_hz == pytest.approx(math.sqrt(a * b), rel=0.01)
    assert fit.q == pytest.approx(math.sqrt(a * b) / (a + b), rel=0.01)


# -- the file ---------------------------------------------------------------------------------


def test_calibration_file_round_trip(tmp_path) -> None:
    c = ChainCalibration(out_v_per_fs=2.5, in_v_per_fs=4.0, accel_mv_per_g=98.7,
                         loop_delay_samples=1536)
    p = tmp_path / "rig.yaml"
    cal.write_calibration(p, c, device="Scarlett", fs_hz=48000, datasheet_mv_per_g=100.0)
    got = cal.load_calibration(p)
    assert (got.out_v_per_fs, got.in_v_per_fs, got.accel_mv_per_g, got.loop_delay_samples) == (
        2.5, 4.0, 98.7, 1536)
    assert got.calibrated and got.source == str(p)


def test_the_example_file_in_the_repository_loads() -> None:
    from pathlib import Path

    p = Path(__file__).resolve().parents[1] / "calibration" / "example-calibration.yaml"
    got = cal.load_calibration(p)
    assert got.calibrated and got.out_v_per_fs > 0 and got.accel_mv_per_g > 0


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("liveshape_calibration: 1\noutput: {v_per_fs: 1}\ninput: {v_per_fs: 1}\n"
         "accelerometer: {mv_per_gg: 100}\n", "accelerometer.mv_per_gg: unknown key"),
        ("liveshape_calibration: 1\noutput: {v_per_fs: 1}\ninput: {v_per_fs: 1}\n",
         "accelerometer: required key is missing"),
        ("liveshape_calibration: 2\noutput: {v_per_fs: 1}\ninput: {v_per_fs: 1}\n"
         "accelerometer: {mv_per_g: 100}\n", "liveshape_calibration = 2 must be <= 1"),
        ("liveshape_calibration: 1\noutput: {v_per_fs: -1}\ninput: {v_per_fs: 1}\n"
         "accelerometer: {mv_per_g: 100}\n", "output.v_per_fs = -1 must be > 0"),
        ("output: [1, 2\n", "malformed YAML"),
    ],
)
def test_malformed_files_are_one_line_errors(tmp_path, text: str, message: str) -> None:
    p = tmp_path / "bad.yaml"
    p.write_text(text, encoding="utf-8")
    with pytest.raises(ConfigError) as err:
        cal.load_calibration(p)
    assert message in str(err.value) and "\n" not in str(err.value)
    assert str(p) in str(err.value)


def test_resolve_refuses_missing_or_malformed_unless_declared_uncalibrated(tmp_path) -> None:
    with pytest.raises(ConfigError, match="rig.calibration: missing.*rig.uncalibrated: true"):
        cal.resolve_calibration(None, False)
    with pytest.raises(ConfigError, match="file not found.*rig.uncalibrated"):
        cal.resolve_calibration(tmp_path / "nope.yaml", False)
    bad = tmp_path / "bad.yaml"
    bad.write_text("output: 3\n", encoding="utf-8")
    with pytest.raises(ConfigError):
        cal.resolve_calibration(bad, False)
    for path in (None, bad):
        u = cal.resolve_calibration(path, True)
        assert not u.calibrated and u.g_per_fs == 1.0 and u.source == "uncalibrated"


def test_moved_names_are_reexported():
    # the arithmetic lives in rigs.calmath, the file in rigs.calfile; rigs.calibration keeps
    # every name importable as before the split
    from liveshape.rigs import calfile, calmath

    for name in ("sine_fit", "tone", "output_v_per_fs", "input_v_per_fs", "burst_train",
                 "estimate_loop_delay", "fit_highpass", "highpass_response", "accel_sensitivity",
                 "SineFit", "VoltsPerFs", "LoopDelay", "HighpassFit", "AccelCheck",
                 "REFERENCE_F_HZ", "REFERENCE_ACCEL_M_S2_RMS", "VOLTMETER_F_HZ"):
        assert getattr(cal, name) is getattr(calmath, name)
    for name in ("SCHEMA_VERSION", "UNCALIBRATED", "calibration_mapping", "write_calibration",
                 "calibration_from_mapping", "load_calibration", "resolve_calibration"):
        assert getattr(cal, name) is getattr(calfile, name)


# -- plausibility ------------------------------------------------------------------------------


@pytest.mark.parametrize("snr_db", [3.0, 20.0, 40.0])
def test_sine_fit_snr_is_the_signal_to_noise_ratio(snr_db: float) -> None:
    # A sine of amplitude A in white noise of sd sigma: SNR = 10 log10((A²/2) / sigma²) (the
    # SINAD of IEEE Std 1241 with the fit residual as noise). With N = 96000 samples the
    # residual power scatters by sqrt(2/N) = 0.46 % (chi-square), i.e. 0.02 dB: 0.1 dB bound.
    amp = 0.2
    sigma = math.sqrt(amp**2 / 2 / 10 ** (snr_db / 10))
    x = noisy_sine(96000, cal.REFERENCE_F_HZ, amp, 0.4, 0.0, sigma, seed=11)
    fit = cal.sine_fit(x, FS, 159.2)
    assert fit.snr_db == pytest.approx(snr_db, abs=0.1)
    if snr_db < cal.MIN_SINE_SNR_DB - 1:
        with pytest.raises(ConfigError, match=rf"^no 159.2 Hz signal found on input 2: SNR "
                                              rf"{snr_db:.0f} dB"):
            cal.require_sine(fit, 159.2, "input 2")
    elif snr_db > cal.MIN_SINE_SNR_DB + 1:
        assert cal.require_sine(fit, 159.2, "input 2") is fit


def test_a_sine_at_another_frequency_is_not_the_reference() -> None:
    # 3 % off the nominal frequency (exciters hold about 1 %): over 0.1 s the 4-parameter fit
    # follows it (4.8 Hz is half a resolution bin of 10 Hz) and finds a clean sine elsewhere
    x = noisy_sine(4800, 159.155 * 1.03, 0.2, 0.0, 0.0, 1e-5, seed=1)
    with pytest.raises(ConfigError, match="no 159.2 Hz signal found on input 1: the fit found"):
        cal.require_sine(cal.sine_fit(x, FS, 159.2), 159.2, "input 1")


def test_scattered_burst_delays_are_refused() -> None:
    ok = cal.LoopDelay(480, 10.0, 3, (480, 481, 483, 480, 480), 0.9)
    assert cal.require_steady_delay(ok, "input 1") is ok
    bad = cal.LoopDelay(480, 10.0, 4109, (12, 480, 4112, 900, 3), 0.02)
    with pytest.raises(ConfigError, match=r"loop delay on input 1: the bursts gave 3-4112 samples"
                                          r" \(spread 4109 > 3"):
        cal.require_steady_delay(bad, "input 1")
