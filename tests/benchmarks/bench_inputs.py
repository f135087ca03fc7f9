"""Several inputs in the loop: how well a monitor's limit holds, how deep the notch goes, how
the combined control sits on target, how fast a lost input trips.

Figures (the example spec, loudspeaker rig, 20 s at full level):

* limit: a monitor on the payload's bracket (350 Hz, Q 15) under a flat 0.01 g²/Hz limit; the
  worst line of the monitor's Welch PSD (scipy.signal.welch of the recorded signal over the
  full-level time, 8192 points) over the limit, dB; the worst line of 4-s windows from the first
  level step on (the ramp-up included); the notch's depth and extent; the control's rms error
  outside the notch;
* transmissibility: the full-level monitor/control H1 against the base-excitation formula
  (Rao, Mechanical Vibrations, 5th ed., §3.6) on lines with coherence above 0.98: rms and worst
  error, dB;
* strategies on a rocking two-point fixture: each strategy's combination (recomputed from the
  recorded signals) against the target: rms error and worst line, dB;
* input lost: time from a control sensor coming loose to the trip, and the drive's change
  until then, dB; the same for a monitor with a limit.

Run with ``python -m tests.benchmarks inputs``.
"""

from __future__ import annotations

import dataclasses
import json
import tempfile
from pathlib import Path

import numpy as np
import scipy.signal

EXAMPLE = Path(__file__).resolve().parents[2] / "examples" / "handlebar-nav-unit.yaml"
LIMIT = 0.01


def _spec(inputs, *, plant="loudspeaker", faults=(), **over):
    from liveshape.schema import Where
    from liveshape.testdef.inputs import inputs_from_list
    from liveshape.testdef.spec import load_spec

    spec = load_spec(EXAMPLE, overrides={"rig.plant": plant, **over})
    roles = inputs_from_list(inputs, Where("bench").key("rig.inputs"))
    rig = dataclasses.replace(spec.rig, inputs=roles)
    return dataclasses.replace(spec, rig=rig, faults=tuple(faults))


def _welch(run_dir: Path, t0: float, t1: float):
    import soundfile

    y, fs = soundfile.read(run_dir / "response.wav", always_2d=True)
    f, p = scipy.signal.welch(y[int(t0 * fs): int(t1 * fs)].T, fs, nperseg=8192)
    return f, p


def _limit(report, out: Path) -> None:
    from liveshape.rigs.plant import load_plant
    from liveshape.rigs.plantmodel import mode_transmissibility_tf
    from liveshape.session import run_session

    inputs = [{"channel": 1, "role": "control", "name": "table"},
              {"channel": 2, "role": "monitor", "name": "bracket",
               "limit": [{"f_hz": 20, "asd": LIMIT}, {"f_hz": 1000, "asd": LIMIT}]}]
    spec = _spec(inputs)
    s = run_session(spec, out_dir=out, fast=True, seed=3)
    z = np.load(s.run_dir / "decisions" / "full_level.npz")
    gpf = s.calibration["g_per_fs"]
    band_lo, band_hi = 20.0, 1000.0
    f, p = _welch(s.run_dir, float(z["first_t_s"]) - 0.5, float(z["last_t_s"]))
    band = (f >= band_lo) & (f <= band_hi)
    mon, ctrl = p[1][band] * gpf**2, p[0][band] * gpf**2
    report("inputs.limit_worst_line_over_limit_full_level", float(np.max(10 * np.log10(
        mon / LIMIT))), "dB (Welch of the recorded monitor, ~200 DOF)")
    # the ramp-up, in 4-s windows (about 90 DOF each: ±1.3 dB at 3σ on a line, Bendat &
    # Piersol §8.5.4): the worst line of the worst window
    events = [json.loads(e) for e in (s.run_dir / "events.jsonl").read_text().splitlines()]
    t = next(e["t_s"] for e in events if e["kind"] == "level")
    worst = -np.inf
    while t + 4.0 <= float(z["last_t_s"]):
        f2, p2 = _welch(s.run_dir, t, t + 4.0)
        b2 = (f2 >= band_lo) & (f2 <= band_hi)
        worst = max(worst, float(np.max(10 * np.log10(p2[1][b2] * gpf**2 / LIMIT))))
        t += 2.0
    report("inputs.limit_worst_line_over_limit_4s_windows_from_first_step", worst,
           "dB (90-DOF windows, ramp-up included)")
    summ = s.result.inputs
    report("inputs.notch_deepest", summ["notch_deepest_db"], "dB")
    report("inputs.notch_lines", summ["notched_lines"], f"lines, {summ['notch_f_hz'][0]:.0f}-"
           f"{summ['notch_f_hz'][1]:.0f} Hz")
    target = spec.profile.asd_at(f[band])
    lo, hi = summ["notch_f_hz"]
    out_n = (f[band] < lo - 12) | (f[band] > hi + 12)
    dev = 10 * np.log10(ctrl[out_n] / target[out_n])
    report("inputs.control_rms_error_outside_notch", float(10 * np.log10(np.mean(
        10 ** (dev / 10)))), "dB")
    report("inputs.control_worst_line_outside_notch", float(np.max(np.abs(dev))), "dB")
    fz = z["f_hz"]
    fw = spec.control.fs_hz / np.pi * np.tan(np.pi * fz / spec.control.fs_hz)
    _, t = scipy.signal.freqs(*mode_transmissibility_tf(load_plant("loudspeaker"), 0),
                              worN=2 * np.pi * fw)
    ok = z["input_bracket_trans_coherence"] > 0.98
    err = 20 * np.log10(z["input_bracket_trans_mag"][ok] / np.abs(t[ok]))
    report("inputs.transmissibility_rms_error", float(np.sqrt(np.mean(err**2))),
           f"dB ({int(ok.sum())} of {ok.size} lines with coherence > 0.98)")
    report("inputs.transmissibility_worst_error", float(np.max(np.abs(err))), "dB")


def _tip_plant(folder: Path) -> str:
    from liveshape.rigs.plant import FixturePoint, load_plant, plant_to_mapping
    from liveshape.testdef.config import write_yaml_file

    p = load_plant("loudspeaker")
    tip = FixturePoint(name="tip", f_hz=700.0, q=8.0, coupling=-0.6)  # DEMO rocking fixture
    p = dataclasses.replace(p, payload=dataclasses.replace(p.payload, fixture_points=(tip,)))
    path = folder / "tip.yaml"
    write_yaml_file(path, plant_to_mapping(p))
    return str(path)


def _strategies(report, out: Path) -> None:
    from liveshape.session import run_session

    plant = _tip_plant(out)
    inputs = [{"channel": 1, "role": "control", "name": "table"},
              {"channel": 2, "role": "control", "name": "tip"}]
    for strategy, fn in (("average", np.mean), ("maximum", np.max), ("minimum", np.min)):
        spec = _spec(inputs, plant=plant, **{"control.strategy": strategy})
        s = run_session(spec, out_dir=out, fast=True, seed=4)
        z = np.load(s.run_dir / "decisions" / "full_level.npz")
        f, p = _welch(s.run_dir, float(z["first_t_s"]) - 0.5, float(z["last_t_s"]))
        band = (f >= 25) & (f <= 1000)
        comb = fn(p[:, band], axis=0) * s.calibration["g_per_fs"] ** 2
        dev = 10 * np.log10(comb / spec.profile.asd_at(f[band]))
        report(f"inputs.{strategy}_rms_error", float(10 * np.log10(np.mean(10 ** (dev / 10)))),
               f"dB (status {s.result.status})")
        report(f"inputs.{strategy}_worst_line", float(np.max(np.abs(dev))), "dB")
        bias = (s.result.inputs or {}).get("extremal_bias_db")
        if bias is not None:
            report(f"inputs.{strategy}_stated_bias", bias, "dB (order statistics, decision DOF)")


def _lost(report, out: Path) -> None:
    from liveshape.control.controller import Controller
    from liveshape.schema import Where
    from liveshape.session import build_sim_rig
    from liveshape.testdef.fault_spec import fault_from_mapping

    plant = _tip_plant(out)
    cases = (("control", [{"channel": 1, "role": "control", "name": "table"},
                          {"channel": 2, "role": "control", "name": "tip"}], plant),
             ("limit_monitor", [{"channel": 1, "role": "control", "name": "table"},
                                {"channel": 2, "role": "monitor", "name": "bracket",
                                 "limit": [{"f_hz": 20, "asd": LIMIT},
                                           {"f_hz": 1000, "asd": LIMIT}]}], "loudspeaker"))
    for name, inputs, pl in cases:
        fault = fault_from_mapping({"kind": "sensor_detached", "at_s": 30, "input": 2},
                                   Where("faults[0]"))
        spec = _spec(inputs, plant=pl, faults=(fault,))
        rig, cal, _ = build_sim_rig(spec, 5)
        ctl = Controller(spec, cal)
        resp = np.zeros((1024, 2))
        t, d = [], []
        while not ctl.finished:
            drive = ctl.exchange(resp)
            resp = rig.process_inputs(drive).T
            t.append(ctl.t_s)
            d.append(float(np.sqrt(np.mean(drive**2))))
        trip = ctl.trip
        if trip is None:
            report(f"inputs.{name}_lost_trip", "none", "")
            continue
        ta, da = np.array(t), np.array(d)
        before = np.sqrt(np.mean(da[(ta > 27) & (ta < 30)] ** 2))
        until = np.sqrt(np.mean(da[(ta > 30) & (ta < trip.t_s)] ** 2))
        report(f"inputs.{name}_lost_trip_after", trip.t_s - 30.0, f"s ({trip.rule})")
        report(f"inputs.{name}_lost_drive_change_until_trip", 20 * np.log10(until / before),
               "dB")


def run(report) -> None:
    with tempfile.TemporaryDirectory() as tmp:
        out = Path(tmp)
        _limit(report, out)
        _strategies(report, out)
        _lost(report, out)
