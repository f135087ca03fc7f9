"""Sine tones on random: phase-continuous fixed and swept tones, their least-squares fit, and
the lines that hold them.

Outside references: the tone A cos(2π f t + φ) itself; the instantaneous frequency as the
derivative of the phase over 2π (numpy.gradient); the duration of a log sweep, octaves ÷ rate;
scipy.optimize.curve_fit as a reference fit; the Cramér-Rao bound σ·sqrt(2/n) for a sinusoid's
amplitude at known frequency (Kay, Fundamentals of Statistical Signal Processing: Estimation
Theory, 1993, §3.7); the Hann window's main lobe of ±2 lines and first sidelobe at −31.5 dB
(Harris, "On the use of windows for harmonic analysis with the discrete Fourier transform",
Proc. IEEE 66(1), 1978) with scipy.signal.welch.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.optimize
import scipy.signal

from liveshape.dsp.tones import Tone, ToneBank, fit_tones, tone_line_mask
from liveshape.errors import LiveshapeError

FS = 8000.0


def _in_blocks(bank: ToneBank, n: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    parts, done = [], 0
    while done < n:
        m = min(int(rng.integers(1, 700)), n - done)
        parts.append(bank.read(m))
        done += m
    return np.concatenate(parts)


def test_fixed_tone_is_the_cosine_whatever_the_blocks():
    tone = Tone(0.7, 123.4, phase_rad=0.3)
    x = _in_blocks(ToneBank([tone], FS), 20000, 1)
    t = np.arange(20000) / FS
    np.testing.assert_allclose(x, 0.7 * np.cos(2 * np.pi * 123.4 * t + 0.3), atol=1e-9)


def test_swept_tone_frequency_is_the_phase_derivative_and_turns_at_the_limits():
    tone = Tone(1.0, 50.0, f_hi_hz=400.0, rate_oct_min=60.0)  # 3 octaves at 1 oct/s
    t = np.arange(int(8 * FS)) / FS
    phase = tone.phase(t)
    f_inst = np.gradient(phase, t) / (2 * np.pi)
    np.testing.assert_allclose(f_inst[5:-5], tone.frequency(t)[5:-5], rtol=2e-4)
    # a log sweep of 3 octaves at 1 octave per second reaches the top at 3 s (octaves ÷ rate)
    f = tone.frequency(t)
    assert t[np.argmax(f)] == pytest.approx(3.0, abs=1 / FS)
    assert f.max() == pytest.approx(400.0, rel=1e-6) and f.min() == pytest.approx(50.0)
    assert t[np.argmin(f[int(4 * FS):]) + int(4 * FS)] == pytest.approx(6.0, abs=1 / FS)
    # no step in the signal at the turn: the largest sample-to-sample change stays that of a
    # 400 Hz sine, 2π·400/fs of its amplitude
    x = ToneBank([tone], FS).read(t.size)
    assert np.max(np.abs(np.diff(x))) <= 2 * np.pi * 400.0 / FS * 1.001


def test_swept_tone_is_the_same_in_any_blocks():
    tone = Tone(0.5, 20.0, f_hi_hz=2000.0, rate_oct_min=120.0)
    whole = ToneBank([tone], FS).read(60000)
    parts = _in_blocks(ToneBank([tone], FS), 60000, 2)
    np.testing.assert_allclose(parts, whole, atol=1e-9)


def test_fit_matches_scipy_curve_fit_and_the_cramer_rao_bound():
    rng = np.random.default_rng(7)
    n, sigma = 4096, 0.5
    t = np.arange(n) / FS
    freqs = np.array([100.0, 313.0])
    amps, phases = np.array([1.0, 0.25]), np.array([0.4, -1.1])
    clean = sum(a * np.cos(2 * np.pi * f * t + p)
                for a, f, p in zip(amps, freqs, phases, strict=True))
    x = clean + sigma * rng.standard_normal(n)
    fit = fit_tones(x, freqs, FS)

    def model(tt, c, a0, p0, a1, p1):
        return (c + a0 * np.cos(2 * np.pi * freqs[0] * tt + p0)
                + a1 * np.cos(2 * np.pi * freqs[1] * tt + p1))

    ref, _ = scipy.optimize.curve_fit(model, t, x, p0=[0, 0.9, 0.3, 0.3, -1.0])
    np.testing.assert_allclose(fit.amplitude, [abs(ref[1]), abs(ref[3])], rtol=1e-6)
    np.testing.assert_allclose(fit.phase_rad, [ref[2], ref[4]], atol=1e-6)
    # Monte Carlo of the amplitude scatter against σ sqrt(2/n) (Kay §3.7)
    est = [fit_tones(clean + sigma * rng.standard_normal(n), freqs, FS).amplitude[0]
           for _ in range(400)]
    crb = sigma * math.sqrt(2.0 / n)
    # the sample std of 400 draws is within ±20 % of the true std with > 99.9 % probability
    assert np.std(est, ddof=1) == pytest.approx(crb, rel=0.2)
    assert abs(np.mean(est) - 1.0) < 4 * crb / math.sqrt(400)


def test_tone_lines_hold_the_tone_and_the_rest_is_below_the_hann_sidelobe():
    nper = 1024
    df = FS / nper
    for f_tone in (1000.0, 1000.0 + 0.37 * df, 1000.0 + 0.5 * df):
        t = np.arange(64 * nper) / FS
        f, p = scipy.signal.welch(np.cos(2 * np.pi * f_tone * t), FS, nperseg=nper)
        mask = tone_line_mask(f, f_tone, df)
        assert mask.sum() in (4, 5)
        # re the PSD of the tone centred on a line: (A²/2) over the Hann equivalent noise
        # bandwidth of 1.5 lines (Harris 1978); the highest sidelobe is at −31.5 dB
        on_line = 0.5 / (1.5 * df)
        assert 10 * np.log10(p[~mask].max() / on_line) < -31.0


@pytest.mark.parametrize("kw, key", [
    (dict(amplitude=-1.0, f_hz=100.0), "amplitude"),
    (dict(amplitude=1.0, f_hz=0.0), "f_hz"),
    (dict(amplitude=1.0, f_hz=100.0, f_hi_hz=50.0), "f_hi_hz"),
    (dict(amplitude=1.0, f_hz=100.0, f_hi_hz=200.0, rate_oct_min=0.0), "rate_oct_min"),
])
def test_bad_tone_is_one_line_naming_the_key(kw, key):
    with pytest.raises(LiveshapeError) as exc:
        Tone(**kw)
    assert key in str(exc.value) and "\n" not in str(exc.value)


def test_tone_above_nyquist_is_refused():
    with pytest.raises(LiveshapeError) as exc:
        ToneBank([Tone(1.0, 100.0, f_hi_hz=5000.0)], FS)
    assert "Nyquist" in str(exc.value)
