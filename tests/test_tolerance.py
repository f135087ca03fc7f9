"""Tests of liveshape.testdef.tolerance: alarm and abort limits, bands, strict reading of a
mapping."""

from __future__ import annotations

import numpy as np
import pytest

from liveshape.errors import ConfigError
from liveshape.schema import Where
from liveshape.testdef.tolerance import Tolerance, ToleranceBand, tolerance_from_mapping


def test_tolerance_defaults_and_bands():
    t = Tolerance()
    # IEC 60068-2-64 (Test Fh) ASD tolerance ±3 dB [from a secondary summary of the standard];
    # abort ±6 dB and rms limits 1 / 1.5 dB are [common practice].
    assert (t.alarm_db, t.abort_db, t.rms_alarm_db, t.rms_abort_db) == (3.0, 6.0, 1.0, 1.5)
    t = Tolerance(bands=(ToleranceBand(500.0, 1000.0, 4.5, 9.0),))
    f = np.array([100.0, 500.0, 700.0, 1000.0, 1001.0])
    np.testing.assert_array_equal(t.alarm_db_at(f), [3, 4.5, 4.5, 4.5, 3])
    np.testing.assert_array_equal(t.abort_db_at(f), [6, 9, 9, 9, 6])


def test_tolerance_from_mapping():
    t = tolerance_from_mapping(
        {"alarm_db": 2, "abort_db": 5, "bands": [{"f_lo_hz": 20, "f_hi_hz": 40, "abort_db": 8}]},
        Where("t.yaml", "tolerance"),
    )
    assert t.alarm_db == 2 and t.abort_db == 5 and t.rms_abort_db == 1.5
    assert t.bands == (ToleranceBand(20.0, 40.0, 2.0, 8.0),)
    assert tolerance_from_mapping(None, Where("t.yaml", "tolerance")) == Tolerance()


@pytest.mark.parametrize(
    "data, match",
    [
        ({"alarm_db": 4, "abort_db": 3}, r"tolerance\.abort_db = 3 must be >= alarm_db = 4"),
        ({"alarm_db": 0}, r"tolerance\.alarm_db = 0 must be > 0"),
        ({"rms_alarm_db": 2, "rms_abort_db": 1}, r"rms_abort_db = 1 must be >= rms_alarm_db"),
        ({"alarm": 3}, r"did you mean 'alarm_db'"),
        ({"bands": [{"f_lo_hz": 50, "f_hi_hz": 40}]}, r"bands\[0\]\.f_hi_hz = 40 must be above"),
        ({"bands": [{"f_lo_hz": 50, "f_hi_hz": 60, "alarm_db": 7}]}, r"abort_db = 6.0 must be >="),
        ({"bands": [{"f_lo_hz": 50}]}, r"f_hi_hz: required key is missing"),
    ],
)
def test_tolerance_bad_input(data, match):
    with pytest.raises(ConfigError, match=match):
        tolerance_from_mapping(data, Where("t.yaml", "tolerance"))
    with pytest.raises(ConfigError):
        Tolerance(alarm_db=4, abort_db=3)
