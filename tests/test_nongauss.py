"""Tests of the non-Gaussian drive (liveshape.dsp.nongauss, synth/drive files with a kurtosis).

Statistical tolerances are fixed before looking at the data: a check fails by chance with
probability about 1e-4 (4-sigma normal bounds on block-scatter standard errors, or exact 1e-4
quantiles). Seeds are fixed. scipy.stats.kurtosis(fisher=False) is the reference estimator.
"""

from __future__ import annotations

import hashlib
import json
import math
import subprocess
import sys

import numpy as np
import pytest
import soundfile as sf
from scipy import integrate, signal, stats

from liveshape.dsp.nongauss import (
    FrameGains,
    clip_sigma_needed,
    clipped_kurtosis,
    kurtosis_confidence,
)
from liveshape.dsp.profile import Profile
from liveshape.dsp.synth import RandomPhaseSynth
from liveshape.errors import ConfigError
from liveshape.record.drivefile import make_drive_file
from liveshape.testdef.spec import ControlSettings, SafetyLimits, TestSpec

Z4 = 4.0  # two-sided normal bound, P = 6.3e-5
P_FAIL = 1e-4


def band_synth(kurtosis, seed=3, fs=8000.0, n=512, amplitudes="fixed"):
    s = RandomPhaseSynth(fs, n, seed=seed, kurtosis=kurtosis, amplitudes=amplitudes)
    f = s.f_hz
    psd = np.where((f >= 100) & (f <= 3000), 2e-4, 0.0)
    s.set_psd(psd)
    return s, psd


@pytest.mark.parametrize("target", [4.0, 6.0, 8.0])
def test_stream_kurtosis_meets_the_target_within_its_block_scatter(target):
    s, _ = band_synth(target, seed=11)
    x = s.read(8000 * 400)
    k_ref = stats.kurtosis(x, fisher=False)  # reference estimator
    conf = kurtosis_confidence(x, 64 * s.hop * 2)  # blocks of 2 groups of frame gains
    assert conf.kurtosis == pytest.approx(k_ref, rel=1e-9)
    assert conf.n_blocks >= 20
    # batch means [common practice]: the record's estimate scatters with block_std / sqrt(B)
    assert abs(k_ref - target) < Z4 * conf.std_error
    # and the bound is informative: well below the distance to the Gaussian value
    assert Z4 * conf.std_error < 0.5 * (target - 3.0)


def test_without_a_target_the_stream_is_the_gaussian_one_sample_for_sample():
    a, _ = band_synth(None, amplitudes="rayleigh")
    b, _ = band_synth(3.0, amplitudes="rayleigh")
    assert np.array_equal(a.read(20000), b.read(20000))


def test_frame_gains_have_unit_mean_square_and_exact_group_power():
    rng = np.random.default_rng(5)
    g = FrameGains(6.0, rng, group=64)
    a = np.array([g.next() for _ in range(64 * 2000)])
    p = (a**2).reshape(-1, 64).mean(axis=1)
    assert np.allclose(p, 1.0, rtol=1e-12)  # every group of 64 frames has the Gaussian power
    # a^2 / M ~ Beta(s, (M - 1) s) (gamma shares, Johnson, Kotz & Balakrishnan ch. 25 [from
    # memory]): E[a^4] = M^2 s (s + 1) / (M s (M s + 1))
    s, m = g.shape, 64
    beta = stats.beta(s, (m - 1) * s)
    e4 = m**2 * beta.moment(2)
    assert e4 == pytest.approx(g.fourth_moment, rel=1e-9)
    sd = m**2 * math.sqrt(beta.moment(4) - beta.moment(2) ** 2) / math.sqrt(a.size)
    assert abs(np.mean(a**4) - e4) < Z4 * sd * 2  # x2: gains within a group are dependent


def test_psd_is_kept_welch_inside_the_chi2_band():
    fs, n = 8000.0, 512
    s, psd = band_synth(6.0, seed=4, fs=fs, n=n)
    x = s.read(n * 64 * 40)  # 40 groups of gains
    fw, pxx = signal.welch(x, fs, window="hann", nperseg=n, noverlap=n // 2, detrend=False)
    k = (x.size - n) // (n // 2) + 1
    # Welch 1967: DOF = 2K / (1 + 2 c^2 (K-1)/K), c = overlap correlation of the window
    w = signal.get_window("hann", n)
    c = np.sum(w[: n // 2] * w[n // 2 :]) / np.sum(w**2)
    dof = 2 * k / (1 + 2 * c**2 * (k - 1) / k)
    inner = (fw >= 100 + 3 * s.delta_f) & (fw <= 3000 - 3 * s.delta_f)
    r_db = 10 * np.log10(pxx[inner] / psd[inner])
    # Bendat & Piersol, Random Data: estimate/true ~ chi2(dof)/dof; 90 % interval in dB
    lo = 10 * math.log10(stats.chi2.ppf(0.05, dof) / dof)
    hi = 10 * math.log10(stats.chi2.ppf(0.95, dof) / dof)
    inside = np.mean((r_db > lo) & (r_db < hi))
    m = int(inner.sum()) // 2  # adjacent Hann lines correlated: every other line independent
    blo, _ = stats.binom.interval(1 - P_FAIL, m, 0.9)
    assert inside >= blo / m
    # level: the band power equals the target's (E[a^2] = 1 and exact group power)
    assert abs(np.mean(pxx[inner]) / 2e-4 - 1.0) < 0.02


def test_clipped_kurtosis_of_the_laplace_case_matches_numerical_integration():
    # Kurtosis 6 is a normal scale mixture with exponential variance: the Laplace distribution
    # (Andrews & Mallows 1974); clip it at c and integrate with scipy as the reference.
    lap = stats.laplace(scale=1 / math.sqrt(2))  # unit variance
    for c in (3.0, 4.0, 6.0):
        e2 = 2 * integrate.quad(lambda x: x**2 * lap.pdf(x), 0, c)[0] + c**2 * 2 * lap.sf(c)
        e4 = 2 * integrate.quad(lambda x: x**4 * lap.pdf(x), 0, c)[0] + c**4 * 2 * lap.sf(c)
        assert clipped_kurtosis(6.0, c) == pytest.approx(e4 / e2**2, rel=1e-6)
    assert clipped_kurtosis(6.0, 1e3) == pytest.approx(6.0, rel=1e-9)
    assert clipped_kurtosis(6.0, clip_sigma_needed(6.0)) == pytest.approx(6.0 * 0.98, rel=1e-4)


def small_spec(clip_sigma=8.0):
    prof = Profile((50.0, 100.0, 1000.0, 2000.0), (0.001, 0.004, 0.004, 0.001), name="demo")
    return TestSpec(
        name="demo",
        profile=prof,
        control=ControlSettings(fs_hz=8000.0, frame_length=512),
        safety=SafetyLimits(clip_sigma=clip_sigma),
        seed=5,
        source="demo.yaml",
    )


def test_drive_file_reports_kurtosis_with_its_confidence(tmp_path):
    out = tmp_path / "k.wav"
    res = make_drive_file(small_spec(), out, duration_s=300.0, kurtosis=5.0)
    x, _ = sf.read(out, dtype="float64")
    side = json.loads(out.with_suffix(".json").read_text())
    kc = side["kurtosis_check"]
    assert kc["kurtosis"] == pytest.approx(stats.kurtosis(x, fisher=False), rel=1e-4)
    assert abs(kc["kurtosis"] - 5.0) < Z4 * kc["std_error"]
    # Joanes & Gill 1998: sqrt(24/N) is the standard error for independent normal samples;
    # the bursty drive's error is far larger, and the record length for +-0.1 follows 1/N
    assert kc["gaussian_std_error"] == pytest.approx(math.sqrt(24 / x.size))
    assert kc["std_error"] > 3 * kc["gaussian_std_error"]
    assert kc["samples_for_0.1"] == math.ceil(x.size * (1.645 * kc["std_error"] / 0.1) ** 2)
    assert side["settings"]["kurtosis_target"] == 5.0
    assert res.psd_check.fraction_inside > 0.75


def test_clip_level_that_caps_the_kurtosis_is_refused_and_nothing_written(tmp_path):
    out = tmp_path / "k.wav"
    with pytest.raises(ConfigError, match=r"clip_sigma = 4 would cut kurtosis = 6 .*>= 6\.3"):
        make_drive_file(small_spec(clip_sigma=4.0), out, duration_s=5.0, kurtosis=6.0)
    assert list(tmp_path.iterdir()) == []
    make_drive_file(small_spec(clip_sigma=None), out, duration_s=5.0, kurtosis=6.0)  # no clip
    assert out.exists()


@pytest.mark.parametrize("bad", [2.5, 25.0])
def test_kurtosis_out_of_range_is_refused(tmp_path, bad):
    with pytest.raises(ConfigError, match=rf"kurtosis = {bad} must be >= 3"):
        make_drive_file(small_spec(), tmp_path / "k.wav", duration_s=5.0, kurtosis=bad)


def _samples_sha(path):
    # the WAV's PEAK chunk carries a time stamp: compare the samples, not the file
    x, _ = sf.read(path, dtype="float32")
    return hashlib.sha256(x.tobytes()).hexdigest()


def test_gaussian_drive_file_is_unchanged_by_an_explicit_target_of_3(tmp_path):
    a, b = tmp_path / "a.wav", tmp_path / "b.wav"
    make_drive_file(small_spec(4.0), a, duration_s=10.0)
    make_drive_file(small_spec(4.0), b, duration_s=10.0, kurtosis=3.0)
    assert _samples_sha(a) == _samples_sha(b)
    # the Gaussian file is the plain synthesizer's stream of SeedSequence([seed, 0])
    syn = RandomPhaseSynth(
        8000.0, 512, seed=np.random.default_rng(np.random.SeedSequence([5, 0])), clip_sigma=4.0
    )
    syn.set_psd(small_spec().profile.lines(8000.0, 512))
    ref = syn.read(80000)
    x, _ = sf.read(a, dtype="float64")
    side = json.loads(a.with_suffix(".json").read_text())
    assert np.allclose(x * side["full_scale_g"], ref, rtol=0, atol=1e-6 * side["full_scale_g"])


def run_cli(*args, cwd):
    return subprocess.run(
        [sys.executable, "-m", "liveshape", *args], capture_output=True, text=True, cwd=cwd
    )


def test_cli_refuses_the_capping_clip_level_in_one_line(tmp_path):
    spec = tmp_path / "p.csv"
    spec.write_text("freq_hz,asd_g2_hz\n50,0.001\n100,0.004\n1000,0.004\n2000,0.001\n")
    r = run_cli("synth", str(spec), "--duration", "5", "-o", "k.wav", "--kurtosis", "6",
                "--clip-sigma", "4", cwd=tmp_path)  # fmt: skip
    assert r.returncode == 2
    assert len(r.stderr.strip().splitlines()) == 1 and "clip_sigma = 4" in r.stderr
    assert not (tmp_path / "k.wav").exists()
    r = run_cli("synth", str(spec), "--duration", "5", "-o", "k.wav", "--kurtosis", "6",
                "--clip-sigma", "7", "--json", "--seed", "1", cwd=tmp_path)  # fmt: skip
    assert r.returncode == 0, r.stderr
    assert json.loads(r.stdout)["settings"]["kurtosis_target"] == 6.0
