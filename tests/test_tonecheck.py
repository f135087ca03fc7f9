"""Drive headroom of sine-on-random: random clip level plus the tones' drive amplitudes.

Outside references: the triangle inequality |Σ x_i| <= Σ |x_i| (the worst case of peaks that
add); the steady-state gain of a linear filter at a frequency, |H(f)| from scipy.signal.freqz
(Oppenheim & Schafer, Discrete-Time Signal Processing, 3rd ed., §2.6); the 3-sigma peak of an
unclipped Gaussian drive ([common practice], as in the rig feasibility budgets).
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

from liveshape.control.tonecheck import tone_drive_headroom
from liveshape.testdef.tone_spec import ToneSpec

FS = 8000.0
ROOT = Path(__file__).resolve().parents[1]


def test_without_an_frf_the_tones_are_amplitude_over_g_per_fs():
    tones = [ToneSpec(100.0, 0.6), ToneSpec(300.0, 0.2)]
    h = tone_drive_headroom(tones, 0.1, g_per_fs=4.0, limit_fs=1.0, clip_sigma=4.0)
    assert h.tone_drive_fs == pytest.approx((0.15, 0.05))
    assert h.peak_fs == pytest.approx(4.0 * 0.1 + 0.2)
    assert h.headroom_db == pytest.approx(20 * math.log10(1.0 / 0.6))
    assert h.ok and h.binding == "random"
    h3 = tone_drive_headroom(tones, 0.1, g_per_fs=4.0, limit_fs=1.0, clip_sigma=None)
    assert h3.random_peak_fs == pytest.approx(0.3)  # 3σ [common practice]
    big = tone_drive_headroom([ToneSpec(100.0, 4.0)], 0.1, g_per_fs=4.0, limit_fs=1.0,
                              clip_sigma=4.0)
    assert not big.ok and big.binding == "tone 0 (100 Hz)" and big.headroom_db < 0


def test_swept_tone_takes_the_least_gain_of_its_range():
    w0 = 2 * math.pi * 300.0
    b, a = scipy.signal.bilinear([w0 / 10, w0**2], [1.0, w0 / 10, w0**2], fs=FS)

    def h_abs(f):
        return np.abs(scipy.signal.freqz(b, a, worN=np.asarray(f, float), fs=FS)[1])

    tone = ToneSpec(100.0, 1.0, f_hi_hz=1200.0, rate_oct_min=1.0)
    h = tone_drive_headroom([tone], 0.0, g_per_fs=1.0, limit_fs=1.0, clip_sigma=4.0,
                            h_abs=h_abs)
    least = h_abs(np.geomspace(100.0, 1200.0, 4000)).min()  # dense reference grid
    assert h.tone_drive_fs[0] == pytest.approx(1.0 / least, rel=0.01)


def test_the_bound_holds_on_a_synthesized_drive():
    rng = np.random.default_rng(1)
    sigma, k = 0.1, 4.0
    x = np.clip(sigma * rng.standard_normal(200000), -k * sigma, k * sigma)
    t = np.arange(x.size) / FS
    tones = [ToneSpec(97.0, 0.3), ToneSpec(251.3, 0.1)]
    y = x + sum(tn.amplitude_g * np.cos(2 * np.pi * tn.f_hz * t + 0.3 * i)
                for i, tn in enumerate(tones))
    h = tone_drive_headroom(tones, sigma, g_per_fs=1.0, limit_fs=1.0, clip_sigma=k)
    assert np.max(np.abs(y)) <= h.peak_fs  # triangle inequality
    assert np.max(np.abs(y)) > 0.8 * h.peak_fs  # and the bound is not loose by much


def _check(tmp_path, amplitude_g):
    spec = tmp_path / "sor.yaml"
    spec.write_text(
        "profile:\n  breakpoints:\n    - {f_hz: 100, asd: 0.001}\n    - {f_hz: 1000, asd: 0.001}\n"
        f"tones:\n  - {{f_hz: 300, amplitude_g: {amplitude_g}}}\n", encoding="utf-8")
    return subprocess.run([sys.executable, "-m", "liveshape", "check", str(spec), "--rig", "sim",
                           "--json"], capture_output=True, text=True, cwd=ROOT)


def test_check_reports_the_drive_peak_with_tones_and_fails_when_it_binds(tmp_path):
    ok = _check(tmp_path, 0.5)
    assert ok.returncode == 0, ok.stderr
    rig = json.loads(ok.stdout)["rig"]
    assert rig["drive_peak_ok"] and rig["drive_peak_fs"] > rig["random_peak_fs"]
    bad = _check(tmp_path, 50)
    assert bad.returncode == 3, bad.stderr
    rig = json.loads(bad.stdout)["rig"]
    assert rig["drive_peak_binding"] == "tone 0 (300 Hz)" and not rig["feasible"]
    assert rig["drive_peak_headroom_db"] < 0
