"""Tests of liveshape.dsp.spectral_stats: Welch-1967 DOF, chi-square bands, dB scatter.

Closed forms and published tables first, then Monte Carlo on Welch estimates (made by
liveshape.dsp.spectra). Monte Carlo tolerances are derived from the simulation's own standard error
(batch means over independent trials) or from binomial bounds.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.stats as st

from liveshape.dsp.spectra import PsdAverager, welch_psd
from liveshape.dsp.spectral_stats import (
    chi2_interval_db,
    db_scatter_std,
    exp_average_dof,
    welch_dof,
)
from liveshape.errors import ConfigError

FS = 1000.0


def test_welch_dof_closed_forms():
    # Welch 1967 with Hann at 50 %: c(1) = 1/6, so nu = 2K / (1 + (1 - 1/K)/18)   [calc]
    for k in (1, 2, 5, 40, 1000):
        assert welch_dof(k) == pytest.approx(2 * k / (1 + (1 - 1 / k) / 18), rel=1e-12)
    # many segments: 36/19 per segment (Welch 1967, IEEE Trans. Audio Electroacoust. AU-15(2);
    # c(1) = 1/6 for Hann at 50 %)
    assert welch_dof(100_000) / 100_000 == pytest.approx(36 / 19, rel=1e-5)
    # no overlap: 2 per segment (Bendat & Piersol)
    assert welch_dof(10, overlap=0.0) == pytest.approx(20.0, rel=1e-12)
    # Hann at 75 %: 1.04 per segment for many segments (Welch 1967; [calc] from c(1), c(2), c(3))
    assert welch_dof(10_000, overlap=0.75) / 10_000 == pytest.approx(1.04, abs=0.005)
    assert welch_dof(0) == 0.0
    # exponential averaging: alpha/(2 - alpha) variance ratio -> 2(2n-1) DOF without overlap,
    # and the Hann 50 % correction 1 + (1 - 1/n)/18 (derivation in exp_average_dof)
    assert exp_average_dof(10, overlap=0.0) == pytest.approx(38.0, rel=1e-12)
    assert exp_average_dof(10) == pytest.approx(38.0 / (1 + 0.9 / 18), rel=1e-12)
    assert exp_average_dof(1) == pytest.approx(2.0)


@pytest.mark.parametrize(
    "nu, lo, hi",
    # 90 % chi-square interval of the true PSD about the estimate, nu/chi2_(nu; 0.95) ..
    # nu/chi2_(nu; 0.05) in dB (Bendat & Piersol, Random Data, 4th ed., ch. 8), hand values
    # [calc] rounded to 0.01 dB
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
    # 4.343 sqrt(psi1(nu/2)) = 1.10 dB at nu = 32, 0.56 dB at 120 [calc, 0.01 rounding;
    # docs/methods.md, "χ² confidence bands and dB scatter"]
    assert db_scatter_std(32) == pytest.approx(1.10, abs=0.0051)
    assert db_scatter_std(120) == pytest.approx(0.56, abs=0.0051)
    # the same quantity by direct integration over the chi-square law (scipy.stats reference)
    nu = 32
    dist = st.chi2(nu)
    m1 = dist.expect(lambda v: 10 * np.log10(v / nu))
    m2 = dist.expect(lambda v: (10 * np.log10(v / nu)) ** 2)
    assert db_scatter_std(nu) == pytest.approx(math.sqrt(m2 - m1**2), rel=1e-6)


# ---------------------------------------------------------------------------------------------
# Monte Carlo against Welch 1967 and the chi-square law
# ---------------------------------------------------------------------------------------------


def _nu_hat(p: np.ndarray) -> float:
    """nu = 2 mean**2 / var of estimates (rows: independent trials, columns: lines).

    A scaled chi-square G chi2_nu / nu has mean G and variance 2 G**2 / nu (Bendat & Piersol).
    """
    return 2.0 * float(np.mean(p.mean(axis=0))) ** 2 / float(np.mean(p.var(axis=0, ddof=1)))


def _nu_hat_with_error(p: np.ndarray, n_batches: int = 40) -> tuple[float, float]:
    """Point estimate from all trials and its standard error from batch means of trials."""
    batches = np.array([_nu_hat(b) for b in np.array_split(p, n_batches)])
    return _nu_hat(p), float(batches.std(ddof=1) / math.sqrt(n_batches))


@pytest.mark.parametrize("k", [2, 8, 32])
def test_welch_dof_by_monte_carlo(k):
    rng = np.random.default_rng(100 + k)
    nperseg = 64
    trials = 12_800 // k * 4
    x = rng.standard_normal((trials, (k + 1) * nperseg // 2))
    _, p = welch_psd(x, FS, nperseg)
    nu, se = _nu_hat_with_error(p[:, 2:-2])  # lines away from DC and Nyquist
    # Welch 1967 equivalent DOF (Hann 50 %): agreement within 4 Monte Carlo standard errors
    assert abs(nu - welch_dof(k)) < 4 * se
    # and the test has the power to see the overlap correlation: 2K is rejected
    assert abs(nu - 2 * k) > 4 * se


@pytest.mark.parametrize("n_updates, trials", [(4, 1000), (56, 1500)])
def test_exponential_dof_by_monte_carlo(n_updates, trials):
    rng = np.random.default_rng(200 + n_updates)
    nperseg, n_avg = 64, 8
    k = n_avg + n_updates
    rows = []
    for _ in range(trials):
        pa = PsdAverager(FS, nperseg, averaging="exponential", n_avg=n_avg)
        pa.push(rng.standard_normal((k + 1) * nperseg // 2))
        rows.append(pa.psd[2:-2])
    assert pa.n_segments == k
    nu, se = _nu_hat_with_error(np.array(rows))
    # exact DOF of the applied weights (Welch 1967 with arbitrary weights); 4 standard errors
    assert abs(nu - pa.dof) < 4 * se
    if n_updates > 5 * n_avg:
        # steady state: alpha/(2 - alpha) variance ratio with the Hann overlap correction
        assert pa.dof == pytest.approx(exp_average_dof(n_avg), rel=1e-3)
        # power: the uncorrected 2(2n - 1) and the linear welch_dof(K) are rejected
        assert abs(nu - 2 * (2 * n_avg - 1)) > 4 * se
        assert abs(nu - welch_dof(k)) > 4 * se
    else:
        assert welch_dof(n_avg) < pa.dof < welch_dof(k)


def test_chi2_band_coverage_is_90_percent():
    rng = np.random.default_rng(300)
    nperseg, k, sigma = 64, 16, 0.5
    x = sigma * rng.standard_normal((8000, (k + 1) * nperseg // 2))
    _, p = welch_psd(x, FS, nperseg)
    truth = 2 * sigma**2 / FS  # one-sided density of white noise
    lo_db, hi_db = chi2_interval_db(welch_dof(k), 0.90)
    # lines 4 bins apart are independent: the Hann DFT kernel spans 3 bins (Harris 1978)
    est = p[:, 2:-2:4]
    covered = (est * 10 ** (lo_db / 10) <= truth) & (truth <= est * 10 ** (hi_db / 10))
    n = covered.size
    # binomial bound: two-sided 99.9 % interval of the observed fraction (scipy.stats.binom)
    lo_n, hi_n = st.binom.interval(0.999, n, 0.90)
    assert lo_n <= covered.sum() <= hi_n


def test_bad_statistics_arguments():
    with pytest.raises(ConfigError, match="dof"):
        chi2_interval_db(0.0)
    with pytest.raises(ConfigError, match="confidence"):
        chi2_interval_db(10.0, 1.5)
    with pytest.raises(ConfigError, match="overlap"):
        welch_dof(4, overlap=1.0)
