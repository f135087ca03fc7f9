"""The README's hardware path, command by command, through a real JACK server.

``liveshape virtual-rig`` (the simulated plant as a JACK client), ``liveshape devices``,
``liveshape calibrate`` (output, input through the loopback, delay) and ``liveshape run --rig
audio:...`` with the calibration file, each as its own process, as a user would type them.
The plant's card has distinct known scales (2 V/FS out, 4 V/FS in) so that a swapped or missing
factor shows. Realtime-paced by design (the dummy driver runs in real time).

Outside references: the plant's own known values; the sine-amplitude/rms relation
V_rms = V_peak / sqrt(2) (physics of a sine); the JACK loop-delay rule measured in
liveshape.rigs.jackrig.jack_loop_delay_samples (one period plus one fixed-size block).
"""

from __future__ import annotations

import json
import math
import os
import signal
import subprocess
import sys
import uuid
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

from liveshape.testdef import config

REPO = Path(__file__).resolve().parents[1]
OUT_V_PER_FS = 2.0
IN_V_PER_FS = 4.0
CARD_DELAY = 1536
SENS_MV_PER_G = 100.0

pytestmark = pytest.mark.jack


def cli(*args: str) -> list[str]:
    return [sys.executable, "-m", "liveshape", *args]


@pytest.fixture(scope="module")
def plant_file(tmp_path_factory: pytest.TempPathFactory) -> Path:
    from liveshape.rigs.plant import load_plant, plant_to_mapping

    data = plant_to_mapping(load_plant("loudspeaker"))
    data["name"] = "scaled-loudspeaker"
    data["card"]["out_v_per_fs"] = OUT_V_PER_FS
    data["card"]["in_v_per_fs"] = IN_V_PER_FS
    assert data["card"]["delay_samples"] == CARD_DELAY
    assert data["accelerometer"]["sens_mv_per_g"] == SENS_MV_PER_G
    path = tmp_path_factory.mktemp("plant") / "scaled.yaml"
    config.write_yaml_file(path, data)
    return path


@pytest.fixture(scope="module")
def virtual_rig(jack_server, plant_file: Path) -> Iterator[tuple[str, dict]]:
    """``liveshape virtual-rig`` in its own process, ended with SIGTERM."""
    name = f"vr-{uuid.uuid4().hex[:6]}"
    env = dict(os.environ, JACK_DEFAULT_SERVER=jack_server.name)
    proc = subprocess.Popen(cli("virtual-rig", "--plant", str(plant_file), "--name", name,
                                "--seed", "3"),
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True,
                            env=env, cwd=REPO)
    try:
        line = proc.stderr.readline()  # the ready line
        assert "running" in line, line
        yield name, env
    finally:
        proc.send_signal(signal.SIGTERM)
        try:
            proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()
    assert proc.returncode == 0


def call(env: dict, *args: str, timeout: float = 300) -> subprocess.CompletedProcess[str]:
    proc = subprocess.run(cli(*args), capture_output=True, text=True, env=env, cwd=REPO,
                          timeout=timeout)
    assert "Traceback" not in proc.stderr, proc.stderr
    return proc


@pytest.fixture(scope="module")
def calibration_file(virtual_rig, tmp_path_factory) -> tuple[Path, dict]:
    """Build the calibration file step by step, as calibration/README.md tells a user to."""
    name, env = virtual_rig
    path = tmp_path_factory.mktemp("cal") / "chain.yaml"
    level = 0.5
    # The user reads an AC voltmeter on the output: a sine of `level` FS at OUT_V_PER_FS volts
    # (peak) per FS reads level * OUT_V_PER_FS / sqrt(2) V rms.
    reading = level * OUT_V_PER_FS / math.sqrt(2.0)
    steps = {}
    # The virtual rig's loopback cable runs from output 2 to input 2 (channels count from 1);
    # scripted, so --unattended (stdin is not a terminal here).
    for args in (
        ("output", "--reading", f"{reading:.6f}", "--level", str(level)),
        ("input", "--loopback", "2:2"),
        ("delay", "--loopback", "2:2"),
    ):
        proc = call(env, "calibrate", *args, "--device", name, "-o", str(path), "--json",
                    "--unattended")
        assert proc.returncode == 0, proc.stderr
        steps[args[0]] = json.loads(proc.stdout)
    return path, steps


def test_devices_lists_the_virtual_rig(virtual_rig) -> None:
    name, env = virtual_rig
    proc = call(env, "devices", "--json")
    assert proc.returncode == 0, proc.stderr
    devices = {d["name"]: d for d in json.loads(proc.stdout)["devices"]}
    assert name in devices
    dev = devices[name]
    assert dev["full_duplex"] and dev["max_input_channels"] >= 2
    assert dev["max_output_channels"] >= 2 and dev["default_fs_hz"] == 48000


def test_calibration_matches_the_rigs_known_values(calibration_file, jack_server) -> None:
    from liveshape.rigs.calibration import load_calibration
    from liveshape.rigs.jackrig import jack_loop_delay_samples

    path, steps = calibration_file
    cal_data = config.read_yaml_file(path)
    # Output: the voltmeter arithmetic returns the card's known scale (sine V_rms = V_pk/sqrt 2).
    assert cal_data["output"]["v_per_fs"] == pytest.approx(OUT_V_PER_FS, rel=1e-5)
    # Input through the loopback cable: the card's input scale. The 400 Hz test tone sits far
    # above the 7 Hz / 5 Hz AC-coupling corners (first-order loss < 0.03 %), and the sine fit's
    # scatter at -100 dBFS noise is ~1e-5: 0.1 % is a generous bound.
    assert cal_data["input"]["v_per_fs"] == pytest.approx(IN_V_PER_FS, rel=1e-3)
    # Loop delay: JACK period + one stream block + the card's own delay, exact in samples.
    want = jack_loop_delay_samples(jack_server.period_frames, 1024, plant_delay=CARD_DELAY)
    assert cal_data["loop_delay"]["samples"] == want
    assert steps["delay"]["spread_samples"] == 0
    # Without the accelerometer step the file is incomplete and a run refuses it.
    with pytest.raises(Exception, match="accelerometer"):
        load_calibration(path)


def test_run_through_the_stream_with_the_calibration(virtual_rig, calibration_file,
                                                     tmp_path: Path) -> None:
    name, env = virtual_rig
    path, _ = calibration_file
    # The sensor's datasheet value, as a user enters it when no reference exciter is at hand.
    data = config.read_yaml_file(path)
    data["accelerometer"] = {"mv_per_g": SENS_MV_PER_G}
    config.write_yaml_file(path, data)
    spec = tmp_path / "short.yaml"
    spec.write_text(
        "name: jack-short\n"
        "profile: {units: g2/Hz, breakpoints: [{f_hz: 20, asd: 0.001}, {f_hz: 1000, asd: 0.001}]}\n"
        "schedule: {steps_db: [-3, 0], hold_s: 1.0, full_level_s: 3.0}\n"
        "control: {fs_hz: 48000, frame_length: 4096}\n"
        "seed: 2\n"
    )
    # --unattended: scripted, the gain "already set" (the virtual rig has none); no bring-up
    proc = call(env, "run", str(spec), "--rig", f"audio:{name}", "--calibration", str(path),
                "--out", str(tmp_path / "runs"), "--json", "--unattended", timeout=600)
    assert proc.returncode == 0, proc.stderr
    summary = json.loads(proc.stdout)
    assert summary["status"] == "completed"
    assert summary["calibration"]["calibrated"] is True
    kinds = [json.loads(x)["kind"] for x in
             (Path(summary["run_dir"]) / "events.jsonl").read_text().splitlines()]
    assert "bring_up_confirmed" not in kinds and "identify" in kinds
    run_json = json.loads((Path(summary["run_dir"]) / "run.json").read_text())
    assert run_json["extra"]["bring_up"] is False
    assert summary["rig"]["stream"]["dry_blocks"] == 0
    # The acceleration the plant really produced: response FS x the chain's true g per FS
    # (IN_V_PER_FS volts per FS over 0.1 V/g). Its rms over the last full-level second is the
    # target's (flat 0.001 g^2/Hz over 20-1000 Hz: sqrt(0.98) = 0.990 g, exact integral) within
    # the rms alarm band of 1 dB (common practice tolerance, IEC 60068-2-64 +-10 % in rms).
    response, fs = sf.read(Path(summary["run_dir"]) / "response.wav")
    drive, _ = sf.read(Path(summary["run_dir"]) / "drive.wav")
    g = response * IN_V_PER_FS / (SENS_MV_PER_G * 1e-3)
    nz = np.flatnonzero(drive)
    end = nz[-1] - int(1.2 * fs)  # before the final ramp-down
    seg = g[end - int(1.0 * fs) : end]
    grms = float(np.sqrt(np.mean(seg**2)))
    assert 20 * math.log10(grms / math.sqrt(0.98)) == pytest.approx(0.0, abs=1.0)


def test_survey_through_the_stream_finds_the_plants_resonance(virtual_rig, calibration_file,
                                                              tmp_path: Path) -> None:
    from liveshape.dsp.resonance import find_resonances
    from liveshape.rigs.plant import load_plant
    from liveshape.rigs.sim import SimRig

    name, env = virtual_rig
    data = config.read_yaml_file(calibration_file[0])
    data["accelerometer"] = {"mv_per_g": SENS_MV_PER_G}  # the datasheet value
    path = tmp_path / "chain.yaml"
    config.write_yaml_file(path, data)
    spec = tmp_path / "survey.yaml"
    spec.write_text(
        "name: jack-survey\n"
        "profile: {units: g2/Hz,\n"
        "  breakpoints: [{f_hz: 100, asd: 0.001}, {f_hz: 1000, asd: 0.001}]}\n"
        "control: {fs_hz: 48000, frame_length: 4096}\n"
    )
    proc = call(env, "survey", str(spec), "--rig", f"audio:{name}", "--calibration", str(path),
                "--duration", "8", "--out", str(tmp_path / "runs"), "--json", timeout=120)
    assert proc.returncode == 0, proc.stderr
    out = json.loads(proc.stdout)
    assert out["status"] == "completed"
    # truth: the simulated chain's analytic FRF on a fine grid (the plant the rig serves)
    rig = SimRig(load_plant("loudspeaker"), 48000.0)
    f = np.arange(100.0, 1000.0, 0.01)
    truth = {r.kind: r for r in find_resonances(f, rig.frf(f), np.ones(f.size), 1e9)}
    got = {r["kind"]: r for r in out["resonances"]}
    df = 48000.0 / 32768
    for kind in ("peak", "dip"):
        assert abs(got[kind]["f_hz"] - truth[kind].f_hz) <= df + 3 * got[kind]["f_sigma_hz"]


def test_run_without_a_terminal_stops_before_any_drive(virtual_rig, calibration_file, jack_server,
                                                       tmp_path: Path) -> None:
    name, env = virtual_rig
    data = config.read_yaml_file(calibration_file[0])
    data["accelerometer"] = {"mv_per_g": SENS_MV_PER_G}  # the datasheet value
    path = tmp_path / "chain.yaml"
    config.write_yaml_file(path, data)
    # An independent tap, in its own process, on the plant's response: with no drive it carries
    # only the simulated sensor and card noise (about 1e-5 FS rms). The connection level alone
    # (0.01 FS through this chain's 2 V/FS out, 4 V/FS in and the loudspeaker's few g per volt
    # at 100 mV/g) would give some 0.01-0.1 FS rms.
    tap_file = tmp_path / "tap.npy"
    tap = subprocess.Popen([sys.executable, str(REPO / "tests" / "tapprocess.py"),
                            jack_server.name, f"{name}:response_out", str(tap_file)],
                           env=env, cwd=REPO, stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                           text=True)
    try:
        assert tap.stdout.readline().strip() == "ready"
        assert tap.stdout.readline().strip() == "connected"
        tap.stdin.write("mark\n")
        tap.stdin.flush()
        start = int(tap.stdout.readline())
        proc = subprocess.run(cli("run", "examples/handlebar-nav-unit.yaml", "--rig",
                                  f"audio:{name}", "--calibration", str(path), "--out",
                                  str(tmp_path / "runs")),
                              stdin=subprocess.DEVNULL, capture_output=True, text=True,
                              env=env, cwd=REPO, timeout=120)
        import time

        time.sleep(1.0)  # what would have played right after the refusal
        tap.stdin.close()
        tap.wait(timeout=30)
    finally:
        if tap.poll() is None:
            tap.kill()
            tap.wait()
    assert proc.returncode == 2, proc.stderr
    assert proc.stderr.count("\n") == 1 and "stdin is not a terminal" in proc.stderr
    assert "nothing was driven" in proc.stderr and "--unattended" in proc.stderr
    assert not (tmp_path / "runs").exists() or not any((tmp_path / "runs").iterdir())
    y = np.load(tap_file)[start:, 0].astype(float)
    assert y.size > 48000
    block = 4800
    rms = np.sqrt(np.mean(y[: y.size - y.size % block].reshape(-1, block) ** 2, axis=1))
    assert rms.max() < 1e-3, rms.max()


def test_channel_map_through_the_stream(virtual_rig, calibration_file, tmp_path: Path) -> None:
    from liveshape.control.safety import EXIT_STATUS

    name, env = virtual_rig
    data = config.read_yaml_file(calibration_file[0])
    data["accelerometer"] = {"mv_per_g": SENS_MV_PER_G}
    path = tmp_path / "chain.yaml"
    config.write_yaml_file(path, data)
    proc = call(env, "devices")
    head = proc.stdout.splitlines()[0]
    assert "inputs" in head and "outputs" in head
    row = next(line for line in proc.stdout.splitlines() if name in line)
    assert row.split()[-4:-2] == ["2", "2"]  # the virtual rig: drive + loopback cable each way
    # a map the device cannot satisfy: one line naming the key, nothing written
    out = tmp_path / "runs"
    proc = call(env, "run", "examples/handlebar-nav-unit.yaml", "--rig", f"audio:{name}",
                "--calibration", str(path), "--control-input", "3", "--unattended",
                "--out", str(out))
    assert proc.returncode == 2 and proc.stderr.count("\n") == 1
    assert f"rig.control_input = 3: audio device {name!r} has 2 input channel(s)" in proc.stderr
    assert not out.exists() or not any(out.iterdir())
    # the drive on output 2 reaches the loopback cable, not the shaker: the control input 1
    # does not answer and the connection check stops the run at the connection level
    spec = tmp_path / "short.yaml"
    spec.write_text(
        "name: jack-map\n"
        "profile: {units: g2/Hz, breakpoints: [{f_hz: 20, asd: 0.001}, {f_hz: 1000, asd: 0.001}]}\n"
        "control: {fs_hz: 48000, frame_length: 4096}\n"
        "rig: {drive_output: 2}\n")
    proc = call(env, "run", str(spec), "--rig", f"audio:{name}", "--calibration", str(path),
                "--unattended", "--json", "--out", str(out), timeout=120)
    summary = json.loads(proc.stdout)
    assert summary["abort_rule"] == "connect_check", proc.stderr
    assert proc.returncode == EXIT_STATUS["connect_check"]
    assert summary["rig"]["drive_output"] == 2 and summary["rig"]["control_input"] == 1
