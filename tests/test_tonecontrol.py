"""ToneLoop: the tone fit, the amplitude update law on a simulated linear chain, and removal of
the tones from the control before the random spectrum is estimated.

Outside references: numpy.linalg.lstsq of cos/sin regressors and scipy.optimize.curve_fit as
reference fits; the Cramér-Rao bound σ·sqrt(2/n) for a sinusoid's amplitude at known frequency
(Kay, Fundamentals of Statistical Signal Processing: Estimation Theory, 1993, §3.7); the
steady-state response of a linear filter to a sinusoid, |H(f)| from scipy.signal.freqz
(Oppenheim & Schafer, Discrete-Time Signal Processing, 3rd ed., §2.6); the Welch PSD
(scipy.signal.welch) with its chi-square band (Bendat & Piersol, Random Data, 4th ed., §8.5).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.optimize
import scipy.signal
import scipy.stats

from liveshape.control.tonecontrol import ToneLoop, fit_tone_phases, initial_drive_fs
from liveshape.dsp.spectra import welch_dof
from liveshape.dsp.tones import Tone, fit_tones, tone_line_mask
from liveshape.testdef.tone_spec import ToneSpec

FS = 8000.0


def _ba(f0=300.0, q=10.0):
    """A digital linear chain: the base-excitation SDOF transmissibility
    (ω0/Q s + ω0²) / (s² + ω0/Q s + ω0²) through the bilinear transform."""
    w0 = 2 * math.pi * f0
    return scipy.signal.bilinear([w0 / q, w0**2], [1.0, w0 / q, w0**2], fs=FS)


def test_fixed_tone_fit_is_fit_tones_and_lstsq_and_within_the_cramer_rao_bound():
    rng = np.random.default_rng(3)
    loop = ToneLoop([ToneSpec(120.0, 1.0), ToneSpec(410.0, 0.3)], FS, [1.0, 1.0])
    n0, n, sigma = 12345, 4096, 0.4
    t = (n0 + np.arange(n)) / FS
    clean = 0.8 * np.cos(2 * np.pi * 120 * t + 0.5) + 0.2 * np.cos(2 * np.pi * 410 * t - 2.0)
    y = clean + sigma * rng.standard_normal(n)
    fit = loop.fit(y, n0)
    ref = fit_tones(y, [120.0, 410.0], FS, t0_s=n0 / FS)
    np.testing.assert_allclose(fit.amplitude, ref.amplitude, rtol=1e-9)
    np.testing.assert_allclose(fit.phase_rad, ref.phase_rad, atol=1e-9)
    # reference: lstsq of offset + cos/sin regressors, written out here
    m = np.column_stack([np.ones(n)] + [f(2 * np.pi * fk * t) for fk in (120.0, 410.0)
                                        for f in (np.cos, np.sin)])
    c, *_ = np.linalg.lstsq(m, y, rcond=None)
    np.testing.assert_allclose(fit.amplitude, np.hypot(c[1::2], c[2::2]), rtol=1e-9)
    crb = sigma * math.sqrt(2.0 / n)  # Kay §3.7
    assert np.all(np.abs(fit.amplitude - [0.8, 0.2]) < 4 * crb)
    np.testing.assert_allclose(ToneLoop.remove(y, fit), y - m[:, 1:] @ c[1:], atol=1e-9)


def test_swept_tone_fit_matches_curve_fit():
    rng = np.random.default_rng(4)
    spec = ToneSpec(100.0, 1.0, f_hi_hz=1600.0, rate_oct_min=240.0)  # 4 oct/s
    loop = ToneLoop([spec], FS, [1.0])
    n0, n = 5000, 2048
    phi = Tone(1.0, 100.0, 1600.0, 240.0).phase((n0 + np.arange(n)) / FS)
    y = 0.7 * np.cos(phi + 0.9) + 0.3 * rng.standard_normal(n)
    fit = fit_tone_phases(y, phi[None, :])
    assert np.allclose(loop.fit(y, n0).amplitude, fit.amplitude)

    def model(_, c, a, p):
        return c + a * np.cos(phi + p)

    ref, _ = scipy.optimize.curve_fit(model, np.arange(n), y, p0=[0.0, 0.5, 0.5])
    assert fit.amplitude[0] == pytest.approx(abs(ref[1]), rel=1e-6)
    assert fit.phase_rad[0] == pytest.approx(ref[2], abs=1e-6)


def _run_loop(loop, b, a, g_per_fs, n_updates, block, rng, sigma_fs=0.02):
    """Drive = white random + the loop's tones through the filter; control in g."""
    zi = np.zeros(max(len(a), len(b)) - 1)
    out = []
    n0 = 0
    for _ in range(n_updates):
        drive = sigma_fs * rng.standard_normal(block) + loop.read(block)
        resp, zi = scipy.signal.lfilter(b, a, drive, zi=zi)
        out.append((loop.update(drive, g_per_fs * resp, n0), loop.drive_fs.copy()))
        n0 += block
    return out


def test_update_law_reaches_the_targets_within_half_a_db_in_the_stated_updates():
    rng = np.random.default_rng(5)
    b, a = _ba()
    freqs = np.array([150.0, 300.0, 1000.0])
    target = np.array([0.5, 2.0, 0.3])
    g_per_fs = 5.0
    _, h = scipy.signal.freqz(b, a, worN=freqs, fs=FS)
    # start as without an FRF (|H| = 1): off by 20 log10 |H| at each tone
    start = initial_drive_fs(target, g_per_fs)
    err0 = np.abs(20 * np.log10(np.abs(h)))
    assert err0.max() > 15  # the resonance makes a real error to correct
    max_step = 3.0
    loop = ToneLoop([ToneSpec(f, t) for f, t in zip(freqs, target, strict=True)], FS, start,
                    gamma=1.0, max_step_db=max_step, averaging=0.5)
    block = 4096
    stated = math.ceil(err0.max() / max_step) + 2  # step-limited approach, then settling
    hist = _run_loop(loop, b, a, g_per_fs, stated + 6, block, rng)
    for k, (upd, drive_fs) in enumerate(hist):
        # steady-state amplitude of the tones with this drive, from freqz (the reference)
        true_db = 20 * np.log10(drive_fs * np.abs(h) * g_per_fs / target)
        if k < 2:
            assert np.all(np.abs(upd.drive_fs / (start if k == 0 else hist[k - 1][1])) <=
                          10 ** (max_step / 20) * (1 + 1e-12))
        if k >= stated - 1:
            assert np.all(np.abs(true_db) < 0.5), (k, true_db)
            # and the loop's own measurement agrees with it once the ramp is over
            if k >= stated:
                assert np.all(np.abs(upd.error_db) < 0.5)
                assert not upd.alarm.any()
    assert hist[0][0].alarm[1] and hist[0][0].abort[1]  # 300 Hz starts ~20 dB high
    np.testing.assert_allclose(hist[-1][0].gain_g_per_fs, np.abs(h) * g_per_fs, rtol=0.03)


def test_swept_tone_follows_the_gain_within_its_change_over_two_blocks():
    # a sweep 100 -> 1000 Hz at 6 oct/min through the Q = 10 resonance at 300 Hz: the gain
    # used for a block was measured one block earlier and the new amplitude ramps in over the
    # block, so the error is bounded by the range of |H| (freqz) over the last two blocks
    # frequencies plus the fit's scatter (0.3 dB here, Kay §3.7)
    rng = np.random.default_rng(9)
    b, a = _ba()
    loop = ToneLoop([ToneSpec(100.0, 1.0, f_hi_hz=1000.0, rate_oct_min=6.0)], FS, [0.2],
                    averaging=1.0, max_step_db=3.0)
    hist = _run_loop(loop, b, a, 5.0, 120, 2048, rng)
    f = np.array([u.f_hz[0] for u, _ in hist])
    err = np.array([u.error_db[0] for u, _ in hist])

    def h_db(fr):
        return 20 * np.log10(np.abs(scipy.signal.freqz(b, a, worN=fr, fs=FS)[1]))

    # the range of 20 log10 |H| over the frequencies of the last two blocks
    change = np.array([np.ptp(h_db(np.geomspace(f[k - 2], f[k], 16)))
                       for k in range(2, f.size)])
    assert f.max() > 700 and change.max() > 2.0  # the sweep crossed the resonance
    assert np.all(np.abs(err[4:]) <= change[2:] + 0.3)


def test_level_scales_the_target():
    rng = np.random.default_rng(6)
    b, a = _ba()
    loop = ToneLoop([ToneSpec(200.0, 1.0)], FS, [0.1], max_step_db=20.0)
    zi = np.zeros(len(a) - 1)
    n0 = 0
    for _ in range(6):
        d = 0.01 * rng.standard_normal(4096) + loop.read(4096)
        r, zi = scipy.signal.lfilter(b, a, d, zi=zi)
        loop.update(d, r, n0, level_db=-6.0)
        n0 += 4096
    _, h = scipy.signal.freqz(b, a, worN=[200.0], fs=FS)
    assert 20 * np.log10(loop.drive_fs[0] * abs(h[0])) == pytest.approx(-6.0, abs=0.2)


def test_removal_leaves_the_random_psd_unchanged_away_from_the_tones():
    # white random: the block-wise fit leaves steps of about the fit's scatter (Kay §3.7) at
    # block joins, which a Welch segment across a join sees; over a white random they are far
    # below the band (a random falling by tens of dB towards fs/2 would show them there)
    rng = np.random.default_rng(8)
    n_blocks, block = 40, 8192
    random_fs = 0.1 * rng.standard_normal(n_blocks * block)
    freqs = [250.0, 733.3]
    loop = ToneLoop([ToneSpec(f, 1.0) for f in freqs], FS, [1.0, 0.5])
    y = random_fs + loop.read(random_fs.size)
    cleaned = np.concatenate([
        ToneLoop.remove(y[k * block:(k + 1) * block],
                        loop.fit(y[k * block:(k + 1) * block], k * block))
        for k in range(n_blocks)])
    nper = 1024
    f, p_ref = scipy.signal.welch(random_fs, FS, nperseg=nper)
    _, p_clean = scipy.signal.welch(cleaned, FS, nperseg=nper)
    _, p_tones = scipy.signal.welch(y, FS, nperseg=nper)
    df = FS / nper
    near = tone_line_mask(f, freqs, df, half_width_lines=3)
    assert np.array_equal(near, loop.line_mask(f, df, 0, block, half_width_lines=3))
    away = ~near & (f > 10) & (f < FS / 2 - 10)
    # against the random alone: inside the 99 % chi-square band of a Welch estimate
    # (Bendat & Piersol §8.5; DOF from Welch 1967)
    dof = welch_dof((cleaned.size - nper) // (nper // 2) + 1)
    lo = scipy.stats.chi2.ppf(0.005, dof) / dof
    hi = scipy.stats.chi2.ppf(0.995, dof) / dof
    ratio = p_clean[away] / p_ref[away]
    assert np.all((ratio > lo) & (ratio < hi))
    assert abs(10 * np.log10(ratio).mean()) < 0.05
    # the tones were there (tens of dB) and are gone from their own lines
    on = [int(round(fk / df)) for fk in freqs]
    assert np.all(10 * np.log10(p_tones[on] / p_ref[on]) > 20)
    assert np.all(np.abs(10 * np.log10(p_clean[on] / p_ref[on])) < 3.0)


def test_swept_line_mask_covers_the_range_of_the_block():
    loop = ToneLoop([ToneSpec(100.0, 1.0, f_hi_hz=1600.0, rate_oct_min=240.0)], FS, [1.0])
    f = np.arange(513) * FS / 1024
    df = FS / 1024
    n = 4000  # 0.5 s: 100 Hz to 100·2^2 = 400 Hz at 4 oct/s
    m = loop.line_mask(f, df, 0, n)
    assert m[(f >= 100) & (f <= 400 * 2 ** (-1 / 4000 * 4 / FS))].all()
    assert not m[f < 100 - 2.01 * df].any() and not m[f > 400 + 2.01 * df].any()


def test_drive_cap_and_no_step_in_the_tones():
    loop = ToneLoop([ToneSpec(100.0, 1.0), ToneSpec(200.0, 1.0)], FS, [0.4, 0.4],
                    max_drive_fs=0.5)
    assert loop.drive_fs.sum() == pytest.approx(0.5) and loop.peak_fs == pytest.approx(0.5)
    loop = ToneLoop([ToneSpec(100.0, 1.0)], FS, [0.5])
    x1 = loop.read(1001)
    loop.drive_fs = np.array([0.1])
    x2 = loop.read(1001)
    # a ramped change: no sample-to-sample jump beyond that of the tone itself, 2π f / fs of
    # the amplitude per sample, plus the ramp's own slope
    bound = 2 * np.pi * 100 / FS * 0.5 + 0.4 / 1001
    assert np.max(np.abs(np.diff(np.concatenate([x1, x2])))) <= bound * 1.01
