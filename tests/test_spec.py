"""Tests of liveshape.testdef.spec: strict reading, defaults, precedence, validation, round trip."""

from __future__ import annotations

import math
from pathlib import Path

import pytest
from refprofiles import quad_grms

from liveshape.errors import ConfigError
from liveshape.testdef import config
from liveshape.testdef.spec import (
    ControlSettings,
    FaultSpec,
    RigSelection,
    SafetyLimits,
    Schedule,
    load_spec,
    spec_from_mapping,
    spec_to_mapping,
)
from liveshape.testdef.tolerance import Tolerance

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"

POINTS = [
    {"f_hz": 20, "asd": 0.01},
    {"f_hz": 80, "slope_db_oct": 3},
    {"f_hz": 350, "asd": 0.04},
    {"f_hz": 2000, "slope_db_oct": -3},
]


def minimal(**extra):
    return {"profile": {"breakpoints": [dict(p) for p in POINTS]}, **extra}


def build(data, overrides=None, source="bench.yaml", base_dir=None):
    return spec_from_mapping(data, source=source, base_dir=base_dir, overrides=overrides)


def write(path: Path, text: str) -> Path:
    path.write_text(text, encoding="utf-8")
    return path


# -- defaults --------------------------------------------------------------------------------
def test_defaults_are_the_agreed_ones():
    s = build(minimal())
    assert s.name == "bench" and s.source == "bench.yaml"
    assert s.schedule == Schedule((-12, -9, -6, -3, 0), 3.0, 60.0, 6.0)
    assert s.control == ControlSettings(
        48000.0, 8192, 120.0, "exponential", 0.5, 3.0, 20.0, 0.5, "direct"
    )
    assert s.control.df_hz == 48000 / 8192
    assert s.safety == SafetyLimits()
    assert s.safety.clip_sigma == 4.0 and s.safety.max_rate_db_s == 12.0
    assert s.rig == RigSelection("sim", "loudspeaker", None, None, False)
    assert s.tolerance == Tolerance()
    assert s.faults == () and s.seed is None


def test_resolution_from_lines_or_df():
    s = build(minimal(control={"lines": 2048}))
    assert s.control.frame_length == 4096
    s = build(minimal(control={"fs_hz": 44100, "df_hz": 5.0}))
    # 2**round(log2(44100/5)) = 2**round(13.107) = 8192 (agreed rule, spec_fields.md).
    assert s.control.frame_length == 8192
    s = build(minimal(control={"frame_length": 16384}))
    assert s.control.frame_length == 16384


# -- precedence ------------------------------------------------------------------------------
def test_precedence_override_beats_file_beats_default():
    data = minimal(control={"fs_hz": 44100, "target_dof": 60}, seed=1)
    s = build(data)
    assert s.control.fs_hz == 44100  # file beats default
    assert s.control.update_gain == 0.5  # default where the file is silent
    s = build(
        data,
        overrides={
            "control.fs_hz": "32000",
            "seed": 3,
            "rig.plant": "bench",
            "control.update_gain": 0.25,
        },
    )
    assert s.control.fs_hz == 32000.0  # command line beats file
    assert s.control.target_dof == 60  # file kept where no override
    assert s.control.update_gain == 0.25  # command line beats default
    assert s.seed == 3 and s.rig.plant == "bench"
    assert data["control"]["fs_hz"] == 44100  # the caller's data is not modified


def test_override_paths_are_read_against_the_current_folder(tmp_path, monkeypatch):
    tmp_path = tmp_path.resolve()
    monkeypatch.chdir(tmp_path)
    data = minimal(rig={"plant": "plants/a.yaml", "calibration": "cal.yaml"})
    s = build(data, base_dir=tmp_path / "specs")
    assert s.rig.plant == str(tmp_path / "specs" / "plants" / "a.yaml")
    assert s.rig.calibration == str(tmp_path / "specs" / "cal.yaml")
    s = build(
        data,
        overrides={"rig.plant": "mine/b.yml", "rig.calibration": "c.yaml"},
        base_dir=tmp_path / "specs",
    )
    assert s.rig.plant == str(tmp_path / "mine" / "b.yml")
    assert s.rig.calibration == str(tmp_path / "c.yaml")


def test_resolution_override_replaces_the_files_choice():
    s = build(minimal(control={"lines": 1024}), overrides={"control.df_hz": 2.9296875})
    assert s.control.frame_length == 16384


def test_override_strings_read_as_yaml_scalars():
    s = build(
        minimal(),
        overrides={
            "rig.uncalibrated": "true",
            "safety.clip_sigma": "null",
            "schedule.steps_db": "[-6, 0]",
        },
    )
    assert s.rig.uncalibrated is True and s.safety.clip_sigma is None
    assert s.schedule.steps_db == (-6.0, 0.0)


def test_unknown_override_is_one_error_naming_it():
    with pytest.raises(
        ConfigError,
        match=r"control\.fs: unknown option; did you mean "
        r"'control\.fs_hz'\?",
    ) as e:
        build(minimal(), overrides={"control.fs": 8000})
    assert "\n" not in str(e.value)
    with pytest.raises(ConfigError, match="unknown option"):
        build(minimal(), overrides={"nonsense": 1})


def test_bad_override_value_names_the_command_line():
    with pytest.raises(ConfigError, match=r"^command line: control\.update_gain = 2.0 must be "):
        build(minimal(), overrides={"control.update_gain": 2.0})


def test_override_faults_and_profile_file(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    write(tmp_path / "other.csv", "20,0.01\n500,0.01\n")
    s = build(
        minimal(faults=[{"kind": "amp_trip", "at_s": 3}]),
        overrides={"faults": ["sensor_gain@12=0.5"], "profile.file": "other.csv"},
        base_dir=tmp_path / "elsewhere",
    )
    assert s.faults == (FaultSpec("sensor_gain", 12.0, 0.5, None),)
    assert s.profile.f_hz == (20.0, 500.0)


# -- strict keys -----------------------------------------------------------------------------
@pytest.mark.parametrize(
    "data, match",
    [
        (minimal(shedule={}), r"bench\.yaml: shedule: unknown key .*did you mean 'schedule'"),
        (minimal(control={"fs_Hz": 8000}), r"control\.fs_Hz: unknown key .*did you mean 'fs_hz'"),
        (minimal(safety={"clip_sigm": 3}), r"did you mean 'clip_sigma'"),
        (minimal(rig={"plnt": "x"}), r"did you mean 'plant'"),
        (minimal(schedule={"full_level": 3}), r"did you mean 'full_level_s'"),
        (minimal(tolerance={"abort": 3}), r"did you mean 'abort_db'"),
        ({"profile": {"breakpoint": POINTS}}, r"did you mean 'breakpoints'"),
        (
            {"profile": {"breakpoints": [{"f_hz": 20, "asd": 1}, {"f": 30, "asd": 1}]}},
            r"profile\.breakpoints\[1\]\.f: unknown key",
        ),
        (minimal(faults=[{"kind": "amp_trip", "at": 3}]), r"faults\[0\]\.at: unknown key"),
    ],
)
def test_misspelled_key_suggests_nearest(data, match):
    with pytest.raises(ConfigError, match=match) as e:
        build(data)
    assert "\n" not in str(e.value)


# -- validation ------------------------------------------------------------------------------
@pytest.mark.parametrize(
    "data, match",
    [
        # Sampling theorem (Nyquist-Shannon): the band must lie below fs/2.
        (
            minimal(control={"fs_hz": 4000}),
            r"control\.fs_hz = 4000.0 puts the Nyquist frequency "
            r"at 2000 Hz, not above the profile's f_max_hz = 2000",
        ),
        (minimal(control={"fs_hz": 3000}), r"Nyquist"),
        # IEC 60068-2-64 (Test Fh) drive crest factor >= 2.5 [from a secondary summary].
        (
            minimal(safety={"clip_sigma": 2.4}),
            r"clip_sigma = 2.4 is below the drive crest-factor "
            r"floor of 2.5 \(IEC 60068-2-64\)",
        ),
        (minimal(control={"frame_length": 128}), r"frame_length = 128.*256"),
        (minimal(control={"lines": 64}), r"control\.lines = 64 gives frame_length = 128"),
        (minimal(control={"lines": 2048, "df_hz": 5}), r"give only one of"),
        (minimal(control={"averaging": "linar"}), r"did you mean 'linear'"),
        (minimal(control={"law": "fancy"}), r"is not one of direct, blend"),
        (minimal(control={"update_gain": 0}), r"update_gain = 0 must be > 0"),
        (
            minimal(schedule={"rate_db_s": 20}),
            r"schedule\.rate_db_s = 20.0 must be <= "
            r"safety\.max_rate_db_s = 12",
        ),
        (minimal(schedule={"steps_db": [-6, -9, 0]}), r"steps_db\[1\] = -9 is not above"),
        (minimal(schedule={"steps_db": [-12, -6]}), r"steps_db\[1\] = -6 must be 0"),
        (minimal(schedule={"full_level_s": 0}), r"full_level_s = 0 must be > 0"),
        (
            minimal(safety={"drive_rms_max_fs": 0.8, "drive_peak_max_fs": 0.5}),
            r"rms cannot exceed peak",
        ),
        (minimal(rig={"kind": "usb"}), r"rig\.kind = 'usb' is not one of sim, audio"),
        (minimal(rig={"calibration": "c.yaml", "uncalibrated": True}), r"contradicts"),
        (minimal(seed=-1), r"seed = -1 must be >= 0"),
        (minimal(seed="x"), r"seed = 'x' is not a whole number"),
        (minimal(faults=[{"kind": "sensor_gian", "at_s": 3}]), r"did you mean 'sensor_gain'"),
        (minimal(faults=[{"kind": "dropout", "at_s": -1}]), r"at_s = -1 must be >= 0"),
        (minimal(faults="sensor_gain@x"), r"must be a list"),
        ({"name": "x"}, r"bench\.yaml: profile: required key is missing"),
        ({"profile": {"units": "g2/Hz"}}, r"give breakpoints"),
        (
            {"profile": {"units": "g/Hz", "breakpoints": POINTS}},
            r"profile\.units = 'g/Hz' is not a known ASD unit \(valid: g2/Hz, \(m/s2\)2/Hz",
        ),
        ([1, 2], r"bench\.yaml must be a mapping"),
    ],
)
def test_bad_spec_is_one_config_error(data, match):
    with pytest.raises(ConfigError, match=match) as e:
        build(data)
    assert "\n" not in str(e.value)


def test_band_needs_eight_lines():
    # 20-40 Hz at df = 48000/256 = 187.5 Hz holds no line at all; at df = 2.93 Hz it holds 7
    # (k = 7..13), one short of the 8-line minimum; at df = 2.34 Hz 9 lines (k = 9..17).
    narrow = {"profile": {"breakpoints": [{"f_hz": 20, "asd": 1}, {"f_hz": 40, "asd": 1}]}}
    with pytest.raises(ConfigError, match=r"only 0 lines .*needs >= 8"):
        build({**narrow, "control": {"frame_length": 256}})
    with pytest.raises(ConfigError, match=r"only 7 lines"):
        build({**narrow, "control": {"frame_length": 16384}})
    assert build({**narrow, "control": {"fs_hz": 38400, "frame_length": 16384}}).control


def test_nyquist_error_names_overridden_fs():
    with pytest.raises(ConfigError, match=r"^command line: control\.fs_hz = 4000"):
        build(minimal(), overrides={"control.fs_hz": 4000})




# -- files -----------------------------------------------------------------------------------
def test_load_yaml_with_csv_profile_relative_to_the_file(tmp_path, monkeypatch):
    d = tmp_path / "tests"
    d.mkdir()
    write(d / "board.csv", "# demo\nHz,g2/Hz\n20,0.001\n1000,0.001\n")
    write(
        d / "board.yaml",
        "name: board\nprofile: {file: board.csv}\nseed: 4\n"
        "rig: {plant: plants/big.yaml, calibration: cal.yaml, kind: audio}\n",
    )
    monkeypatch.chdir(tmp_path)  # a relative path must not be read against the cwd
    s = load_spec("tests/board.yaml")
    assert s.profile.f_hz == (20.0, 1000.0) and s.seed == 4
    assert s.source == str(Path("tests/board.yaml"))
    assert s.rig.plant == str((d / "plants/big.yaml").resolve())
    assert s.rig.calibration == str((d / "cal.yaml").resolve())
    # flat 0.001 g²/Hz over 980 Hz: sqrt(0.98) grms (calc, flat-band closed form).
    assert s.profile.grms == pytest.approx(math.sqrt(0.98), rel=1e-12)


def test_csv_is_a_whole_spec_with_defaults_and_overrides(tmp_path):
    p = write(tmp_path / "bench.csv", "20 0.01\n500 0.01\n")
    s = load_spec(p, overrides={"control.fs_hz": 8000})
    assert s.name == "bench" and s.control.fs_hz == 8000 and s.schedule == Schedule()


@pytest.mark.parametrize(
    "name, text, match",
    [
        ("bad.yaml", "profile: [unclosed\n", r"bad\.yaml: line \d+ column \d+: malformed YAML"),
        ("bad.yaml", "name: a\n\tseed: 2\n", r"malformed YAML"),
        ("bad.csv", "20,0.01\n10,0.02\n", r"bad\.csv: line 2: f_hz = 10 is not above 20"),
        ("bad.txt", "20,0.01\n", r"at least 2 data lines"),
        ("bad.yaml", "profile: {file: nope.csv}\n", r"profile\.file = 'nope\.csv' does not exist"),
        ("bad.yaml", "profile: {file: p.yaml}\n", r"must be a two-column \.csv or \.txt"),
        ("bad.yaml", "profile: {file: a.csv, units: g2/Hz}\n", r"not allowed with profile\.file"),
        ("bad.json", "{}", r"unknown kind of test file"),
    ],
)
def test_bad_files_are_one_config_error(tmp_path, name, text, match):
    p = write(tmp_path / name, text)
    with pytest.raises(ConfigError, match=match) as e:
        load_spec(p)
    assert "\n" not in str(e.value)


def test_missing_file(tmp_path):
    with pytest.raises(ConfigError, match="file not found"):
        load_spec(tmp_path / "none.yaml")
    with pytest.raises(ConfigError, match="file not found"):
        load_spec(tmp_path / "none.csv")


# -- round trip ------------------------------------------------------------------------------
ROUND_TRIP_CASES = [
    minimal(),
    minimal(
        name="full",
        seed=7,
        tolerance={
            "alarm_db": 2,
            "abort_db": 4,
            "bands": [{"f_lo_hz": 20, "f_hi_hz": 50, "alarm_db": 3, "abort_db": 5}],
        },
        schedule={"steps_db": [-10, -5, 0], "hold_s": 1, "full_level_s": 5, "rate_db_s": 3},
        control={"fs_hz": 44100, "df_hz": 2.7, "law": "blend", "averaging": "linear"},
        safety={"clip_sigma": None, "abort_min_lines": 5},
        rig={"kind": "audio", "device": 3, "uncalibrated": True},
        faults=["noise_burst@20=0.1/0.5", {"kind": "sensor_detached", "at_s": 30}],
    ),
    {
        "profile": {
            "units": "(m/s2)2/Hz",
            "breakpoints": [
                {"f_hz": 20, "asd": 0.1},
                {"f_hz": 100, "slope_db_oct": 600},
                {"f_hz": 101, "asd": 1.0},
            ],
        }
    },
]


@pytest.mark.parametrize("data", ROUND_TRIP_CASES)
def test_round_trip_through_mapping_and_yaml(data, tmp_path):
    s = build(data)
    m = spec_to_mapping(s)
    assert build(m) == s
    # And through YAML text, as a run record would store it.
    p = tmp_path / "bench.yaml"
    config.write_yaml_file(p, m)
    s2 = load_spec(p)
    assert s2.profile == s.profile and s2.control == s.control and s2.faults == s.faults
    assert s2.rig == s.rig and s2.tolerance == s.tolerance and s2.safety == s.safety


# -- examples --------------------------------------------------------------------------------
@pytest.mark.parametrize(
    "name", ["handlebar-nav-unit.yaml", "battery-bms-board.yaml", "battery-bms-board.csv"]
)
def test_examples_load_and_suit_a_loudspeaker_shaker(name):
    s = load_spec(EXAMPLES / name)
    p = s.profile
    assert p.f_min_hz >= 20 and p.f_max_hz <= 1000
    assert 0.5 <= p.grms <= 1.5
    # Small loudspeaker drivers have about 1-3 mm one-way Xmax [from memory]: the 3-sigma
    # peak-to-peak stroke must stay well under the smallest of those, 2 mm peak-to-peak.
    assert p.displacement_pp_3sigma_m < 2e-3
    assert s.control.fs_hz == 48000 and s.rig.kind == "sim"


def test_all_example_tests_load():
    files = sorted(EXAMPLES.glob("*.yaml")) + sorted(EXAMPLES.glob("*.csv"))
    assert len(files) >= 3
    for f in files:
        p = load_spec(f).profile
        # grms against scipy.integrate.quad of the breakpoints' log-log interpolation (scipy as
        # reference; quad's epsrel 1e-12 per segment, so 1e-9 leaves room only for rounding)
        assert p.grms == pytest.approx(quad_grms(p.f_hz, p.asd_g2_hz), rel=1e-9), f.name


def test_yaml_example_header_says_demo():
    for f in list(EXAMPLES.glob("*.yaml")) + list(EXAMPLES.glob("*.csv")):
        assert "DEMO DATA" in f.read_text(encoding="utf-8").splitlines()[0]


def test_moved_names_are_reexported():
    # other modules import these from liveshape.testdef.spec; they live in fault_spec and overrides
    from liveshape.testdef import fault_spec, overrides, spec

    for name in ("FAULT_KINDS", "FaultSpec", "parse_fault"):
        assert getattr(spec, name) is getattr(fault_spec, name)
    assert spec.COMMAND_LINE is overrides.COMMAND_LINE


# -- duplicate keys ------------------------------------------------------------------------
def test_duplicate_key_is_one_error_naming_key_and_both_lines(tmp_path):
    # YAML 1.2 §3.2.1.1: the keys of a mapping are unique. The example with a second schedule
    # appended must not run straight at 0 dB (the last key used to win in silence).
    text = (EXAMPLES / "handlebar-nav-unit.yaml").read_text(encoding="utf-8")
    first = 1 + text.splitlines().index("schedule:")
    path = tmp_path / "twice.yaml"
    path.write_text(text + "schedule: {steps_db: [0]}\n", encoding="utf-8")
    last = len(path.read_text(encoding="utf-8").splitlines())
    with pytest.raises(ConfigError) as info:
        load_spec(path)
    msg = str(info.value)
    assert "\n" not in msg
    assert str(path) in msg and "'schedule'" in msg
    assert f"lines {first} and {last}" in msg


@pytest.mark.parametrize("text", [
    "a: {b: 1, b: 2}\n",
    "a:\n  - x: 1\n    x: 2\n",
    "a: 1\n'a': 2\n",
])
def test_duplicate_keys_anywhere_are_refused(text):
    with pytest.raises(ConfigError, match="given twice"):
        config.read_yaml_text(text, "t.yaml")


def test_merge_keys_and_safe_load_semantics_are_kept():
    # A key written next to a merge (<<) overrides the merged one (yaml.org/type/merge.html);
    # that is not a duplicate. Tags beyond safe_load's stay refused.
    data = config.read_yaml_text("b: &x {c: 1, d: 2}\ne:\n  <<: *x\n  c: 3\n", "t.yaml")
    assert data == {"b": {"c": 1, "d": 2}, "e": {"c": 3, "d": 2}}
    with pytest.raises(ConfigError, match="malformed"):
        config.read_yaml_text("a: !!python/object/apply:os.system ['true']\n", "t.yaml")
