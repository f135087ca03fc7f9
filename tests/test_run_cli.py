"""``liveshape run`` end to end on the simulated rig: record, JSON, stop signals, faults, errors.

Stop signals are sent to a real subprocess once its event log shows the loop running; the run
uses ``--fast`` so nothing here waits for real time to pass.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

from liveshape.record.writer import load_run

REPO = Path(__file__).resolve().parents[1]
SPEC = REPO / "examples" / "handlebar-nav-unit.yaml"
JSON_KEYS = (
    "status", "abort_reason", "updates_to_tolerance", "final_rms_error_db", "final_max_dev_db",
    "final_lines_outside_alarm", "final_lines_outside_abort", "control_grms_g", "target_grms_g",
    "dof", "time_at_full_level_s", "run_dir",
)


def cli(*args: str) -> list[str]:
    return [sys.executable, "-m", "liveshape", *args]


def run_json(tmp_path: Path, *args: str) -> tuple[int, dict, str]:
    proc = subprocess.run(
        cli("run", str(SPEC), "--fast", "--json", "--out", str(tmp_path), *args),
        capture_output=True, text=True, cwd=REPO, timeout=600,
    )
    assert "Traceback" not in proc.stderr, proc.stderr
    return proc.returncode, json.loads(proc.stdout), proc.stderr


def max_step(x: np.ndarray) -> float:
    return float(np.max(np.abs(np.diff(x)))) if x.size > 1 else 0.0


@pytest.fixture(scope="module")
def completed(tmp_path_factory: pytest.TempPathFactory) -> tuple[int, dict, str]:
    return run_json(tmp_path_factory.mktemp("runs"), "--duration", "6", "--seed", "7")


def test_run_completes_with_record(completed: tuple[int, dict, str]) -> None:
    rc, data, stderr = completed
    assert rc == 0
    for key in JSON_KEYS:
        assert key in data
    assert data["status"] == "completed"
    # The safety cautions come before the drive (on stderr with --json).
    assert "hearing protection" in stderr
    # IEC 60068-2-64 / common practice: ±3 dB alarm band per line, rms within tolerance.
    assert data["final_lines_outside_alarm"] == 0
    assert abs(data["final_rms_error_db"]) < 1.0
    assert data["time_at_full_level_s"] >= 6.0
    run = load_run(data["run_dir"])
    assert run.complete and run.status == "completed"
    kinds = {e.kind for e in run.events}
    assert {"stage", "level", "update"} <= kinds
    drive, fs = sf.read(Path(data["run_dir"]) / "drive.wav")
    response, _ = sf.read(Path(data["run_dir"]) / "response.wav")
    assert fs == 48000 and drive.size == response.size > 0
    # The run ends with a controlled ramp-down then zeros.
    assert np.all(drive[-256:] == 0.0)


def test_report_from_the_record(completed: tuple[int, dict, str], tmp_path: Path) -> None:
    _, data, _ = completed
    proc = subprocess.run(cli("report", data["run_dir"], "--out", str(tmp_path), "--png"),
                          capture_output=True, text=True, cwd=REPO, timeout=300)
    assert proc.returncode == 0, proc.stderr
    assert (tmp_path / "report.pdf").read_bytes().startswith(b"%PDF-")  # ISO 32000-1 §7.5.2
    pngs = sorted(p.name for p in tmp_path.glob("*.png"))
    assert {"control.png", "drive.png", "frf.png", "convergence.png", "level.png"} <= set(pngs)
    assert "completed" in (tmp_path / "summary.txt").read_text()


def test_same_seed_same_drive(completed: tuple[int, dict, str], tmp_path: Path) -> None:
    _, first, _ = completed
    rc, second, _ = run_json(tmp_path, "--duration", "6", "--seed", "7")
    assert rc == 0
    a, _ = sf.read(Path(first["run_dir"]) / "drive.wav", dtype="float32")
    b, _ = sf.read(Path(second["run_dir"]) / "drive.wav", dtype="float32")
    assert a.shape == b.shape and np.array_equal(a, b)


def test_fault_aborts_with_distinct_status(tmp_path: Path) -> None:
    from liveshape.control.safety import EXIT_STATUS

    rc, data, _ = run_json(tmp_path, "--fault", "sensor_gain@25=4", "--seed", "3")
    assert data["status"] == "aborted"
    rule = data["abort_rule"]
    assert rule in EXIT_STATUS and rc == EXIT_STATUS[rule] and rc not in (0, 1, 2, 130)
    run = load_run(data["run_dir"])
    assert any(e.kind == "trip" for e in run.events)


def wait_for_event(run_root: Path, kind: str, proc: subprocess.Popen, timeout_s: float) -> None:
    """Poll the run's event log until an event of ``kind`` shows (the loop is running)."""
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        for log in run_root.glob("*/events.jsonl"):
            for line in log.read_text().splitlines():
                try:
                    if json.loads(line)["kind"] == kind:
                        return
                except (ValueError, KeyError):
                    continue
        if proc.poll() is not None:
            raise AssertionError(f"run ended before a {kind!r} event: {proc.stderr.read()}")
        time.sleep(0.05)
    raise AssertionError(f"no {kind!r} event within {timeout_s} s")


@pytest.mark.parametrize("signum", [signal.SIGINT, signal.SIGTERM])
def test_stop_signal_ramps_down(tmp_path: Path, signum: int) -> None:
    proc = subprocess.Popen(
        cli("run", str(SPEC), "--fast", "--json", "--out", str(tmp_path), "--duration", "120"),
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, cwd=REPO,
    )
    try:
        wait_for_event(tmp_path, "update", proc, timeout_s=300)
        os.kill(proc.pid, signum)
        out, err = proc.communicate(timeout=120)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert "Traceback" not in err, err
    assert proc.returncode == 130
    data = json.loads(out)
    assert data["status"] == "stopped"
    drive, fs = sf.read(Path(data["run_dir"]) / "drive.wav")
    assert np.all(drive[-64:] == 0.0)
    # The stop is a raised-cosine fade over abort_ramp_s (0.25 s = M samples), not a cut: d
    # samples before the first zero the gain is g(d) = (1 - cos(pi d / M)) / 2 (the fade's
    # definition), so |drive| <= g(d) * P with P the drive's own peak level. The drive is clipped
    # at 4 sigma, so the peak over the second before the stop (which reaches the clip level)
    # bounds it; 1.5 allows for a level step or an update in between. A cut would put a sample
    # of order P right next to the first zero, where g is ~1e-7.
    nz = np.flatnonzero(drive)
    m = int(0.25 * fs)
    end = nz[-1] + 1
    d = np.arange(m, 0, -1)
    fade = np.abs(drive[end - m : end])
    peak = float(np.max(np.abs(drive[end - m - int(fs) : end - m])))
    envelope = (1.0 - np.cos(np.pi * d / m)) / 2.0 * 1.5 * peak
    assert np.all(fade <= envelope + 1e-9)


def test_bad_plant_file_is_one_line(tmp_path: Path) -> None:
    plant = tmp_path / "plant.yaml"
    plant.write_text("shaker:\n  re_ohm: -3\n")
    proc = subprocess.run(
        cli("run", str(SPEC), "--fast", "--rig", f"sim:{plant}", "--out", str(tmp_path)),
        capture_output=True, text=True, cwd=REPO, timeout=120,
    )
    assert proc.returncode == 2
    lines = [ln for ln in proc.stderr.splitlines() if ln.startswith("liveshape:")]
    assert len(lines) == 1 and "plant.yaml" in lines[0]
    assert "Traceback" not in proc.stderr
    assert not list(tmp_path.glob("2*")), "no run folder for a run that never started"


def test_bad_fault_option(tmp_path: Path) -> None:
    proc = subprocess.run(
        cli("run", str(SPEC), "--fast", "--fault", "meltdown@3", "--out", str(tmp_path)),
        capture_output=True, text=True, cwd=REPO, timeout=120,
    )
    assert proc.returncode == 2 and "meltdown" in proc.stderr and "Traceback" not in proc.stderr


def _too_high(tmp_path: Path) -> Path:
    # The example profile 25 dB up (about 20 grms) needs more stroke, amplifier voltage and
    # drive than the loudspeaker preset has (its feasibility budgets, rigs/feasibility.py).
    text = SPEC.read_text().replace("asd: 0.0005", "asd: 0.158").replace("asd: 0.002",
                                                                         "asd: 0.632")
    spec = tmp_path / "too-high.yaml"
    spec.write_text(text)
    return spec


def test_infeasible_profile_is_refused_before_any_drive(tmp_path: Path) -> None:
    spec = _too_high(tmp_path)
    proc = subprocess.run(cli("run", str(spec), "--fast", "--json", "--out", str(tmp_path)),
                          capture_output=True, text=True, cwd=REPO, timeout=600)
    assert "Traceback" not in proc.stderr
    assert proc.returncode == 3, proc.stderr
    assert proc.stdout == ""
    assert "cannot be held at full level" in proc.stderr and "binding limit" in proc.stderr
    assert "--accept-infeasible" in proc.stderr and "to make it feasible" in proc.stderr
    # nothing was driven: no run folder was made
    assert not [p for p in tmp_path.iterdir() if p.is_dir()]


def test_infeasible_profile_runs_when_accepted_and_the_record_says_so(tmp_path: Path) -> None:
    # The first rule to trip is the input overload: at the first step (-12 dB) the control is
    # ~5 grms, which at the preset's 100 mV/g and 1 V/FS is 0.5 FS rms, so Gaussian peaks
    # (P(|x| > 2 sigma) = 4.6 %) pass 0.98 FS.
    spec = _too_high(tmp_path)
    proc = subprocess.run(cli("run", str(spec), "--fast", "--json", "--out", str(tmp_path),
                              "--accept-infeasible"),
                          capture_output=True, text=True, cwd=REPO, timeout=600)
    assert "Traceback" not in proc.stderr
    notice = proc.stderr.index("hearing protection")
    warning = proc.stderr.index("cannot be held at full level")
    assert notice < warning
    data = json.loads(proc.stdout)
    assert data["status"] == "aborted"
    assert data["abort_rule"] == "input_overload"
    run_dir = Path(data["run_dir"])
    meta = json.loads((run_dir / "run.json").read_text())
    acc = meta["accepted_infeasible"]
    assert acc["binding_limit"] != "none" and acc["reachable_level_db"] < 0
    events = [json.loads(line) for line in (run_dir / "events.jsonl").read_text().splitlines()]
    first = events[0]
    assert first["kind"] == "infeasible_accepted" and first["t_s"] == 0.0


def test_units_option_shows_si_and_keeps_the_record_in_g(tmp_path: Path) -> None:
    # g0 = 9.80665 m/s² (3rd CGPM, 1901). The screen shows m/s²; summary.json stays in g.
    proc = subprocess.run(
        cli("run", str(SPEC), "--fast", "--duration", "6", "--seed", "3", "--units", "m/s2",
            "--out", str(tmp_path)),
        capture_output=True, text=True, cwd=REPO, timeout=600,
        env={**os.environ, "COLUMNS": "140", "LINES": "45"},
    )
    assert proc.returncode == 0, proc.stderr
    (run_dir,) = [p for p in tmp_path.iterdir() if p.is_dir()]
    summary = json.loads((run_dir / "summary.json").read_text())
    c, t = summary["control_grms_g"], summary["target_grms_g"]
    assert 0.5 < t < 2.0  # the example's target is about 1.1 g rms: the record is in g
    assert f"{c * 9.80665:.3f} / {t * 9.80665:.3f} m/s²" in proc.stdout


def test_a_level_that_cannot_be_reached_ends_with_its_own_status(tmp_path: Path) -> None:
    # ±0.3 dB alarm limits are narrower than the χ² band of any estimate (Bendat & Piersol,
    # Random Data, 4th ed., §8.5.4), so the first step can never be left.
    text = SPEC.read_text(encoding="utf-8")
    text = text.replace("  alarm_db: 3.0\n", "  alarm_db: 0.3\n").replace(
        "alarm_db: 4.5, abort_db: 7.5", "alarm_db: 0.3, abort_db: 7.5").replace(
        "  rate_db_s: 6.0\n", "  rate_db_s: 6.0\n  max_step_s: 20\n")
    spec = tmp_path / "tight.yaml"
    spec.write_text(text, encoding="utf-8")
    proc = subprocess.run(cli("run", str(spec), "--fast", "--json", "--out", str(tmp_path)),
                          capture_output=True, text=True, cwd=REPO, timeout=600)
    assert proc.returncode == 20, proc.stderr
    summary = json.loads(proc.stdout)
    assert summary["status"] == "aborted" and summary["trip"]["rule"] == "level_unreachable"
    assert "lines outside the alarm limits" in summary["abort_reason"]
    run = load_run(summary["run_dir"])
    levels = [e for e in run.events if e.kind == "level"]
    assert len(levels) == 1  # never left the first step
    assert summary["trip"]["t_s"] - levels[0].t_s == pytest.approx(20.0, abs=0.1)
    drive, fs = sf.read(run.drive_wav)
    tail = drive[int((summary["trip"]["t_s"] + 0.3) * fs):]
    assert tail.size and np.max(np.abs(tail)) < 1e-4  # ramped down
    bad = text.replace("max_step_s: 20", "max_step_s: 5")
    spec.write_text(bad, encoding="utf-8")
    proc = subprocess.run(cli("run", str(spec), "--fast", "--out", str(tmp_path / "b")),
                          capture_output=True, text=True, cwd=REPO, timeout=600)
    assert proc.returncode == 2 and "schedule.max_step_s = 5 s" in proc.stderr
    assert len(proc.stderr.strip().splitlines()) == 1 and not (tmp_path / "b").exists()


@pytest.mark.parametrize("kind", ["sensor_detached", "amp_trip", "dropout"])
@pytest.mark.parametrize("at_s", [1.6, 2.0, 2.6])
def test_a_fault_inside_the_connection_window_stops_at_the_connection_level(
        tmp_path: Path, kind: str, at_s: float) -> None:
    # The cases an outside audit found passing the connection check (window 0.6-2.73 s): the
    # drive then rose up to +6.2 dB above the connection level before loop_open tripped. Now
    # the run stops with connect_check and the drive never exceeds the connection noise.
    code, summary, stderr = run_json(tmp_path, "--fault", f"{kind}@{at_s}")
    assert code == 18, stderr
    assert summary["trip"]["rule"] == "connect_check"
    run = load_run(summary["run_dir"])
    drive, fs = sf.read(run.drive_wav)
    level = 0.01  # safety.connect_level_fs of the example (the default)
    piece = int(0.02 * fs)
    frames = drive[: drive.size // piece * piece].reshape(-1, piece)
    assert np.max(np.sqrt(np.mean(frames**2, axis=1))) < 1.5 * level
    assert not any(e.kind == "stage" and e.message.startswith("identify") for e in run.events)
