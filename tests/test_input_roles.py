"""Input roles of a test definition (rig.inputs), the control strategy, and per-input
calibration.

Outside references: the rules are the definition's own; the limit is read by the profile code,
checked against the log-log interpolation of a breakpoint spectrum (straight lines on log-log
axes between breakpoints, the form of MIL-STD-810H Method 514.8 and IEC 60068-2-64 test
profiles [common practice]).
"""

from __future__ import annotations

import math

import pytest

from liveshape.errors import ConfigError
from liveshape.testdef.inputs import InputRole
from liveshape.testdef.spec import spec_from_mapping, spec_to_mapping

PROFILE = {"breakpoints": [{"f_hz": 20, "asd": 0.01}, {"f_hz": 2000, "asd": 0.01}]}
LIMIT = [{"f_hz": 20, "asd": 0.04}, {"f_hz": 2000, "asd": 0.01}]


def make(rig=None, control=None):
    data = {"name": "t", "profile": PROFILE}
    if rig is not None:
        data["rig"] = rig
    if control is not None:
        data["control"] = control
    return spec_from_mapping(data, source="t.yaml")


FOUR = [
    {"channel": 1, "role": "control", "name": "table"},
    {"channel": 2, "role": "control", "name": "tip", "weight": 0.5},
    {"channel": 3, "role": "monitor", "name": "bracket", "limit": LIMIT},
    {"channel": 4, "role": "reference"},
]


def test_a_list_of_inputs_gives_their_roles():
    spec = make({"inputs": FOUR})
    roles = spec.rig.input_roles()
    assert isinstance(roles, tuple)
    assert [(r.channel, r.role, r.name) for r in roles] == [
        (1, "control", "table"), (2, "control", "tip"), (3, "monitor", "bracket"),
        (4, "reference", "reference4")]
    assert roles[1].weight == 0.5 and roles[0].weight == 1.0
    with pytest.raises(AttributeError):  # frozen
        roles[0].channel = 5
    # the limit is the profile code's reading: log-log straight line between the breakpoints
    # (0.04 at 20 Hz to 0.01 at 2000 Hz: at the geometric mean 200 Hz, sqrt(0.04·0.01) = 0.02)
    lim = roles[2].limit
    assert lim.f_hz == (20.0, 2000.0) and lim.asd_g2_hz == (0.04, 0.01)
    assert float(lim.asd_at(200.0)) == pytest.approx(math.sqrt(0.04 * 0.01), rel=1e-12)
    # the one-control fields follow the list: its first control and its reference
    assert spec.rig.control_input == 1 and spec.rig.loopback_input == 4


def test_the_shorthand_gives_the_same_kind_of_roles():
    roles = make({"control_input": 3, "loopback_input": 2}).rig.input_roles()
    assert roles == (InputRole(3, "control", "control3"), InputRole(2, "reference", "reference2"))
    assert make().rig.input_roles() == (InputRole(1, "control", "control1"),)


def test_a_limit_in_other_units_is_converted_like_the_profile():
    # (m/s²)²/Hz -> g²/Hz divides by g0² (g0 = 9.80665 m/s², 3rd CGPM, 1901)
    inputs = [{"channel": 1, "role": "control"},
              {"channel": 2, "role": "monitor", "limit": {
                  "units": "(m/s2)2/Hz", "breakpoints": [{"f_hz": 10, "asd": 9.80665 ** 2},
                                                         {"f_hz": 100, "asd": 9.80665 ** 2}]}}]
    lim = make({"inputs": inputs}).rig.input_roles()[1].limit
    assert lim.asd_g2_hz == pytest.approx((1.0, 1.0), rel=1e-12)


def test_roles_survive_the_round_trip_through_plain_data():
    spec = make({"inputs": FOUR}, {"strategy": "maximum"})
    back = spec_from_mapping(spec_to_mapping(spec), source="again")
    assert back.rig == spec.rig and back.control.strategy == "maximum"
    plain = make()
    assert spec_from_mapping(spec_to_mapping(plain), source="again").rig == plain.rig


@pytest.mark.parametrize("rig, words", [
    ({"inputs": [{"channel": 1, "role": "monitor"}]},
     "rig.inputs = '1 input(s) with roles monitor' has no control input"),
    ({"inputs": [{"channel": 1, "role": "control"}, {"channel": 2, "role": "reference"},
                 {"channel": 3, "role": "reference"}]},
     "rig.inputs[2].role = 'reference' is a second reference (inputs[1] is one already"),
    ({"inputs": [{"channel": 1, "role": "control"}, {"channel": 1, "role": "monitor"}]},
     "rig.inputs[1].channel = 1 is already the control input 'control1'"),
    ({"inputs": [{"channel": 1, "role": "control", "limit": LIMIT}]},
     "rig.inputs[0].limit = '<2 breakpoints>' is given on a control input; a limit is only "
     "for a monitor"),
    ({"inputs": [{"channel": 1, "role": "control"}, {"channel": 2, "role": "reference",
                                                      "limit": LIMIT}]},
     "rig.inputs[1].limit = '<2 breakpoints>' is given on a reference input"),
    ({"inputs": [{"channel": 1, "role": "control"}, {"channel": 2, "role": "monitor",
                                                      "weight": 2}]},
     "rig.inputs[1].weight = 2 is given on a monitor input; a weight is only for a control"),
    ({"inputs": [{"channel": 1, "role": "control", "weight": 0}]},
     "rig.inputs[0].weight = 0"),
    ({"inputs": [{"channel": 0, "role": "control"}]}, "rig.inputs[0].channel = 0"),
    ({"inputs": [{"channel": 1, "role": "controller"}]},
     "rig.inputs[0].role = 'controller' is not one of control, monitor, reference"),
    ({"inputs": [{"channel": 1, "role": "control", "name": "a"},
                 {"channel": 2, "role": "monitor", "name": "a"}]},
     "rig.inputs[1].name = 'a' is already the name of another input"),
    ({"inputs": [{"channel": 1, "role": "control", "gain": 2}]}, "rig.inputs[0]"),
    ({"inputs": [{"role": "control"}]}, "rig.inputs[0]"),
    ({"inputs": []}, "rig.inputs"),
    ({"inputs": [{"channel": 1, "role": "control"}], "control_input": 2},
     "rig.control_input = 2 is the one-control shorthand; with rig.inputs give every input"),
    ({"inputs": [{"channel": 1, "role": "control"}], "loopback_input": 2},
     "rig.loopback_input = 2 is the one-control shorthand"),
    ({"inputs": [{"channel": 1, "role": "control"},
                 {"channel": 2, "role": "monitor", "limit": [{"f_hz": 20, "asd": -1},
                                                             {"f_hz": 30, "asd": 1}]}]},
     "rig.inputs[1].limit[0]"),
])
def test_each_rule_of_the_input_list_is_one_line(rig, words):
    with pytest.raises(ConfigError) as exc:
        make(rig)
    msg = str(exc.value)
    assert msg.startswith("t.yaml: ") and words in msg, msg
    assert "\n" not in msg


def test_control_strategy_is_one_of_the_combinations():
    assert make().control.strategy == "average"
    for s in ("average", "maximum", "minimum"):
        assert make(control={"strategy": s}).control.strategy == s
    with pytest.raises(ConfigError) as exc:
        make(control={"strategy": "median"})
    assert "t.yaml: control.strategy = 'median' is not one of average, maximum, minimum" \
        in str(exc.value)


def test_the_strategy_and_inputs_can_be_given_on_the_command_line():
    data = {"name": "t", "profile": PROFILE}
    spec = spec_from_mapping(data, source="t.yaml", overrides={
        "control.strategy": "minimum",
        "rig.inputs": "[{channel: 2, role: control}, {channel: 5, role: monitor}]"})
    assert spec.control.strategy == "minimum"
    assert [r.channel for r in spec.rig.input_roles()] == [2, 5]
    with pytest.raises(ConfigError) as exc:
        spec_from_mapping(data, source="t.yaml", overrides={"rig.inputs": "[{channel: 2, "
                                                            "role: monitor}]"})
    assert str(exc.value).startswith("command line: rig.inputs")


# -- per-input calibration --------------------------------------------------------------------

OLD_FILE = """liveshape_calibration: 1
output: {v_per_fs: 2.0}
input: {v_per_fs: 4.0}
accelerometer: {mv_per_g: 100.0}
"""


def test_an_old_calibration_file_still_loads_and_serves_every_input(tmp_path):
    from liveshape.rigs.calfile import load_calibration

    p = tmp_path / "old.yaml"
    p.write_text(OLD_FILE)
    cal = load_calibration(p)
    assert cal.inputs == ()
    # g/FS = (V/FS) / (V/g): 4 V/FS over 0.1 V/g is 40 g per FS (definition of the units)
    assert cal.g_per_fs_at(1) == pytest.approx(40.0) == cal.g_per_fs_at(7)
    assert cal.for_input(3) == cal


def test_per_input_factors_are_read_written_and_used(tmp_path):
    from liveshape.rigs.calfile import load_calibration, write_calibration

    p = tmp_path / "multi.yaml"
    p.write_text(OLD_FILE + """inputs:
  - {channel: 2, v_per_fs: 1.0, mv_per_g: 10.0}
  - {channel: 4, v_per_fs: 2.5, mv_per_g: null}
""")
    cal = load_calibration(p)
    # input 2: 1 V/FS over 0.010 V/g = 100 g/FS; input 1 keeps the chain's 4 V/FS / 0.1 V/g
    assert cal.g_per_fs_at(2) == pytest.approx(100.0)
    assert cal.g_per_fs_at(1) == pytest.approx(40.0)
    assert cal.for_input(2).g_per_fs == pytest.approx(100.0)
    assert cal.for_input(2).out_v_per_fs == 2.0
    # a loopback passes volts: 1 FS at input 4 is 2.5 V, which the 2 V/FS output makes from
    # 1.25 FS of drive
    assert cal.drive_fs_per_input_fs(4) == pytest.approx(1.25)
    assert cal.volts_per_fs_at(4) == 2.5
    with pytest.raises(ValueError, match="input 4 has no accelerometer"):
        cal.g_per_fs_at(4)
    q = tmp_path / "again.yaml"
    write_calibration(q, cal)
    assert load_calibration(q).inputs == cal.inputs


@pytest.mark.parametrize("extra, words", [
    ("inputs:\n  - {channel: 2, v_per_fs: 1.0}\n  - {channel: 2, v_per_fs: 3.0}\n",
     "inputs[1].channel = 2 is listed twice"),
    ("inputs:\n  - {channel: 0, v_per_fs: 1.0}\n", "inputs[0].channel = 0"),
    ("inputs:\n  - {channel: 2, v_per_fs: -1.0}\n", "inputs[0].v_per_fs = -1.0"),
    ("inputs:\n  - {channel: 2}\n", "inputs[0]"),
    ("inputs:\n  - {channel: 2, v_per_fs: 1, mv_per_gg: 3}\n", "inputs[0]"),
])
def test_bad_per_input_entries_are_one_line(tmp_path, extra, words):
    from liveshape.rigs.calfile import load_calibration

    p = tmp_path / "bad.yaml"
    p.write_text(OLD_FILE + extra)
    with pytest.raises(ConfigError) as exc:
        load_calibration(p)
    assert words in str(exc.value) and str(p) in str(exc.value)
    assert "\n" not in str(exc.value)
