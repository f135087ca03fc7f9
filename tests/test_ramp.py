"""Tests of liveshape.dsp.ramp: per-sample gain ramps (dB ramps and raised-cosine fades).

The checks are the ramps' definitions and their step bounds, exact in float64.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from liveshape.dsp.ramp import GainRamp
from liveshape.errors import ConfigError


def test_gain_ramp_db_ramp_rate_and_step_bound():
    fs, rate = 1000.0, 6.0
    ramp = GainRamp(fs, gain=1.0, rate_db_s=rate)
    ramp.set(0.25)  # -12.04 dB
    g = np.empty(4000)
    ramp.fill(g)
    n_expected = math.ceil(20 * math.log10(4) * fs / rate)
    assert ramp.remaining_samples() == 0 and not ramp.ramping
    assert g[n_expected - 1] == 0.25 and np.all(g[n_expected:] == 0.25)
    steps_db = np.diff(20 * np.log10(np.concatenate([[1.0], g])))
    # straight in dB at no more than the rate (definition of a dB/s ramp)
    assert np.all(steps_db <= 1e-12)
    assert np.max(-steps_db) <= rate / fs * (1 + 1e-9)
    # sample-to-sample gain change bounded by g * (10^(rate/(20 fs)) - 1)
    prev = np.concatenate([[1.0], g[:-1]])
    assert np.all(
        np.abs(np.diff(np.concatenate([[1.0], g]))) <= prev * (10 ** (rate / 20 / fs) - 1)
    )
    assert np.allclose(np.diff(steps_db[: n_expected - 1]), 0.0, atol=1e-9)


@pytest.mark.parametrize(("g0", "g1"), [(1.0, 0.0), (0.0, 0.5)])
def test_gain_ramp_raised_cosine_fade(g0, g1):
    fs, dur = 1000.0, 0.2
    ramp = GainRamp(fs, gain=g0, fade_s=dur)
    ramp.set(g1)
    m = round(fs * dur)
    g = np.empty(m + 10)
    ramp.fill(g)
    t = np.arange(1, m + 1) / m
    # raised cosine g0 + (g1 - g0)(1 - cos(pi t))/2 (its definition)
    assert np.allclose(g[:m], g0 + (g1 - g0) * 0.5 * (1 - np.cos(np.pi * t)), atol=1e-15)
    assert g[m - 1] == g1 and np.all(g[m:] == g1)
    # slope bound |g1 - g0| * pi / (2 M) (maximum derivative of the raised cosine)
    d = np.abs(np.diff(np.concatenate([[g0], g])))
    assert d.max() <= abs(g1 - g0) * math.pi / (2 * m)
    assert d[0] < 1e-4 and d[m - 1] < 1e-4  # starts and ends with zero slope


def test_gain_ramp_retarget_mid_ramp_has_no_step_and_blocks_do_not_matter():
    fs = 1000.0
    a = GainRamp(fs, gain=0.0, fade_s=0.1)
    b = GainRamp(fs, gain=0.0, fade_s=0.1)
    a.set(1.0)
    b.set(1.0)
    ga = np.empty(50)
    a.fill(ga)
    a.set(0.1, rate_db_s=40.0)  # new target from 0.5 on, as a dB ramp
    ga2 = np.empty(1000)
    a.fill(ga2)
    gb = np.concatenate([_fill_blocks(b, [7, 13, 30]), np.empty(0)])
    assert np.array_equal(ga, gb)
    full = np.concatenate([ga, ga2])
    assert np.max(np.abs(np.diff(full))) <= 1.0 * math.pi / (2 * 100)
    assert full[-1] == pytest.approx(0.1) and a.gain == pytest.approx(0.1)


def _fill_blocks(ramp, sizes):
    out = []
    for k in sizes:
        g = np.empty(k)
        ramp.fill(g)
        out.append(g)
    return np.concatenate(out)


def test_gain_ramp_refuses_bad_values():
    with pytest.raises(ConfigError, match="gain"):
        GainRamp(1000.0, gain=-1.0)
    ramp = GainRamp(1000.0)
    with pytest.raises(ConfigError, match="rate_db_s"):
        ramp.set(0.5, rate_db_s=0.0)
    with pytest.raises(ConfigError, match="gain"):
        ramp.set(float("nan"))
