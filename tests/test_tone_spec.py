"""The ``tones:`` list of a test definition: strict reading, one-line errors, round trip.

Project rules, not an outside reference, apart from the Nyquist frequency fs/2 (Shannon's
sampling theorem) and the alarm/abort defaults of 1 and 3 dB ([common practice], no standard
named).
"""

from __future__ import annotations

import pytest

from liveshape.errors import ConfigError
from liveshape.schema import Where
from liveshape.testdef import config
from liveshape.testdef.spec import load_spec, spec_from_mapping, spec_to_mapping
from liveshape.testdef.tone_spec import ToneSpec, check_tones

POINTS = [{"f_hz": 20, "asd": 0.01}, {"f_hz": 2000, "asd": 0.01}]


def build(tones, **extra):
    data = {"profile": {"breakpoints": [dict(p) for p in POINTS]}, "tones": tones, **extra}
    return spec_from_mapping(data, source="sor.yaml")


def test_fixed_and_swept_tones_read_with_their_defaults():
    s = build([{"f_hz": 100, "amplitude_g": 0.5},
               {"f_hz": 200, "f_hi_hz": 800, "rate_oct_min": 1, "amplitude_g": 1,
                "tolerance_db": 2, "abort_db": 4}])
    fixed, swept = s.tones
    # alarm ±1 dB, abort ±3 dB [common practice]
    assert fixed == ToneSpec(100.0, 0.5, None, None, 1.0, 3.0) and not fixed.swept
    assert swept.swept and swept.f_top_hz == 800.0 and swept.abort_db == 4.0
    t = swept.tone(0.2)
    assert (t.amplitude, t.f_hz, t.f_hi_hz, t.rate_oct_min) == (0.2, 200.0, 800.0, 1.0)


def test_no_tones_is_the_default():
    s = spec_from_mapping({"profile": {"breakpoints": POINTS}}, source="r.yaml")
    assert s.tones == ()


def test_round_trip_through_mapping_and_yaml(tmp_path):
    s = build([{"f_hz": 100, "amplitude_g": 0.5},
               {"f_hz": 200, "f_hi_hz": 800, "rate_oct_min": 2, "amplitude_g": 1}])
    m = spec_to_mapping(s)
    assert spec_from_mapping(m, source="sor.yaml") == s
    p = tmp_path / "sor.yaml"
    config.write_yaml_file(p, m)
    assert load_spec(p).tones == s.tones


def test_tones_from_the_command_line():
    data = {"profile": {"breakpoints": POINTS}}
    s = spec_from_mapping(data, source="sor.yaml",
                          overrides={"tones": "[{f_hz: 150, amplitude_g: 0.3}]"})
    assert s.tones == (ToneSpec(150.0, 0.3),)


@pytest.mark.parametrize("tone, key, words", [
    ({"f_hz": 10, "amplitude_g": 1}, "tones[0].f_hz", "profile band 20-2000"),
    ({"f_hz": 100, "amplitude_g": 0}, "tones[0].amplitude_g", "> 0"),
    ({"f_hz": 100, "amplitude_g": -1}, "tones[0].amplitude_g", "> 0"),
    ({"f_hz": 100, "f_hi_hz": 50, "rate_oct_min": 1, "amplitude_g": 1}, "tones[0].f_hi_hz",
     "above f_hz"),
    ({"f_hz": 100, "f_hi_hz": 3000, "rate_oct_min": 1, "amplitude_g": 1}, "tones[0].f_hi_hz",
     "profile band"),
    ({"f_hz": 100, "f_hi_hz": 300, "amplitude_g": 1}, "tones[0].f_hi_hz", "rate_oct_min"),
    ({"f_hz": 100, "rate_oct_min": 1, "amplitude_g": 1}, "tones[0].rate_oct_min", "f_hi_hz"),
    ({"f_hz": 100, "f_hi_hz": 300, "rate_oct_min": 0, "amplitude_g": 1},
     "tones[0].rate_oct_min", "> 0"),
    ({"f_hz": 100, "amplitude_g": 1, "tolerance_db": 3, "abort_db": 2}, "tones[0].abort_db",
     "above tolerance_db"),
    ({"f_hz": 100}, "tones[0].amplitude_g", "required"),
    ({"f_hz": 100, "amplitude_g": 1, "freq": 3}, "tones[0].freq", "unknown key"),
    ({"f_hz": "x", "amplitude_g": 1}, "tones[0].f_hz", "'x'"),
])
def test_bad_tone_is_one_line_naming_key_value_and_rule(tone, key, words):
    with pytest.raises(ConfigError) as exc:
        build([tone])
    msg = str(exc.value)
    assert msg.startswith(f"sor.yaml: {key}") and words in msg and "\n" not in msg


def test_tone_at_or_above_nyquist_is_refused():
    # a band up to 2000 Hz at fs = 4400 Hz: Nyquist 2200 Hz (Shannon); the tone must lie in
    # the band, and the band below Nyquist, so the band rule names the key first; with a
    # narrower fs the spec's own Nyquist rule fires before the tone's
    s = build([{"f_hz": 1999, "amplitude_g": 1}], control={"fs_hz": 4400, "frame_length": 512})
    assert s.tones[0].f_hz == 1999.0
    with pytest.raises(ConfigError) as exc:
        check_tones(s.tones, 20.0, 2000.0, 3000.0, Where("sor.yaml").key("tones"))
    assert "sor.yaml: tones[0].f_hz = 1999.0 must be below Nyquist (1500 Hz)" == str(exc.value)


def test_not_a_list_is_one_line():
    with pytest.raises(ConfigError) as exc:
        build({"f_hz": 100, "amplitude_g": 1})
    assert "sor.yaml: tones" in str(exc.value) and "must be a list" in str(exc.value)
