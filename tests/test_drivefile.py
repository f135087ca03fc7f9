"""Tests of liveshape.record.drivefile: streamed WAV + JSON sidecar, verification, crest selection.

Statistical checks use bounds with a false-failure probability of about 1e-4 (4-sigma normal or
exact binomial quantiles), fixed before looking at the data; seeds are fixed.
"""

from __future__ import annotations

import json
import math
import os
import tracemalloc
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from scipy import signal, stats
from scipy.special import polygamma, psi

from liveshape.dsp.profile import Profile
from liveshape.dsp.synth import RandomPhaseSynth
from liveshape.errors import ConfigError
from liveshape.record.drivefile import EDGE_LINES, DriveFileResult, make_drive_file
from liveshape.testdef.spec import ControlSettings, SafetyLimits, TestSpec

P_FAIL = 1e-4
Z4 = 4.0  # two-sided normal bound, P = 6.3e-5

SIDECAR_KEYS = {
    "path", "fs_hz", "duration_s", "seed", "frame_length", "full_scale_g", "rms_g",
    "crest_factor", "kurtosis", "clipped_fraction", "tries", "settings", "psd_check",
}  # fmt: skip
CHECK_KEYS = {
    "dof", "mean_dev_db", "max_dev_db", "chi2_90_lo_db", "chi2_90_hi_db", "fraction_inside",
}  # fmt: skip


def small_spec(seed: int | None = 5, clip_sigma: float | None = 4.0) -> TestSpec:
    # invented demo profile: +6 dB/oct to a plateau, -6 dB/oct above 1 kHz
    prof = Profile((50.0, 100.0, 1000.0, 2000.0), (0.001, 0.004, 0.004, 0.001), name="demo")
    return TestSpec(
        name="demo",
        profile=prof,
        control=ControlSettings(fs_hz=8000.0, frame_length=512),
        safety=SafetyLimits(clip_sigma=clip_sigma),
        seed=seed,
        source="demo.yaml",
    )


@pytest.mark.parametrize("clip_sigma", [4.0, None])  # one pass / statistics + writing pass
def test_wav_matches_sidecar_and_psd_check_passes(tmp_path, clip_sigma):
    spec = small_spec(clip_sigma=clip_sigma)
    out = tmp_path / "drive.wav"
    res = make_drive_file(spec, out, duration_s=20.0)
    assert isinstance(res, DriveFileResult)
    assert sorted(os.listdir(tmp_path)) == ["drive.json", "drive.wav"]  # nothing else left

    info = sf.info(str(out))
    assert (info.samplerate, info.channels, info.subtype, info.frames) == (8000, 1, "FLOAT", 160000)
    y, fs = sf.read(str(out), dtype="float32")
    assert np.max(np.abs(y)) == 1.0  # the peak is at full scale, nothing beyond
    x = y.astype(np.float64) * res.full_scale_g  # sample * full_scale_g = acceleration in g

    side = json.loads((tmp_path / "drive.json").read_text())
    assert SIDECAR_KEYS <= set(side) and CHECK_KEYS <= set(side["psd_check"])
    assert side == json.loads(json.dumps(res.to_dict()))
    assert side["path"] == str(out) and side["seed"] == 5 and side["tries"] == 1
    # statistics of the file read back (numpy/scipy as reference); float32 rounding: 6e-8
    assert side["rms_g"] == pytest.approx(np.sqrt(np.mean(x**2)), rel=1e-6)
    assert side["crest_factor"] == pytest.approx(np.max(np.abs(x)) / side["rms_g"], rel=1e-6)
    assert side["kurtosis"] == pytest.approx(stats.kurtosis(x, fisher=False), rel=1e-5)
    n_full = np.count_nonzero(np.abs(y) == 1.0)
    if clip_sigma is None:
        assert side["clipped_fraction"] == 0.0 and n_full == 1  # only the peak is at full scale
    else:
        # full scale is the clip level: the clipped samples read back as +-1
        nominal = math.sqrt(np.sum(spec.profile.lines(8000.0, 512)) * 8000.0 / 512)  # Parseval
        assert side["full_scale_g"] == pytest.approx(clip_sigma * nominal, rel=1e-12)
        assert round(side["clipped_fraction"] * y.size) == n_full > 1
    # Parseval: the rms is the target grms (clipping at 4 sigma removes < 0.1 % of the power);
    # the relative error of an rms from N_eff ~ 2 B T independent samples is 1/sqrt(4 B T)
    bt = (2000.0 - 50.0) * res.duration_s  # bandwidth x duration [Bendat & Piersol, mem]
    assert abs(res.rms_g / spec.profile.grms - 1) < Z4 / math.sqrt(4 * bt) + 1e-3

    chk = side["psd_check"]
    # independent estimate with scipy: Welch, Hann, 50 %, nperseg = frame_length
    f, pxx = signal.welch(x, fs, window="hann", nperseg=512, noverlap=256)
    lines = spec.profile.lines(fs, 512)
    df = fs / 512
    sel = (f >= 50 + EDGE_LINES * df) & (f <= 2000 - EDGE_LINES * df)
    dev = 10 * np.log10(pxx[sel] / lines[sel])
    assert chk["n_lines"] == sel.sum()
    assert chk["mean_dev_db"] == pytest.approx(dev.mean(), abs=1e-6)
    assert chk["max_dev_db"] == pytest.approx(np.max(np.abs(dev)), abs=1e-6)
    # Welch 1967 DOF for K Hann segments at 50 %, c = overlap correlation of the window
    k = (x.size - 512) // 256 + 1
    w = signal.get_window("hann", 512)
    c = np.sum(w[:256] * w[256:]) / np.sum(w**2)
    dof = 2 * k / (1 + 2 * c**2 * (k - 1) / k)
    assert chk["dof"] == pytest.approx(dof, rel=1e-3)
    # Bendat & Piersol: estimate / true ~ chi2(dof) / dof; 90 % range in dB
    assert chk["chi2_90_lo_db"] == pytest.approx(10 * math.log10(stats.chi2.ppf(0.05, dof) / dof))
    assert chk["chi2_90_hi_db"] == pytest.approx(10 * math.log10(stats.chi2.ppf(0.95, dof) / dof))
    # the record passes: ~90 % of lines inside (adjacent Hann lines correlated: count half the
    # lines as independent, binomial bounds), and the mean dB deviation is the chi-square
    # log-bias 4.343 (psi(v/2) - ln(v/2)) within 4 standard errors (gamma distribution)
    m = chk["n_lines"] // 2
    lo, hi = stats.binom.interval(1 - P_FAIL, m, 0.9)
    assert lo / m <= chk["fraction_inside"] <= hi / m
    mean_exp = 10 / math.log(10) * (psi(dof / 2) - math.log(dof / 2))
    sd = 10 / math.log(10) * math.sqrt(polygamma(1, dof / 2))
    assert abs(chk["mean_dev_db"] - mean_exp) < Z4 * sd / math.sqrt(m)
    assert chk["f_lo_hz"] >= 50 + EDGE_LINES * df and chk["f_hi_hz"] <= 2000 - EDGE_LINES * df


def test_same_seed_same_file_and_seed_recorded(tmp_path):
    a = make_drive_file(small_spec(seed=None), tmp_path / "a.wav", duration_s=2.0, seed=42)
    b = make_drive_file(small_spec(seed=42), tmp_path / "b.wav", duration_s=2.0)
    assert a.seed == b.seed == 42
    ya, _ = sf.read(str(tmp_path / "a.wav"), dtype="float32")
    yb, _ = sf.read(str(tmp_path / "b.wav"), dtype="float32")
    assert np.array_equal(ya, yb)
    # no seed anywhere: a fresh one is drawn and recorded, and it reproduces the file
    c = make_drive_file(small_spec(seed=None), tmp_path / "c.wav", duration_s=2.0)
    make_drive_file(small_spec(seed=None), tmp_path / "d.wav", duration_s=2.0, seed=c.seed)
    yc, _ = sf.read(str(tmp_path / "c.wav"), dtype="float32")
    yd, _ = sf.read(str(tmp_path / "d.wav"), dtype="float32")
    assert np.array_equal(yc, yd)


def _crest_of_realization(spec, seed, k, n):
    """Realization k as documented: default_rng(SeedSequence([seed, k]))."""
    rng = np.random.default_rng(np.random.SeedSequence([seed, k]))
    s = RandomPhaseSynth(spec.control.fs_hz, spec.control.frame_length, seed=rng)
    s.set_psd(spec.profile.lines(spec.control.fs_hz, spec.control.frame_length))
    s.read(n)
    return s.stats.crest_factor


def test_crest_selection_honours_the_limits(tmp_path):
    spec = small_spec(seed=7, clip_sigma=None)
    n = 16000
    crests = [_crest_of_realization(spec, 7, k, n) for k in range(10)]
    limit = sorted(crests)[3]  # at least one realization meets crest <= limit, some do not
    first_ok = next(k for k, c in enumerate(crests) if c <= limit)
    res = make_drive_file(spec, tmp_path / "c.wav", duration_s=2.0, crest_max=limit)
    assert res.tries == first_ok + 1
    assert res.crest_factor == pytest.approx(crests[first_ok], rel=1e-12)
    y, _ = sf.read(str(tmp_path / "c.wav"), dtype="float32")
    crest_file = np.max(np.abs(y)) / np.sqrt(np.mean(y.astype(float) ** 2))
    assert crest_file <= limit * (1 + 1e-6)  # float32 rounding
    lo = sorted(crests)[-3]
    res2 = make_drive_file(spec, tmp_path / "d.wav", duration_s=2.0, crest_min=lo, crest_max=9.0)
    assert res2.crest_factor >= lo


def test_crest_selection_with_clipping_rewrites_until_accepted(tmp_path):
    spec = small_spec(seed=3, clip_sigma=4.5)
    first = make_drive_file(spec, tmp_path / "a.wav", duration_s=2.0)
    assert first.tries == 1
    # a limit just below the first realization's crest factor forces another one
    res = make_drive_file(
        spec, tmp_path / "b.wav", duration_s=2.0, crest_max=first.crest_factor * 0.999
    )
    assert res.tries >= 2 and res.crest_factor < first.crest_factor * 0.999
    y, _ = sf.read(str(tmp_path / "b.wav"), dtype="float32")
    x = y.astype(float) * res.full_scale_g
    assert np.max(np.abs(x)) / np.sqrt(np.mean(x**2)) == pytest.approx(res.crest_factor, rel=1e-6)
    assert y.size == res.n_samples  # the rewritten file holds one realization, not several


def test_max_tries_spent_is_an_error_and_leaves_nothing(tmp_path):
    spec = small_spec(clip_sigma=3.0)
    with pytest.raises(ConfigError, match=r"crest_min = 6.*max_tries = 2.*best crest factor"):
        make_drive_file(spec, tmp_path / "x.wav", duration_s=2.0, crest_min=6.0, max_tries=2)
    assert os.listdir(tmp_path) == []


def test_interrupted_run_leaves_no_partial_output_and_keeps_the_old_file(tmp_path):
    out = tmp_path / "drive.wav"
    old = make_drive_file(small_spec(seed=1), out, duration_s=2.0)
    before = out.read_bytes(), (tmp_path / "drive.json").read_bytes()

    def interrupt(fraction):
        if fraction > 0.75:  # inside the writing pass
            raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        make_drive_file(small_spec(seed=2), out, duration_s=4.0, progress=interrupt)
    assert sorted(os.listdir(tmp_path)) == ["drive.json", "drive.wav"]
    assert (out.read_bytes(), (tmp_path / "drive.json").read_bytes()) == before
    assert old.seed == 1


def test_progress_is_monotonic_and_ends_at_one(tmp_path):
    seen = []
    # 40 s at 8 kHz is five blocks per pass
    make_drive_file(small_spec(), tmp_path / "p.wav", duration_s=40.0, progress=seen.append)
    assert seen[-1] == 1.0 and all(b >= a for a, b in zip(seen, seen[1:], strict=False))
    assert any(0.0 < f < 0.5 for f in seen) and any(0.5 < f < 1.0 for f in seen)


@pytest.mark.parametrize(
    ("path", "match"),
    [
        ("missing/drive.wav", "does not exist"),
        ("afile/drive.wav", "does not exist"),
        ("drive.flac", "must end in .wav"),
    ],
)
def test_bad_output_path_is_a_config_error_naming_it(tmp_path, path, match):
    (tmp_path / "afile").write_text("x")
    target = tmp_path / path
    with pytest.raises(ConfigError, match=match) as err:
        make_drive_file(small_spec(), target, duration_s=1.0)
    assert str(target) in str(err.value)


def test_unwritable_folder_is_a_config_error_naming_the_path():
    target = Path("/proc/liveshape-drive.wav")  # procfs refuses new files, even for root
    with pytest.raises(ConfigError, match="liveshape-drive.wav"):
        make_drive_file(small_spec(), target, duration_s=1.0)


@pytest.mark.parametrize(
    ("kw", "match"),
    [
        ({"fs_hz": 4000}, r"fs_hz = 4000 .*f_max_hz = 2000"),
        ({"fs_hz": 8000.5}, "fs_hz"),
        ({"duration_s": 0.01}, "duration_s"),
        ({"clip_sigma": 2.0}, r"clip_sigma = 2\.0.*IEC 60068-2-64"),
        ({"crest_min": 5.0, "crest_max": 4.0}, "crest_min"),
        ({"max_tries": 0}, "max_tries"),
        ({"seed": -1}, "seed"),
    ],
)
def test_bad_options_are_refused(tmp_path, kw, match):
    args = {"duration_s": 1.0} | kw
    with pytest.raises(ConfigError, match=match):
        make_drive_file(small_spec(), tmp_path / "x.wav", **args)
    assert os.listdir(tmp_path) == []


def test_memory_does_not_grow_with_duration(tmp_path):
    spec = small_spec()
    peaks = []
    for duration in (16.0, 128.0):
        tracemalloc.start()
        make_drive_file(spec, tmp_path / "m.wav", duration_s=duration)
        peaks.append(tracemalloc.get_traced_memory()[1])
        tracemalloc.stop()
    record_bytes = 128.0 * 8000 * 8  # the long record as float64
    # streaming: 8x the duration costs no more working memory (10 % allowance for allocator
    # noise), and far less than the record itself
    assert peaks[1] < 1.1 * peaks[0]
    assert peaks[1] < record_bytes / 2
