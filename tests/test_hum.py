"""Simulated mains hum: phase continuity, level, drift, and the strict reading of ``hum:``."""

from __future__ import annotations

import math

import numpy as np
import pytest

from liveshape.errors import ConfigError
from liveshape.rigs.hum import HumSource, HumSpec, hum_from_mapping
from liveshape.schema import Where

FS = 8000.0


@pytest.mark.parametrize("splits", [[1, 2, 3, 4093, 7, 10000],
                                    [8000, 8000, 104],
                                    [17] * 952])
def test_blocks_join_like_one_long_block(splits):
    # Phase continuity: the phase is a function of the sample index, so any split gives the
    # same samples as one long block [common practice: phase from time, not a running sum].
    spec = HumSpec(50.0, 5, 0.02, 0.1, 3.0)
    whole = HumSource(spec, FS, seed=4).block(sum(splits))
    src = HumSource(spec, FS, seed=4)
    parts = np.concatenate([src.block(k) for k in splits])
    np.testing.assert_array_equal(parts, whole)
    assert src.samples == sum(splits)


def test_each_line_has_the_rms_level():
    # A cos of amplitude A has the rms A/√2 over whole periods, so A = level·√2 gives the rms
    # level (elementary trigonometry); harmonics are orthogonal over whole mains periods,
    # so the total is level·√H, and each line's rms is read by projecting on cos/sin
    # (least squares, numpy.linalg.lstsq).
    spec = HumSpec(60.0, 4, 0.03)
    n = int(FS)  # 1 s: whole periods of every line
    x = HumSource(spec, FS, seed=9).block(n)
    t = np.arange(n) / FS
    assert np.sqrt(np.mean(x**2)) == pytest.approx(0.03 * math.sqrt(4), rel=1e-9)
    cols = []
    for f in spec.frequencies_hz():
        cols += [np.cos(2 * math.pi * f * t), np.sin(2 * math.pi * f * t)]
    coef, *_ = np.linalg.lstsq(np.column_stack(cols), x, rcond=None)
    rms = np.hypot(coef[0::2], coef[1::2]) / math.sqrt(2)
    np.testing.assert_allclose(rms, 0.03, rtol=1e-9)


def test_lines_at_or_above_nyquist_are_left_out():
    # A line at or above fs/2 would alias (sampling theorem, Shannon 1949): it is not made.
    spec = HumSpec(50.0, 20, 0.01)
    x = HumSource(spec, 1000.0, seed=1).block(1000)  # fs/2 = 500 Hz: lines 50..450 Hz only
    assert np.sqrt(np.mean(x**2)) == pytest.approx(0.01 * 3.0, rel=1e-9)


def test_drift_stays_within_drift_hz():
    # The instantaneous frequency is dφ/dt / 2π of the closed-form phase; a central difference of
    # the phase (numpy.gradient) and the analytic f0 + d·sin(2πt/T) agree, and the frequency
    # sweeps the full ±drift_hz over a drift period and no more.
    spec = HumSpec(50.0, 1, 0.01, drift_hz=0.08, drift_period_s=2.0)
    src = HumSource(spec, FS)
    t = np.arange(int(3 * FS)) / FS
    f_num = np.gradient(src.phase(t), t) / (2 * math.pi)
    f_ana = src.frequency_hz(t)
    np.testing.assert_allclose(f_num[1:-1], f_ana[1:-1], atol=1e-6)
    dev = f_num[1:-1] - 50.0
    assert dev.max() <= 0.08 + 1e-6 and dev.min() >= -0.08 - 1e-6
    assert dev.max() > 0.0799 and dev.min() < -0.0799
    # the samples are the cosine of that phase
    x = src.block(t.size)
    np.testing.assert_allclose(x, 0.01 * math.sqrt(2) * np.cos(src.phase(t) + src._theta[0]),
                               atol=1e-12)


def test_seed_fixes_the_start_phases():
    spec = HumSpec(50.0, 3, 0.01)
    a = HumSource(spec, FS, seed=5).block(100)
    np.testing.assert_array_equal(a, HumSource(spec, FS, seed=5).block(100))
    assert not np.array_equal(a, HumSource(spec, FS, seed=6).block(100))


def test_mapping_defaults_and_round_trip():
    w = Where("t.yaml").key("rig").key("hum")
    assert hum_from_mapping({}, w) == HumSpec()
    spec = hum_from_mapping({"mains_hz": 60, "harmonics": 5, "level_g": 0.2, "drift_hz": 0.05,
                             "drift_period_s": 30}, w)
    assert spec == HumSpec(60.0, 5, 0.2, 0.05, 30.0)
    assert hum_from_mapping(spec.as_mapping(), w) == spec


@pytest.mark.parametrize(("data", "key", "value", "rule"), [
    ({"mains_hz": 55}, "mains_hz", "55", "must be 50 or 60"),
    ({"mains_hz": "50"}, "mains_hz", "'50'", "must be a finite number"),
    ({"harmonics": 0}, "harmonics", "0", "from 1 to 20"),
    ({"harmonics": 2.5}, "harmonics", "2.5", "from 1 to 20"),
    ({"harmonics": True}, "harmonics", "True", "from 1 to 20"),
    ({"level_g": 0}, "level_g", "0", "must be > 0"),
    ({"level_g": float("nan")}, "level_g", "nan", "must be a finite number"),
    ({"drift_hz": 0.5}, "drift_hz", "0.5", "from 0 to 0.1"),
    ({"drift_hz": -0.01}, "drift_hz", "-0.01", "from 0 to 0.1"),
    ({"drift_period_s": 0}, "drift_period_s", "0", "must be > 0"),
])
def test_bad_values_are_one_line_errors_naming_key_value_and_rule(data, key, value, rule):
    with pytest.raises(ConfigError) as e:
        hum_from_mapping(data, Where("t.yaml").key("rig").key("hum"))
    msg = str(e.value)
    assert "\n" not in msg
    assert f"t.yaml: rig.hum.{key} = {value}" in msg and rule in msg


def test_unknown_key_is_named_with_a_suggestion():
    with pytest.raises(ConfigError) as e:
        hum_from_mapping({"level": 0.1}, Where("t.yaml").key("rig").key("hum"))
    msg = str(e.value)
    assert "\n" not in msg and "rig.hum.level" in msg and "did you mean 'level_g'" in msg
    with pytest.raises(ConfigError, match=r"rig\.hum must be a mapping"):
        hum_from_mapping([1, 2], Where("t.yaml").key("rig").key("hum"))
