"""Several control inputs: combined spectra, the bias of extremal control, a dropped channel, and
the acceleration of the test item's modes (where a monitor accelerometer sits).

Outside references: the order-statistics integrals E[max] = ∫(1 − Fⁿ)dx and E[min] = ∫(1 − F)ⁿdx
(David & Nagaraja, *Order Statistics*, 3rd ed., 2003, §2.1) checked by a Monte Carlo of χ²
variables drawn with numpy; the expected maximum of four standard normals 1.02938 (H. L. Harter,
"Expected values of normal order statistics", Biometrika 48, 1961 [value from memory]); for two
channels E[max] + E[min] = E[X1] + E[X2] (an identity); the base-excitation transmissibility of
a single-degree-of-freedom system (S. S. Rao, *Mechanical Vibrations*, 5th ed., §3.6) and
scipy.signal.freqs. The PSD scatter χ²_ν/ν is that of Bendat & Piersol, *Random Data*, 4th ed.,
§8.5.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.signal

from liveshape.dsp.multichannel import (
    channel_dropouts,
    combine_control,
    extremal_bias,
    extremal_bias_db,
)
from liveshape.errors import LiveshapeError
from liveshape.rigs.plant import load_plant
from liveshape.rigs.plantmodel import (
    electromechanical_tf,
    evaluate_tf,
    mode_transmissibility_tf,
)


@pytest.mark.parametrize("n, dof", [(2, 16), (4, 120), (4, 16), (8, 60)])
@pytest.mark.parametrize("kind", ["maximum", "minimum"])
def test_extremal_bias_against_a_monte_carlo_of_chi_square_estimates(n, dof, kind):
    rng = np.random.default_rng(20261204 + n + dof)
    draws = rng.chisquare(dof, size=(200_000, n)) / dof  # χ²_ν/ν: Bendat & Piersol §8.5
    ext = draws.max(axis=1) if kind == "maximum" else draws.min(axis=1)
    mean, sem = float(ext.mean()), float(ext.std(ddof=1)) / math.sqrt(ext.size)
    expected = extremal_bias(n, dof, kind)
    assert abs(mean - expected) < 4.0 * sem, (mean, expected, sem)  # 4σ of the Monte Carlo
    assert (expected > 1.0) if kind == "maximum" else (expected < 1.0)


def test_maximum_of_four_channels_at_120_dof_reads_about_half_a_db_high():
    # The figure an outside reader derived for four equal channels at 120 DOF: about +0.55 dB.
    assert extremal_bias_db(4, 120) == pytest.approx(0.55, abs=0.01)
    assert extremal_bias_db(4, 120, "minimum") == pytest.approx(-0.60, abs=0.01)


def test_extremal_bias_tends_to_the_normal_order_statistic():
    # For large ν, χ²_ν/ν ≈ 1 + sqrt(2/ν)·Z, so E[max of 4] ≈ 1 + 1.02938·sqrt(2/ν) (Harter
    # 1961 [from memory]); the χ² skew adds O(1/ν).
    dof = 20_000.0
    got = (extremal_bias(4, dof) - 1.0) / math.sqrt(2.0 / dof)
    assert got == pytest.approx(1.02938, abs=0.01)


def test_two_channels_extremes_add_to_the_sum():
    # max(a, b) + min(a, b) = a + b, so E[max] + E[min] = 2 for two estimates of mean 1.
    for dof in (4.0, 16.0, 120.0):
        assert extremal_bias(2, dof) + extremal_bias(2, dof, "minimum") == pytest.approx(2.0,
                                                                                          abs=1e-8)
    assert extremal_bias(1, 16.0) == 1.0


def test_average_and_extremes_are_consistent_with_the_frf():
    # Coherent channels driven by one drive: G_i = |H_i|² G_d. The combined PSD must equal the
    # equivalent FRF's |H|² times G_d for every strategy, or the equalizer divides by the wrong
    # gain (the definition of the FRF of a linear system).
    rng = np.random.default_rng(3)
    g_d = rng.uniform(0.5, 2.0, 50)
    h = rng.normal(size=(3, 50)) + 1j * rng.normal(size=(3, 50))
    psds = np.abs(h) ** 2 * g_d
    w = np.array([1.0, 2.0, 1.0])
    for strategy in ("average", "maximum", "minimum"):
        c = combine_control(psds, strategy, weights=w, frfs=h)
        np.testing.assert_allclose(c.psd, c.frf_mag**2 * g_d, rtol=1e-12)
    avg = combine_control(psds, "average", weights=w)
    np.testing.assert_allclose(avg.psd, (psds[0] + 2 * psds[1] + psds[2]) / 4, rtol=1e-12)
    mx = combine_control(psds, "maximum")
    np.testing.assert_array_equal(mx.psd, psds.max(axis=0))
    np.testing.assert_array_equal(mx.channel, psds.argmax(axis=0))
    mn = combine_control(psds, "minimum")
    np.testing.assert_array_equal(mn.psd, psds.min(axis=0))


@pytest.mark.parametrize("kw, words", [
    (dict(strategy="median"), "strategy"),
    (dict(strategy="average", weights=[1.0, -1.0]), "weights"),
    (dict(strategy="average", weights=[1.0]), "weights"),
    (dict(strategy="maximum", frfs=np.ones((2, 3))), "frfs"),
])
def test_bad_combination_is_one_line_naming_the_key(kw, words):
    with pytest.raises(LiveshapeError) as exc:
        combine_control(np.ones((2, 4)), **kw)
    text = str(exc.value)
    assert words in text and "\n" not in text


def test_a_detached_control_sensor_is_flagged_and_equal_ones_are_not():
    # A loose sensor reads its noise floor, tens of dB down [common practice threshold 12 dB].
    assert not channel_dropouts([1.1, 1.0, 1.05]).any()
    assert channel_dropouts([1.1, 0.01, 1.05]).tolist() == [False, True, False]
    assert channel_dropouts([1.0, 0.2]).tolist() == [False, True]   # -14 dB
    assert not channel_dropouts([1.0, 0.3]).any()                    # -10.5 dB
    assert not channel_dropouts([1.0]).any()


@pytest.mark.parametrize("preset", ["loudspeaker", "bench", "ideal+bench payload"])
def test_mode_acceleration_is_the_table_times_the_base_excitation_transmissibility(preset):
    if preset.startswith("ideal"):  # the acceleration-source shaker carrying the bench payload
        import dataclasses

        plant = dataclasses.replace(load_plant("ideal"), payload=load_plant("bench").payload)
    else:
        plant = load_plant(preset)
    assert plant.payload.resonances
    tfs = electromechanical_tf(plant)
    f = np.geomspace(5.0, 5000.0, 400)
    s = 2j * np.pi * f
    table = evaluate_tf(tfs["table_accel_m_s2_per_v"], s)
    for j, res in enumerate(plant.payload.resonances):
        mode = evaluate_tf(tfs["mode_accel_m_s2_per_v"][j], s)
        b, a = mode_transmissibility_tf(plant, j)
        _, t_scipy = scipy.signal.freqs(b, a, worN=2 * np.pi * f)
        np.testing.assert_allclose(mode / table, t_scipy, rtol=1e-7)
        # |T| = sqrt((1 + (2ζr)²) / ((1 − r²)² + (2ζr)²)), ζ = 1/(2Q) (Rao, §3.6)
        r, zeta = f / res.f_hz, 1.0 / (2.0 * res.q)
        t_rao = np.sqrt((1 + (2 * zeta * r) ** 2) / ((1 - r**2) ** 2 + (2 * zeta * r) ** 2))
        np.testing.assert_allclose(np.abs(t_scipy), t_rao, rtol=1e-9)
        # at resonance |T| ≈ Q for light damping: sqrt(1 + Q²)
        peak = np.abs(scipy.signal.freqs(b, a, worN=[2 * np.pi * res.f_hz])[1][0])
        assert peak == pytest.approx(math.sqrt(1 + res.q**2), rel=1e-9)


# --------------------------------------------------------------------------------------------
# The simulated rig's monitor points

FS_SIM = 48000


def _sim_pair(monitors=("bracket",), blocks=60, seed=1, faults=(), level=0.05, plant=None):
    from liveshape.rigs.sim import SimRig

    plant = plant or load_plant("loudspeaker")
    rig = SimRig(plant, FS_SIM, seed=seed, monitors=monitors, faults=faults)
    rng = np.random.default_rng(seed + 100)
    ys, ms = [], []
    for _ in range(blocks):
        ys.append(rig.process(level * rng.standard_normal(8192)))
        ms.append(rig.last_monitor_fs.copy())
    return plant, np.concatenate(ys), np.concatenate(ms, axis=1)


def test_monitor_over_control_is_the_modes_transmissibility():
    # H1 from the control channel to the monitor (scipy.signal.csd / welch) against the analytic
    # base-excitation transmissibility (Rao §3.6), evaluated at the frequency the bilinear
    # transform maps each line to, f' = (fs/π) tan(π f/fs) (Oppenheim & Schafer, Discrete-Time
    # Signal Processing, 3rd ed., §7.2: the sim discretizes every stage that way; 0.1 dB at
    # 2 kHz). Bound per line: 4× the random error of |H1|,
    # ε = sqrt(1 − γ²)/(|γ| sqrt(2 n_d)) (Bendat & Piersol, Random Data, 4th ed., Table 9.6),
    # counting only non-overlapping segments (n_d = N/nperseg: conservative), plus 0.05 dB for
    # the resolution bias of a Q = 15 peak on 1.46 Hz lines ((B_e/B_r)²/3 ≈ 0.003 [from memory]).
    plant, y, m = _sim_pair(blocks=120)
    nper = 32768
    f, gyy = scipy.signal.welch(y, FS_SIM, nperseg=nper)
    _, gym = scipy.signal.csd(y, m[0], FS_SIM, nperseg=nper)
    _, coh = scipy.signal.coherence(y, m[0], FS_SIM, nperseg=nper)
    b, a = mode_transmissibility_tf(plant, 0)
    f_warped = FS_SIM / np.pi * np.tan(np.pi * f / FS_SIM)
    _, t = scipy.signal.freqs(b, a, worN=2 * np.pi * f_warped)
    sel = (f > 60) & (f < 2000)
    err_db = 20 * np.log10(np.abs(gym[sel] / gyy[sel]) / np.abs(t[sel]))
    n_d = y.size // nper
    eps = np.sqrt(1 - coh[sel]) / (np.sqrt(coh[sel]) * np.sqrt(2 * n_d))
    bound = 4 * 8.686 * eps + 0.05
    assert np.all(np.abs(err_db) < bound), float(np.max(np.abs(err_db) - bound))
    peak = f[sel][np.argmax(np.abs(gym[sel] / gyy[sel]))]
    assert abs(peak - plant.payload.resonances[0].f_hz) < 2 * (f[1] - f[0])


def test_monitor_points_leave_the_control_channel_bit_identical():
    from liveshape.rigs.sim import SimRig

    plant = load_plant("loudspeaker")
    d = 0.1 * np.random.default_rng(5).standard_normal(30000)
    plain = SimRig(plant, FS_SIM, seed=3).process(d)
    with_mon = SimRig(plant, FS_SIM, seed=3, monitors=["bracket"]).process(d)
    assert np.array_equal(plain, with_mon)


def test_a_detached_control_sensor_leaves_the_monitor_reading():
    from liveshape.testdef.spec import parse_fault

    _, y, m = _sim_pair(blocks=12, faults=[parse_fault("sensor_detached@0.5")])
    late = slice(FS_SIM, None)
    assert np.std(y[late]) < 1e-3 * np.std(m[0][late])  # control: only its noise floor
    assert np.std(m[0][late]) > 0.01


def test_a_resonance_shift_moves_the_monitors_mode():
    from liveshape.testdef.spec import parse_fault

    def peak(y, m):
        f, gyy = scipy.signal.welch(y, FS_SIM, nperseg=16384)
        _, gym = scipy.signal.csd(y, m, FS_SIM, nperseg=16384)
        sel = (f > 200) & (f < 600)
        return f[sel][np.argmax(np.abs(gym[sel] / gyy[sel]))]

    _, y0, m0 = _sim_pair(blocks=40)
    _, y1, m1 = _sim_pair(blocks=40, faults=[parse_fault("resonance_shift@0=1.05")])
    assert peak(y1, m1[0]) / peak(y0, m0[0]) == pytest.approx(1.05, abs=0.01)


@pytest.mark.parametrize("monitors, words", [
    (["nothing"], "'nothing' names no payload resonance"),
])
def test_bad_monitor_is_one_line(monitors, words):
    from liveshape.rigs.sim import SimRig

    with pytest.raises(LiveshapeError) as exc:
        SimRig(load_plant("loudspeaker"), FS_SIM, monitors=monitors)
    assert words in str(exc.value) and "bracket" in str(exc.value)
    assert "\n" not in str(exc.value)


def test_monitor_needs_the_control_sensor_on_the_table():
    import dataclasses

    from liveshape.rigs.sim import SimRig

    plant = load_plant("loudspeaker")
    on_mode = dataclasses.replace(plant, payload=dataclasses.replace(
        plant.payload, control_point="bracket"))
    with pytest.raises(LiveshapeError) as exc:
        SimRig(on_mode, FS_SIM, monitors=["bracket"])
    assert "control_point: table" in str(exc.value)
