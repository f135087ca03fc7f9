"""Tests of the drive equalizer against the loop theory of iterative PSD equalization.

References: the direct law D_{k+1} = D_k (R/Ĉ)^γ and the FRF-based law D = R/|H|² (Harris'
Shock and Vibration Handbook, chapter on digital control systems for vibration testing); the loop
theory derived from them in docs/methods.md, "Equalizer update laws and their scatter" (error
recursion e_{k+1} = (1−γ) e_k − γ n_k, steady-state variance γ/(2−γ)·σ²); the dB scatter of a χ²
estimate, std = 4.343·√ψ1(ν/2) (Bendat & Piersol, Random Data, 4th ed., ch. 8, for the χ²_ν
scatter; trigamma for the variance of a log-gamma variate).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import special

from liveshape.control import equalizer as eq

N = 64


def _band(n: int = N, lo: int = 4, hi: int = 60) -> np.ndarray:
    b = np.zeros(n, dtype=bool)
    b[lo:hi] = True
    return b


def _plant(n: int = N, seed: int = 1) -> np.ndarray:
    rng = np.random.default_rng(seed)
    return 10.0 ** (rng.uniform(-10, 10, n) / 20.0)  # |H| in g/FS, ±10 dB around 1


# ---- initial drive -----------------------------------------------------------------------


def test_initial_drive_is_target_over_frf_squared_exactly():
    band = _band()
    h = _plant() * np.exp(1j * np.linspace(0, 3, N))  # phase must not matter: |H|²
    target = np.full(N, 0.01)
    res = eq.initial_drive(
        target, h, np.ones(N), max_boost_db=40.0, coherence_min=0.5, band=band
    )
    # indirect (FRF-based) equalization D = R/|H|² (Harris' Shock and Vibration Handbook,
    # chapter on digital control systems for vibration testing)
    np.testing.assert_allclose(res.drive_psd[band], target[band] / np.abs(h[band]) ** 2,
                               rtol=1e-12)
    assert np.all(res.drive_psd[~band] == 0.0)
    assert res.n_step_limited == 0 and res.n_held == 0 and res.ceiling_scale == 1.0
    assert not res.drive_psd.flags.writeable


def test_initial_drive_boost_limited_relative_to_band_median():
    band = _band()
    h = np.ones(N)
    h[30] = 1e-3  # antiresonance / dead line: would ask for +60 dB
    res = eq.initial_drive(
        np.full(N, 1.0), h, np.ones(N), max_boost_db=20.0, coherence_min=0.5, band=band
    )
    # median correction is 0 dB, so the cap is +20 dB exactly
    assert res.drive_psd[30] == pytest.approx(100.0, rel=1e-12)
    assert res.step_limited[30] and res.n_step_limited == 1
    # resonances (cuts) are not limited
    h[31] = 100.0
    res = eq.initial_drive(
        np.full(N, 1.0), h, np.ones(N), max_boost_db=20.0, coherence_min=0.5, band=band
    )
    assert res.drive_psd[31] == pytest.approx(1e-4, rel=1e-12)


def test_initial_drive_interpolates_frf_on_low_coherence_lines():
    band = _band()
    h = np.ones(N)
    h[20] = 2.0  # |H|² = 6.02 dB
    h[24] = 8.0  # |H|² = 18.06 dB
    h[21:24] = 1e-6  # garbage on low-coherence lines
    coh = np.ones(N)
    coh[21:24] = 0.1
    res = eq.initial_drive(np.ones(N), h, coh, max_boost_db=60.0, coherence_min=0.5, band=band)
    # linear interpolation in dB between the good neighbours 20 and 24
    expect_db = np.interp([21, 22, 23], [20, 24], 20 * np.log10([2.0, 8.0]))
    np.testing.assert_allclose(10 * np.log10(res.drive_psd[21:24]), -expect_db, atol=1e-9)
    assert res.held[21:24].all() and res.n_held == 3


def test_initial_drive_ceiling_scales_whole_drive():
    band = _band()
    h = _plant()
    target = np.full(N, 0.01)
    free = eq.initial_drive(target, h, np.ones(N), max_boost_db=40, coherence_min=0.5, band=band)
    df = 2.0
    ms_free = free.drive_psd.sum() * df
    res = eq.initial_drive(target, h, np.ones(N), max_boost_db=40, coherence_min=0.5, band=band,
                           ceiling_ms_fs2=ms_free / 4, df_hz=df)
    assert res.ceiling_scale == pytest.approx(0.25, rel=1e-12)
    assert res.drive_ms_fs2 == pytest.approx(ms_free / 4, rel=1e-12)
    np.testing.assert_allclose(res.drive_psd, free.drive_psd / 4, rtol=1e-12)


# ---- update laws: noiseless decay ---------------------------------------------------------


@pytest.mark.parametrize("law", ["direct", "blend"])
@pytest.mark.parametrize("gamma", [0.25, 0.5, 1.0])
def test_noiseless_error_decays_as_one_minus_gamma_to_the_k(law, gamma):
    # [calc] (docs/methods.md, "Equalizer update laws and their scatter"): for a linear plant
    # the log error obeys e_{k+1} = (1−γ) e_k
    band = _band()
    h = _plant()
    target = np.full(N, 0.02)
    rng = np.random.default_rng(3)
    e0_db = rng.uniform(-2.5, 2.5, N)  # inside the step limit
    ideal = target / h**2
    drive = ideal * 10 ** (e0_db / 10)
    for k in range(1, 8):
        control = drive * h**2
        res = eq.update_drive(drive, target, control, gain=gamma, max_step_db=3.0, band=band,
                              law=law, h1=h)
        drive = res.drive_psd
        err_db = 10 * np.log10(drive[band] * h[band] ** 2 / target[band])
        np.testing.assert_allclose(err_db, (1 - gamma) ** k * e0_db[band], atol=1e-9)
        assert res.n_step_limited == 0


# ---- update law: steady state under estimation noise -----------------------------------------


@pytest.mark.parametrize("gamma", [0.3, 0.5, 1.0])
def test_steady_state_error_variance_matches_loop_theory(gamma):
    # Monte Carlo of the direct law with χ²_ν estimates Ĉ = C·χ²_ν/ν on independent lines.
    # Loop theory [calc, docs/methods.md]: var(true error) = γ/(2−γ)·σ² with σ² the variance of
    # 10·log10(χ²_ν/ν) = (10/ln10)²·ψ1(ν/2) (χ²_ν scatter: Bendat & Piersol, Random Data, 4th
    # ed., ch. 8; variance of the log of a gamma variate: the trigamma function).
    nu = 32
    n = 20000
    band = np.ones(n, dtype=bool)
    rng = np.random.default_rng(12345)
    h2 = 10 ** (rng.uniform(-1, 1, n))
    target = np.ones(n)
    drive = target / h2
    k_burn = 40  # (1−γ)^40 ≤ 1e-6 for γ ≥ 0.3: transient gone
    for _ in range(k_burn):
        control = drive * h2 * rng.chisquare(nu, n) / nu
        drive = eq.update_drive(drive, target, control, gain=gamma, max_step_db=100.0,
                                band=band).drive_psd
    err = 10 * np.log10(drive * h2 / target)
    sigma2 = (10 / np.log(10)) ** 2 * special.polygamma(1, nu / 2)
    pred = gamma / (2 - gamma) * sigma2
    s2 = err.var(ddof=1)
    # standard error of a sample variance from its fourth central moment (CLT); 4 se bound
    m4 = np.mean((err - err.mean()) ** 4)
    se = np.sqrt((m4 - s2**2) / n)
    assert abs(s2 - pred) < 4 * se, (s2, pred, se)


@pytest.mark.parametrize("correct", [False, True])
def test_steady_state_mean_error_and_log_bias_correction(correct):
    # The direct law in dB settles where E[10 log10 Ĉ] = 10 log10 R, i.e. the true control sits
    # above target by −E[10 log10(χ²_ν/ν)] = 4.343·(ln(ν/2) − ψ(ν/2)) (digamma, scipy). With
    # control_dof the bias is removed and the mean true error is 0.
    nu, n, gamma = 16, 20000, 0.5
    band = np.ones(n, dtype=bool)
    rng = np.random.default_rng(99)
    target = np.ones(n)
    drive = target.copy()
    for _ in range(30):
        control = drive * rng.chisquare(nu, n) / nu
        drive = eq.update_drive(drive, target, control, gain=gamma, max_step_db=100.0,
                                band=band, control_dof=nu if correct else None).drive_psd
    err = 10 * np.log10(drive)
    expect = 0.0 if correct else 10 / np.log(10) * (np.log(nu / 2) - special.digamma(nu / 2))
    se = err.std(ddof=1) / np.sqrt(n)
    assert abs(err.mean() - expect) < 4 * se, (err.mean(), expect, se)
    assert eq.log_bias_db(nu) == pytest.approx(-10 / np.log(10) * (np.log(nu / 2)
                                                - special.digamma(nu / 2)), rel=1e-12)


# ---- limits ------------------------------------------------------------------------------


def test_step_limit_cuts_each_line_to_max_step():
    band = _band()
    drive = np.ones(N)
    target = np.ones(N)
    control = np.ones(N)
    control[10] = 1e-3  # +30 dB error -> +15 dB wanted at γ=0.5
    control[11] = 1e3  # −30 dB
    control[12] = 10 ** (-0.4)  # +4 dB error -> +2 dB: below the limit
    res = eq.update_drive(drive, target, control, gain=0.5, max_step_db=3.0, band=band)
    assert 10 * np.log10(res.drive_psd[10]) == pytest.approx(3.0, abs=1e-12)
    assert 10 * np.log10(res.drive_psd[11]) == pytest.approx(-3.0, abs=1e-12)
    assert 10 * np.log10(res.drive_psd[12]) == pytest.approx(2.0, abs=1e-12)
    assert res.step_limited[10] and res.step_limited[11] and not res.step_limited[12]
    assert res.n_step_limited == 2


def test_ceiling_scales_down_and_keeps_shape():
    band = _band()
    rng = np.random.default_rng(5)
    drive = rng.uniform(0.5, 2.0, N)
    target = np.ones(N)
    control = np.full(N, 0.25)  # everything 6 dB low -> drive wants +3 dB (γ=0.5)
    df = 1.5
    ceiling = 0.8 * drive[band].sum() * df
    res = eq.update_drive(drive, target, control, gain=0.5, max_step_db=6.0, band=band,
                          ceiling_ms_fs2=ceiling, df_hz=df)
    assert res.ceiling_hit
    assert res.drive_ms_fs2 == pytest.approx(ceiling, rel=1e-12)
    ratio = res.drive_psd[band] / drive[band]
    np.testing.assert_allclose(ratio, ratio[0], rtol=1e-12)
    assert res.ceiling_scale == pytest.approx(0.8 / 2.0, rel=1e-12)  # (R/Ĉ)^γ = 4^0.5 = 2
    with pytest.raises(ValueError, match="df_hz"):
        eq.update_drive(drive, target, control, gain=0.5, max_step_db=6.0, band=band,
                        ceiling_ms_fs2=ceiling)


def test_frozen_and_unusable_lines_are_held_and_band_edges_stay_zero():
    band = _band()
    drive = np.ones(N)
    drive[~band] = 5.0  # garbage outside the band must become 0
    target = np.ones(N)
    control = np.full(N, 0.5)
    control[20] = 0.0
    control[21] = np.nan
    frozen = np.zeros(N, dtype=bool)
    frozen[30] = True
    res = eq.update_drive(drive, target, control, gain=1.0, max_step_db=6.0, band=band,
                          frozen=frozen)
    assert res.drive_psd[20] == 1.0 and res.drive_psd[21] == 1.0 and res.drive_psd[30] == 1.0
    assert res.held[[20, 21, 30]].all() and res.n_held == 3
    assert np.all(res.drive_psd[~band] == 0.0)
    np.testing.assert_allclose(res.drive_psd[40], 2.0)  # +3.01 dB at γ = 1
    assert np.isfinite(res.drive_psd).all()


def test_bad_arguments_are_refused():
    band = _band()
    one = np.ones(N)
    with pytest.raises(ValueError, match="law"):
        eq.update_drive(one, one, one, gain=0.5, max_step_db=3, band=band, law="magic")
    with pytest.raises(ValueError, match="h1"):
        eq.update_drive(one, one, one, gain=0.5, max_step_db=3, band=band, law="blend")
    with pytest.raises(ValueError, match="gain"):
        eq.update_drive(one, one, one, gain=1.5, max_step_db=3, band=band)
    with pytest.raises(ValueError, match="band"):
        eq.update_drive(one, one, one, gain=0.5, max_step_db=3, band=np.zeros(N, bool))
