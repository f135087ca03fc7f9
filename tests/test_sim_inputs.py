"""The simulated rig with several inputs: a second control point on a rocking fixture, payload
monitors, the drive's loopback as a reference input, and faults on one input.

Outside references: the base-excitation transmissibility of a single-degree-of-freedom system,
|T| = sqrt((1 + (2ζr)²)/((1 − r²)² + (2ζr)²)), ζ = 1/(2Q) (S. S. Rao, *Mechanical Vibrations*,
5th ed., §3.6); scipy.signal.freqs and scipy.signal.butter/sosfilt as independent evaluators;
the bilinear transform's frequency warping f' = (fs/π) tan(π f/fs) (Oppenheim & Schafer,
*Discrete-Time Signal Processing*, 3rd ed., §7.2); the random error of an H1 magnitude estimate,
ε = sqrt(1 − γ²)/(|γ| sqrt(2 n_d)) (Bendat & Piersol, *Random Data*, 4th ed., Table 9.6).
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest
import scipy.signal

from liveshape.errors import ConfigError
from liveshape.rigs.plant import FixturePoint, load_plant
from liveshape.rigs.plantmodel import fixture_point_tf, mode_transmissibility_tf
from liveshape.rigs.sim import SimRig, sim_inputs
from liveshape.testdef.spec import parse_fault, spec_from_mapping

FS = 48000
TIP = FixturePoint("tip", f_hz=700.0, q=8.0, coupling=-0.6)
INPUTS = ((1, "control"), (2, "fixture:tip"), (3, "mode:bracket"), (4, "reference"))


def plant_with_tip(**card):
    p = load_plant("loudspeaker")
    p = dataclasses.replace(p, payload=dataclasses.replace(p.payload, fixture_points=(TIP,)))
    if card:
        p = dataclasses.replace(p, card=dataclasses.replace(p.card, **card))
    return p


def run(rig, blocks=40, level=0.05, seed=11, n=8192):
    rng = np.random.default_rng(seed)
    d = level * rng.standard_normal(blocks * n)
    rows = np.concatenate([rig.process_inputs(d[i * n:(i + 1) * n]) for i in range(blocks)],
                          axis=1)
    return d, rows


# -- the second control point's model -----------------------------------------------------------

def fixture_mag_formula(f, f_n, q, mu):
    """|((1-μ)s² + 2ζω s + ω²)/(s² + 2ζω s + ω²)| at s = j2πf, written out in r = f/f_n."""
    r, zeta = f / f_n, 1 / (2 * q)
    return np.sqrt(((1 - (1 - mu) * r**2) ** 2 + (2 * zeta * r) ** 2)
                   / ((1 - r**2) ** 2 + (2 * zeta * r) ** 2))


def test_fixture_point_frf_against_scipy_its_limits_and_rao():
    plant = plant_with_tip()
    f = np.geomspace(1.0, 20000.0, 400)
    b, a = fixture_point_tf(plant, 0)
    _, h = scipy.signal.freqs(b, a, worN=2 * np.pi * f)
    np.testing.assert_allclose(np.abs(h), fixture_mag_formula(f, 700.0, 8.0, -0.6), rtol=1e-9)
    # limits: the table's motion at 0 Hz, 1 − μ far above the mode
    assert abs(h[0]) == pytest.approx(1.0, abs=1e-5)
    assert abs(h[-1]) == pytest.approx(1.6, rel=1e-2)
    # μ = 1 is the base-excitation transmissibility of a single mode (Rao §3.6)
    one = dataclasses.replace(plant, payload=dataclasses.replace(plant.payload, fixture_points=(
        dataclasses.replace(TIP, coupling=1.0),)))
    _, h1 = scipy.signal.freqs(*fixture_point_tf(one, 0), worN=2 * np.pi * f)
    r, zeta = f / 700.0, 1 / 16.0
    rao = np.sqrt((1 + (2 * zeta * r) ** 2) / ((1 - r**2) ** 2 + (2 * zeta * r) ** 2))
    np.testing.assert_allclose(np.abs(h1), rao, rtol=1e-9)


@pytest.mark.parametrize("row, tf, index", [(1, fixture_point_tf, 0),
                                            (2, mode_transmissibility_tf, 0)])
def test_simulated_points_over_the_control_follow_their_frfs(row, tf, index):
    # H1 from the control row to the point's row against the analytic FRF at the bilinear-warped
    # frequency; per-line bound 4 ε (Bendat & Piersol Table 9.6, non-overlapping segments only)
    # plus 0.05 dB for the resolution bias of the resonance on 1.46 Hz lines [from memory]
    plant = plant_with_tip()
    rig = SimRig(plant, FS, seed=2, inputs=INPUTS)
    assert rig.input_channels == (1, 2, 3, 4)
    _, rows = run(rig, blocks=120)
    y, m = rows[0], rows[row]
    nper = 32768
    f, gyy = scipy.signal.welch(y, FS, nperseg=nper)
    _, gym = scipy.signal.csd(y, m, FS, nperseg=nper)
    _, coh = scipy.signal.coherence(y, m, FS, nperseg=nper)
    f_warped = FS / np.pi * np.tan(np.pi * f / FS)
    _, t = scipy.signal.freqs(*tf(plant, index), worN=2 * np.pi * f_warped)
    sel = (f > 60) & (f < 2000)
    err_db = 20 * np.log10(np.abs(gym[sel] / gyy[sel]) / np.abs(t[sel]))
    eps = np.sqrt(1 - coh[sel]) / (np.sqrt(coh[sel]) * np.sqrt(2 * (y.size // nper)))
    bound = 4 * 8.686 * eps + 0.05
    assert np.all(np.abs(err_db) < bound), float(np.max(np.abs(err_db) - bound))


def test_the_control_row_is_what_process_returns_bit_for_bit():
    plant = plant_with_tip()
    d = 0.1 * np.random.default_rng(5).standard_normal(30000)
    plain = SimRig(plant, FS, seed=3).process(d)
    rows = SimRig(plant, FS, seed=3, inputs=INPUTS).process_inputs(d)
    assert rows.shape == (4, d.size)
    assert np.array_equal(rows[0], plain)


# -- the reference input --------------------------------------------------------------------

def test_the_reference_is_the_drive_through_the_card_and_cable():
    # card 2 V/FS out, 4 V/FS in: a cable passes volts, so the reference reads 0.5 FS per FS of
    # drive; the card's first-order 7 Hz and 5 Hz couplings (scipy.signal.butter, bilinear) and
    # its 1536-sample delay
    plant = plant_with_tip(out_v_per_fs=2.0, in_v_per_fs=4.0, in_noise_fs_rms=0.0)
    rig = SimRig(plant, FS, seed=1, inputs=INPUTS)
    d, rows = run(rig, blocks=6)
    sos = np.vstack([scipy.signal.butter(1, fc, "highpass", fs=FS, output="sos")
                     for fc in (7.0, 5.0)])
    delayed = np.concatenate([np.zeros(1536), d[:-1536]])
    expect = 0.5 * scipy.signal.sosfilt(sos, delayed)
    np.testing.assert_allclose(rows[3], expect, rtol=0, atol=1e-6 * np.std(expect))
    assert rig.calibration.drive_fs_per_input_fs(4) == pytest.approx(2.0)  # 4 V/FS / 2 V/FS


def test_reference_coherence_with_the_drive_is_one_with_card_noise():
    # with -100 dBFS of card noise on a 0.05 FS drive (SNR ≈ 74 dB) the coherence is
    # 1/(1 + N/S) ≥ 0.9999 (Bendat & Piersol, Random Data, 4th ed., coherence of a noisy
    # output; section number [from memory]: §6.1.3)
    rig = SimRig(plant_with_tip(), FS, seed=1, inputs=INPUTS)
    d, rows = run(rig, blocks=12)
    delayed = np.concatenate([np.zeros(1536), d[:-1536]])
    f, coh = scipy.signal.coherence(delayed, rows[3], FS, nperseg=8192)
    sel = (f > 50) & (f < 5000)
    assert coh[sel].min() > 0.999


@pytest.mark.parametrize("fault, window_db", [
    ("dac_gain@0.5=-6", (0.0, -6.0)),            # a step of -6 dB
    ("dac_gain@0.5=-6/2", (-1.5, -4.5)),         # a drift over 2 s: -1.5 dB at 1.0 s, -4.5 at 2
])
def test_dac_gain_steps_or_drifts_the_card_output_seen_by_control_and_reference(fault,
                                                                                window_db):
    plant = plant_with_tip(in_noise_fs_rms=0.0)
    spec_f = parse_fault(fault)
    base = SimRig(plant, FS, seed=1, inputs=INPUTS)
    rig = SimRig(plant, FS, seed=1, inputs=INPUTS, faults=[spec_f])
    d0, r0 = run(base, blocks=18, n=8000)
    d1, r1 = run(rig, blocks=18, n=8000)
    # the ratio of the references, sample by sample, away from the card filters' memory (a
    # gain on the drive side of a linear filter equals one after it where it is constant);
    # the plant is linear at this level, so the control follows the same gain
    for t_s, db in zip((0.25, 2.75), (0.0, -6.0), strict=True):
        k = int(t_s * FS)
        for row in (3, 0):
            ratio = r1[row][k:k + 2000] / r0[row][k:k + 2000]
            assert 20 * np.log10(np.median(ratio)) == pytest.approx(db, abs=0.02)
    if "/" in fault:  # mid-drift: the gain at 1.0 s and 2.0 s, ±10 ms of drift each side
        # (fault times are rig time of the input samples, as for every fault)
        for t_s, db in zip((1.0, 2.0), window_db, strict=True):
            k = int(t_s * FS)
            ratio = r1[3][k - 100:k + 100] / r0[3][k - 100:k + 100]
            assert 20 * np.log10(np.median(ratio)) == pytest.approx(db, abs=0.05)


# -- faults on one input ------------------------------------------------------------------------

def test_a_sensor_detached_on_input_2_affects_only_that_input():
    plant = plant_with_tip()
    base = SimRig(plant, FS, seed=4, inputs=INPUTS)
    rig = SimRig(plant, FS, seed=4, inputs=INPUTS,
                 faults=[parse_fault("sensor_detached:2@0.5")])
    _, r0 = run(base, blocks=12)
    _, r1 = run(rig, blocks=12)
    late = slice(FS, None)
    for k in (0, 2, 3):
        assert np.array_equal(r0[k], r1[k]), k
    # input 2 reads its sensor and card noise only: hypot(1e-4 g × 0.1 V/g / 1 V/FS, 1e-5 FS)
    noise = math.hypot(1e-5, 1e-5)
    assert np.std(r1[1][late]) == pytest.approx(noise, rel=0.05)
    assert np.std(r0[1][late]) > 100 * noise


@pytest.mark.parametrize("fault, row", [("dropout:3@0.5", 2), ("noise_burst:4@0.5=0.1", 3),
                                        ("sensor_gain:2@0.5=0.5", 1)])
def test_other_faults_on_one_input(fault, row):
    plant = plant_with_tip()
    _, r0 = run(SimRig(plant, FS, seed=4, inputs=INPUTS), blocks=8)
    _, r1 = run(SimRig(plant, FS, seed=4, inputs=INPUTS, faults=[parse_fault(fault)]), blocks=8)
    others = [k for k in range(4) if k != row]
    assert all(np.array_equal(r0[k], r1[k]) for k in others)
    late = slice(FS, None)
    s0, s1 = np.std(r0[row][late]), np.std(r1[row][late])
    if fault.startswith("dropout"):
        assert s1 == 0.0
    elif fault.startswith("noise_burst"):
        assert s1 == pytest.approx(math.hypot(s0, 0.1), rel=0.02)  # variances add
    else:
        assert s1 / s0 == pytest.approx(0.5, rel=0.01)


def test_a_fault_without_input_still_hits_the_control_only():
    plant = plant_with_tip()
    _, r0 = run(SimRig(plant, FS, seed=4, inputs=INPUTS), blocks=6)
    _, r1 = run(SimRig(plant, FS, seed=4, inputs=INPUTS,
                       faults=[parse_fault("dropout@0.5")]), blocks=6)
    assert np.all(r1[0][FS:] == 0.0)
    assert all(np.array_equal(r0[k], r1[k]) for k in (1, 2, 3))


@pytest.mark.parametrize("kwargs, words", [
    ({"faults": [parse_fault("plant_gain:2@1=-3")]}, "plant_gain acts on the whole rig"),
    ({"faults": [parse_fault("sensor_detached:9@1")]},
     "input = 9 is not an input of the simulated rig (inputs: 1, 2, 3, 4)"),
    ({"faults": [parse_fault("dac_gain:2@1=-1")]}, "dac_gain acts on the whole rig"),
    ({"inputs": ((1, "control"), (1, "reference"))}, "channel 1 is given twice"),
    ({"inputs": ((1, "control"), (2, "control"))}, "a second control input"),
    ({"inputs": ((1, "reference"),)}, "no 'control' input"),
    ({"inputs": ((1, "control"), (2, "fixture:nose"))},
     "names no source of plant 'loudspeaker' (control, reference, mode:bracket, fixture:tip)"),
])
def test_bad_inputs_and_input_faults_are_one_line(kwargs, words):
    kwargs.setdefault("inputs", INPUTS)
    with pytest.raises(ConfigError) as exc:
        SimRig(plant_with_tip(), FS, **kwargs)
    assert words in str(exc.value) and "\n" not in str(exc.value)


def test_inputs_from_a_test_definition():
    spec = spec_from_mapping({
        "name": "t", "profile": {"breakpoints": [{"f_hz": 20, "asd": 0.01},
                                                 {"f_hz": 2000, "asd": 0.01}]},
        "rig": {"inputs": [{"channel": 2, "role": "control"},
                           {"channel": 1, "role": "control", "name": "tip"},
                           {"channel": 3, "role": "monitor", "name": "bracket"},
                           {"channel": 5, "role": "reference"}]},
        "faults": [{"kind": "sensor_detached", "at_s": 1, "input": 1}]}, source="t.yaml")
    plant = plant_with_tip()
    layout = sim_inputs(spec.rig.input_roles(), plant)
    assert layout == ((2, "control"), (1, "fixture:tip"), (3, "mode:bracket"), (5, "reference"))
    rig = SimRig(plant, FS, seed=1, inputs=layout, faults=spec.faults)
    cal = rig.calibration
    assert [c.channel for c in cal.inputs] == [2, 1, 3, 5]
    assert cal.inputs[3].mv_per_g is None and cal.g_per_fs_at(1) == pytest.approx(10.0)
    bad = dataclasses.replace(spec.rig.input_roles()[2], name="shelf")
    with pytest.raises(ConfigError, match="monitor input 3 .'shelf'. names no point"):
        sim_inputs([spec.rig.input_roles()[0], bad], plant)


def test_fixture_points_in_a_plant_file_read_back_and_are_checked():
    from liveshape.rigs.plant import plant_from_mapping, plant_to_mapping
    from liveshape.schema import Where

    data = plant_to_mapping(plant_with_tip())
    assert data["payload"]["fixture_points"] == [
        {"name": "tip", "f_hz": 700.0, "q": 8.0, "coupling": -0.6}]
    assert plant_from_mapping(data, Where("p.yaml")) == plant_with_tip()
    data["payload"]["fixture_points"].append({"name": "bracket", "f_hz": 9, "q": 1,
                                              "coupling": 0})
    with pytest.raises(ConfigError, match=r"p.yaml: payload.fixture_points\[1\].name = "
                       "'bracket' must be unique"):
        plant_from_mapping(data, Where("p.yaml"))
    data["payload"]["fixture_points"][1] = {"name": "x", "f_hz": 9, "q": 1}
    with pytest.raises(ConfigError, match=r"fixture_points\[1\]"):
        plant_from_mapping(data, Where("p.yaml"))
    fast = dataclasses.replace(TIP, f_hz=30000.0)
    p = plant_with_tip()
    p = dataclasses.replace(p, payload=dataclasses.replace(p.payload, fixture_points=(fast,)))
    with pytest.raises(ConfigError, match=r"payload.fixture_points\[0\].f_hz = 30000 must be "
                       "below 0.45"):
        SimRig(p, FS)


def test_a_fault_naming_the_control_channel_of_a_one_input_rig_acts_on_the_control():
    plant = plant_with_tip()
    d = 0.05 * np.random.default_rng(2).standard_normal(FS)
    a = SimRig(plant, FS, seed=1, faults=[parse_fault("dropout@0.5")]).process(d)
    b = SimRig(plant, FS, seed=1, faults=[parse_fault("dropout:1@0.5")]).process(d)
    assert np.array_equal(a, b) and np.all(a[FS // 2:] == 0.0)


def test_the_virtual_rig_calibration_file_lists_every_input(tmp_path):
    # the file the virtual-rig command writes: the sim's own truth per input (1 V/FS, 100 mV/g
    # for accelerometer inputs; none for the reference)
    from types import SimpleNamespace

    from liveshape.cli import write_virtual_rig_calibration
    from liveshape.rigs.calfile import load_calibration
    from liveshape.rigs.jackrig import PlantProcessor

    proc = PlantProcessor("loudspeaker", 48000.0, inputs=((1, "control"), (2, "mode:bracket"),
                                                          (3, "reference")))
    rig = SimpleNamespace(processor=proc, period_frames=1024, fs_hz=48000.0, client_name="vr")
    cal = load_calibration(write_virtual_rig_calibration(rig, tmp_path / "cal.yaml"))
    assert [(c.channel, c.v_per_fs, c.mv_per_g) for c in cal.inputs] == [
        (1, 1.0, 100.0), (2, 1.0, 100.0), (3, 1.0, None)]
    assert cal.g_per_fs_at(2) == pytest.approx(10.0)  # 1 V/FS over 0.1 V/g
