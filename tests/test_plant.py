"""Plant description (liveshape.rigs.plant) and its continuous-time model (rigs.plantmodel)."""

from __future__ import annotations

import dataclasses
import math
from pathlib import Path

import numpy as np
import pytest
from scipy import integrate, optimize, signal

from liveshape.dsp.profile import G0_M_S2
from liveshape.errors import ConfigError
from liveshape.rigs.plant import (
    IdealShaker,
    Payload,
    Plant,
    Resonance,
    ThieleSmallShaker,
    load_plant,
    plant_from_mapping,
    plant_to_mapping,
    preset_names,
)
from liveshape.rigs.plantmodel import analytic_frf, chain_tf, electromechanical_tf, voltage_frf
from liveshape.schema import Where
from liveshape.testdef.config import read_yaml_file, write_yaml_file

EXAMPLES = Path(__file__).resolve().parent.parent / "examples" / "rigs"
PRESETS = ("loudspeaker", "bench", "ideal")

# Float64 evaluation of polynomials of degree <= 11 whose roots are well separated: the relative
# rounding error is a few hundred ulp at most (observed ~1e-13); 1e-9 bounds it with margin.
RTOL_POLY = 1e-9


def two_mode_plant() -> Plant:
    """A plant with two payload resonances and the sensor on the second one."""
    p = load_plant("loudspeaker")
    res = (Resonance(300.0, 12.0, 0.01, "a"), Resonance(900.0, 30.0, 0.004, "b"))
    return dataclasses.replace(p, payload=dataclasses.replace(
        p.payload, resonances=res, control_point="b"))


def impedance_model_accel(plant: Plant, f_hz: np.ndarray) -> np.ndarray:
    """Acceleration (m/s²) per amplifier volt from the textbook impedance analogy.

    Electrical input impedance ``Ze = Re + jw Le + Bl²/Zm`` with mechanical impedance
    ``Zm = Rms + jw M + 1/(jw Cms) + sum Zj``; a modal mass on spring k and damper c presents the
    driving-point impedance ``Zj = jw m (c + k/jw) / (jw m + c + k/jw)`` and moves with
    transmissibility ``(c + k/jw)/(jw m + c + k/jw)`` (R. H. Small, JAES 1972; Den Hartog,
    Mechanical Vibrations, dynamic absorber).
    """
    sh = plant.shaker
    jw = 2j * math.pi * f_hz
    zm = sh.rms_kg_s + jw * plant.moving_mass_kg + 1.0 / (jw * sh.cms_m_per_n)
    trans = {}
    for r in plant.payload.resonances:
        w = 2 * math.pi * r.f_hz
        k, c, m = r.mass_kg * w * w, r.mass_kg * w / r.q, r.mass_kg
        zs = c + k / jw
        zm = zm + jw * m * zs / (jw * m + zs)
        trans[r.name] = zs / (jw * m + zs)
    ze = sh.re_ohm + jw * sh.le_h + sh.bl_tm**2 / zm
    a_table = jw * sh.bl_tm * (1.0 / ze) / zm
    cp = plant.payload.control_point
    return a_table if cp == "table" else a_table * trans[cp]


# -- presets and files ---------------------------------------------------------------------------
def test_preset_names_are_the_packaged_three():
    assert set(preset_names()) == set(PRESETS)


@pytest.mark.parametrize("name", PRESETS)
def test_presets_load_and_round_trip(name, tmp_path):
    p = load_plant(name)
    assert p.name == name and p.source == f"preset:{name}"
    again = plant_from_mapping(plant_to_mapping(p), Where("x"))
    assert again == p
    path = tmp_path / "rig.yaml"
    write_yaml_file(path, plant_to_mapping(p))
    assert load_plant(str(path)) == p
    assert load_plant(path).source == str(path)


@pytest.mark.parametrize("name", PRESETS)
def test_example_files_describe_the_presets(name):
    example = EXAMPLES / f"{name}.yaml"
    assert load_plant(example) == load_plant(name)


def test_readme_documents_every_key():
    text = (EXAMPLES / "README.md").read_text(encoding="utf-8")

    def keys(d, out):
        for k, v in d.items():
            out.add(k)
            if isinstance(v, dict):
                keys(v, out)
            if isinstance(v, list):
                for item in v:
                    keys(item, out)
        return out

    for name in PRESETS:
        for k in keys(read_yaml_file(EXAMPLES / f"{name}.yaml"), set()):
            assert f"`{k}`" in text, k


def test_ideal_preset_is_exactly_flat():
    p = load_plant("ideal")
    f = np.geomspace(0.1, 20000.0, 400)
    h = analytic_frf(p, f, fs_hz=48000.0)
    undelayed = h * np.exp(2j * math.pi * f * p.card.delay_samples / 48000.0)
    # Only the delay's complex exponential is rounded: a few ulp.
    np.testing.assert_allclose(undelayed, 1.0, rtol=0, atol=8 * np.finfo(float).eps)


def test_description_and_models_live_apart():
    # The continuous-time models live in rigs.plantmodel, which reads the description in
    # rigs.plant; the description module lists only its own names (no import back).
    from liveshape.rigs import plant, plantmodel

    assert all(hasattr(plant, n) for n in plant.__all__)
    assert not [n for n in plant.__all__ if hasattr(plantmodel, n) and n != "Plant"]
    for name in ("analytic_frf", "chain_tf", "electromechanical_ss", "voltage_frf"):
        assert callable(getattr(plantmodel, name))


# -- physics ----------------------------------------------------------------------------------
def test_thiele_small_resonance_is_where_velocity_is_in_phase():
    # Thiele–Small definition: fs = 1/(2 pi sqrt(Mms Cms)); with Le = 0 the coil sees a purely
    # resistive motional impedance at fs, so velocity/voltage has zero phase there (Small 1972).
    sh = ThieleSmallShaker(re_ohm=6.0, le_h=0.0, bl_tm=7.0, mms_kg=0.015,
                           cms_m_per_n=1.0e-3, rms_kg_s=1.5)
    p = Plant("free", sh)
    fs_exact = 1.0 / (2 * math.pi * math.sqrt(sh.mms_kg * sh.cms_m_per_n))
    assert sh.fs_hz == pytest.approx(fs_exact, rel=1e-15)

    def phase(f):
        return np.angle(voltage_frf(p, f, "displacement_m_per_v") * 2j * math.pi * f)

    f0 = optimize.brentq(phase, fs_exact / 2, fs_exact * 2, xtol=1e-12)
    assert f0 == pytest.approx(fs_exact, rel=1e-9)  # brentq tolerance
    # Added-mass loading (the standard added-mass measurement of Mms, from memory): 50 g more
    # moves the resonance to 1/(2 pi sqrt((Mms + m) Cms)).
    loaded = dataclasses.replace(p, payload=dataclasses.replace(p.payload, mass_kg=0.05))

    def phase_loaded(f):
        return np.angle(voltage_frf(loaded, f, "displacement_m_per_v") * 2j * math.pi * f)

    f1 = optimize.brentq(phase_loaded, fs_exact / 4, fs_exact, xtol=1e-12)
    assert f1 == pytest.approx(1 / (2 * math.pi * math.sqrt(0.065 * 1e-3)), rel=1e-9)


def test_impedance_peaks_at_resonance_without_inductance():
    # |Ze| = |Re + Bl²/Zm| is largest where |Zm| is smallest, i.e. at fs (Le = 0).
    sh = ThieleSmallShaker(re_ohm=4.0, le_h=0.0, bl_tm=5.0, mms_kg=0.02,
                           cms_m_per_n=5e-4, rms_kg_s=2.0)
    p = Plant("free", sh)
    res = optimize.minimize_scalar(
        lambda f: -abs(1.0 / voltage_frf(p, f, "current_a_per_v")),
        bracket=(sh.fs_hz * 0.8, sh.fs_hz * 1.2), tol=1e-10)
    # The optimizer's tolerance on f is about sqrt(tol) relative.
    assert res.x == pytest.approx(sh.fs_hz, rel=1e-4)
    z_max = abs(1.0 / voltage_frf(p, sh.fs_hz, "current_a_per_v"))
    assert z_max == pytest.approx(sh.re_ohm + sh.bl_tm**2 / sh.rms_kg_s, rel=RTOL_POLY)


@pytest.mark.parametrize("which", ["loudspeaker", "bench", "two_modes"])
def test_accel_frf_matches_impedance_model(which):
    p = two_mode_plant() if which == "two_modes" else load_plant(which)
    f = np.geomspace(1.0, 20000.0, 2000)
    ours = voltage_frf(p, f, "accel_m_s2_per_v")
    np.testing.assert_allclose(ours, impedance_model_accel(p, f), rtol=RTOL_POLY)
    # scipy.signal.freqs as the reference evaluator of the same polynomials.
    b, a = electromechanical_tf(p)["accel_m_s2_per_v"]
    _, h = signal.freqs(b, a, worN=2 * math.pi * f)
    np.testing.assert_allclose(ours, h, rtol=RTOL_POLY)


@pytest.mark.parametrize("name", PRESETS)
def test_chain_frf_is_freqs_of_chain_polynomials_with_delay(name):
    p = load_plant(name)
    fs = 48000.0
    f = np.geomspace(0.5, 20000.0, 1500)
    b, a = chain_tf(p)
    _, h = signal.freqs(b, a, worN=2 * math.pi * f)  # scipy as reference
    h = h * np.exp(-2j * math.pi * f * p.card.delay_samples / fs)
    np.testing.assert_allclose(analytic_frf(p, f, fs_hz=fs), h, rtol=RTOL_POLY)


def test_undamped_modal_mass_stops_the_table_at_its_frequency():
    # Den Hartog's dynamic absorber: at the absorber's own (fixed-base) frequency the main mass
    # stands still when the absorber is undamped.
    p = load_plant("loudspeaker")
    res = (Resonance(350.0, 1e9, 0.01, "absorber"),)
    p = dataclasses.replace(p, payload=dataclasses.replace(p.payload, resonances=res))
    near = abs(voltage_frf(p, 350.0, "table_accel_m_s2_per_v"))
    off = abs(voltage_frf(p, 420.0, "table_accel_m_s2_per_v"))
    assert near / off < 1e-6


def test_base_excited_mode_on_ideal_shaker_follows_miles():
    # A modal mass on an acceleration source is a base-excited SDOF: with white base ASD its rms
    # absolute acceleration is Miles' value x sqrt(1 + 1/Q²) (NASA GSFC FEMCI "Miles' Equation";
    # the factor is the exact integral of the transmissibility). Preset-like mode: 350 Hz, Q 15.
    fn, q, asd = 350.0, 15.0, 1e-3
    p = Plant("sdof", IdealShaker(g_per_v=1.0),
              payload=Payload(resonances=(Resonance(fn, q, 0.01, "m"),), control_point="m"))

    def integrand(f):  # base acceleration 1 g per volt, so |H|/g0 is the transmissibility
        return asd * abs(voltage_frf(p, f, "accel_m_s2_per_v") / G0_M_S2) ** 2

    ms = sum(integrate.quad(integrand, lo, hi, limit=400, epsabs=0, epsrel=1e-12)[0]
             for lo, hi in [(0, fn * 0.8), (fn * 0.8, fn * 1.25), (fn * 1.25, np.inf)])
    miles = math.sqrt(math.pi / 2 * fn * q * asd)
    assert math.sqrt(ms) == pytest.approx(miles * math.sqrt(1 + 1 / q**2), rel=1e-8)


# -- errors -----------------------------------------------------------------------------------
def _mapping() -> dict:
    return plant_to_mapping(load_plant("loudspeaker"))


def _one_line(exc: pytest.ExceptionInfo) -> str:
    msg = str(exc.value)
    assert "\n" not in msg
    return msg


def test_unknown_key_suggests_the_nearest(tmp_path):
    d = _mapping()
    d["shaker"]["bl_t"] = d["shaker"].pop("bl_tm")
    path = tmp_path / "myrig.yaml"
    write_yaml_file(path, d)
    with pytest.raises(ConfigError) as exc:
        load_plant(path)
    msg = _one_line(exc)
    assert msg.startswith(str(path)) and "shaker.bl_t" in msg and "did you mean 'bl_tm'" in msg


def test_negative_mass_is_refused():
    d = _mapping()
    d["payload"]["mass_kg"] = -0.05
    with pytest.raises(ConfigError) as exc:
        plant_from_mapping(d, Where("rig.yaml"))
    msg = _one_line(exc)
    assert "rig.yaml: payload.mass_kg = -0.05" in msg and ">= 0" in msg
    d = _mapping()
    d["payload"]["resonances"][0]["mass_kg"] = -1
    with pytest.raises(ConfigError) as exc:
        plant_from_mapping(d, Where("rig.yaml"))
    assert "payload.resonances[0].mass_kg = -1" in _one_line(exc)


def test_unknown_preset_names_the_valid_ones():
    with pytest.raises(ConfigError) as exc:
        load_plant("loudspeakr")
    msg = _one_line(exc)
    assert "'loudspeakr'" in msg and "bench, ideal, loudspeaker" in msg
    assert "did you mean 'loudspeaker'" in msg


def test_missing_file_and_missing_shaker(tmp_path):
    with pytest.raises(ConfigError) as exc:
        load_plant(tmp_path / "none.yaml")
    assert "file not found" in _one_line(exc)
    with pytest.raises(ConfigError) as exc:
        plant_from_mapping({"name": "x"}, Where("r.yaml"))
    assert "r.yaml: shaker: required key is missing" == _one_line(exc)


@pytest.mark.parametrize(
    "path, value, words",
    [
        (("shaker", "model"), "electrostatic", "is not one of thiele_small, ideal"),
        (("payload", "control_point"), "lid", "is not one of table, bracket"),
        (("card", "delay_samples"), 2.5, "is not a whole number"),
        (("amplifier", "highpass_order"), 3, "must be <= 2"),
        (("shaker", "re_ohm"), 0, "must be > 0"),
        (("accelerometer", "noise_g_rms"), "loud", "is not a number"),
    ],
)
def test_bad_values_are_one_line(path, value, words):
    d = _mapping()
    d[path[0]][path[1]] = value
    with pytest.raises(ConfigError) as exc:
        plant_from_mapping(d, Where("rig.yaml"))
    msg = _one_line(exc)
    assert f"rig.yaml: {path[0]}.{path[1]} = {value!r}" in msg and words in msg


def test_duplicate_resonance_names_are_refused():
    d = _mapping()
    d["payload"]["resonances"].append(dict(d["payload"]["resonances"][0]))
    with pytest.raises(ConfigError) as exc:
        plant_from_mapping(d, Where("rig.yaml"))
    assert "payload.resonances[1].name = 'bracket' must be unique" in _one_line(exc)


def test_defaults_of_a_minimal_file():
    d = {"shaker": {"re_ohm": 6, "bl_tm": 7, "mms_kg": 0.015, "cms_m_per_n": 0.001,
                    "rms_kg_s": 1.5}}
    p = plant_from_mapping(d, Where("min.yaml"), default_name="min")
    assert p.name == "min" and p.shaker.le_h == 0.0 and p.shaker.xmax_m is None
    assert p.card.delay_samples == 0 and p.card.out_highpass_hz is None
    assert p.payload.control_point == "table" and p.payload.resonances == ()
    assert p.fs_per_g == pytest.approx(0.1)
