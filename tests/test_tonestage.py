"""Sine-on-random in the running loop: tones held on their targets, the random undisturbed.

Outside references: the least-squares sine fit (IEEE Std 1057, three-parameter fit) done with
numpy.linalg.lstsq on the recorded control; the χ² band of a Welch estimate (Bendat & Piersol,
Random Data, 4th ed., §8.5) for "the random is undisturbed".
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from liveshape.control.controller import Controller
from liveshape.dsp.spectra import chi2_interval_db
from liveshape.dsp.synth import RandomPhaseSynth
from liveshape.errors import ConfigError
from liveshape.rigs.plant import load_plant
from liveshape.rigs.sim import SimRig
from liveshape.testdef.spec import load_spec, parse_fault

EXAMPLE = Path(__file__).resolve().parents[1] / "examples" / "handlebar-nav-unit.yaml"
TONES = [{"f_hz": 120.0, "amplitude_g": 1.0}, {"f_hz": 600.0, "amplitude_g": 0.5}]


def _run(overrides: dict, seed: int = 2, keep_s: float = 0.0):
    spec = load_spec(EXAMPLE, overrides)
    rig = SimRig(load_plant("loudspeaker"), spec.control.fs_hz, seed=seed, faults=spec.faults)
    ctl = Controller(spec, rig.calibration)
    resp = np.zeros(4096)
    kept = []
    while not ctl.finished:
        resp = rig.process(ctl.exchange(resp))
        if ctl.stage == "full_level" and ctl.schedule.remaining_s < keep_s:
            kept.append(resp)
    return spec, rig, ctl, (np.concatenate(kept) if kept else None)


def _lstsq_amplitude(y: np.ndarray, f_hz: float, fs_hz: float) -> float:
    """Peak amplitude of a sine at f_hz in y by the three-parameter least-squares fit."""
    t = np.arange(y.size) / fs_hz
    a = np.column_stack((np.cos(2 * np.pi * f_hz * t), np.sin(2 * np.pi * f_hz * t),
                         np.ones_like(t)))
    c, *_ = np.linalg.lstsq(a, y, rcond=None)
    return float(np.hypot(c[0], c[1]))


def test_tones_are_held_on_their_targets_at_full_level():
    spec, rig, ctl, y = _run({"tones": TONES, "schedule.full_level_s": 30.0}, keep_s=10.0)
    res = ctl.result()
    assert res.status == "completed" and res.verdict.verdict == "pass", res.abort_reason
    g = y * rig.calibration.g_per_fs
    for tone in spec.tones:
        got = _lstsq_amplitude(g, tone.f_hz, spec.control.fs_hz)
        # the bound: tone amplitude within 0.5 dB of its target at full level
        assert abs(20 * np.log10(got / tone.amplitude_g)) <= 0.5, (tone.f_hz, got)
    assert all(t["in_tolerance"] for t in res.tones)


def test_the_random_next_to_the_tones_is_undisturbed():
    # the full-level control spectrum (tones removed) against a run without tones: the lines
    # next to each tone stay inside the two estimates' joint χ² band
    _, _, with_tones, _ = _run({"tones": TONES, "schedule.full_level_s": 30.0})
    _, _, without, _ = _run({"schedule.full_level_s": 30.0})
    a, b = with_tones.full_level_arrays(), without.full_level_arrays()
    f = a["f_hz"]
    lo, hi = chi2_interval_db(min(a["dof"], b["dof"]), 0.999)
    band = np.sqrt(2.0) * max(-lo, hi)  # difference of two independent estimates
    for tone in TONES:
        near = np.abs(f - tone["f_hz"]) <= 1.5 * (f[1] - f[0])
        d = 10 * np.log10(a["control_psd_g2_hz"][near] / b["control_psd_g2_hz"][near])
        assert np.all(np.abs(d) <= band), (tone["f_hz"], d, band)


def test_a_tone_that_cannot_be_held_trips_tone_abort():
    # the plant loses 5 dB at 35 s and the drive may change 0.1 dB per update only: the tone's
    # averaged amplitude stays beyond its ±3 dB abort band; the tone rule (about 1 s) trips
    # before the random's persistent rules (two 2.7 s blocks)
    spec, rig, ctl, _ = _run({"tones": TONES, "schedule.full_level_s": 30.0,
                              "control.max_step_db": 0.1,
                              "faults": [parse_fault("plant_gain@35=-5")]})
    assert ctl.result().status == "aborted"
    assert ctl.trip.rule == "tone_abort", ctl.trip.message
    assert 35.0 < ctl.trip.t_s < 35.0 + 3.0
    assert ctl.result().exit_status == 22


def test_tones_need_the_fast_loop():
    spec = load_spec(EXAMPLE, {"tones": TONES, "control.loop": "block"})
    rig = SimRig(load_plant("loudspeaker"), spec.control.fs_hz, seed=2)
    with pytest.raises(ConfigError, match="tones need control.loop = fast"):
        Controller(spec, rig.calibration)


def test_added_samples_take_the_gain_like_the_random():
    a = RandomPhaseSynth(8000.0, 256, seed=5, gain=0.5)
    b = RandomPhaseSynth(8000.0, 256, seed=5, gain=0.5)
    psd = np.zeros(129)
    psd[10:60] = 1e-4
    a.set_psd(psd)
    b.set_psd(psd)
    add = np.sin(np.arange(1000) * 0.1)
    np.testing.assert_allclose(a.read(1000, add=add) - b.read(1000), 0.5 * add, atol=1e-12)
    a.set_gain(1.0, rate_db_s=60.0)  # during a ramp too
    b.set_gain(1.0, rate_db_s=60.0)
    x, y = a.read(1000, add=add), b.read(1000)
    assert np.all(np.abs(x - y) <= np.abs(add) * (1 + 1e-12))
    assert np.max(np.abs(x - y)) > 0.5 * np.max(np.abs(add))


def test_the_dashboard_the_summary_and_the_report_show_tones_and_kurtosis(tmp_path):
    import io

    from liveshape.session import run_session
    from liveshape.views import dashboard

    spec = load_spec(EXAMPLE, {"tones": TONES, "control.kurtosis": 4.0,
                               "safety.clip_sigma": 5.0, "schedule.full_level_s": 25.0})
    snaps = []
    session = run_session(spec, out_dir=tmp_path, fast=True, seed=2, view_hz=1e9,
                          on_snapshot=lambda s: snaps.append(s) if s.stage == "full_level"
                          else None)
    assert session.result.status == "completed"
    console = dashboard.make_console(file=io.StringIO(), width=140)
    console.print(dashboard.dashboard(snaps[-1], width=140, height=45))
    screen = console.file.getvalue()
    assert "tone 120 Hz" in screen and "tone 600 Hz" in screen and "control kurtosis" in screen
    console = dashboard.make_console(file=io.StringIO(), width=140)
    console.print(dashboard.run_summary(session.summary()))
    text = console.file.getvalue()
    assert "tone 120 Hz" in text and "g peak" in text and "control kurtosis" in text
    from liveshape.record.report import _figure_rows  # the report's page-1 figures
    from liveshape.record.runfolder import load_run

    run = load_run(session.run_dir)
    summary = run.summary
    assert summary["tones"][0]["f_hz"] == 120.0 and summary["control_kurtosis"]["target"] == 4.0
    rows, colours = _figure_rows(run, None, spec.tolerance, {}, "")
    labels = [r[0] for r in rows]
    assert "tone 120 Hz" in labels and "control kurtosis" in labels
