"""Feasibility of a profile on a plant (liveshape.rigs.feasibility) against hand calculations."""

from __future__ import annotations

import dataclasses
import json
import math
from pathlib import Path

import numpy as np
import pytest

from liveshape.dsp.profile import G0_M_S2, Profile
from liveshape.errors import ConfigError
from liveshape.rigs.feasibility import assess
from liveshape.rigs.plant import load_plant

FS, N = 48000.0, 8192
DF = FS / N
LINES = np.arange(N // 2 + 1) * DF
EPS = np.finfo(float).eps


def flat(grms: float, f1: float = 20.0, f2: float = 1000.0) -> Profile:
    asd = grms**2 / (f2 - f1)
    return Profile((f1, f2), (asd, asd), f"flat {grms:g} grms")


def hp_mag(f: float, fc: float | None, order: int = 1) -> float:
    """|H| of a first-order s/(s + wc) or second-order Butterworth high-pass."""
    if fc is None:
        return 1.0
    r = f / fc
    return r / math.sqrt(1 + r * r) if order == 1 else r * r / math.sqrt(1 + r**4)


def test_ideal_rig_drive_is_grms_times_fs_per_g():
    # Ideal rig: response = drive x 1.0, so the drive rms is the target rms in FS:
    # grms x fs_per_g, the target summed over the control lines (rectangle rule on lines df apart).
    p, prof = load_plant("ideal"), flat(1.0)
    r = assess(prof, p, fs_hz=FS, frame_length=N)
    a = prof.asd_at(LINES)
    line_ms = float(a.sum() * DF)
    assert r.drive.rms == pytest.approx(p.fs_per_g * math.sqrt(line_ms), rel=8 * EPS)
    # The line sum differs from the exact integral by at most one line width of level at each
    # band edge: |sum - grms²| <= 2 A df.
    edge = 2 * a.max() * DF / prof.grms**2
    assert r.drive.rms == pytest.approx(prof.grms * p.fs_per_g, rel=edge / 2)
    assert r.drive.peak_3sigma == pytest.approx(3 * r.drive.rms, rel=EPS)
    assert r.drive.headroom_db == pytest.approx(20 * math.log10(1 / (3 * r.drive.rms)), rel=1e-12)
    assert r.amp_voltage.rms == pytest.approx(r.drive.rms, rel=8 * EPS)  # 1 V/FS, gain 1
    noise_ms = p.card.in_noise_fs_rms**2
    assert r.card_input.rms == pytest.approx(math.sqrt(r.drive.rms**2 + noise_ms), rel=8 * EPS)
    # Displacement of an acceleration a at angular frequency w is a/w² (kinematics).
    band = a > 0
    x_ms = float(np.sum(a[band] * G0_M_S2**2 / (2 * math.pi * LINES[band]) ** 4) * DF)
    assert r.excursion.rms == pytest.approx(math.sqrt(x_ms), rel=1e-12)
    assert r.amp_current is None and r.coil_power_w is None
    assert r.feasible and r.unreachable == ()
    assert r.lowest_controllable_hz == LINES[band][0]


def test_single_line_loudspeaker_budget_by_hand():
    # One control line at 200.2 Hz. By hand from the impedance analogy: the sensor chain's two
    # first-order couplings attenuate the measured response, so the true acceleration is
    # target/|HP_acc HP_in|; the coil needs I = M_eff a / Bl ... written out via the impedances
    # Ze = Re + jw Le + Bl²/Zm, Zm = Rms + jw M + 1/(jw Cms) + absorber (R. H. Small, JAES 1972).
    p = load_plant("loudspeaker")
    k = 34
    f = k * DF
    prof = Profile((f - 0.1 * DF, f + 0.1 * DF), (1e-3, 1e-3), "line")
    r = assess(prof, p, fs_hz=FS, frame_length=N)
    a_meas_ms = 1e-3 * DF  # g², one line
    sh, acc, card, amp = p.shaker, p.accelerometer, p.card, p.amplifier
    a_true = math.sqrt(a_meas_ms) / (hp_mag(f, acc.highpass_hz) * hp_mag(f, card.in_highpass_hz))
    jw = 2j * math.pi * f
    res = p.payload.resonances[0]
    wn = 2 * math.pi * res.f_hz
    kk, cc, m = res.mass_kg * wn * wn, res.mass_kg * wn / res.q, res.mass_kg
    zs = cc + kk / jw
    zm = (sh.rms_kg_s + jw * p.moving_mass_kg + 1 / (jw * sh.cms_m_per_n)
          + jw * m * zs / (jw * m + zs))
    ze = sh.re_ohm + jw * sh.le_h + sh.bl_tm**2 / zm
    v_over_a = abs(ze * zm / (jw * sh.bl_tm))  # volts per m/s² at the table
    volts = a_true * G0_M_S2 * v_over_a
    assert r.amp_voltage.rms == pytest.approx(volts, rel=1e-9)  # float rounding
    assert r.amp_current.rms == pytest.approx(volts / abs(ze), rel=1e-9)
    assert r.excursion.rms == pytest.approx(a_true * G0_M_S2 / (2 * math.pi * f) ** 2, rel=1e-9)
    drive = volts / (card.out_v_per_fs * amp.gain_v_per_v * hp_mag(f, card.out_highpass_hz))
    assert r.drive.rms == pytest.approx(drive, rel=1e-9)
    assert r.coil_power_w == pytest.approx((volts / abs(ze)) ** 2 * sh.re_ohm, rel=1e-9)
    assert r.coil_rise_k == pytest.approx(r.coil_power_w * 8.0, rel=1e-12)


@pytest.mark.parametrize("grms", [0.5, 1.0, 1.5])
def test_loudspeaker_preset_reproduces_the_example_levels(grms):
    # The example tests are 20-1000 Hz at about 0.5-1.5 grms with the 50 g payload.
    r = assess(flat(grms), load_plant("loudspeaker"), fs_hz=FS, frame_length=N)
    assert r.feasible, r.to_dict()
    for b in (r.drive, r.amp_voltage, r.excursion, r.card_input):
        assert b.ok and b.headroom_db > 6.0
    assert r.lowest_controllable_hz == LINES[LINES >= 20.0][0]


def test_excursion_limits_the_lowest_controllable_line():
    p = load_plant("loudspeaker")  # with a small driver's 1 mm Xmax
    p = dataclasses.replace(p, shaker=dataclasses.replace(p.shaker, xmax_m=1e-3))
    prof = Profile((5.0, 1000.0), (1e-3, 1e-3), "deep")
    r = assess(prof, p, fs_hz=FS, frame_length=N)
    assert not r.feasible and not r.excursion.ok and r.drive.ok
    low = r.lowest_controllable_hz
    assert low is not None and low > LINES[1]
    below, first = r.unreachable[:2]
    assert below.reason == "below the line spacing fs/N" and below.f_lo_hz == 5.0
    assert first.f_lo_hz == LINES[1] and first.reason.endswith(
        "3-sigma excursion of the band from here up exceeds its limit")
    assert first.f_hi_hz == pytest.approx(low - DF)
    # By the rule, the profile from the lowest line up fits Xmax, one line lower does not.
    for f_lo, fits in ((low, True), (low - DF, False)):
        part = Profile((f_lo - 0.01, 1000.0), (1e-3, 1e-3))
        assert assess(part, p, fs_hz=FS, frame_length=N).excursion.ok is fits


def test_snr_rule_by_hand():
    # Without card noise the SNR of a line is A / (noise_g² / (fs/2)): white noise over 0 .. fs/2
    # against the target the controller holds. +6 dB/oct profile: 1e-10 g²/Hz at 20 Hz.
    p = load_plant("loudspeaker")
    p = dataclasses.replace(p, card=dataclasses.replace(p.card, in_noise_fs_rms=0.0),
                            accelerometer=dataclasses.replace(p.accelerometer, noise_g_rms=1e-3))
    prof = Profile((20.0, 1000.0), (1e-10, 1e-10 * 50**2), "rising")
    r = assess(prof, p, fs_hz=FS, frame_length=N)
    a = prof.asd_at(LINES)
    snr = 10 * np.log10(a[a > 0] / (1e-6 / (FS / 2)))
    first_ok = LINES[a > 0][np.argmax(snr >= 10.0)]
    assert r.lowest_controllable_hz == first_ok
    assert r.snr_worst_db == pytest.approx(snr.min(), abs=1e-9)  # float rounding, in dB
    (u,) = r.unreachable
    assert "SNR" in u.reason and u.f_lo_hz == LINES[a > 0][0] and u.f_hi_hz == first_ok - DF
    assert not r.feasible


def test_current_trip_limit_is_checked():
    p = load_plant("bench")  # 6 A trip
    prof = Profile((50.0, 200.0), (0.5, 0.5), "heavy")
    r = assess(prof, p, fs_hz=FS, frame_length=N)
    assert not r.amp_current.ok and not r.feasible
    assert r.amp_current.headroom_db == pytest.approx(
        20 * math.log10(6.0 / r.amp_current.peak_3sigma), rel=1e-12)
    assert any("amplifier current" in u.reason for u in r.unreachable)


def test_band_above_nyquist_and_dict_form():
    r = assess(flat(1.0, 20.0, 30000.0), load_plant("ideal"), fs_hz=FS, frame_length=N)
    assert any(u.reason == "above fs/2" and u.f_lo_hz == FS / 2 for u in r.unreachable)
    d = json.loads(json.dumps(r.to_dict()))
    assert d["plant"] == "ideal" and d["drive_rms_fs"] == r.drive.rms
    assert d["drive_headroom_db"] == r.drive.headroom_db and "amp_current_rms_a" not in d
    assert d["unreachable"].endswith("24000-30000 Hz: above fs/2")
    assert d["feasible"] is False and d["limits_exceeded"] == "none"


def test_bad_arguments():
    with pytest.raises(ConfigError, match="frame_length = 0"):
        assess(flat(1.0), load_plant("ideal"), fs_hz=FS, frame_length=0)
    with pytest.raises(ConfigError, match="fs_hz = -1"):
        assess(flat(1.0), load_plant("ideal"), fs_hz=-1, frame_length=N)


# -- what binds and what would make it feasible ------------------------------------------------

FINE_N = 65536  # df = 0.73 Hz: the line sum is the integral to well under 1 %


def stroke_plant(xmax_m: float):
    """The loudspeaker preset with only a stroke limit: no AC coupling between the table and the
    card (measured acceleration = table acceleration), no amplifier limits, a card that neither
    clips nor hisses, so the excursion budget is the only one that can bind."""
    p = load_plant("loudspeaker")
    return dataclasses.replace(
        p,
        card=dataclasses.replace(p.card, in_highpass_hz=None, out_v_per_fs=1000.0,
                                 in_v_per_fs=1000.0, in_noise_fs_rms=1e-12),
        amplifier=dataclasses.replace(p.amplifier, v_out_max_v=None, i_max_a=None),
        accelerometer=dataclasses.replace(p.accelerometer, highpass_hz=None, noise_g_rms=1e-9),
        shaker=dataclasses.replace(p.shaker, xmax_m=xmax_m),
    )


def stroke_ms(asd_g2_hz: float, f1: float, f2: float) -> float:
    """Mean-square displacement of a flat acceleration ASD over f1..f2, m², in closed form.

    Displacement PSD = acceleration PSD / (2 pi f)^4 (sinusoidal kinematics, x = a / w²;
    C. M. Harris & A. G. Piersol, Harris' Shock and Vibration Handbook, 5th ed., ch. 1 and 23;
    Bendat & Piersol, Random Data, 4th ed., §6.1 for the PSD of a derivative), so
    integral of A g0² / (2 pi f)^4 df = A g0² (f1^-3 - f2^-3) / (3 (2 pi)^4).
    """
    return asd_g2_hz * G0_M_S2**2 * (f1**-3 - f2**-3) / (3 * (2 * math.pi) ** 4)


def test_stroke_budget_and_lowest_frequency_by_hand():
    a, f1, f2, xmax = 0.01, 10.0, 1000.0, 0.7e-3
    df = FS / FINE_N
    prof = Profile((f1, f2), (a, a), "flat")
    r = assess(prof, stroke_plant(xmax), fs_hz=FS, frame_length=FINE_N)
    # The lines sit at k df; their sum is the midpoint rule of the integral over
    # [first - df/2, last + df/2] (error ~ (df/f)² / 24 relative, < 1e-3 here).
    lines = LINES_FINE[(LINES_FINE >= f1) & (LINES_FINE <= f2)]
    x_rms = math.sqrt(stroke_ms(a, lines[0] - df / 2, lines[-1] + df / 2))
    assert r.excursion.rms == pytest.approx(x_rms, rel=2e-3)
    assert not r.feasible and r.binding == "excursion" and not r.excursion.ok
    # Reachable level: displacement scales with the square root of the ASD, so the 3-sigma
    # peak meets Xmax at 20 log10(Xmax / (3 x_rms)) dB.
    assert r.reachable_level_db == pytest.approx(20 * math.log10(xmax / (3 * x_rms)), abs=0.02)
    # Lowest frequency at full level: solve 3 sqrt(stroke_ms(f*, f2)) = Xmax for f*,
    # f*^-3 = (Xmax/3)² 3 (2 pi)^4 / (A g0²) + f2^-3. The first line whose midpoint cell starts
    # at or above f* is the answer, within one line.
    f_star = ((xmax / 3) ** 2 * 3 * (2 * math.pi) ** 4 / (a * G0_M_S2**2) + f2**-3) ** (-1 / 3)
    assert r.lowest_controllable_hz == pytest.approx(f_star + df / 2, abs=df)
    assert r.lowest_limited_by == ("excursion",)
    assert any(f"start the band at {r.lowest_controllable_hz:.6g} Hz" in s for s in r.advice)


LINES_FINE = np.arange(FINE_N // 2 + 1) * (FS / FINE_N)


def test_minus_12_db_feasible_full_level_not():
    # The case of a level schedule whose -12 dB step holds and whose 0 dB step cannot: at
    # -12 dB the whole band is controllable (lowest = the first line of the band, no advice);
    # at 0 dB the report names the binding budget, a reachable level that re-assessing the
    # scaled profile confirms, and a band edge that re-assessing the cut profile confirms.
    p = stroke_plant(0.7e-3)
    prof = Profile((10.0, 1000.0), (0.01, 0.01), "flat")
    low = assess(prof.scaled(-12.0), p, fs_hz=FS, frame_length=FINE_N)
    first = LINES_FINE[LINES_FINE >= 10.0][0]
    assert low.feasible and low.binding is None and low.advice == ()
    assert low.lowest_controllable_hz == first and low.reachable_level_db == 0.0
    full = assess(prof, p, fs_hz=FS, frame_length=FINE_N)
    assert not full.feasible and full.binding == "excursion"
    lvl = full.reachable_level_db
    assert -12.0 < lvl < 0.0
    assert assess(prof.scaled(lvl - 0.01), p, fs_hz=FS, frame_length=FINE_N).feasible
    assert not assess(prof.scaled(lvl + 0.01), p, fs_hz=FS, frame_length=FINE_N).feasible
    f_lo, df = full.lowest_controllable_hz, FS / FINE_N
    for edge, ok in ((f_lo, True), (f_lo - df, False)):
        cut = Profile((edge - 0.01, 1000.0), (0.01, 0.01))
        assert assess(cut, p, fs_hz=FS, frame_length=FINE_N).feasible is ok
    assert full.advice[0].startswith(f"run at {lvl:.1f} dB re the target")


def test_card_output_binding_advises_the_amplifier_gain():
    # The handlebar example 12 dB up on the loudspeaker preset: the card output and input are
    # over, the amplifier voltage is not. Raising the amplifier gain by g dB lowers the drive
    # needed by g dB and leaves the amplifier's output volts as they are (volts = drive x
    # out_v_per_fs x gain), so the advice spans the card's deficit to the amplifier's headroom.
    from liveshape.testdef.spec import load_spec

    spec = load_spec(Path(__file__).resolve().parents[1] / "examples" / "handlebar-nav-unit.yaml")
    p = load_plant("loudspeaker")
    r = assess(spec.profile.scaled(12.0), p, fs_hz=FS, frame_length=N)
    assert not r.feasible
    heads = r.headrooms_db()
    assert heads["card output"] < 0 < heads["amplifier voltage"]
    assert r.binding == min(heads, key=heads.get)
    want = (f"or raise the amplifier gain by {-heads['card output']:.1f} to "
            f"{heads['amplifier voltage']:.1f} dB")
    assert any(a.startswith(want) for a in r.advice), r.advice
    # the gain change really fixes the card output: same plant with that much more gain
    g = 10 ** (-heads["card output"] / 20 + 0.001)
    p2 = dataclasses.replace(p, amplifier=dataclasses.replace(
        p.amplifier, gain_v_per_v=p.amplifier.gain_v_per_v * g))
    r2 = assess(spec.profile.scaled(12.0), p2, fs_hz=FS, frame_length=N)
    assert r2.drive.ok and r2.amp_voltage.headroom_db == pytest.approx(
        heads["amplifier voltage"], abs=1e-9)
    # and the profile as written (12 dB lower) is feasible with its full band
    r0 = assess(spec.profile, p, fs_hz=FS, frame_length=N)
    assert r0.feasible and r0.lowest_controllable_hz == LINES[LINES >= 20.0][0]
    d = json.loads(json.dumps(r.to_dict()))
    assert d["binding_limit"] == r.binding and d["reachable_level_db"] == r.reachable_level_db
    assert d["advice"] == list(r.advice) and "amplifier voltage +" in d["headroom_left"]


def test_snr_binding_has_no_reachable_level():
    # Lowering the level lowers every line's SNR by as much: when the SNR rule already fails at
    # full level no level below it helps (reachable level None) and the advice says so.
    p = load_plant("loudspeaker")
    p = dataclasses.replace(p, accelerometer=dataclasses.replace(p.accelerometer,
                                                                 noise_g_rms=0.3))
    r = assess(flat(0.05), p, fs_hz=FS, frame_length=N)
    assert not r.feasible and r.binding == "SNR" and r.reachable_level_db is None
    assert any(a.startswith("raise the SNR by") for a in r.advice)
