"""Drive files with sine tones on the random (sine-on-random): `synth` and make_drive_file.

Outside references: the least-squares fit of cos/sin regressors (numpy.linalg.lstsq; the
three-parameter sine fit of IEEE Std 1057) recovers each tone's amplitude within the
Cramér-Rao bound sqrt(2σ²/n) for a sinusoid at known frequency (Kay, Fundamentals of
Statistical Signal Processing: Estimation Theory, 1993, §3.7), where the random's one-sided
PSD G at the tone stands for white noise of the same level, 2σ²/fs = G, so the bound is
sqrt(G/T) [common practice for a record much longer than the noise's correlation time];
the Welch PSD (scipy.signal.welch) with its chi-square band (Bendat & Piersol, Random Data,
4th ed., §8.5); the triangle inequality for the worst-case peak of a sum.
"""

from __future__ import annotations

import json
import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import scipy.signal
import scipy.stats
import soundfile as sf

from liveshape.dsp.profile import Profile
from liveshape.dsp.spectra import welch_dof
from liveshape.dsp.tones import Tone, tone_line_mask
from liveshape.record.drivefile import EDGE_LINES, TONE_LINES, make_drive_file
from liveshape.testdef.spec import ControlSettings, SafetyLimits, TestSpec

ROOT = Path(__file__).resolve().parents[1]
FS = 8000.0
NPER = 512


def spec(clip_sigma=4.0):
    prof = Profile((50.0, 100.0, 1000.0, 2000.0), (0.001, 0.004, 0.004, 0.001), name="demo")
    return TestSpec(name="demo", profile=prof, control=ControlSettings(fs_hz=FS, frame_length=NPER),
                    safety=SafetyLimits(clip_sigma=clip_sigma), seed=11, source="demo.yaml")


def _read(path, res):
    y, _ = sf.read(str(path), dtype="float32")
    return y.astype(np.float64) * res.full_scale_g


@pytest.mark.parametrize("clip_sigma", [4.0, None])
def test_tones_recovered_within_the_cramer_rao_bound_and_random_psd_unchanged(tmp_path,
                                                                                clip_sigma):
    s = spec(clip_sigma)
    tones = [Tone(0.5, 160.0), Tone(0.2, 777.7, phase_rad=1.0)]
    dur = 30.0
    plain = make_drive_file(s, tmp_path / "plain.wav", duration_s=dur)
    res = make_drive_file(s, tmp_path / "sor.wav", duration_s=dur, tones=tones)
    x0, x = _read(tmp_path / "plain.wav", plain), _read(tmp_path / "sor.wav", res)
    n = x.size
    t = np.arange(n) / FS
    # reference fit: offset + cos/sin regressors at the known frequencies
    m = np.column_stack([np.ones(n)] + [g(2 * np.pi * tn.f_hz * t) for tn in tones
                                        for g in (np.cos, np.sin)])
    c, *_ = np.linalg.lstsq(m, x, rcond=None)
    amp = np.hypot(c[1::2], c[2::2])
    for tn, a in zip(tones, amp, strict=True):
        crb = math.sqrt(float(s.profile.asd_at(tn.f_hz)) / (n / FS))  # Kay §3.7, G/T
        assert abs(a - tn.amplitude) < 4 * crb, (tn.f_hz, a, crb)
    # the file never exceeds full scale; with clipping full scale is clip·grms + Σ amplitudes
    assert np.max(np.abs(x)) <= res.full_scale_g * (1 + 1e-7)
    if clip_sigma is not None:
        grms = math.sqrt(np.sum(s.profile.lines(FS, NPER)) * FS / NPER)
        assert res.full_scale_g == pytest.approx(clip_sigma * grms + 0.7, rel=1e-9)
    # the random away from the tones (±3 lines): same PSD as the file without tones, inside
    # the 99 % chi-square band of the Welch estimate (Bendat & Piersol §8.5)
    f, p0 = scipy.signal.welch(x0, FS, nperseg=NPER)
    _, p1 = scipy.signal.welch(x, FS, nperseg=NPER)
    df = FS / NPER
    away = ~tone_line_mask(f, [tn.f_hz for tn in tones], df, 3) & (f >= 60) & (f <= 1990)
    dof = welch_dof((n - NPER) // (NPER // 2) + 1)
    lo, hi = (scipy.stats.chi2.ppf(q, dof) / dof for q in (0.005, 0.995))
    ratio = p1[away] / p0[away]
    assert np.all((ratio > lo) & (ratio < hi))
    # and the sidecar's PSD check leaves the tones' lines out, so it still passes
    side = json.loads((tmp_path / "sor.json").read_text())
    assert [d["f_hz"] for d in side["settings"]["tones"]] == [160.0, 777.7]
    assert side["settings"]["tone_lines_excluded"] == TONE_LINES
    assert side["psd_check"]["n_lines"] < plain.psd_check.n_lines
    assert side["psd_check"]["fraction_inside"] > 0.75
    # the statistics are those of the written sum (read back)
    assert side["rms_g"] == pytest.approx(np.sqrt(np.mean(x**2)), rel=1e-6)
    assert side["crest_factor"] == pytest.approx(np.max(np.abs(x)) / side["rms_g"], rel=1e-6)


def test_swept_tone_is_phase_continuous_in_the_file(tmp_path):
    s = spec()
    tone = Tone(0.5, 100.0, f_hi_hz=1600.0, rate_oct_min=240.0)
    res = make_drive_file(s, tmp_path / "sw.wav", duration_s=4.0, tones=[tone])
    x = _read(tmp_path / "sw.wav", res)
    t = np.arange(x.size) / FS
    phi = tone.phase(t)
    # block-wise fits on the tone's own phase (65536-sample write blocks join inside)
    for k in range(0, x.size - 4000, 4000):
        sl = slice(k, k + 4000)
        m = np.column_stack([np.ones(4000), np.cos(phi[sl]), np.sin(phi[sl])])
        c, *_ = np.linalg.lstsq(m, x[sl], rcond=None)
        # within 4 CRB of the random's plateau (0.004 g²/Hz over 0.5 s; Kay §3.7): amplitude
        # sqrt(G/T), phase sqrt(G/T)/A; a phase jump between write blocks would show here
        crb = math.sqrt(0.004 / 0.5)
        assert abs(math.hypot(c[1], c[2]) - 0.5) < 4 * crb
        assert abs(math.atan2(-c[2], c[1])) < 4 * crb / 0.5
    side = json.loads((tmp_path / "sw.json").read_text())
    assert side["settings"]["tones"][0]["f_hi_hz"] == 1600.0
    # the PSD check keeps only the lines outside the sweep's range and 3 lines beyond it
    df = FS / NPER
    f = np.arange(NPER // 2 + 1) * df
    kept = ((f >= 50 + EDGE_LINES * df - 1e-9) & (f <= 2000 - EDGE_LINES * df + 1e-9)
            & ~((f >= 100 - TONE_LINES * df - 1e-9) & (f <= 1600 + TONE_LINES * df + 1e-9)))
    assert side["psd_check"]["n_lines"] == kept.sum()


def test_tone_option_of_synth_and_its_errors(tmp_path):
    y = tmp_path / "t.yaml"
    y.write_text("profile:\n  breakpoints:\n    - {f_hz: 100, asd: 0.001}\n"
                 "    - {f_hz: 1000, asd: 0.001}\ncontrol: {fs_hz: 8000, frame_length: 1024}\n"
                 "tones:\n  - {f_hz: 300, amplitude_g: 0.5}\n", encoding="utf-8")
    out = tmp_path / "o.wav"

    def synth(*extra):
        return subprocess.run([sys.executable, "-m", "liveshape", "synth", str(y), "--duration",
                               "3", "--seed", "1", "-o", str(out), "--json", *extra],
                              capture_output=True, text=True, cwd=ROOT)

    ok = synth("--tone", "500:0.25")
    assert ok.returncode == 0, ok.stderr
    tones = json.loads(ok.stdout)["settings"]["tones"]
    assert [(d["f_hz"], d["amplitude_g"]) for d in tones] == [(300.0, 0.5), (500.0, 0.25)]
    out.unlink()
    out.with_suffix(".json").unlink()
    for bad, words in (("5000:0.3", "profile band 100-1000 Hz"), ("50", "F_HZ:AMPLITUDE"),
                       ("300:-1", "must be > 0")):
        r = synth("--tone", bad)
        assert r.returncode == 2 and words in r.stderr, r.stderr
        assert len(r.stderr.strip().splitlines()) == 1 and "Traceback" not in r.stderr
        assert not out.exists() and not out.with_suffix(".json").exists()
