"""Closed-loop tests of the controller on the simulated rig: convergence, schedule, every abort
rule with its ramp-down, determinism and stop.

Outside references: the simulated plant's own physics (``SimRig.frf``, the analytic transfer
function of the rig, independent of the controller's estimates); the χ² statistics of Welch
estimates (Bendat & Piersol, Random Data, 4th ed., ch. 8); the raised-cosine fade slope bound
``|Δg| ≤ π/(2M)`` per sample of an M-sample fade (calculus).
Runs use fs = 12 kHz with 2048-sample frames (df = 5.86 Hz, the same update timing as 48 kHz with
8192) and short schedules so the file stays fast.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from liveshape.control.controller import Controller, run_offline
from liveshape.control.safety import EXIT_STATUS
from liveshape.dsp.profile import Profile
from liveshape.rigs.plant import load_plant
from liveshape.rigs.sim import SimRig
from liveshape.testdef.chain import ChainCalibration
from liveshape.testdef.spec import ControlSettings, FaultSpec, SafetyLimits, Schedule, TestSpec
from liveshape.testdef.tolerance import Tolerance

FS = 12000.0
N = 2048
BLOCK = 1024
PERSISTENT = ("lines_abort", "drive_limit", "loop_open")


def make_spec(*, grms=1.0, steps=(-6.0, 0.0), hold_s=1.0, full_s=4.0, seed=1,
              tolerance=None, safety=None, **control):
    # flat 20-1000 Hz, grms² = ASD·980 Hz. These tests pin the block loop unless they ask for
    # the fast one (tests/test_fastloop.py covers the fast loop's own promises).
    control.setdefault("loop", "block")
    prof = Profile((20.0, 1000.0), (grms**2 / 980.0, grms**2 / 980.0), "flat")
    return TestSpec(
        name="t", profile=prof, tolerance=tolerance or Tolerance(),
        schedule=Schedule(steps_db=steps, hold_s=hold_s, full_level_s=full_s),
        control=ControlSettings(fs_hz=FS, frame_length=N, **control),
        safety=safety or SafetyLimits(), seed=seed)


def run(spec, rig, *, max_s=120.0, block=BLOCK, calibration=None, hook=None):
    """Run to the end; return the controller, the drive stream and all events."""
    ctl = Controller(spec, calibration or rig.calibration)
    resp = np.zeros(block)
    drives, events = [], []
    while not ctl.finished:
        d = ctl.exchange(resp)
        drives.append(d)
        resp = rig.process(d)
        if hook is not None:
            resp = hook(ctl, resp)
        events += ctl.drain_events()
        if ctl.t_s > max_s:
            raise AssertionError(f"run did not finish in {max_s} s: stage {ctl.stage}")
    return ctl, np.concatenate(drives), events


def rec_dof(ctl):
    return ctl.last_update.dof


class Wire:
    """A linear test rig: gain, pure delay and white noise (FS in, FS out)."""

    def __init__(self, gain, delay=300, noise_fs=1e-5, seed=0):
        self.gain, self.buf = gain, np.zeros(delay)
        self.noise, self.rng = noise_fs, np.random.default_rng(seed)

    calibration = ChainCalibration()

    def process(self, x):
        z = np.concatenate((self.buf, x))
        self.buf = z[x.size:]
        return self.gain * z[: x.size] + self.noise * self.rng.standard_normal(x.size)


# ---- convergence -------------------------------------------------------------------------------


@pytest.mark.parametrize("preset", ["loudspeaker", "bench", "ideal"])
def test_converges_and_completes_on_each_preset(preset):
    spec = make_spec(full_s=4.0)
    rig = SimRig(load_plant(preset), FS, seed=3)
    ctl, drive, events = run(spec, rig)
    res = ctl.result()
    assert res.status == "completed" and res.trip is None and res.exit_status == 0
    assert res.final_lines_outside_alarm == 0 and res.final_lines_outside_abort == 0
    assert abs(res.final_rms_error_db) <= spec.tolerance.rms_alarm_db
    # the first decision (two 60-DOF updates pool to the 120-DOF decision) is in tolerance
    assert res.updates_to_tolerance == math.ceil(spec.control.target_dof / rec_dof(ctl))
    assert res.time_at_full_level_s >= spec.schedule.full_level_s
    # Outside check: the rig's analytic FRF (its physics, not the controller's estimate) times
    # the drive PSD played at full level gives the true control grms, within the rms alarm.
    up = [e for e in events if e.kind == "update"]
    rec = ctl.last_update
    assert rec.level_db == 0.0 and up[-1].data["update"] == rec.index
    h = rig.frf(rec.f_hz) * rig.calibration.g_per_fs
    df = FS / N
    true_ms = float(np.sum(np.abs(h) ** 2 * rec.new_drive_psd)) * df
    target_ms = spec.profile.grms**2
    assert abs(10 * math.log10(true_ms / target_ms)) <= spec.tolerance.rms_alarm_db
    # the drive never left its limits
    assert np.max(np.abs(drive)) <= spec.safety.drive_peak_max_fs


def test_result_falls_back_to_the_latest_update_without_a_decision_at_full_level():
    # one step straight to 0 dB and 3 s there: fewer than the two updates a decision needs
    spec = make_spec(steps=(0.0,), full_s=3.0)
    ctl, _, _ = run(spec, SimRig(load_plant("bench"), FS, seed=1))
    res = ctl.result()
    assert res.status == "completed" and res.updates_to_tolerance is None
    assert res.dof == pytest.approx(ctl.last_update.dof)  # one update's DOF, not the pool's
    assert res.final_lines_outside_abort == 0
    assert res.final_rms_error_db == pytest.approx(ctl.last_update.rms_error_db)


def test_blocks_of_varying_length_are_fine():
    # an audio-like loop: the response waits in a FIFO (a fixed 3000-sample latency) and each
    # exchange takes a block of random length from it
    spec = make_spec(full_s=3.0)
    rig = SimRig(load_plant("ideal"), FS, seed=6)
    ctl = Controller(spec, rig.calibration)
    rng = np.random.default_rng(1)
    fifo = np.zeros(3000)
    while not ctl.finished:
        n = int(rng.integers(1, 3001))
        block, fifo = fifo[:n], fifo[n:]
        drive = ctl.exchange(block)
        assert drive.size == n
        fifo = np.concatenate((fifo, rig.process(drive)))
        assert ctl.t_s < 120.0
    res = ctl.result()
    assert res.status == "completed" and res.final_lines_outside_alarm == 0
    assert ctl.loop_delay_samples >= 3000  # the FIFO is part of the loop delay


def test_snapshot_and_result_numbers_are_consistent():
    spec = make_spec(full_s=2.0)
    rig = SimRig(load_plant("ideal"), FS, seed=4)
    ctl = Controller(spec, rig.calibration)
    resp = np.zeros(BLOCK)
    seen = set()
    while not ctl.finished:
        resp = rig.process(ctl.exchange(resp))
        snap = ctl.snapshot()
        seen.add(snap.stage)
        assert not snap.target_psd.flags.writeable
        if snap.control_psd is not None and snap.dof >= spec.control.target_dof:
            # the χ² band is the 90 % interval for the DOF in use (scipy.stats reference)
            from liveshape.dsp.spectra import chi2_interval_db
            assert (snap.chi2_lo_db, snap.chi2_hi_db) == pytest.approx(chi2_interval_db(snap.dof))
            grms = math.sqrt(float(np.sum(snap.control_psd)) * FS / N)
            assert snap.control_grms_g == pytest.approx(grms)
    assert seen == {"connect", "identify", "equalize", "full_level", "ramp_down", "done"}
    assert snap.status == "completed" and snap.loop_delay_samples is not None


# ---- schedule ------------------------------------------------------------------------------------


def test_schedule_steps_after_hold_in_tolerance_and_ramps_at_the_rate():
    spec = make_spec(steps=(-9.0, -3.0, 0.0), hold_s=2.0, full_s=3.0)
    rig = SimRig(load_plant("ideal"), FS, seed=5)
    ctl = Controller(spec, rig.calibration)
    resp = np.zeros(BLOCK)
    gains_db, times, stages, events = [], [], [], []
    while not ctl.finished:
        resp = rig.process(ctl.exchange(resp))
        s = ctl.snapshot()
        gains_db.append(s.gain_db)
        times.append(s.t_s)
        stages.append(s.stage)
        events += ctl.drain_events()
    levels = [e for e in events if e.kind == "level" and "level_db" in e.data]
    assert [e.data["level_db"] for e in levels] == [-9.0, -3.0, 0.0]
    # each step up came after at least hold_s of in-tolerance decisions at the previous step
    decisions = [e for e in events if e.kind == "update" and e.data.get("in_tolerance") is not None]
    for prev, nxt in zip(levels[:-1], levels[1:], strict=True):
        at_step = [d for d in decisions if prev.t_s < d.t_s <= nxt.t_s]
        ok = [d for d in at_step if d.data["in_tolerance"]]
        assert ok and ok[-1].t_s == nxt.t_s
        assert nxt.t_s - ok[0].t_s >= spec.schedule.hold_s
        tail = at_step[at_step.index(ok[0]):]
        assert all(d.data["in_tolerance"] for d in tail)
    # ramp rate: in equalize/full_level (dB ramps between non-zero gains; fades to and from 0
    # are cosine fades) the level never moves faster than rate_db_s
    g = np.array(gains_db)
    t = np.array(times)
    st = np.array(stages)
    eq = np.isin(st, ("equalize", "full_level"))
    live = eq[1:] & eq[:-1]
    with np.errstate(invalid="ignore"):  # -inf dB at zero gain outside the checked stages
        rate = np.abs(np.diff(g))[live] / np.diff(t)[live]
    assert rate.max() <= spec.schedule.rate_db_s * (1 + 1e-9)
    assert rate.max() >= 0.9 * spec.schedule.rate_db_s  # a ramp did happen
    # time at full level is counted only after reaching 0 dB
    full = next(e for e in events if e.kind == "stage" and e.data["stage"] == "full_level")
    end = next(e for e in events if e.kind == "stage" and e.data["stage"] == "ramp_down")
    assert end.t_s - full.t_s >= spec.schedule.full_level_s - BLOCK / FS
    assert ctl.result().time_at_full_level_s == pytest.approx(spec.schedule.full_level_s,
                                                               abs=BLOCK / FS)


# ---- abort rules ---------------------------------------------------------------------------------


def _check_ramp_down(ctl, drive, t_fault_s, spec):
    """The trip is recorded, the drive fades without steps and is quiet in time."""
    trip = ctl.trip
    assert ctl.status == "aborted" and trip is not None
    assert ctl.result().exit_status == EXIT_STATUS[trip.rule]
    i_fault = int(t_fault_s * FS)
    pre = drive[i_fault - int(FS): i_fault]
    ref = float(np.sqrt(np.mean(pre**2)))
    loud = np.flatnonzero(np.abs(drive) > 1e-3 * ref)  # −60 dB re the pre-fault rms
    t_quiet = (loud[-1] + 1) / FS
    # fast rules trip within one update; persistent ones need abort_persist_updates whole
    # updates after the one the fault fell into
    n_upd = 1 if trip.rule not in PERSISTENT else spec.safety.abort_persist_updates + 1
    assert t_quiet - t_fault_s <= spec.safety.abort_ramp_s + n_upd * ctl.safety_estimate_s
    # no step during the fade: |Δx| stays below 6 standard deviations of the pre-trip |Δx|
    # (Gaussian drive: P = 2e−9 per sample) plus the raised-cosine slope π/(2M)·peak
    i_trip = int(round(trip.t_s * FS))
    m = int(math.ceil(spec.safety.abort_ramp_s * FS))
    fade = drive[i_trip: i_trip + m + BLOCK]
    before = drive[i_trip - int(FS): i_trip]
    bound = 6 * np.std(np.diff(before)) + math.pi / (2 * m) * np.max(np.abs(before))
    assert np.max(np.abs(np.diff(fade))) <= bound
    assert np.all(drive[i_trip + m:] == 0.0)  # zeros after the fade
    return trip


_FAULTS = [
    (FaultSpec("sensor_detached", 24.0), "loop_open", 1.0),
    (FaultSpec("amp_trip", 24.0), "loop_open", 1.0),
    (FaultSpec("sensor_gain", 24.0, 4.0), "rms_abort", 0.25),
    # at 0.25 grms the +10 dB jump leaves the input far from overload (0.08 FS rms)
    (FaultSpec("plant_gain", 24.0, 10.0), "rms_abort", 0.25),
    (FaultSpec("noise_burst", 24.0, 0.5, 0.5), "input_overload", 1.0),
    (FaultSpec("dropout", 24.0, None, 1.0), "response_silent", 1.0),
]
# A 25 % resonance shift: the block loop sees lines beyond abort on two updates in a row and
# trips; the fast loop follows it (test_fast_loop_follows_a_resonance_shift_the_block_loop_aborts)
_BLOCK_ONLY = [(FaultSpec("resonance_shift", 24.0, 1.25), "lines_abort", 1.0)]


@pytest.mark.parametrize(
    ("fault", "rule", "grms", "loop"),
    [(*f, loop) for loop in ("block", "fast") for f in _FAULTS]
    + [(*f, "block") for f in _BLOCK_ONLY],
    ids=lambda v: str(getattr(v, "kind", v)),
)
def test_fault_trips_its_rule_and_ramps_the_drive_down(fault, rule, grms, loop):
    spec = make_spec(grms=grms, full_s=15.0, loop=loop)
    rig = SimRig(load_plant("loudspeaker"), FS, seed=2, faults=(fault,))
    ctl, drive, events = run(spec, rig)
    trip = _check_ramp_down(ctl, drive, fault.at_s, spec)
    assert trip.rule == rule, trip.message
    assert trip.t_s >= fault.at_s
    assert any(e.kind == "trip" and e.data["rule"] == rule for e in events)
    assert all(k.endswith(("_db", "_fs", "_s", "dof", "updates", "samples", "_bad", "abort"))
               or k in ("lines_beyond_abort",) for k in trip.detail)


def test_fast_loop_follows_a_resonance_shift_the_block_loop_aborts():
    # The same 25 % shift as the block loop's lines_abort case: the fast loop sees the moved
    # lines within a second, restarts their estimates and re-equalizes; the run completes in
    # tolerance (the true control, from the rig's analytic FRF, is back inside the alarm band).
    spec = make_spec(full_s=25.0, loop="fast")  # the run ends 15 s after the shift
    rig = SimRig(load_plant("loudspeaker"), FS, seed=2,
                 faults=(FaultSpec("resonance_shift", 24.0, 1.25),))
    ctl, _, events = run(spec, rig)
    res = ctl.result()
    assert res.status == "completed", res.abort_reason
    assert any(e.kind == "track" and e.t_s > 24.0 for e in events)
    assert res.final_lines_outside_alarm == 0
    from tests.benchmarks.bench_control import _expected_control_fs

    # the true control of the final drive (the expected Welch estimate through the rig's
    # analytic FRF, windows included): every line within the alarm band, where the shift had
    # put lines more than 6 dB off before the loop followed it
    rec = ctl.last_update
    true = _expected_control_fs(rig, rec.f_hz, rec.new_drive_psd, N, FS)
    true_db = 10 * np.log10(true / rec.target_psd)
    assert np.max(np.abs(true_db)) <= spec.tolerance.alarm_db


def test_short_dropout_does_not_trip_and_does_not_enter_an_estimate():
    spec = make_spec(full_s=10.0)
    rig = SimRig(load_plant("loudspeaker"), FS, seed=2,
                 faults=(FaultSpec("dropout", 24.0, None, 0.05),))
    ctl, _, events = run(spec, rig)
    assert ctl.status == "completed"
    assert any(e.kind == "dropout" for e in events)
    ups = [e for e in events if e.kind == "update" and e.t_s > 24.0]
    assert all(e.data["min_dev_db"] > -6.0 for e in ups)


def test_non_finite_response_trips():
    spec = make_spec(full_s=10.0)
    rig = SimRig(load_plant("ideal"), FS, seed=2)

    def hook(ctl, resp):
        if 20.0 <= ctl.t_s < 20.0 + BLOCK / FS:
            resp = resp.copy()
            resp[100] = np.nan
        return resp

    ctl, drive, _ = run(spec, rig, hook=hook)
    assert _check_ramp_down(ctl, drive, 20.0, spec).rule == "non_finite"


def test_underflow_report_trips_controller_late():
    spec = make_spec(full_s=10.0)
    rig = SimRig(load_plant("ideal"), FS, seed=2)

    def hook(ctl, resp):
        if 20.0 <= ctl.t_s < 20.0 + BLOCK / FS:
            ctl.report_underflow(1)
        return resp

    ctl, drive, _ = run(spec, rig, hook=hook)
    assert _check_ramp_down(ctl, drive, 20.0, spec).rule == "controller_late"


@pytest.mark.parametrize("loop", ["block", "fast"])
def test_drive_limit_trips_when_the_plant_is_too_weak(loop):
    # 0.05 FS/FS: 1 grms needs 0.1 FS rms of response, i.e. 2 FS rms of drive > 0.25 FS ceiling
    spec = make_spec(steps=(-20.0, -10.0, 0.0), full_s=5.0, loop=loop)
    rig = Wire(0.05)
    ctl, drive, events = run(spec, rig)
    assert ctl.trip is not None and ctl.trip.rule == "drive_limit", ctl.trip
    # the drive never exceeded its rms ceiling (nominal, from every update) or its peak limit
    assert all(e.data["drive_rms_fs"] <= ctl.drive_rms_limit_fs * (1 + 1e-9)
               for e in events if e.kind == "update")
    assert np.max(np.abs(drive)) <= spec.safety.drive_peak_max_fs
    rms = np.sqrt(np.convolve(drive**2, np.ones(N) / N, mode="valid"))
    # the mean square of N samples of band-limited Gaussian noise scatters by about
    # 1/√(N·B/fs) = 5 % (B = 980 Hz), its rms by half that: 5 × 5 % bounds the rms (≥ 10σ)
    assert rms.max() <= ctl.drive_rms_limit_fs * (1 + 5 * math.sqrt(FS / (N * 980.0)))


@pytest.mark.parametrize("loop", ["block", "fast"])
def test_runaway_after_a_sensor_loss_never_exceeds_the_drive_limit(loop):
    # The sensor loses 4.4 dB (gain 0.6): inside the abort and loop-open limits, so the
    # equalizer pushes the drive up to make up for it, into a 0.1 FS rms ceiling (1 grms needs
    # ≈ 0.08 FS before the fault, 0.13 FS after). The drive must stop at the ceiling and the
    # run end on drive_limit. Where the fault falls between updates decides whether a few
    # lines go beyond the abort band first (then lines_abort trips and, while pending, keeps
    # the drive from rising: also safe); 25 s is a phase at which the push reaches the ceiling.
    spec = make_spec(full_s=30.0, safety=SafetyLimits(drive_rms_max_fs=0.1), loop=loop)
    rig = SimRig(load_plant("loudspeaker"), FS, seed=2,
                 faults=(FaultSpec("sensor_gain", 25.0, 0.6),))
    ctl, drive, events = run(spec, rig)
    assert ctl.trip is not None and ctl.trip.rule == "drive_limit", ctl.trip
    ups = [e for e in events if e.kind == "update"]
    assert max(e.data["drive_rms_fs"] for e in ups) >= 0.99 * ctl.drive_rms_limit_fs  # pushed
    assert all(e.data["drive_rms_fs"] <= ctl.drive_rms_limit_fs * (1 + 1e-9) for e in ups)
    assert np.max(np.abs(drive)) <= spec.safety.drive_peak_max_fs
    rms = np.sqrt(np.convolve(drive**2, np.ones(N) / N, mode="valid"))
    # the mean square of N samples of band-limited Gaussian noise scatters by about
    # 1/√(N·B/fs) = 5 % (B = 980 Hz), its rms by half that: 5 × 5 % bounds the rms (≥ 10σ)
    assert rms.max() <= ctl.drive_rms_limit_fs * (1 + 5 * math.sqrt(FS / (N * 980.0)))


def test_connect_check_refuses_a_channel_that_does_not_respond():
    spec = make_spec()
    ctl, drive, events = run(spec, Wire(0.0, noise_fs=1e-4))
    assert ctl.trip.rule == "connect_check"
    assert "mean coherence" in ctl.trip.message
    assert ctl.stage == "done" and not any(e.kind == "identify" for e in events)
    # never above the connection level: a 1-s rms never exceeds connect_level_fs by 5σ scatter
    w = int(FS)
    rms = np.sqrt(np.convolve(drive**2, np.ones(w) / w, mode="valid"))
    assert rms.max() <= spec.safety.connect_level_fs * (1 + 5 / math.sqrt(980.0))


def test_connect_with_a_dead_input_trips_response_silent():
    spec = make_spec()
    ctl, _, _ = run(spec, Wire(0.0, noise_fs=0.0))
    assert ctl.trip.rule == "response_silent"


def test_low_dof_updates_do_not_trip_lines_abort_on_scatter():
    # 16-DOF updates with a tight ±4 dB abort band: the χ²_16 scatter alone (σ = 4.343
    # sqrt(psi1(8)) = 1.6 dB; docs/methods.md, "χ² confidence bands and dB scatter") puts a line
    # beyond ±4 dB with P = 0.017, some line of ~160 in 94 % of updates [calc], more with the
    # equalizer's own error; the statistics-aware rule must not trip on it
    # (safety.scatter_limits_db bounds the false count at 1e−6 per update).
    spec = make_spec(full_s=30.0, tolerance=Tolerance(alarm_db=3.0, abort_db=4.0),
                     safety=SafetyLimits(abort_persist_updates=1))
    rig = SimRig(load_plant("ideal"), FS, seed=8)
    ctl = Controller(spec, rig.calibration, update_dof=16.0)
    res = run_offline(ctl, rig, BLOCK, max_s=200.0)
    evs = ctl.drain_events()
    ups = [e for e in evs if e.kind == "update"]
    assert res.status == "completed", res.abort_reason
    naive = sum(1 for e in ups if e.data["max_dev_db"] > 4.0 or e.data["min_dev_db"] < -4.0)
    assert naive >= len(ups) // 2  # the naive rule would have tripped


# ---- determinism and stop ---------------------------------------------------------------------


def test_same_seed_and_response_give_a_bit_identical_drive():
    spec = make_spec(full_s=2.0)
    _, d1, _ = run(spec, SimRig(load_plant("bench"), FS, seed=11))
    _, d2, _ = run(spec, SimRig(load_plant("bench"), FS, seed=11))
    assert d1.size == d2.size and np.array_equal(d1, d2)
    _, d3, _ = run(make_spec(full_s=2.0, seed=2), SimRig(load_plant("bench"), FS, seed=11))
    assert not np.array_equal(d1[: d3.size], d3[: d1.size])


def test_request_stop_ramps_down_with_status_stopped():
    spec = make_spec(full_s=30.0)
    rig = SimRig(load_plant("ideal"), FS, seed=2)

    def hook(ctl, resp):
        if 22.0 <= ctl.t_s < 22.0 + BLOCK / FS:
            ctl.request_stop("SIGTERM")
        return resp

    ctl, drive, events = run(spec, rig, hook=hook)
    res = ctl.result()
    assert res.status == "stopped" and res.abort_reason == "SIGTERM" and res.exit_status == 130
    i = int(22.0 * FS) + BLOCK
    m = int(math.ceil(spec.safety.abort_ramp_s * FS))
    assert np.all(drive[i + m + BLOCK:] == 0.0)
    before = drive[i - int(FS): i]
    bound = 6 * np.std(np.diff(before)) + math.pi / (2 * m) * np.max(np.abs(before))
    assert np.max(np.abs(np.diff(drive[i: i + m + BLOCK]))) <= bound
    assert any(e.kind == "stop" for e in events)


# ---- pure pieces of the stages -----------------------------------------------------------------


def test_segments_for_dof_is_the_smallest_count_reaching_the_dof():
    from liveshape.control.stages import segments_for_dof
    from liveshape.dsp.spectra import welch_dof
    for dof in (16.0, 60.0, 120.0):
        k = segments_for_dof(dof)
        # Welch 1967 equivalent DOF (liveshape.dsp.spectra.welch_dof, checked against scipy there)
        assert welch_dof(k) >= dof > welch_dof(k - 1)


@pytest.mark.parametrize("averaging", ["linear", "exponential"])
def test_decision_pool_dof_matches_monte_carlo_of_chi2_estimates(averaging):
    # Pool independent χ²_ν/ν estimates; the pooled estimate's var/mean² must be 2/ν_pool
    # (χ² variance 2ν). 20000 lines: relative standard error of the variance ≈ √(2/20000)·√κ
    # with κ ≈ 1.5 for these weighted χ² sums; 4σ ≈ 7 %.
    from liveshape.control.stages import DecisionPool
    rng = np.random.default_rng(17)
    nu_u, n = 60.0, 20000
    pool = DecisionPool(120.0, nu_u, averaging)
    for k in range(1, 7):
        pool.push(rng.chisquare(nu_u, n) / nu_u, nu_u)
        if k == 1:
            assert not pool.ready and pool.dof == pytest.approx(60.0)
        if k == 2:
            assert pool.ready and pool.dof == pytest.approx(120.0)
    p = pool.psd
    nu_mc = 2 * p.mean() ** 2 / p.var(ddof=1)
    assert nu_mc == pytest.approx(pool.dof, rel=0.07)
    if averaging == "exponential":
        # steady state of weight 1/n: ν_u (2n − 1) (exponential averaging, Bendat & Piersol)
        assert pool.dof < 60.0 * 3 and pool.dof > 120.0


def test_drive_history_returns_what_was_appended():
    from liveshape.control.stages import DriveHistory
    rng = np.random.default_rng(3)
    h = DriveHistory(64)
    ref = []
    for _ in range(40):
        x = rng.standard_normal(int(rng.integers(1, 50)))
        h.append(x)
        ref.append(x)
        total = np.concatenate(ref)
        h.forget_before(total.size - 100)
        a = max(0, total.size - 90)
        np.testing.assert_array_equal(h.get(a, total.size), total[a:])
    np.testing.assert_array_equal(h.get(-5, 0), np.zeros(5))  # before the stream: zeros


def test_analyse_connection_finds_delay_coherence_and_h1():
    # Reference: scipy.signal.lfilter plant with a known pure delay; H1 compared with
    # scipy.signal.freqz. Bendat & Piersol: with coherence ≈ 1 the H1 magnitude error is about
    # √((1−γ²)/(2 n_d γ²)); with 1e−4 relative noise it is far below the 2 % allowed here.
    from scipy import signal as sig

    from liveshape.control.stages import analyse_connection
    rng = np.random.default_rng(5)
    fs, n, delay = 8000.0, 512, 137
    b, a = sig.butter(2, [100, 1500], btype="band", fs=fs)
    x = rng.standard_normal(40 * n)
    y = np.concatenate((np.zeros(delay), sig.lfilter(b, a, x)[:-delay]))
    y += 1e-4 * rng.standard_normal(y.size)
    f = np.arange(n // 2 + 1) * fs / n
    band = (f >= 200) & (f <= 1200)
    chk = analyse_connection(x, y, 1e-4 * rng.standard_normal(4 * n), fs_hz=fs, nperseg=n,
                             band=band, max_lag=400, skip=0)
    # for white x the cross-correlation is σ²·h(k − delay): its peak sits at the delay plus the
    # lag of the impulse response's largest magnitude (scipy.signal.lfilter of an impulse)
    imp = sig.lfilter(b, a, np.r_[1.0, np.zeros(63)])
    assert chk.delay_samples == delay + int(np.argmax(np.abs(imp)))
    assert chk.mean_coherence > 0.99
    _, h = sig.freqz(b, a, worN=f[band], fs=fs)
    np.testing.assert_allclose(np.abs(chk.h1[band]), np.abs(h), rtol=0.02)
    assert chk.snr_db > 40


def test_control_estimate_newest_sum_is_the_newest_segment_alone():
    # Reference: scipy.signal.welch of the newest segment by itself.
    from scipy import signal as sig

    from liveshape.control.stages import ControlEstimate
    rng = np.random.default_rng(9)
    fs, n = 1000.0, 256
    band = np.zeros(n // 2 + 1, dtype=bool)
    band[10:100] = True
    est = ControlEstimate(fs, n, band, 4.0, cross=False)
    est.restart(0)
    y = rng.standard_normal(n // 2 * 7)
    got = []
    for i in range(0, y.size, 100):
        if est.feed(y[i:i + 100], y[i:i + 100], i):
            got.append(est.newest_sum)
    k = est.n_segments
    seg = y[(k - 1) * n // 2:(k - 1) * n // 2 + n]
    _, p = sig.welch(seg, fs, nperseg=n)
    assert est.newest_sum == pytest.approx(4.0 * p[band].sum(), rel=1e-9)


def test_blend_law_converges_too():
    spec = make_spec(full_s=3.0, law="blend")
    rig = SimRig(load_plant("bench"), FS, seed=3)
    ctl, _, _ = run(spec, rig)
    res = ctl.result()
    assert res.status == "completed", res.abort_reason
    # ~160 band lines at ~61 DOF: chi-square scatter alone puts a line outside +-3 dB with
    # p = 4.4e-4 [calc: P(χ²_60 < 60·10^-0.3) + P(χ²_60 > 60·10^0.3)], so a converged loop
    # shows 1 such line 7 % of the time; 3 or
    # more have binomial probability 5.4e-5 (scipy.stats.binom.sf(2, 160, 4.4e-4)).
    assert res.final_lines_outside_alarm <= 2
    assert abs(res.final_rms_error_db) <= spec.tolerance.rms_alarm_db


def test_drive_only_goes_down_while_a_rule_is_pending():
    # A resonance shift puts lines beyond the abort limits; while lines_abort is pending (3
    # updates needed here) no line of the drive may rise, and those too high come down.
    spec = make_spec(full_s=25.0, safety=SafetyLimits(abort_persist_updates=3))
    rig = SimRig(load_plant("loudspeaker"), FS, seed=2,
                 faults=(FaultSpec("resonance_shift", 24.0, 1.25),))
    records = {}

    def hook(ctl, resp):
        rec = ctl.last_update
        if rec is not None:
            records[rec.index] = rec
        return resp

    ctl, _, events = run(spec, rig, hook=hook)
    assert ctl.trip is not None and ctl.trip.rule == "lines_abort"
    held = [records[e.data["update"]] for e in events if e.kind == "hold"]
    assert len(held) == spec.safety.abort_persist_updates - 1  # pending, then the trip
    for rec in held:
        before = rec.drive_psd / 10 ** (rec.level_db / 10)  # as played, back to full level
        assert not rec.applied
        assert np.all(rec.new_drive_psd <= before * (1 + 1e-12))
        assert np.any(rec.new_drive_psd < before * 10 ** -0.1)  # some lines did come down


def test_moved_names_are_reexported():
    # the connection stage's pieces live in connect; stages keeps them importable
    from liveshape.control import connect, stages

    for name in ("CONNECT_SEGMENTS", "ConnectionCheck", "ConnectRecorder", "analyse_connection",
                 "connection_data", "connection_trip"):
        assert getattr(stages, name) is getattr(connect, name)
    # the loop's settings and views are the controller's base class, in loopstate
    from liveshape.control import controller, loopstate

    assert issubclass(controller.Controller, loopstate.LoopState)
    assert (controller.FADE_IN_S, controller.IDENTIFY_BELOW_DB) == (
        loopstate.FADE_IN_S, loopstate.IDENTIFY_BELOW_DB)


def test_target_follows_the_level_as_it_ramps():
    # The target shown is the full-level target scaled by the gain playing now (a level of L dB
    # is a power ratio 10^(L/10): the decibel definition), also while a step ramps and before a
    # new estimate exists at the new level.
    spec = make_spec(steps=(-6.0, 0.0), hold_s=1.0, full_s=2.0)
    rig = SimRig(load_plant("ideal"), FS, seed=5)
    ctl = Controller(spec, rig.calibration)
    resp = np.zeros(BLOCK)
    full = None
    ramping = []
    while not ctl.finished:
        resp = rig.process(ctl.exchange(resp))
        s = ctl.snapshot()
        if s.stage in ("equalize", "full_level") and np.isfinite(s.gain_db):
            ramping.append((s.gain_db, s.target_grms_g))
        if s.stage == "full_level":
            full = s.target_grms_g
    assert full is not None
    mid = [(g, t) for g, t in ramping if -5.5 < g < -0.5]
    assert mid, "no snapshot while the level ramped from -6 to 0 dB"
    for g_db, t in ramping:
        assert t == pytest.approx(full * 10 ** (g_db / 20), rel=1e-9)


# ---- a level that cannot be reached ----------------------------------------------------------


def _with_max_step(spec, max_step_s):
    import dataclasses

    return dataclasses.replace(spec, schedule=dataclasses.replace(spec.schedule,
                                                                  max_step_s=max_step_s))


def test_a_level_that_cannot_be_held_ends_the_run_after_max_step_s():
    # An alarm band of ±0.3 dB is narrower than the 90 % χ² band of any estimate the loop
    # makes (±0.7 dB at ~180 DOF; Bendat & Piersol, Random Data, 4th ed., §8.5.4): no decision
    # can be in tolerance, so the first step never ends. The run must end on its own rule after
    # schedule.max_step_s of that step and ramp the drive down, not sit there for ever.
    from liveshape.control.runplan import least_step_s
    from liveshape.control.safety import EXIT_STATUS

    spec = make_spec(steps=(-6.0, 0.0), hold_s=1.0, full_s=4.0,
                     tolerance=Tolerance(alarm_db=0.3, abort_db=6.0))
    limit = round(2.0 * least_step_s(spec), 1)
    spec = _with_max_step(spec, limit)
    rig = SimRig(load_plant("ideal"), FS, seed=2)
    ctl, drive, events = run(spec, rig, max_s=limit + 60.0)
    res = ctl.result()
    assert res.status == "aborted" and res.trip.rule == "level_unreachable"
    assert EXIT_STATUS["level_unreachable"] == 20
    (level,) = [e for e in events if e.kind == "level"]
    assert res.trip.t_s - level.t_s == pytest.approx(limit, abs=BLOCK / FS + 1e-9)
    assert "lines outside the alarm limits" in res.trip.message
    assert "χ² band" in res.trip.message and f"max_step_s = {limit:g}" in res.trip.message
    # the drive ramps down within the abort ramp and stays quiet (a per-sample fade, no step)
    after = drive[int((res.trip.t_s + spec.safety.abort_ramp_s) * FS) + BLOCK:]
    assert after.size and np.max(np.abs(after)) < 1e-3 * np.std(drive[: int(res.trip.t_s * FS)])


def test_the_automatic_limit_lets_a_normal_run_complete():
    from liveshape.control.runplan import DEFAULT_MAX_STEP_S, least_step_s, max_step_s

    spec = make_spec(steps=(-9.0, -6.0, -3.0, 0.0), hold_s=1.0, full_s=2.0)
    assert spec.schedule.max_step_s is None
    assert max_step_s(spec) == max(DEFAULT_MAX_STEP_S, 4 * least_step_s(spec))
    ctl, _, _ = run(spec, SimRig(load_plant("ideal"), FS, seed=2), max_s=200.0)
    assert ctl.result().status == "completed"


def test_a_max_step_no_step_could_meet_is_refused_in_one_line():
    from liveshape.control.runplan import least_step_s
    from liveshape.errors import ConfigError

    spec = make_spec(steps=(-6.0, 0.0), hold_s=1.0)
    least = least_step_s(spec)
    cal = SimRig(load_plant("ideal"), FS, seed=2).calibration
    with pytest.raises(ConfigError) as exc:
        Controller(_with_max_step(spec, least), cal)
    text = str(exc.value)
    assert "schedule.max_step_s" in text and f"{least:.1f} s" in text and "\n" not in text
    Controller(_with_max_step(spec, 1.5 * least + 0.1), cal)


def test_level_schedule_overdue_only_below_full_level():
    from liveshape.control.schedule import LevelSchedule

    sch = LevelSchedule(Schedule(steps_db=(-3.0, 0.0), hold_s=1.0, max_step_s=5.0))
    assert not sch.overdue(100.0)  # no step started yet
    sch.start_step(10.0)
    assert not sch.overdue(15.0) and sch.overdue(15.01)
    sch.step_up()
    sch.start_step(16.0)
    assert not sch.overdue(1000.0)  # full level: the test time runs, no limit


# ---- faults inside the connection check --------------------------------------------------------


@pytest.mark.parametrize("kind", ["sensor_detached", "amp_trip", "dropout"])
@pytest.mark.parametrize("at_s", [1.2, 1.6, 2.0])
def test_a_fault_inside_the_connection_record_stops_the_run_at_the_connection_level(kind, at_s):
    # The connection record of this set-up covers rig time ~0.75-2.5 s. A fault anywhere in it
    # left the mean coherence high enough to pass before; the drive then rose to the
    # identification level. Now the check stops the run, and nothing louder than the connection
    # noise is ever played.
    from liveshape.testdef.spec import parse_fault

    spec = make_spec(steps=(-6.0, 0.0), hold_s=1.0, full_s=1.0)
    rig = SimRig(load_plant("loudspeaker"), FS, seed=1, faults=[parse_fault(f"{kind}@{at_s}")])
    ctl, drive, _ = run(spec, rig, max_s=20.0)
    res = ctl.result()
    assert res.status == "aborted" and res.trip.rule in ("connect_check", "response_silent")
    assert res.trip.t_s < 3.0  # at the end of the connection stage, before identification
    level = spec.safety.connect_level_fs
    hop = 256
    frames = drive[: drive.size // hop * hop].reshape(-1, hop)
    assert np.max(np.sqrt(np.mean(frames**2, axis=1))) < 1.6 * level  # rms of 21 ms pieces


@pytest.mark.parametrize("band_hz", [(20.0, 1000.0), (100.0, 500.0)])
@pytest.mark.parametrize("plant", ["loudspeaker", "bench", "ideal"])
def test_clean_connection_records_stay_well_inside_the_drop_limit(plant, band_hz):
    # Over 8 seeds per plant no clean record comes near the 6 dB limit (largest seen 2.9 dB;
    # a false stop would keep a working rig from running).
    import dataclasses

    from liveshape.control.connect import CONNECT_DROP_DB

    worst = []
    for seed in range(8):
        spec = make_spec(steps=(-6.0, 0.0), hold_s=1.0, full_s=1.0, seed=seed)
        # a narrow band has few lines in a short piece: the pieces grow to hold 32 of them
        spec = dataclasses.replace(spec, profile=Profile(band_hz, (1e-3, 1e-3), "band"))
        rig = SimRig(load_plant(plant), FS, seed=seed)
        ctl = Controller(spec, rig.calibration)
        resp = np.zeros(BLOCK)
        while ctl.stage == "connect" and not ctl.finished:
            resp = rig.process(ctl.exchange(resp))
        assert ctl.stage == "identify"
        worst.append(ctl.connection.worst_drop_db)
    assert max(worst) < CONNECT_DROP_DB - 1.5, worst
