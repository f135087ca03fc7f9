"""Tests of liveshape.testdef.fault_spec: the fault kinds and the command-line form of a fault."""

from __future__ import annotations

import pytest

from liveshape.errors import ConfigError
from liveshape.testdef.fault_spec import FAULT_KINDS, FaultSpec, parse_fault


@pytest.mark.parametrize(
    "text, expected",
    [
        ("sensor_gain@12=0.5", FaultSpec("sensor_gain", 12.0, 0.5, None)),
        ("noise_burst@20=0.1/0.5", FaultSpec("noise_burst", 20.0, 0.1, 0.5)),
        ("sensor_detached@30", FaultSpec("sensor_detached", 30.0, None, None)),
        ("dropout@4.5/0.2", FaultSpec("dropout", 4.5, None, 0.2)),
        (" plant_gain @ 1 = -3 ", FaultSpec("plant_gain", 1.0, -3.0, None)),
    ],
)
def test_parse_fault(text, expected):
    assert parse_fault(text) == expected


@pytest.mark.parametrize(
    "text, match",
    [
        ("sensor_gain", r"is not KIND\[:INPUT\]@SECONDS"),
        ("sensor_gian@3", r"did you mean 'sensor_gain'"),
        ("amp_trip@-1", r"seconds '-1', which must be >= 0"),
        ("amp_trip@x", r"seconds 'x', which is not a number"),
        ("noise_burst@1=0.1/0", r"duration '0', which must be > 0"),
        ("dropout@1=abc", r"value 'abc', which is not a number"),
    ],
)
def test_parse_fault_errors(text, match):
    with pytest.raises(ConfigError, match=match) as e:
        parse_fault(text)
    assert str(e.value).startswith("command line: fault = ")


def test_fault_kinds_are_the_agreed_ones():
    assert FAULT_KINDS == (
        "sensor_detached",
        "sensor_gain",
        "amp_trip",
        "resonance_shift",
        "plant_gain",
        "noise_burst",
        "dropout",
        "dac_gain",
    )


def test_a_fault_can_name_one_input():
    from liveshape.schema import Where
    from liveshape.testdef.fault_spec import fault_from_mapping

    assert parse_fault("sensor_detached:2@30") == FaultSpec("sensor_detached", 30.0, input=2)
    assert parse_fault("dac_gain@1=-3/10").input is None
    assert fault_from_mapping({"kind": "dropout", "at_s": 1, "input": 3}, Where("t.yaml", "f")
                              ).input == 3
    with pytest.raises(ConfigError, match=r"has input 'x', which must be an input channel >= 1"):
        parse_fault("sensor_detached:x@30")
    with pytest.raises(ConfigError, match=r"t.yaml: f.input = 0"):
        fault_from_mapping({"kind": "dropout", "at_s": 1, "input": 0}, Where("t.yaml", "f"))
