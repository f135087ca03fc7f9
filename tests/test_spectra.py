"""Tests of liveshape.spectra against scipy, published formulas and Monte Carlo statistics.

Every numeric check names its outside source beside it. Monte Carlo tolerances are derived from
the simulation's own standard error (batch means over independent trials) or from binomial
bounds; rounding tolerances from float64 rounding.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.signal as sig
import scipy.stats as st

from liveshape.errors import ConfigError
from liveshape.spectra import (
    CrossSpectrum,
    DelayEstimate,
    PsdAverager,
    band_mask,
    chi2_interval_db,
    db_scatter_std,
    estimate_delay,
    exp_average_dof,
    rms_from_psd,
    welch_dof,
    welch_psd,
)

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
    sigma = 0.3
    x = sigma * rng.standard_normal(2**16)
    f, p = welch_psd(x, FS, 512)
    # Parseval: sum(psd) df = mean square (physical). Both are estimates of sigma²; their
    # difference comes from the window weighting. Relative standard deviation of a sample
    # variance of N Gaussian samples is sqrt(2/N); the Hann-weighted one uses N/1.94 effective
    # samples at 50 % overlap (36/19 DOF per 512/... -> bounded by sqrt(2 * 2/N)); 5 sigma.
    tol = 5 * math.sqrt(2 * 2.0 / x.size)
    assert abs(np.sum(p) * f[1] / sigma**2 - 1) < tol
    # White noise has the flat one-sided density 2 sigma² / fs (definition of one-sided PSD)
    assert abs(np.mean(p[2:-2]) / (2 * sigma**2 / FS) - 1) < tol


def test_welch_dof_closed_forms():
    # Welch 1967 with Hann at 50 %: c(1) = 1/6, so nu = 2K / (1 + (1 - 1/K)/18)   [calc]
    for k in (1, 2, 5, 40, 1000):
        assert welch_dof(k) == pytest.approx(2 * k / (1 + (1 - 1 / k) / 18), rel=1e-12)
    # many segments: 36/19 per segment (Welch 1967; DOMAIN.md §3)
    assert welch_dof(100_000) / 100_000 == pytest.approx(36 / 19, rel=1e-5)
    # no overlap: 2 per segment (Bendat & Piersol)
    assert welch_dof(10, overlap=0.0) == pytest.approx(20.0, rel=1e-12)
    # Hann at 75 %: 1.04 per segment for many segments (DOMAIN.md §3, Welch 1967)
    assert welch_dof(10_000, overlap=0.75) / 10_000 == pytest.approx(1.04, abs=0.005)
    assert welch_dof(0) == 0.0
    # exponential averaging: alpha/(2 - alpha) variance ratio -> 2(2n-1) DOF without overlap,
    # and the Hann 50 % correction 1 + (1 - 1/n)/18 (derivation in exp_average_dof)
    assert exp_average_dof(10, overlap=0.0) == pytest.approx(38.0, rel=1e-12)
    assert exp_average_dof(10) == pytest.approx(38.0 / (1 + 0.9 / 18), rel=1e-12)
    assert exp_average_dof(1) == pytest.approx(2.0)


@pytest.mark.parametrize(
    "nu, lo, hi",
    # DOMAIN.md §3 table of the 90 % chi-square interval, rounded to 0.01 dB
    [(16, -2.16, 3.03), (32, -1.59, 2.03), (60, -1.20, 1.43), (120, -0.87, 0.98),
     (240, -0.62, 0.68)],
)
def test_chi2_interval_matches_table(nu, lo, hi):
    lo_db, hi_db = chi2_interval_db(nu, 0.90)
    # published rounding of the table: half of 0.01 dB (plus float slack)
    assert lo_db == pytest.approx(lo, abs=0.0051)
    assert hi_db == pytest.approx(hi, abs=0.0051)
    # reference: scipy.stats.chi2 quantiles, Bendat & Piersol interval nu G/chi2
    assert lo_db == pytest.approx(10 * math.log10(nu / st.chi2.ppf(0.95, nu)), rel=1e-12)
    assert hi_db == pytest.approx(10 * math.log10(nu / st.chi2.ppf(0.05, nu)), rel=1e-12)


def test_chi2_interval_arrays_and_db_scatter():
    lo, hi = chi2_interval_db(np.array([16.0, 120.0]))
    assert lo.shape == (2,) and np.all(lo < 0) and np.all(hi > 0)
    # DOMAIN.md §3: 4.343 sqrt(psi1(nu/2)) = 1.10 dB at nu = 32, 0.56 dB at 120 (0.01 rounding)
    assert db_scatter_std(32) == pytest.approx(1.10, abs=0.0051)
    assert db_scatter_std(120) == pytest.approx(0.56, abs=0.0051)
    # the same quantity by direct integration over the chi-square law (scipy.stats reference)
    nu = 32
    dist = st.chi2(nu)
    m1 = dist.expect(lambda v: 10 * np.log10(v / nu))
    m2 = dist.expect(lambda v: (10 * np.log10(v / nu)) ** 2)
    assert db_scatter_std(nu) == pytest.approx(math.sqrt(m2 - m1**2), rel=1e-6)


# ---------------------------------------------------------------------------------------------
# Delay
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize("delay", [0, 1, 37, 480])
@pytest.mark.parametrize("plant", ["fir", "iir", "inverted"])
def test_estimate_delay_integer_through_filter(delay, plant):
    rng = np.random.default_rng(10 + delay)
    x = rng.standard_normal(8000)
    # impulse responses whose largest tap is the first: the correlation peak of white noise
    # through h delayed by D sits at D (cross-correlation of white input = impulse response,
    # Bendat & Piersol)
    if plant == "fir":
        h = sig.lfilter([1.0, 0.6, -0.3, 0.1], [1.0], x)
    elif plant == "iir":
        h = sig.lfilter([1.0], [1.0, -0.7], x)
    else:
        h = -sig.lfilter([1.0, 0.4], [1.0], x)
    y = np.concatenate((np.zeros(delay), h[: x.size - delay]))
    y += 0.2 * rng.standard_normal(x.size)
    est = estimate_delay(x, y, max_lag=600)
    assert isinstance(est, DelayEstimate)
    assert est.samples == delay
    assert abs(est.fraction) <= 0.5
    assert (est.peak < 0) == (plant == "inverted")


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


def test_bad_statistics_arguments():
    with pytest.raises(ConfigError, match="dof"):
        chi2_interval_db(0.0)
    with pytest.raises(ConfigError, match="confidence"):
        chi2_interval_db(10.0, 1.5)
    with pytest.raises(ConfigError, match="overlap"):
        welch_dof(4, overlap=1.0)
    with pytest.raises(ConfigError, match="max_lag"):
        estimate_delay(np.ones(10), np.ones(10), max_lag=10)
    with pytest.raises(ValueError, match="equal length"):
        CrossSpectrum(FS, 64).push(np.ones(10), np.ones(9))
