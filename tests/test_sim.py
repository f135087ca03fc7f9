"""The simulated rig (liveshape.rigs.sim, with rigs.modal, rigs.cascade and rigs.faults):
discretization, statistics, faults, protections."""

from __future__ import annotations

import dataclasses
import math
from typing import NamedTuple

import numpy as np
import pytest
from scipy import integrate, signal, stats

from liveshape.errors import ConfigError
from liveshape.rigs import faults
from liveshape.rigs.cascade import OUTPUTS, MotorCascades, output_roots
from liveshape.rigs.modal import ModalSystem, sosfilt_inplace
from liveshape.rigs.plant import CoilHeating, IdealShaker, Payload, Plant, Resonance, load_plant
from liveshape.rigs.plantmodel import (
    analytic_frf,
    chain_tf,
    drive_to_volts_tf,
    electromechanical_ss,
    electromechanical_tf,
    voltage_frf,
)
from liveshape.rigs.sim import FAULT_KINDS, SimRig
from liveshape.testdef import spec

EPS = np.finfo(float).eps


class Fault(NamedTuple):
    """The fields of liveshape.testdef.spec.FaultSpec, which SimRig accepts by attribute."""

    kind: str
    at_s: float
    value: float | None = None
    duration_s: float | None = None


def quiet(p: Plant, *, delay: int | None = None) -> Plant:
    """The plant without noise and coil heating (and optionally another delay)."""
    card = dataclasses.replace(p.card, in_noise_fs_rms=0.0)
    if delay is not None:
        card = dataclasses.replace(card, delay_samples=delay)
    acc = dataclasses.replace(p.accelerometer, noise_g_rms=0.0)
    sh = p.shaker
    if not isinstance(sh, IdealShaker):
        sh = dataclasses.replace(sh, coil_heating=None)
    return dataclasses.replace(p, card=card, accelerometer=acc, shaker=sh)


def run(rig: SimRig, x: np.ndarray, block: int = 1000) -> np.ndarray:
    return np.concatenate([rig.process(x[i:i + block]) for i in range(0, x.size, block)])


def white(n: int, rms: float, seed: int = 0) -> np.ndarray:
    return rms * np.random.default_rng(seed).standard_normal(n)


# -- the discrete system -----------------------------------------------------------------------
@pytest.mark.parametrize("name", ["loudspeaker", "bench", "ideal"])
def test_frf_is_the_bilinear_image_of_the_analytic_frf(name):
    # Bilinear transform (Oppenheim & Schafer, Discrete-Time Signal Processing): the digital
    # response at f equals the analog one at the warped frequency (fs/pi) tan(pi f/fs); the
    # integer delay is exact. Rounding near z = 1 costs about four digits per high-pass section
    # (|1 - 1/z| ~ 2 pi f/fs ~ 1e-4 at 1 Hz), so 1e-6 bounds the float64 error with margin.
    p, fs = load_plant(name), 48000.0
    rig = SimRig(p, fs)
    f = np.geomspace(1.0, 20000.0, 3000)
    fw = fs / math.pi * np.tan(math.pi * f / fs)
    d = p.card.delay_samples
    expected = analytic_frf(p, fw, fs_hz=fs) * np.exp(-2j * math.pi * (f - fw) * d / fs)
    np.testing.assert_allclose(rig.frf(f), expected, rtol=1e-6)
    # scipy's own bilinear transform of the chain polynomials, evaluated by freqz_zpk.
    zd, pd, kd = signal.bilinear_zpk(*signal.tf2zpk(*chain_tf(p)), fs)
    _, h = signal.freqz_zpk(zd, pd, kd, worN=f, fs=fs)
    np.testing.assert_allclose(rig.frf(f) * np.exp(2j * math.pi * f * d / fs), h, rtol=1e-6)


def test_sosfilt_inplace_is_scipy_sosfilt_to_the_bit():
    # scipy.signal.sosfilt as the reference: the rig's cascades call its compiled core.
    sos = np.array([[0.2, 0.3, 0.0, 1.0, -0.99, 0.0], [1.0, -1.96, 0.98, 1.0, -1.959, 0.9605],
                    [1.0, 2.0, 1.0, 1.0, -1.9, 0.95]])
    x = white(3001, 1.0, seed=9)
    zi = np.random.default_rng(10).standard_normal((1, 3, 2))
    y_ref, zf_ref = signal.sosfilt(sos, x, zi=zi.reshape(3, 2))
    y, zf = x[None].copy(), zi.copy()
    sosfilt_inplace(sos, y, zf)
    assert np.array_equal(y[0], y_ref) and np.array_equal(zf.reshape(3, 2), zf_ref)


@pytest.mark.parametrize("name", ["loudspeaker", "bench", "ideal"])
def test_shaker_cascades_are_the_bilinear_image_of_its_transfer_functions(name):
    # scipy.signal.bilinear_zpk of the continuous polynomials, evaluated by freqz_zpk, is the
    # reference for each output's sections. Rounding as in the FRF test above: 1e-6.
    p, fs = load_plant(name), 48000.0
    model = ModalSystem(*electromechanical_ss(p), fs)
    tfs = electromechanical_tf(p)
    cascades = MotorCascades(model, output_roots(tfs, model.n, fs))
    f = np.geomspace(1.0, 20000.0, 500)
    for key, sos in zip(OUTPUTS, cascades.sos, strict=True):
        if sos is None:
            assert p.shaker.model == "ideal" and key != "accel_m_s2_per_v"
            continue
        zd, pd, kd = signal.bilinear_zpk(*signal.tf2zpk(*tfs[key]), fs)
        _, h_ref = signal.freqz_zpk(zd, pd, kd, worN=f, fs=fs)
        _, h = signal.sosfreqz(sos, worN=f, fs=fs)
        np.testing.assert_allclose(h, h_ref, rtol=1e-6)


def test_impulse_response_transforms_to_the_frf():
    # The DFT of a (decayed) impulse response is the transfer function on the DFT lines.
    p, fs = quiet(load_plant("bench")), 8000.0
    rig = SimRig(p, fs)
    x = np.zeros(2**16)
    x[0] = 0.5
    h = np.fft.rfft(rig.process(x)) / 0.5
    f = np.fft.rfftfreq(x.size, 1 / fs)
    expected = rig.frf(f)
    # Truncation: the slowest pole (0.3 Hz sensor coupling) has decayed by exp(-8.2 s / 0.53 s).
    assert np.max(np.abs(h - expected)) <= 1e-6 * np.max(np.abs(expected))


def test_h1_estimate_from_white_noise_matches_frf():
    # H1 = Gxy/Gxx by scipy.signal.csd/welch (Welch 1967), delay removed by alignment. Random
    # error of the complex H1 per line: each component has standard deviation
    # eps = sqrt(1 - coh)/(sqrt(coh) sqrt(2 nd)) (Bendat & Piersol, Random Data, from memory), so
    # |error|²/eps² is chi-square with 2 DOF: P(> 6 eps) = exp(-18) = 1.5e-8 per line, 2e-4 over
    # the 13 000 lines. Hann at 50 % overlap: nd = 0.948 segments per segment (Welch's 36/19
    # DOF). Resolution bias at the 350 Hz, Q 15 resonance: (1/3)(Be/Br)² with Be = 1.5 df (Hann
    # ENBW, Harris 1978) and Br = f/Q (Bendat & Piersol, from memory).
    p, fs = quiet(load_plant("loudspeaker")), 48000.0
    p = dataclasses.replace(p, card=dataclasses.replace(p.card, in_noise_fs_rms=1e-5),
                            accelerometer=dataclasses.replace(p.accelerometer, noise_g_rms=1e-4))
    nper, nseg = 65536, 40
    n = nper // 2 * (nseg + 1)
    d = p.card.delay_samples
    rig = SimRig(p, fs, seed=3)
    x = white(n + d, 0.1, seed=4)
    y = run(rig, x, 4096)
    xa, ya = x[:n], y[d:]
    f, gxy = signal.csd(xa, ya, fs=fs, nperseg=nper)
    _, gxx = signal.welch(xa, fs=fs, nperseg=nper)
    _, gyy = signal.welch(ya, fs=fs, nperseg=nper)
    h1 = gxy / gxx
    coh = np.abs(gxy) ** 2 / (gxx * gyy)
    band = (f >= 10.0) & (f <= 10000.0)
    truth = rig.frf(f[band]) * np.exp(2j * math.pi * f[band] * d / fs)
    nd = nseg * 36.0 / 19.0 / 2.0
    eps = np.sqrt((1 - coh[band]) / (coh[band] * 2 * nd))
    bias = (1.0 / 3.0) * (1.5 * fs / nper / (350.0 / 15.0)) ** 2
    err = np.abs(h1[band] / truth - 1.0)
    assert np.all(err <= 6 * eps + bias), float(np.max(err / (6 * eps + bias)))


def test_base_excited_mode_rms_follows_miles_exact():
    # A modal mass on an ideal acceleration source driven by white noise is an SDOF with white
    # base ASD: rms = Miles x sqrt(1 + 1/Q²) (NASA GSFC FEMCI "Miles' Equation"; the factor is
    # the exact transmissibility integral). Q = 2 makes the factor 1.118, far outside the bound.
    # Bound: the mean square of T seconds of a Gaussian process has normalized random error
    # 1/sqrt(Bs T), Bs = (int G)²/int G² (Bendat & Piersol, from memory); 4.5 sigma on the rms
    # (half the relative error of the mean square). Bilinear bias (weight 1/(1 + (W/2fs)²) on
    # the response spectrum) <= 8 zeta³ (wn/2fs)/(1 + 4 zeta²), 6.5e-4 here, added.
    fn, q, fs, t_s, rms_fs = 100.0, 2.0, 48000.0, 30.0, 0.1
    p = Plant("sdof", IdealShaker(g_per_v=1.0),
              payload=Payload(resonances=(Resonance(fn, q, 0.01, "m"),), control_point="m"))
    rig = SimRig(p, fs)
    y = run(rig, white(int(t_s * fs), rms_fs, seed=11), 8192)
    grms = float(np.sqrt(np.mean(y**2))) / p.fs_per_g
    base_asd = rms_fs**2 / (fs / 2)  # 1 g/V, 1 V/FS: white drive variance over 0 .. fs/2
    miles = math.sqrt(math.pi / 2 * fn * q * base_asd)
    exact = miles * math.sqrt(1 + 1 / q**2)

    def t2(f):
        r = f / fn
        return (1 + (r / q) ** 2) / ((1 - r * r) ** 2 + (r / q) ** 2)

    i1 = integrate.quad(t2, 0, np.inf, limit=400)[0]
    i2 = integrate.quad(lambda f: t2(f) ** 2, 0, np.inf, limit=400)[0]
    eps_ms = 1.0 / math.sqrt(i1**2 / i2 * t_s)
    zeta = 1 / (2 * q)
    bias = 8 * zeta**3 * (2 * math.pi * fn / (2 * fs)) / (1 + 4 * zeta**2)
    tol = 4.5 * eps_ms / 2 + bias
    assert tol < (exact / miles - 1) / 2  # the test tells Miles from the exact value
    assert grms == pytest.approx(exact, rel=tol)


# -- block independence and seeds ----------------------------------------------------------------
FAULTS = (
    Fault("sensor_gain", 0.3, 0.7, 0.2),
    Fault("resonance_shift", 0.5, 1.1),
    Fault("noise_burst", 0.61, 0.01, 0.1),
    Fault("plant_gain", 0.8, -3.0),
)


@pytest.mark.parametrize("stroke", [False, True])
def test_output_does_not_depend_on_block_splits(stroke):
    # stroke: a 20 Hz burst beyond Xmax and a detached sensor, so that some blocks take the
    # shaker and the sensor chain in separate passes (compression, zero input) and others not.
    p = load_plant("loudspeaker")
    p = dataclasses.replace(p, shaker=dataclasses.replace(
        p.shaker, coil_heating=CoilHeating(20.0, 0.3)))
    fs = 8000.0
    x = white(int(1.3 * fs), 0.3, seed=1)
    faults = FAULTS
    if stroke:
        x[2000:6000] += 0.8 * np.sin(2 * math.pi * 20.0 * np.arange(4000) / fs)
        faults = FAULTS + (Fault("sensor_detached", 1.0, duration_s=0.1),)
    whole = SimRig(p, fs, seed=5, faults=faults)
    y0 = whole.process(x)
    assert (whole.status.xmax_exceeded_samples > 0) == stroke
    cuts = np.sort(np.random.default_rng(2).integers(0, x.size, 300))
    for pieces in (np.split(x, cuts), np.split(x, np.arange(1, 60)), [x[i:i + 4096] for i in
                                                                       range(0, x.size, 4096)]):
        rig = SimRig(p, fs, seed=5, faults=faults)
        y = np.concatenate([rig.process(b) for b in pieces])
        assert np.array_equal(y, y0)
        # Everything but the peak of the last block (which depends on the split by definition).
        assert (dataclasses.replace(rig.status, excursion_last_peak_m=None)
                == dataclasses.replace(whole.status, excursion_last_peak_m=None))
    assert whole.status.coil_rise_k > 0


def test_seed_controls_the_noise():
    p, fs = load_plant("loudspeaker"), 8000.0
    x = white(4000, 0.1)
    a = SimRig(p, fs, seed=1).process(x)
    assert np.array_equal(a, SimRig(p, fs, seed=1).process(x))
    assert not np.array_equal(a, SimRig(p, fs, seed=2).process(x))


def test_calibration_is_the_plant_truth():
    p = load_plant("bench")
    cal = SimRig(p, 48000.0).calibration
    assert (cal.out_v_per_fs, cal.in_v_per_fs, cal.accel_mv_per_g) == (5.0, 5.0, 100.0)
    assert cal.loop_delay_samples == 480 and cal.source == "sim:bench" and cal.calibrated
    assert cal.g_per_fs == pytest.approx(1 / p.fs_per_g, rel=4 * EPS)


# -- faults ----------------------------------------------------------------------------------
FS = 8000.0
T0 = 0.4567
N0 = round(T0 * FS)  # 3654: inside a 1000-sample block, so timing must be sample-accurate


def ideal(noise: bool) -> Plant:
    p = load_plant("ideal")
    if not noise:
        return quiet(p)
    return dataclasses.replace(p, card=dataclasses.replace(p.card, in_noise_fs_rms=1e-5),
                               accelerometer=dataclasses.replace(p.accelerometer, noise_g_rms=1e-3))


def pair(p: Plant, faults, x, seed=7):
    base = run(SimRig(p, FS, seed=seed), x)
    rig = SimRig(p, FS, seed=seed, faults=faults)
    return base, run(rig, x), rig


def test_fault_kinds_are_the_agreed_eight():
    assert FAULT_KINDS == ("sensor_detached", "sensor_gain", "amp_trip", "resonance_shift",
                           "plant_gain", "noise_burst", "dropout", "dac_gain")
    assert FAULT_KINDS == spec.FAULT_KINDS
    assert FAULT_KINDS is faults.FAULT_KINDS  # defined in rigs.faults, re-exported by rigs.sim


def test_faults_from_the_test_definition_are_accepted():
    x = white(8000, 0.2)
    fault = spec.parse_fault(f"noise_burst@{T0}=0.1/0.25")
    assert isinstance(fault, spec.FaultSpec)
    base, y, _ = pair(ideal(True), [fault], x)
    _, y_local, _ = pair(ideal(True), [Fault("noise_burst", T0, 0.1, 0.25)], x)
    assert np.array_equal(y, y_local) and not np.array_equal(y, base)


@pytest.mark.parametrize("kind, value, factor", [("sensor_gain", 0.5, 0.5),
                                                 ("plant_gain", -6.0, 10 ** (-6 / 20))])
def test_gain_faults_scale_from_their_sample(kind, value, factor):
    x = white(8000, 0.2)
    base, y, rig = pair(ideal(False), [Fault(kind, T0, value)], x)
    assert np.array_equal(y[:N0], base[:N0])
    np.testing.assert_allclose(y[N0:], factor * base[N0:], rtol=4 * EPS, atol=0)
    assert rig.status.active_faults == (kind,)
    f = np.array([10.0, 1000.0])
    np.testing.assert_allclose(rig.frf(f), factor * SimRig(ideal(False), FS).frf(f), rtol=4 * EPS)


def test_sensor_detached_leaves_only_noise():
    p = ideal(True)
    x = white(8000, 0.2)
    _, y, _ = pair(p, [Fault("sensor_detached", T0)], x)
    silent = run(SimRig(p, FS, seed=7, faults=[Fault("sensor_detached", T0)]), np.zeros(8000))
    assert np.array_equal(y[N0:], silent[N0:])
    assert not np.array_equal(y[N0 - 10:N0], silent[N0 - 10:N0])
    # What is left is sensor noise (1e-3 g x 0.1 FS/g) plus card noise, 4000 samples: the mean
    # square lies within the chi-square(4000) 1e-6 quantiles.
    ms_true = (1e-3 * 0.1) ** 2 + 1e-5**2
    n = y.size - N0
    ms = float(np.mean(y[N0:] ** 2))
    assert stats.chi2.ppf(1e-6, n) / n < ms / ms_true < stats.chi2.ppf(1 - 1e-6, n) / n


def test_amp_trip_fault_silences_the_drive_for_good():
    p = ideal(True)
    x = white(8000, 0.2)
    _, y, rig = pair(p, [Fault("amp_trip", T0, duration_s=0.01)], x)
    silent = run(SimRig(p, FS, seed=7), np.zeros(8000))
    assert np.array_equal(y[N0:], silent[N0:])
    assert rig.status.amp_tripped and rig.status.amp_trip_t_s == N0 / FS


def test_dropout_zeros_exactly_its_duration():
    x = white(8000, 0.2)
    base, y, rig = pair(ideal(True), [Fault("dropout", T0, duration_s=0.25)], x)
    n1 = N0 + round(0.25 * FS)
    assert np.all(y[N0:n1] == 0.0)
    assert np.array_equal(y[:N0], base[:N0]) and np.array_equal(y[n1:], base[n1:])
    assert rig.status.active_faults == ()


def test_noise_burst_adds_its_rms_for_its_duration():
    x = white(8000, 0.2)
    base, y, _ = pair(ideal(True), [Fault("noise_burst", T0, 0.1, 0.25)], x)
    n1 = N0 + round(0.25 * FS)
    diff = y - base
    assert np.all(diff[:N0] == 0) and np.all(diff[n1:] == 0)
    n = n1 - N0
    ms = float(np.mean(diff[N0:n1] ** 2)) / 0.1**2  # chi-square(n)/n, 1e-6 quantiles
    assert stats.chi2.ppf(1e-6, n) / n < ms < stats.chi2.ppf(1 - 1e-6, n) / n


def _shift_plant() -> Plant:
    p = quiet(load_plant("loudspeaker"))
    # Without the 0.5 Hz sensor coupling the slowest pole left is the 5 Hz input coupling.
    return dataclasses.replace(p, accelerometer=dataclasses.replace(p.accelerometer,
                                                                    highpass_hz=None))


def test_resonance_shift_turns_the_rig_into_the_shifted_plant():
    p = _shift_plant()
    x = white(16000, 0.2)
    base, y, rig = pair(p, [Fault("resonance_shift", T0, 1.2)], x)
    assert np.array_equal(y[:N0], base[:N0])
    shifted = dataclasses.replace(p, payload=dataclasses.replace(
        p.payload, resonances=tuple(r.scaled(1.2) for r in p.payload.resonances)))
    ref = run(SimRig(shifted, FS, seed=7), x)
    # One second after the change the old state has decayed through the slowest pole
    # (5 Hz coupling: exp(-2 pi 5 x 1) = 2e-14).
    later = N0 + int(FS)
    assert np.max(np.abs(y[later:] - ref[later:])) <= 1e-9 * np.max(np.abs(ref))
    f = np.array([300.0, 420.0])
    np.testing.assert_allclose(rig.frf(f), SimRig(shifted, FS).frf(f), rtol=1e-9)


def test_parameter_change_carries_the_physical_state():
    # A change by one part in 1e9 must change the output by about that much: a model swap that
    # lost the physical state (currents, displacements, velocities) would ring instead.
    p = _shift_plant()
    x = white(8000, 0.2)
    base, y, _ = pair(p, [Fault("resonance_shift", T0, 1.0 + 1e-9)], x)
    assert np.max(np.abs(y - base)) <= 1e-6 * np.max(np.abs(base))


# -- protections --------------------------------------------------------------------------------
def _tone(f_hz: float, amp_fs: float, n: int) -> np.ndarray:
    return amp_fs * np.sin(2 * math.pi * f_hz * np.arange(n) / FS)


def test_current_trip_reports_and_equals_a_trip_at_that_sample():
    p = quiet(load_plant("bench"))  # i_max 6 A; 11.6 A peak per FS at 100 Hz
    x = _tone(100.0, 0.7, 8000)
    rig = SimRig(p, FS)
    y = run(rig, x)
    st = rig.status
    assert st.amp_tripped and st.amp_trip_t_s is not None
    free = dataclasses.replace(p, amplifier=dataclasses.replace(p.amplifier, i_max_a=None))
    same = run(SimRig(free, FS, faults=[Fault("amp_trip", st.amp_trip_t_s)]), x)
    assert np.array_equal(y, same)
    untripped = SimRig(free, FS)
    run(untripped, x)
    assert untripped.status.current_peak_a > 6.0
    gentle = SimRig(p, FS)
    run(gentle, _tone(100.0, 0.3, 8000))
    assert not gentle.status.amp_tripped and gentle.status.current_peak_a < 6.0


def test_xmax_compresses_the_response_and_counts_samples():
    p = quiet(load_plant("loudspeaker"), delay=0)  # 7 mm peak per FS at 20 Hz, Xmax 4 mm
    p = dataclasses.replace(p, card=dataclasses.replace(p.card, in_highpass_hz=None),
                            accelerometer=dataclasses.replace(p.accelerometer, highpass_hz=None))
    linear = dataclasses.replace(p, shaker=dataclasses.replace(p.shaker, xmax_m=None))
    x = _tone(20.0, 0.8, 8000)
    rig, lin = SimRig(p, FS), SimRig(linear, FS)
    y, y_lin = run(rig, x), run(lin, x)
    st = rig.status
    assert st.excursion_peak_m == lin.status.excursion_peak_m > 4e-3
    ok = np.abs(y_lin) > 1e-9
    ratio = y[ok] / y_lin[ok]
    assert np.all(ratio <= 1 + 8 * EPS)
    assert np.min(ratio) == pytest.approx(4e-3 / st.excursion_peak_m, rel=1e-9)
    assert st.xmax_exceeded_samples == np.count_nonzero(ratio < 1 - 1e-12) > 0
    small = SimRig(p, FS)
    assert np.array_equal(run(small, x / 4), run(SimRig(linear, FS), x / 4))
    assert small.status.xmax_exceeded_samples == 0


def test_clipping_counts():
    p = ideal(False)
    rig = SimRig(p, FS, faults=[Fault("sensor_gain", 0.0, 3.0)])
    x = _tone(50.0, 1.2, 800)
    y = rig.process(x)
    st = rig.status
    assert st.drive_clipped_samples == np.count_nonzero(np.abs(x) > 1)
    assert np.max(np.abs(y)) == 1.0
    assert st.input_clipped_samples == np.count_nonzero(3 * np.clip(x[:-32], -1, 1) > 1) + \
        np.count_nonzero(3 * np.clip(x[:-32], -1, 1) < -1)


def test_coil_heating_reaches_the_thermal_steady_state():
    # First-order thermal model (Newton cooling): after 15 time constants the rise is R_th P
    # within exp(-15) = 3e-7, P = I_rms² Re. I from the analog FRF: the bilinear warping at
    # 200 Hz / 8 kHz moves frequencies by (pi f/fs)²/3 = 2e-4 relative, and |I/V| has a
    # log-slope below 2 there, so the analog I is within 1e-3.
    p = quiet(load_plant("loudspeaker"))
    heat = CoilHeating(thermal_resistance_k_per_w=20.0, time_constant_s=0.2)
    p = dataclasses.replace(p, shaker=dataclasses.replace(p.shaker, coil_heating=heat))
    rig = SimRig(p, FS)
    run(rig, _tone(200.0, 0.5, int(3.0 * FS)))
    st = rig.status
    assert st.re_ohm_now == pytest.approx(6.0 * (1 + 0.0039 * st.coil_rise_k), rel=4 * EPS)
    hot = dataclasses.replace(p, shaker=dataclasses.replace(p.shaker, re_ohm=st.re_ohm_now))
    b, a = drive_to_volts_tf(p)
    s = 2j * math.pi * 200.0
    v_peak = 0.5 * abs(np.polyval(b, s) / np.polyval(a, s))
    i_rms = v_peak * abs(voltage_frf(hot, 200.0, "current_a_per_v")) / math.sqrt(2)
    assert st.coil_rise_k == pytest.approx(20.0 * i_rms**2 * st.re_ohm_now, rel=2e-3)


# -- errors ---------------------------------------------------------------------------------------
@pytest.mark.parametrize(
    "fault, words",
    [
        (Fault("smoke", 1.0), "faults[0].kind = 'smoke' is not one of sensor_detached"),
        (Fault("sensor_gain", 1.0), "value is required"),
        (Fault("sensor_gain", 1.0, -2.0), "value = -2.0 out of range"),
        (Fault("noise_burst", 1.0, 0.1, -1.0), "duration_s = -1.0 must be > 0"),
        (Fault("dropout", -1.0), "faults[0].at_s = -1.0 must be a number >= 0"),
    ],
)
def test_bad_faults_are_one_line(fault, words):
    with pytest.raises(ConfigError) as exc:
        SimRig(load_plant("loudspeaker"), FS, faults=[fault])
    assert words in str(exc.value) and "\n" not in str(exc.value)


def test_resonance_shift_needs_resonances_and_rate_must_fit():
    with pytest.raises(ConfigError, match="has no payload resonances"):
        SimRig(load_plant("ideal"), FS, faults=[Fault("resonance_shift", 1.0, 1.1)])
    with pytest.raises(ConfigError, match=r"payload\.resonances\[0\]\.f_hz = 350 must be below"):
        SimRig(load_plant("loudspeaker"), 600.0)


def test_block_shapes():
    rig = SimRig(load_plant("ideal"), FS)
    assert rig.process(np.zeros(0)).shape == (0,)
    with pytest.raises(ValueError, match="one-dimensional"):
        rig.process(np.zeros((2, 3)))
