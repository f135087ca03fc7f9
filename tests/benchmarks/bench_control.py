"""Figures of the control loop (not pass/fail tests).

* ``control_updates_to_tolerance``: equalizer updates after identification until the first
  decision with every line inside its alarm limit (±3 dB) and the rms inside ±1 dB, loudspeaker
  preset, default test definition at 48 kHz / 8192 lines (target ≤ 2). The same count judged on
  the *true* control (the expected estimate from the rig's analytic FRF and the drive PSD, see
  ``_expected_control``) is reported beside it.
* ``control_line_error_ratio_displayed`` / ``_true``: steady-state rms line error at full level
  divided by the loop-theory prediction for the update DOF in use (docs/methods.md, "Equalizer
  update laws and their scatter": displayed error
  variance 2σ²/(2−γ), true error γ/(2−γ)·σ², σ = 4.343·√ψ1(ν/2)); target ≤ 1.15.
* ``control_alone_speed_*``: audio seconds per CPU second of the controller alone (synthesis,
  estimation, update, supervision) at 48 kHz, fed by a wire rig whose cost is not timed
  (target ≥ 500×).
* ``control_loop_speed_*``: controller and SimRig (loudspeaker preset) together, as fast as
  possible (target ≥ 50×).
* ``control_fault_to_quiet_*``: time from a fault's onset to the drive staying below −60 dB re
  its pre-fault rms, with the bound ``one update + abort_ramp_s`` beside it (rules that need
  ``abort_persist_updates`` consecutive updates, e.g. lines_abort, have their own bound).

* ``example_*``: the figures of issue 10 on ``examples/handlebar-nav-unit.yaml`` (simulated
  loudspeaker rig, full level extended to 60 s): median interval between drive updates,
  start → full level, recovery after ``plant_gain`` −3 dB / +1 dB and ``resonance_shift``
  ×1.05 at 70 s, inside full level (rms within ±0.5 dB and every line inside its alarm limit,
  judged on the true control from the rig's analytic FRF and on the displayed control; time
  resolution one update), time any line spends beyond its abort limit after the shift.

Run with ``python -m tests.benchmarks control``.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable

import numpy as np

from liveshape.control.controller import Controller
from liveshape.dsp.profile import Profile
from liveshape.dsp.spectra import db_scatter_std
from liveshape.rigs.plant import load_plant
from liveshape.rigs.sim import SimRig
from liveshape.testdef.chain import ChainCalibration
from liveshape.testdef.spec import ControlSettings, FaultSpec, Schedule, TestSpec

FS_HZ = 48_000.0
FRAME = 8192
BLOCK = 4096


def _spec(full_s: float = 60.0, loop: str = "block", **schedule) -> TestSpec:
    prof = Profile((20.0, 1000.0), (1.0 / 980.0, 1.0 / 980.0), "flat 1 grms")
    return TestSpec(name="bench", profile=prof,
                    schedule=Schedule(full_level_s=full_s, **schedule),
                    control=ControlSettings(fs_hz=FS_HZ, frame_length=FRAME, loop=loop), seed=1)


class _Wire:
    """Gain, delay, noise: a rig that costs next to nothing."""

    calibration = ChainCalibration()

    def __init__(self, gain: float = 1.0, delay: int = 512) -> None:
        self.gain, self.buf = gain, np.zeros(delay)
        self.rng = np.random.default_rng(0)

    def process(self, x: np.ndarray) -> np.ndarray:
        z = np.concatenate((self.buf, x))
        self.buf = z[x.size:]
        return self.gain * z[: x.size] + 1e-5 * self.rng.standard_normal(x.size)


_OVER = 8  # frequency grid points per line for the expected spectrum
_SPAN = 6  # kernel half-width, lines


def _power_kernel(window: np.ndarray) -> np.ndarray:
    """|W(ν)|² of a window on ν = −SPAN..SPAN lines in steps of 1/OVER, unit area (lines)."""
    n = window.size
    spec = np.abs(np.fft.fft(window, _OVER * n)) ** 2
    m = np.arange(-_SPAN * _OVER, _SPAN * _OVER + 1)
    k = spec[m % spec.size]
    return k / (k.sum() / _OVER)


def _expected_control(rig, f_hz: np.ndarray, drive_psd: np.ndarray, n: int) -> np.ndarray:
    """Expected Welch estimate (g²/Hz) on the lines ``f_hz`` for a drive PSD on those lines.

    The synthesized drive's PSD is its line PSD smoothed by the sine window's |W|²; the rig's
    |H|² (analytic FRF) multiplies it on a fine grid; the Hann-window estimate smooths the
    product by the Hann |W|² (Welch 1967; the synthesis and estimation kernels are the windows'
    power spectra).
    """
    df = FS_HZ / n
    k = np.rint(f_hz / df).astype(int)
    lo, hi = k[0] - 2 * _SPAN, k[-1] + 2 * _SPAN
    fine = np.zeros((hi - lo + 1) * _OVER)
    fine[(k - lo) * _OVER] = drive_psd * _OVER  # lines as impulses of unit area
    ks = _power_kernel(np.sin(np.pi * (np.arange(n) + 0.5) / n))
    kh = _power_kernel(0.5 - 0.5 * np.cos(2 * np.pi * np.arange(n) / n))
    sx = np.convolve(fine, ks, mode="same") / _OVER
    f_fine = (lo + np.arange(fine.size) / _OVER) * df
    h2 = np.abs(rig.frf(f_fine) * rig.calibration.g_per_fs) ** 2
    y = np.convolve(sx * h2, kh, mode="same") / _OVER
    return y[(k - lo) * _OVER]


def _run(ctl: Controller, rig, block: int, *, on_update=None):
    resp = np.zeros(block)
    drive = []
    t_ctl = t_rig = 0.0
    last = None
    while not ctl.finished:
        t0 = time.process_time()
        d = ctl.exchange(resp)
        t1 = time.process_time()
        resp = rig.process(d)
        t_rig += time.process_time() - t1
        t_ctl += t1 - t0
        drive.append(d)
        rec = ctl.last_update
        if on_update is not None and rec is not None and rec is not last:
            on_update(rec, rig)
            last = rec
    return np.concatenate(drive), t_ctl, t_rig


def _convergence(report: Callable[[str, float, str], None]) -> None:
    spec = _spec(full_s=60.0)
    rig = SimRig(load_plant("loudspeaker"), FS_HZ, seed=2)
    ctl = Controller(spec, rig.calibration)
    gamma = spec.control.update_gain
    true_first: list[int] = []
    disp_err: list[np.ndarray] = []
    true_err: list[np.ndarray] = []
    alarm = spec.tolerance.alarm_db

    def on_update(rec, rig):
        target = rec.target_psd
        # expected control of the drive just played (the rig's physics), and its error
        true = _expected_control(rig, rec.f_hz, rec.drive_psd, FRAME)
        e_true = 10 * np.log10(true / target)
        if not true_first and np.all(np.abs(e_true) <= alarm):
            true_first.append(rec.index - 1)  # the drive of update k−1 produced it
        if rec.stage == "full_level" and rec.level_db == 0.0 and rec.index >= 3:
            disp_err.append(10 * np.log10(rec.control_psd / target))
            true_err.append(e_true)

    _run(ctl, rig, BLOCK, on_update=on_update)
    res = ctl.result()
    report("control_updates_to_tolerance", res.updates_to_tolerance, "updates (decision)")
    report("control_updates_to_true_tolerance", true_first[0] if true_first else -1,
           "updates (true control)")
    nu = ctl.last_update.dof
    sigma = db_scatter_std(nu)
    d = np.concatenate(disp_err)
    t = np.concatenate([e - e.mean() for e in true_err])  # shape error about the true rms
    pred_d = math.sqrt(2.0 / (2.0 - gamma)) * sigma
    pred_t = math.sqrt(gamma / (2.0 - gamma)) * sigma
    report("control_update_dof", nu, "DOF")
    report("control_line_error_displayed", float(np.sqrt(np.mean((d - d.mean()) ** 2))), "dB")
    report("control_line_error_ratio_displayed", float(np.std(d) / pred_d), "x predicted")
    report("control_line_error_ratio_true", float(np.std(t) / pred_t), "x predicted")
    report("control_final_rms_error", res.final_rms_error_db, "dB")
    report("control_status_loudspeaker", res.status, "")


def _alone_speed(loop: str, block: int) -> float:
    """Audio seconds per CPU second of the controller alone: the whole loop timed once, minus
    the wire rig timed alone on as many blocks (a clock read per block costs more than a block
    of the wire on some machines, so the two are not timed block by block)."""
    ctl = Controller(_spec(full_s=60.0, loop=loop), _Wire.calibration)
    wire, resp, blocks = _Wire(), np.zeros(block), 0
    t0 = time.process_time()
    while not ctl.finished:
        resp = wire.process(ctl.exchange(resp))
        blocks += 1
    total = time.process_time() - t0
    wire, zeros = _Wire(), np.zeros(block)
    t0 = time.process_time()
    for _ in range(blocks):
        wire.process(zeros)
    return ctl.t_s / (total - (time.process_time() - t0))


def _speed(report: Callable[[str, float, str], None]) -> None:
    for loop in ("block", "fast"):
        for block in (1024, 4096):
            report(f"control_alone_speed_{loop}_block{block}", _alone_speed(loop, block),
                   "x real time")
    spec = _spec(full_s=60.0)
    rig = SimRig(load_plant("loudspeaker"), FS_HZ, seed=2)
    ctl = Controller(spec, rig.calibration)
    _, t_ctl, t_rig = _run(ctl, rig, BLOCK)
    report("control_loop_speed_loudspeaker", ctl.t_s / (t_ctl + t_rig), "x real time")
    report("control_loop_speed_controller_share", t_ctl / (t_ctl + t_rig), "of CPU")


def _faults(report: Callable[[str, float, str], None]) -> None:
    for fault in (FaultSpec("sensor_detached", 40.0), FaultSpec("plant_gain", 40.0, 10.0),
                  FaultSpec("sensor_gain", 40.0, 1.6), FaultSpec("amp_trip", 40.0),
                  FaultSpec("resonance_shift", 40.0, 1.25)):
        spec = _spec(full_s=60.0, steps_db=(-6.0, 0.0), hold_s=1.0)
        rig = SimRig(load_plant("loudspeaker"), FS_HZ, seed=2, faults=(fault,))
        ctl = Controller(spec, rig.calibration)
        drive, _, _ = _run(ctl, rig, BLOCK)
        i = int(fault.at_s * FS_HZ)
        ref = float(np.sqrt(np.mean(drive[i - int(FS_HZ): i] ** 2)))
        loud = np.flatnonzero(np.abs(drive) > 1e-3 * ref)
        quiet_s = (loud[-1] + 1) / FS_HZ - fault.at_s
        rule = ctl.trip.rule if ctl.trip else "none"
        report(f"control_fault_to_quiet_{fault.kind}", quiet_s, f"s ({rule})")
    report("control_fault_bound", ctl.update_interval_s + spec.safety.abort_ramp_s,
           "s (one update + abort ramp)")
    persist = spec.safety.abort_persist_updates
    report("control_fault_bound_persistent",
           (persist + 1) * ctl.update_interval_s + spec.safety.abort_ramp_s,
           f"s ({persist} whole updates after the one the fault fell into + abort ramp)")


EXAMPLE = "examples/handlebar-nav-unit.yaml"
FAULT_S = 70.0  # after full level is reached in both loops


def _example_run(fault: FaultSpec | None, loop: str, *, sample_from_s: float = math.inf):
    """Run the example spec on its simulated rig with ``control.loop = loop``.

    Returns the spec, the controller and, from ``sample_from_s`` on, one sample per block:
    (t_s, true control, displayed control, target, f_hz), the true control being the expected
    estimate for the drive PSD playing then (the rig's analytic FRF).
    """
    import dataclasses
    from pathlib import Path

    from liveshape.testdef.spec import load_spec

    path = Path(__file__).resolve().parents[2] / EXAMPLE
    spec = load_spec(path)
    spec = dataclasses.replace(
        spec, schedule=dataclasses.replace(spec.schedule, full_level_s=60.0),
        control=dataclasses.replace(spec.control, loop=loop))
    faults = (fault,) if fault is not None else ()
    rig = SimRig(load_plant("loudspeaker"), spec.control.fs_hz, seed=2, faults=faults)
    ctl = Controller(spec, rig.calibration)
    n, fs = spec.control.frame_length, spec.control.fs_hz
    samples = []
    resp = np.zeros(BLOCK)
    while not ctl.finished:
        resp = rig.process(ctl.exchange(resp))
        if ctl.t_s < sample_from_s or ctl.status != "running":
            continue
        snap = ctl.snapshot()
        if snap.control_psd is None:
            continue
        # the drive playing now at the current level; the plant as it is now
        true = _expected_control_fs(rig, snap.f_hz, snap.drive_psd, n, fs)
        samples.append((ctl.t_s, true, np.asarray(snap.control_psd),
                        np.asarray(snap.target_psd), snap.f_hz))
    return spec, ctl, samples


def _expected_control_fs(rig, f_hz, drive_psd, n, fs_hz):
    global FS_HZ
    saved, FS_HZ = FS_HZ, fs_hz
    try:
        return _expected_control(rig, f_hz, drive_psd, n)
    finally:
        FS_HZ = saved


def _recovery_s(spec, samples, at_s: float, which: int) -> tuple[float, float, float]:
    """After ``at_s``: (first time the rms is back within ±0.5 dB, first time every line is
    inside its alarm limit too, time any line spends beyond its abort limit), s, at the
    sampling of ``samples`` (one block)."""
    rms_ok = all_ok = None
    beyond = 0.0
    prev_t = at_s
    for t, true, disp, target, f in samples:
        if t <= at_s:
            continue
        c = true if which == 0 else disp
        e = 10 * np.log10(c / target)
        rms = 10 * np.log10(c.sum() / target.sum())
        if np.any(np.abs(e) > spec.tolerance.abort_db_at(f)):
            beyond += t - prev_t
        prev_t = t
        if abs(rms) <= 0.5 and rms_ok is None:
            rms_ok = t
        if abs(rms) <= 0.5 and np.all(np.abs(e) <= spec.tolerance.alarm_db_at(f)):
            if all_ok is None:
                all_ok = t
        elif which == 0:
            all_ok = None  # the true control must stay inside from then on
    nan = float("nan")
    return (nan if rms_ok is None else rms_ok - at_s, nan if all_ok is None else all_ok - at_s,
            beyond)


def _example(report: Callable[[str, float, str], None]) -> None:
    for loop in ("block", "fast"):
        spec, ctl, samples = _example_run(None, loop, sample_from_s=40.0)
        t = np.asarray(ctl.drive_update_times_s)
        report(f"example_{loop}_update_interval_median", float(np.median(np.diff(t))), "s")
        full = [e.t_s for e in ctl.events if e.kind == "stage"
                and e.data.get("stage") == "full_level"]
        report(f"example_{loop}_start_to_full_level", full[0] if full else float("nan"), "s")
        gamma = spec.control.update_gain
        true_err = [10 * np.log10(tr / tg) for _, tr, _, tg, _ in samples]
        e = np.concatenate([x - x.mean() for x in true_err[:: max(1, len(true_err) // 60)]])
        sigma_d = db_scatter_std(spec.control.target_dof)
        report(f"example_{loop}_true_line_error_ratio", float(np.std(e) / sigma_d),
               f"x the χ² scatter of {spec.control.target_dof:g} DOF (γ = {gamma:g})")
        report(f"example_{loop}_status", ctl.result().status, "")
        for name, fault in (("gain_m3db", FaultSpec("plant_gain", FAULT_S, -3.0)),
                            ("gain_p1db", FaultSpec("plant_gain", FAULT_S, 1.0)),
                            ("shift_5pct", FaultSpec("resonance_shift", FAULT_S, 1.05))):
            spec, ctl, samples = _example_run(fault, loop, sample_from_s=FAULT_S - 1.0)
            for which, label in ((0, "true"), (1, "displayed")):
                rms_s, all_s, beyond_s = _recovery_s(spec, samples, FAULT_S, which)
                report(f"example_{loop}_{name}_rms_within_0.5db_{label}", rms_s, "s")
                report(f"example_{loop}_{name}_all_lines_in_alarm_{label}", all_s, "s")
                report(f"example_{loop}_{name}_beyond_abort_{label}", beyond_s, "s")
            report(f"example_{loop}_{name}_status", ctl.result().status, "")


def _warm_and_false_trips(report: Callable[[str, float, str], None]) -> None:
    """Warm start → full level on the example, and trips over 10 min at full level, 5 seeds."""
    import tempfile
    from pathlib import Path

    from liveshape.session import run_session
    from liveshape.testdef.spec import load_spec

    path = Path(__file__).resolve().parents[2] / EXAMPLE
    spec = load_spec(path)

    def full_at(run_dir: Path) -> float:
        import json

        for line in (run_dir / "events.jsonl").read_text().splitlines():
            e = json.loads(line)
            if e["kind"] == "stage" and e["data"]["stage"] == "full_level":
                return float(e["t_s"])
        return float("nan")

    with tempfile.TemporaryDirectory() as tmp:
        first = run_session(spec, out_dir=tmp, fast=True, seed=1, record_signals=False)
        warm = run_session(spec, out_dir=tmp, fast=True, seed=3, record_signals=False,
                           warm_start=first.run_dir)
        report("example_fast_warm_start_to_full_level", full_at(warm.run_dir), "s")
        report("example_fast_cold_start_to_full_level", full_at(first.run_dir), "s")
    trips = 0
    for seed in range(1, 6):
        spec10 = load_spec(path, {"schedule.full_level_s": 600.0, "seed": seed})
        rig = SimRig(load_plant("loudspeaker"), spec10.control.fs_hz, seed=seed)
        ctl = Controller(spec10, rig.calibration)
        resp = np.zeros(BLOCK)
        while not ctl.finished:  # no drive kept: 10 min of it would be 230 MB
            resp = rig.process(ctl.exchange(resp))
        trips += ctl.trip is not None
    report("example_fast_false_trips_10min_5seeds", trips, "trips")


def _tones(report: Callable[[str, float, str], None]) -> None:
    """Sine-on-random on the example: each tone's error at full level from a least-squares fit
    of the last 10 s of control (IEEE 1057 three-parameter fit, numpy.linalg.lstsq)."""
    from pathlib import Path

    from liveshape.testdef.spec import load_spec

    tones = [{"f_hz": 120.0, "amplitude_g": 1.0}, {"f_hz": 600.0, "amplitude_g": 0.5}]
    path = Path(__file__).resolve().parents[2] / EXAMPLE
    spec = load_spec(path, {"tones": tones, "schedule.full_level_s": 30.0})
    rig = SimRig(load_plant("loudspeaker"), spec.control.fs_hz, seed=2)
    ctl = Controller(spec, rig.calibration)
    resp, kept = np.zeros(BLOCK), []
    while not ctl.finished:
        resp = rig.process(ctl.exchange(resp))
        if ctl.stage == "full_level" and ctl.schedule.remaining_s < 10.0:
            kept.append(resp)
    y = np.concatenate(kept) * rig.calibration.g_per_fs
    t = np.arange(y.size) / spec.control.fs_hz
    for tone in spec.tones:
        a = np.column_stack((np.cos(2 * np.pi * tone.f_hz * t),
                             np.sin(2 * np.pi * tone.f_hz * t), np.ones_like(t)))
        c, *_ = np.linalg.lstsq(a, y, rcond=None)
        err = 20 * math.log10(math.hypot(c[0], c[1]) / tone.amplitude_g)
        report(f"tones_error_{tone.f_hz:g}hz", err, "dB (last 10 s of full level)")
    report("tones_run_status", ctl.result().status, "")


#: Full-level time of the hum comparison, s: long enough that the time-averaged drive shows the
#: held lines' bias against the loop's own slow run-to-run differences.
HUM_FULL_S = 120.0


def _hum_run(path, hum, seed: int):
    """The example with ``hum`` (None: none) on rig and controller seed ``seed``: controller,
    CPU s, drive PSD averaged over the full-level time."""
    from liveshape.session import build_sim_rig
    from liveshape.testdef.spec import load_spec

    ov = {"schedule.full_level_s": HUM_FULL_S}
    if hum:
        ov["rig.hum"] = hum
    spec = load_spec(path, ov)
    rig, cal, _ = build_sim_rig(spec, seed)
    ctl = Controller(spec, cal, seed=seed)
    resp = np.zeros(BLOCK)
    t0 = time.process_time()
    drive_sum, n_sum = 0.0, 0
    while not ctl.finished:
        resp = rig.process(ctl.exchange(resp))
        if ctl.stage == "full_level" and ctl.status == "running":
            drive_sum = drive_sum + ctl._out.psd[ctl._band]  # the bias, not the scatter
            n_sum += 1
    return ctl, time.process_time() - t0, drive_sum / max(n_sum, 1)


def _hum(report: Callable[[str, float, str], None]) -> None:
    """Hum 20 dB above the control at 50/100/150 Hz on the example: what the loop does to the
    drive on the held lines, against a hum-free run of the same seed and, as the floor of such a
    comparison, against a hum-free run of another seed."""
    from pathlib import Path

    path = Path(__file__).resolve().parents[2] / EXAMPLE
    ctl, cpu_hum, avg_hum = _hum_run(path, {"mains_hz": 50, "harmonics": 3, "level_g": 1.0,
                                            "drift_hz": 0.1}, 2)
    clean, cpu_clean, avg_clean = _hum_run(path, None, 2)
    other, _, avg_other = _hum_run(path, None, 5)
    res = ctl.result()
    report("hum_run_verdict", res.verdict.verdict, "")
    report("hum_lines_found_hz", ", ".join(f"{ln['f_hz']:.2f}" for ln in res.lines), "")
    band = ctl._band
    held = ctl._hum_mask()
    for label, a, b, what in (
            ("hum_drive_change_on_held_lines", ctl._out.psd[band], clean._out.psd[band],
             "final drive, against the hum-free run of the same seed"),
            ("hum_drive_change_on_held_lines_time_averaged", avg_hum, avg_clean,
             f"drive averaged over {HUM_FULL_S:g} s at full level, same comparison"),
            ("hum_free_seed_to_seed_on_held_lines_time_averaged", avg_other, avg_clean,
             "two hum-free runs, seeds 5 and 2: the floor of this comparison")):
        d = 10 * np.log10(a / b)
        report(f"{label}_max", float(np.max(np.abs(d[held]))), f"dB ({what})")
        report(f"{label}_rms", float(np.sqrt(np.mean(d[held] ** 2))), "dB")
    d = 10 * np.log10(ctl._out.psd[band] / clean._out.psd[band])
    report("hum_drive_change_elsewhere_median", float(np.median(np.abs(d[~held]))), "dB")
    report("hum_guard_cpu_share", (cpu_hum - cpu_clean) / ctl.t_s,
           "CPU s per s of run (controller and rig, hum run minus clean run)")


def run(report: Callable[[str, float, str], None]) -> None:
    _hum(report)
    _tones(report)
    _warm_and_false_trips(report)
    _example(report)
    _convergence(report)
    _speed(report)
    _faults(report)


if __name__ == "__main__":
    from tests.benchmarks.__main__ import report as _report

    run(_report)
