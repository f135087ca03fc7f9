"""Lines not caused by the drive: the multitaper harmonic F-test against its distribution, a
least-squares sine fit, scipy's F quantiles and the coherent output spectrum."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import signal, stats

from liveshape.dsp.lines import (
    LineFinding,
    coherent_control_psd,
    f_threshold,
    find_extraneous_lines,
    harmonic_f_test,
    line_mask,
)

NW, K = 4.0, 7  # the default taper set: K = 2·NW − 1


def _null_exceedances(make_block, p: float, n: int, fs: float, blocks: int) -> tuple[int, int]:
    """Exceedances of the F threshold at Fourier frequencies 2·(2W) apart (nearly independent
    tests), over ``blocks`` blocks without lines; returns (exceedances, tests)."""
    crit = f_threshold(p, K)
    step = int(4 * NW)  # Fourier bins between tested frequencies: twice the full bandwidth 2W
    hits = tests = 0
    for b in range(blocks):
        f, fstat, _ = harmonic_f_test(make_block(b), fs, nw=NW, n_tapers=K)
        idx = np.arange(step, f.size - step, step)  # W <= f <= fs/2 - W
        hits += int(np.count_nonzero(fstat[idx] > crit))
        tests += idx.size
    return hits, tests


def _within_binomial(hits: int, tests: int, p: float, tail: float = 1e-5) -> bool:
    lo = stats.binom.ppf(tail, tests, p)
    hi = stats.binom.isf(tail, tests, p)
    return lo <= hits <= hi


@pytest.mark.parametrize("p", [0.05, 0.01])
def test_false_alarm_rate_on_white_noise_is_p(p):
    # Under no line and a locally flat spectrum, F ~ F(2, 2K-2), so P(F > F_{2,2K-2}(1-p)) = p
    # (Thomson, Proc. IEEE 70(9), 1982, §XIII; Percival & Walden, Spectral Analysis for Physical
    # Applications, 1993, §10.11); the count over independent tests is binomial (scipy.stats).
    rng = np.random.default_rng(11)
    hits, tests = _null_exceedances(lambda b: rng.standard_normal(1024), p, 1024, 1024.0, 120)
    assert _within_binomial(hits, tests, p), (hits, tests, p)


def test_false_alarm_rate_on_shaped_noise_is_p():
    # The F-test holds for any spectrum smooth over ±W (Thomson 1982, §XIII; Percival & Walden
    # 1993, §10.11): noise through a 2nd-order low-pass (scipy.signal.butter) and a 10 dB tilt.
    rng = np.random.default_rng(12)
    sos = signal.butter(2, 150.0, fs=1024.0, output="sos")
    p = 0.02

    def block(_b):
        w = rng.standard_normal(1024 + 512)
        return signal.sosfilt(sos, w)[512:] + 0.3 * w[512:]

    hits, tests = _null_exceedances(block, p, 1024, 1024.0, 120)
    assert _within_binomial(hits, tests, p), (hits, tests, p)


def test_f_threshold_is_the_f_quantile():
    # F_{2,m}(1-p) from scipy.stats.f.isf and from the closed form of the F(2, m) tail,
    # P(F > x) = (1 + 2x/m)^(-m/2)  (Johnson, Kotz & Balakrishnan, Continuous Univariate
    # Distributions, vol. 2, ch. 27 [from memory]); Thomson 1982 §XIII for the degrees of freedom.
    for p in (0.1, 0.01, 1e-4, 1e-7):
        for k in (2, 5, 7, 12):
            m = 2 * k - 2
            assert f_threshold(p, k) == pytest.approx(stats.f.isf(p, 2, m), rel=1e-12)
            assert f_threshold(p, k) == pytest.approx(m / 2 * (p ** (-2 / m) - 1), rel=1e-9)
    for bad in (0.0, 1.0, -0.1):
        with pytest.raises(ValueError):
            f_threshold(bad, 7)
    with pytest.raises(ValueError):
        f_threshold(0.01, 1)


@pytest.mark.parametrize("phase", [0.0, 1.1, -2.5])
def test_sine_amplitude_agrees_with_least_squares(phase):
    # A cos(2π f0 t + φ) in white noise: the multitaper amplitude 2|μ̂| and a least-squares fit
    # on cos/sin regressors (numpy.linalg.lstsq) both estimate A with standard deviation about
    # σ·sqrt(2/n) (Percival & Walden 1993, §10.11; LS: Kay, Fundamentals of Statistical Signal
    # Processing I, 1993, Example 4.2 [from memory]); they must agree within 6 of it.
    fs, n, amp, sigma = 1000.0, 4000, 0.2, 0.5
    f0 = 123.125  # half a Fourier bin (fs/n = 0.25 Hz) off: on the padded grid only
    rng = np.random.default_rng(21)
    t = np.arange(n) / fs
    x = amp * np.cos(2 * math.pi * f0 * t + phase) + sigma * rng.standard_normal(n)
    found = find_extraneous_lines(x, None, fs)
    assert len(found) == 1
    assert found[0].f_hz == pytest.approx(f0, abs=1e-9)
    a = np.column_stack((np.cos(2 * math.pi * f0 * t), np.sin(2 * math.pi * f0 * t),
                         np.ones(n)))
    coef, *_ = np.linalg.lstsq(a, x, rcond=None)
    amp_ls = math.hypot(coef[0], coef[1])
    sd = sigma * math.sqrt(2.0 / n)
    assert abs(amp_ls - amp) < 6 * sd  # the reference itself is sound
    assert abs(found[0].amplitude_g - amp_ls) < 6 * sd, (found[0].amplitude_g, amp_ls, sd)


def test_line_between_grid_frequencies_is_found_at_its_frequency():
    # A line anywhere between Fourier frequencies is found within half a padded grid step
    # (grid step fs/(pad n)); without the padding a line half a bin off loses its F
    # (Percival & Walden 1993, §10.11 recommend searching a zero-padded grid).
    fs, n = 1000.0, 4000
    rng = np.random.default_rng(22)
    t = np.arange(n) / fs
    for f0 in rng.uniform(40.0, 400.0, 5):
        x = 0.1 * np.cos(2 * math.pi * f0 * t + 0.4) + 0.2 * rng.standard_normal(n)
        found = find_extraneous_lines(x, None, fs)
        assert len(found) == 1
        assert abs(found[0].f_hz - f0) <= fs / (8 * n) / 2 + 1e-9
        assert found[0].amplitude_g == pytest.approx(0.1, rel=0.05)


def _plant_drive_control(seed: int, hum_hz=(50.0, 100.0, 150.0), tone_hz=None, n=16384,
                         fs=2048.0):
    """Drive: random (+ a sine-on-random tone); control: the drive through a resonant plant plus
    hum lines that are not in the drive."""
    rng = np.random.default_rng(seed)
    t = np.arange(n) / fs
    drive = rng.standard_normal(n)
    if tone_hz is not None:
        drive = drive + 0.5 * np.cos(2 * math.pi * tone_hz * t)
    b, a = signal.iirpeak(300.0, 5.0, fs=fs)
    control = signal.lfilter(b, a, drive) + 0.05 * drive
    for j, f in enumerate(hum_hz):
        control = control + 0.05 * np.cos(2 * math.pi * f * t + j)
    return drive, control, fs


def test_hum_in_control_but_not_in_drive_is_flagged():
    # A line present in the control and absent from the drive is flagged; its amplitude is the
    # simulated one (Thomson 1982, §XIII).
    drive, control, fs = _plant_drive_control(31)
    found = find_extraneous_lines(control, drive, fs)
    assert [round(x.f_hz, 3) for x in found] == [50.0, 100.0, 150.0]
    for x in found:
        assert x.amplitude_g == pytest.approx(0.05, rel=0.1)
        assert x.p_value == pytest.approx(stats.f.sf(x.f_stat, 2, 2 * K - 2))
        assert x.as_dict()["rms_g"] == pytest.approx(x.amplitude_g / math.sqrt(2))


def test_sine_on_random_tone_in_the_drive_is_not_flagged():
    # A tone in the drive reaches the control through the plant: caused by the drive, so not
    # flagged; the same control without the drive check does show it (the check is what
    # decides).
    drive, control, fs = _plant_drive_control(32, tone_hz=80.3)
    found = find_extraneous_lines(control, drive, fs)
    assert [round(x.f_hz) for x in found] == [50, 100, 150]
    unchecked = find_extraneous_lines(control, None, fs)
    assert any(abs(x.f_hz - 80.3) < 0.1 for x in unchecked)


def test_no_findings_on_noise_beyond_the_per_block_bound():
    # Each grid point is tested at p = false_per_block / N; a finding needs at least one grid
    # point over the threshold, so the mean count per block is at most false_per_block
    # (union bound on the F(2, 2K-2) tail, Thomson 1982 §XIII); the total over blocks is then
    # at most a Poisson count of that mean at the 1e-5 upper tail (scipy.stats.poisson).
    rng = np.random.default_rng(41)
    blocks, rate = 150, 0.5
    total = sum(len(find_extraneous_lines(rng.standard_normal(2048), None, 2048.0,
                                          false_per_block=rate)) for _ in range(blocks))
    assert total <= stats.poisson.isf(1e-5, rate * blocks), total


def test_band_limits_the_search():
    drive, control, fs = _plant_drive_control(33)
    found = find_extraneous_lines(control, drive, fs, band_hz=(75.0, 125.0))
    assert [round(x.f_hz) for x in found] == [100]


def test_line_mask_marks_lines_near_findings():
    f = np.arange(0.0, 200.0, 0.5)
    findings = [LineFinding(50.2, 0.1, 100.0, 1e-6), LineFinding(150.0, 0.1, 100.0, 1e-6)]
    mask = line_mask(f, findings, 1.0)
    assert list(f[mask]) == [49.5, 50.0, 50.5, 51.0, 149.0, 149.5, 150.0, 150.5, 151.0]
    assert not line_mask(f, [], 1.0).any()


def test_coherent_output_psd_removes_hum_on_the_masked_lines():
    # γ²·Gyy = |Gxy|²/Gxx is the output PSD linearly related to the input (Bendat & Piersol,
    # Random Data, 4th ed., Ch. 6, coherent output spectrum [section from memory: §6.1.4]); its
    # normalized random error is sqrt((2 − γ²)/(γ² n_d)) (same book, §9.2.3 [from memory]).
    fs, n = 1024.0, 1024 * 400
    rng = np.random.default_rng(51)
    x = rng.standard_normal(n)
    b, a = signal.butter(2, 200.0, fs=fs)
    y_lin = signal.lfilter(b, a, x)
    t = np.arange(n) / fs
    hum = 0.3 * np.cos(2 * math.pi * 50.0 * t)
    y = y_lin + hum
    nper = 1024
    f, gyy = signal.welch(y, fs, nperseg=nper)
    _, coh = signal.coherence(x, y, fs, nperseg=nper)
    _, gxy = signal.csd(x, y, fs, nperseg=nper)
    _, gxx = signal.welch(x, fs, nperseg=nper)
    found = find_extraneous_lines(y[:16384], x[:16384], fs)
    assert [round(v.f_hz, 2) for v in found] == [50.0]
    mask = line_mask(f, found, 2 * fs / nper)  # Hann main lobe: ±2 lines
    assert mask.sum() == 5
    out = coherent_control_psd(gyy, coh, mask)
    assert np.array_equal(out[~mask], gyy[~mask])  # untouched off the lines
    np.testing.assert_allclose(out[mask], np.abs(gxy[mask]) ** 2 / gxx[mask], rtol=1e-9)
    # On the hum line itself: the hum dominates Gyy, the coherent part is the plant's response
    # to the drive, |H|²·Gxx with Gxx = 2/fs for unit white noise.
    j = int(np.argmin(np.abs(f - 50.0)))
    _, h = signal.freqz(b, a, worN=[50.0], fs=fs)
    g_lin = abs(h[0]) ** 2 * 2.0 / fs
    assert gyy[j] > 10 * g_lin
    n_d = n // nper  # counting only non-overlapping segments: conservative for 50 % overlap
    eps = math.sqrt((2 - coh[j]) / (coh[j] * n_d))
    assert abs(out[j] / g_lin - 1) < 4 * eps, (out[j] / g_lin, eps)
