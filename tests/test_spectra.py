"""Tests of liveshape.dsp.spectra against scipy, published formulas and Monte Carlo statistics.

Every numeric check names its outside source beside it. Monte Carlo tolerances are derived from
the simulation's own standard error (batch means over independent trials) or from binomial
bounds; rounding tolerances from float64 rounding. The DOF and chi-square statistics are tested
in test_spectral_stats.py, the delay estimate in test_delay.py.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.signal as sig

from liveshape.dsp.spectra import (
    CrossSpectrum,
    PsdAverager,
    band_mask,
    estimate_delay,
    rms_from_psd,
    welch_dof,
    welch_psd,
)
from liveshape.errors import ConfigError

FS = 1000.0
# Sums of a few hundred float64 products: agreement to ~1e-12 relative is rounding, not method.
RTOL_ROUNDING = 1e-10


def _push_in_blocks(obj, block: int, *arrays: np.ndarray) -> None:
    n = arrays[0].size
    for i in range(0, n, block):
        obj.push(*(a[i:i + block] for a in arrays))


def _plant(rng: np.random.Generator, n: int, noise: float = 0.1):
    x = rng.standard_normal(n)
    b, a = sig.butter(2, [0.05, 0.3], btype="bandpass")
    y = sig.lfilter(b, a, x) + noise * rng.standard_normal(n)
    return x, y, b, a


# ---------------------------------------------------------------------------------------------
# Level 1: equality with scipy.signal on the same data
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize("nperseg", [64, 65])
def test_welch_psd_is_scipy_welch_hann_half_overlap(nperseg):
    rng = np.random.default_rng(1)
    x = rng.standard_normal(3000)
    f, p = welch_psd(x, FS, nperseg)
    # reference: scipy.signal.welch with a periodic Hann window and 50 % overlap
    f_ref, p_ref = sig.welch(x, FS, window=("hann"), nperseg=nperseg, noverlap=nperseg // 2)
    np.testing.assert_array_equal(f, f_ref)
    np.testing.assert_allclose(p, p_ref, rtol=RTOL_ROUNDING)
    np.testing.assert_allclose(f[1], FS / nperseg)  # DEVELOPERS.md contract: k * fs / N


@pytest.mark.parametrize("nperseg", [128, 127])
@pytest.mark.parametrize("block", [1, 7, "nperseg-1", "nperseg+3", 1000, 10_000])
def test_cross_spectrum_streaming_equals_scipy(nperseg, block):
    block = {"nperseg-1": nperseg - 1, "nperseg+3": nperseg + 3}.get(block, block)
    rng = np.random.default_rng(2)
    x, y, _, _ = _plant(rng, 5000)
    cs = CrossSpectrum(FS, nperseg)
    _push_in_blocks(cs, block, x, y)
    kw = dict(fs=FS, nperseg=nperseg)
    # reference: scipy.signal.welch / csd / coherence (Hann, 50 % overlap, constant detrend)
    _, pxx = sig.welch(x, **kw)
    _, pyy = sig.welch(y, **kw)
    f, pxy = sig.csd(x, y, **kw)
    _, coh = sig.coherence(x, y, **kw)
    assert cs.n_segments == (x.size - nperseg // 2) // (nperseg - nperseg // 2)
    np.testing.assert_array_equal(cs.f_hz, f)
    np.testing.assert_allclose(cs.gxx, pxx, rtol=RTOL_ROUNDING)
    np.testing.assert_allclose(cs.gyy, pyy, rtol=RTOL_ROUNDING)
    np.testing.assert_allclose(cs.gxy, pxy, rtol=RTOL_ROUNDING, atol=1e-14 * np.abs(pxy).max())
    np.testing.assert_allclose(cs.coherence[1:], coh[1:], rtol=RTOL_ROUNDING)
    # H1 in scipy's csd(x, y) convention: Pxy / Pxx
    np.testing.assert_allclose(cs.h1[1:], pxy[1:] / pxx[1:], rtol=1e-9)


@pytest.mark.parametrize("block", [1, 7, 255, 259, 4096])
def test_psd_averager_streaming_equals_scipy(block):
    rng = np.random.default_rng(3)
    x = rng.standard_normal(4096) + 0.3  # an offset: the segment mean must be removed as scipy
    pa = PsdAverager(FS, 256)
    _push_in_blocks(pa, block, x)
    _, p_ref = sig.welch(x, FS, nperseg=256)  # reference: scipy.signal.welch
    np.testing.assert_allclose(pa.psd, p_ref, rtol=RTOL_ROUNDING)
    assert pa.n_segments == 31
    pa.reset()
    assert pa.n_segments == 0 and not pa.psd.any()
    _push_in_blocks(pa, 100, x)
    np.testing.assert_allclose(pa.psd, p_ref, rtol=RTOL_ROUNDING)


@pytest.mark.parametrize(
    "window", ["hann", "hamming", "blackman", "flattop", ("tukey", 0.5), "boxcar"]
)
def test_segment_mean_is_removed_as_scipy_for_any_window(window):
    rng = np.random.default_rng(8)
    x = 100.0 + rng.standard_normal(3000)  # an offset of 100 sigma
    pa = PsdAverager(FS, 128, window=window)
    _push_in_blocks(pa, 333, x)
    # reference: scipy.signal.welch with the same window and detrend="constant". Rounding:
    # the residual DC of a removed mean is about (eps 128 * 100)**2 against lines of about 50
    # (|X|**2 of 128 unit samples), 1e-25 relative; 1e-20 of the largest line bounds it.
    _, p_ref = sig.welch(x, FS, window=window, nperseg=128)
    np.testing.assert_allclose(pa.psd, p_ref, rtol=RTOL_ROUNDING, atol=1e-20 * p_ref.max())


def test_streaming_keeps_constant_memory():
    cs = CrossSpectrum(FS, 256)
    before = (cs._buf.nbytes, cs._sxy.nbytes)  # the preallocated state
    rng = np.random.default_rng(4)
    for _ in range(50):
        cs.push(rng.standard_normal(3000), rng.standard_normal(3000))
    assert (cs._buf.nbytes, cs._sxy.nbytes) == before
    assert cs.n_segments == (150_000 - 128) // 128


def test_exponential_first_n_avg_segments_are_linear_then_recursive():
    rng = np.random.default_rng(5)
    x, y, _, _ = _plant(rng, 128 * 20 + 128)
    n_avg = 6
    cs = CrossSpectrum(FS, 256, averaging="exponential", n_avg=n_avg)
    lin = CrossSpectrum(FS, 256)
    n_first = 128 * (n_avg + 1)
    cs.push(x[:n_first], y[:n_first])
    lin.push(x[:n_first], y[:n_first])
    assert cs.n_segments == n_avg
    np.testing.assert_allclose(cs.gxx, lin.gxx, rtol=RTOL_ROUNDING)
    # one more segment: new = (1 - a) old + a segment, a = 1/n_avg (the definition)
    old = cs.gxy
    seg = CrossSpectrum(FS, 256)
    seg.push(x[128 * n_avg:128 * (n_avg + 2)], y[128 * n_avg:128 * (n_avg + 2)])
    assert seg.n_segments == 1
    cs.push(x[n_first:n_first + 128], y[n_first:n_first + 128])
    a = 1.0 / n_avg
    np.testing.assert_allclose(cs.gxy, (1 - a) * old + a * seg.gxy, rtol=1e-9, atol=1e-15)


@pytest.mark.parametrize("block", [1, 7, 255, 300, 5000])
def test_exponential_streaming_equals_recursion_of_scipy_segments(block):
    rng = np.random.default_rng(8)
    nperseg, n_avg, k = 256, 5, 19
    hop = nperseg // 2
    x, y, _, _ = _plant(rng, hop * (k + 1))
    cs = CrossSpectrum(FS, nperseg, averaging="exponential", n_avg=n_avg)
    _push_in_blocks(cs, block, x, y)
    assert cs.n_segments == k
    # reference: each segment's spectra by scipy.signal.welch / csd on that segment alone,
    # averaged by the documented recursion G_i = (1 - a_i) G_{i-1} + a_i P_i, a_i = 1/min(i, n)
    gxx = gxy = 0.0
    for i in range(1, k + 1):
        seg = slice((i - 1) * hop, (i - 1) * hop + nperseg)
        pxx = sig.welch(x[seg], FS, nperseg=nperseg)[1]
        pxy = sig.csd(x[seg], y[seg], FS, nperseg=nperseg)[1]
        a = 1.0 / min(i, n_avg)
        gxx = (1 - a) * gxx + a * pxx
        gxy = (1 - a) * gxy + a * pxy
    np.testing.assert_allclose(cs.gxx, gxx, rtol=1e-9)
    np.testing.assert_allclose(cs.gxy, gxy, rtol=1e-9, atol=1e-12 * np.abs(gxy).max())
    pa = PsdAverager(FS, nperseg, averaging="exponential", n_avg=n_avg)
    _push_in_blocks(pa, block, x)
    np.testing.assert_allclose(pa.psd, gxx, rtol=1e-9)
    cs.reset()
    assert cs.n_segments == 0 and cs.dof == 0.0 and np.all(np.isnan(cs.h1))


def test_delay_samples_pairs_x_t_minus_d_with_y_t():
    rng = np.random.default_rng(6)
    x, y, _, _ = _plant(rng, 6000)
    d = 300
    for block in (1, 97, 6000):
        cs = CrossSpectrum(FS, 256, delay_samples=d)
        _push_in_blocks(cs, block, x, y)
        _, pxy = sig.csd(x[:-d], y[d:], FS, nperseg=256)  # reference: scipy.signal.csd
        np.testing.assert_allclose(cs.gxy, pxy, rtol=RTOL_ROUNDING, atol=1e-14 * abs(pxy).max())


# ---------------------------------------------------------------------------------------------
# Level 2: published formulas and physical facts
# ---------------------------------------------------------------------------------------------


def test_parseval_bin_centred_sine_and_hann_enbw():
    n, k, amp = 256, 20, 0.7
    t = np.arange(n * 16)
    x = amp * np.sin(2 * np.pi * k * t / n)
    f, p = welch_psd(x, FS, n)
    df = f[1]
    # Parseval: the mean square of a sine is A²/2 (physical fact); exact for a bin-centred sine
    np.testing.assert_allclose(rms_from_psd(p, df) ** 2, amp**2 / 2, rtol=1e-12)
    # Hann equivalent noise bandwidth 1.5 bins (Harris 1978): peak line = (A²/2) / (1.5 df)
    np.testing.assert_allclose(p[k], amp**2 / 2 / (1.5 * df), rtol=1e-12)
    band = band_mask(f, f[k - 1], f[k + 1])
    assert band.sum() == 3
    np.testing.assert_allclose(rms_from_psd(p, df, mask=band) ** 2, amp**2 / 2, rtol=1e-12)


def test_parseval_white_noise_variance():
    rng = np.random.default_rng(7)
    sigma, nperseg = 0.3, 512
    x = sigma * rng.standard_normal(2**16)
    f, p = welch_psd(x, FS, nperseg)
    # Parseval (physical): sum(psd) df is the mean of each segment's Hann-weighted mean square,
    # i.e. sum_n v_n x_n**2 with the weights v_n below (they sum to 1). For Gaussian white noise
    # var(x**2) = 2 sigma**4 (Isserlis), so the estimate's standard deviation is
    # sigma**2 sqrt(2 sum v**2). 5 standard deviations.
    w = sig.get_window("hann", nperseg)
    hop = nperseg // 2
    k = (x.size - hop) // hop
    v = np.zeros(x.size)
    for i in range(k):
        v[i * hop:i * hop + nperseg] += w**2 / (k * np.sum(w**2))
    tol = 5 * math.sqrt(2 * np.sum(v**2))
    assert abs(np.sum(p) * f[1] / sigma**2 - 1) < tol
    # White noise has the flat one-sided density 2 sigma**2 / fs (definition of one-sided PSD).
    # Each line scatters with relative variance 2/nu (chi-square, Bendat & Piersol); the mean of
    # L lines has at most (1 + 2*4/9 + 2/36)/L of it, since the Hann DFT kernel spans 3 bins
    # (Harris 1978) and Gaussian periodogram correlations are |rho|**2 = 4/9, 1/36 (Isserlis).
    lines = p[2:-2]
    tol = 5 * math.sqrt(2 / welch_dof(k) * (1 + 8 / 9 + 2 / 36) / lines.size)
    assert abs(np.mean(lines) / (2 * sigma**2 / FS) - 1) < tol


# ---------------------------------------------------------------------------------------------
# H1 and coherence
# ---------------------------------------------------------------------------------------------


def _h1_bound(cs: CrossSpectrum, p_fail: float = 1e-3) -> tuple[np.ndarray, float]:
    """Per-line standard error of H1 and the Rayleigh multiplier for all lines together.

    Bendat & Piersol: the normalized random error of |H1| is sqrt(1 - g2) / (|g| sqrt(2 n_d)),
    and the phase error in radians the same, so the complex error has the per-component
    standard deviation s = |H| sqrt(1 - g2) / (|g| sqrt(2 n_d)) = sqrt((1 - g2) Gyy / Gxx / nu),
    n_d = nu / 2. |error| / s is then Rayleigh: P(> r) = exp(-r**2 / 2); over L lines
    (Bonferroni) r = sqrt(2 ln(L / p_fail)).
    """
    g2 = cs.coherence
    s = np.sqrt((1 - g2) * cs.gyy / cs.gxx / cs.dof)
    return s, math.sqrt(2 * math.log(s.size / p_fail))


@pytest.mark.parametrize(
    "name", ["butter_bandpass", "fir_lowpass", "cheby_lowpass", "peak_resonance"]
)
def test_h1_matches_freqz_within_coherence_bound(name):
    b, a = {
        "butter_bandpass": sig.butter(2, [0.05, 0.3], btype="bandpass"),
        "fir_lowpass": (sig.firwin(31, 0.2), [1.0]),
        "cheby_lowpass": sig.cheby1(4, 1, 0.3),
        "peak_resonance": sig.iirpeak(100.0, 5.0, fs=FS),
    }[name]
    rng = np.random.default_rng(400)
    nperseg, k = 512, 100
    x = rng.standard_normal(nperseg // 2 * (k + 1))
    y = sig.lfilter(b, a, x) + 0.1 * rng.standard_normal(x.size)
    cs = CrossSpectrum(FS, nperseg)
    _push_in_blocks(cs, 1000, x, y)
    _, h_true = sig.freqz(b, a, worN=cs.f_hz, fs=FS)  # reference: scipy.signal.freqz
    s, r = _h1_bound(cs)
    lines = slice(1, -1)  # DC carries no reference after the segment mean is removed
    assert np.all(np.abs(cs.h1 - h_true)[lines] <= r * s[lines])


def test_coherence_of_noise_free_linear_system_is_one():
    rng = np.random.default_rng(401)
    x = rng.standard_normal(20_000)
    y = sig.lfilter([1.0, 0.5, 0.25], [1.0], x)  # |H| >= 0.75 on every line
    cs = CrossSpectrum(FS, 512)
    cs.push(x, y)
    # gamma**2 = 1 for a noise-free linear system (Bendat & Piersol); the only loss is the
    # 2-sample impulse response leaking across segment ends: the Hann overlap correlation at
    # 2 samples of 512 is 0.99991, so 1 - gamma**2 < 2e-4 (computed from the window)
    w = sig.get_window("hann", 512)
    c2 = (np.dot(w[:-2], w[2:]) / np.dot(w, w)) ** 2
    assert np.all(cs.coherence[1:] >= c2 - 1e-12)
    assert np.all(cs.coherence[1:] <= 1 + 1e-12)  # Cauchy-Schwarz


def test_coherence_of_independent_noise_is_one_over_n_d():
    rng = np.random.default_rng(402)
    k, trials, nperseg = 8, 600, 128
    means = np.empty(trials)
    for i in range(trials):
        cs = CrossSpectrum(FS, nperseg)
        x = rng.standard_normal(nperseg // 2 * (k + 1))
        cs.push(x, rng.standard_normal(x.size))
        means[i] = np.mean(cs.coherence[2:-2])
    mean, se = means.mean(), means.std(ddof=1) / math.sqrt(trials)
    # Bendat & Piersol: for independent signals E[gamma_hat**2] = 1/n_d for n_d independent
    # averages (Beta(1, n_d - 1)); with overlapped segments n_d = nu/2 (Welch 1967 DOF).
    assert abs(mean - 2 / cs.dof) < 4 * se
    # overlap matters: the naive 1/K (non-overlapped segments) is rejected at this precision
    assert abs(mean - 1 / k) > 4 * se


@pytest.mark.parametrize("window", ["hann", "boxcar"])
def test_h1_delay_bias_and_alignment(window):
    rng = np.random.default_rng(403)
    nperseg, k, d = 512, 200, 128
    x = rng.standard_normal(nperseg // 2 * (k + 1) + d)
    y = np.concatenate((np.zeros(d), x[:-d]))  # pure delay of d samples, |H| = 1
    cs = CrossSpectrum(FS, nperseg, window=window)
    _push_in_blocks(cs, 4096, x, y)
    gain = np.abs(cs.h1[1:-1])
    # expected |H1| = window correlation at the lag, sum w(n) w(n + d) / sum w**2 (Welch 1967
    # overlap correlation); for the rectangular window it is 1 - tau/T (Bendat & Piersol)
    w = sig.get_window(window, nperseg)
    expected = np.dot(w[:-d], w[d:]) / np.dot(w, w)
    if window == "boxcar":
        assert expected == pytest.approx(1 - d / nperseg, rel=1e-12)
    # tolerance: per-line B&P error sqrt(1 - g2)/(|g| sqrt(2 n_d)); the mean of L lines has at
    # most 5/L of the per-line variance (lines > 2 bins apart uncorrelated, Harris 1978), 4 sigma
    g2 = cs.coherence[1:-1]
    eps = np.sqrt((1 - g2) / g2 / cs.dof).max()
    assert abs(gain.mean() - expected) < 4 * eps * math.sqrt(5 / gain.size)
    assert gain.mean() < 0.8  # the bias is large: about (1 - tau/T) = 0.75 or lower
    # aligned by the measured delay, the pure delay is removed: H1 = 1, coherence 1
    est = estimate_delay(x, y, max_lag=1000)
    assert est.samples == d
    aligned = CrossSpectrum(FS, nperseg, window=window, delay_samples=est.samples)
    _push_in_blocks(aligned, 333, x, y)
    np.testing.assert_allclose(aligned.h1[1:], 1.0, atol=1e-9)  # float64 rounding
    assert np.all(aligned.coherence[1:] > 1 - 1e-9)


def test_aligned_h1_of_delayed_filter_matches_freqz():
    rng = np.random.default_rng(404)
    nperseg, k, d = 512, 100, 700  # loop delay longer than a segment
    b, a = sig.butter(2, [0.05, 0.3], btype="bandpass")
    x = rng.standard_normal(nperseg // 2 * (k + 1) + d)
    y = np.concatenate((np.zeros(d), sig.lfilter(b, a, x)[:-d]))
    y += 0.1 * rng.standard_normal(y.size)
    est = estimate_delay(x, y, max_lag=2000)
    # the correlation peaks at the pure delay plus the lag of the impulse response's peak
    # (cross-correlation of white input = impulse response, Bendat & Piersol): 1 sample here
    h_peak = int(np.argmax(np.abs(sig.lfilter(b, a, np.r_[1.0, np.zeros(63)]))))
    assert est.samples == d + h_peak
    cs = CrossSpectrum(FS, nperseg, delay_samples=est.samples)
    _push_in_blocks(cs, 256, x, y)
    # reference: scipy.signal.freqz, times the residual pure delay advance exp(+j w (D - d))
    _, h_true = sig.freqz(b, a, worN=cs.f_hz, fs=FS)
    h_true = h_true * np.exp(2j * np.pi * cs.f_hz / FS * (est.samples - d))
    s, r = _h1_bound(cs)
    assert np.all(np.abs(cs.h1 - h_true)[1:-1] <= r * s[1:-1])


# ---------------------------------------------------------------------------------------------
# Errors a user can cause: one line naming the option, the value and the rule
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "kwargs, words",
    [
        (dict(fs_hz=0.0, nperseg=256), "fs_hz = 0.0"),
        (dict(fs_hz=FS, nperseg=1), "nperseg = 1"),
        (dict(fs_hz=FS, nperseg=256, averaging="median"), "averaging = 'median'"),
        (dict(fs_hz=FS, nperseg=256, averaging="exponential"), "n_avg = None"),
        (dict(fs_hz=FS, nperseg=256, delay_samples=-3), "delay_samples = -3"),
    ],
)
def test_bad_settings_are_one_line_config_errors(kwargs, words):
    with pytest.raises(ConfigError) as info:
        CrossSpectrum(**kwargs)
    msg = str(info.value)
    assert words in msg and "\n" not in msg


def test_push_needs_blocks_of_equal_length():
    with pytest.raises(ValueError, match="equal length"):
        CrossSpectrum(FS, 64).push(np.ones(10), np.ones(9))


def test_moved_names_are_reexported():
    # other modules import these from liveshape.dsp.spectra; they live in spectral_stats and delay
    from liveshape.dsp import delay, spectra, spectral_stats

    for name in ("welch_dof", "exp_average_dof", "chi2_interval_db", "db_scatter_std"):
        assert getattr(spectra, name) is getattr(spectral_stats, name)
    assert spectra.estimate_delay is delay.estimate_delay
    assert spectra.DelayEstimate is delay.DelayEstimate
