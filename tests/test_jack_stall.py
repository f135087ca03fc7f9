"""A stalled or dead audio server through the real stack: the run ends on its own, closes its
record and exits with the ``audio_stall`` status within a bounded time; signals are honoured.

A private JACK server (dummy driver), ``liveshape virtual-rig`` as its own process and
``liveshape run --rig audio:...`` as another, as a user would run them. The stall is made from
outside: SIGSTOP of the virtual rig (the JACK graph waits on a client that never answers) or
SIGKILL of jackd (the server is gone). Outside references: the POSIX signals themselves; the
bound is the program's own promise (stall timeout 2 s plus the deadlines on the PortAudio calls,
README "exit status 19"), checked from outside with a wall clock.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
import uuid
from pathlib import Path

import pytest

from tests.jackserver import (
    missing_reason,
    reclaim_server_slot,
    skip_or_fail,
    start_jack_server,
    stop_pid,
)

REPO = Path(__file__).resolve().parents[1]
#: What the README promises: a stall ends the run within this many seconds of the last input.
STALL_EXIT_BOUND_S = 10.0

pytestmark = pytest.mark.jack


def cli(*args: str) -> list[str]:
    return [sys.executable, "-m", "liveshape", *args]


@pytest.fixture()
def stack(tmp_path: Path):
    reason = missing_reason()
    if reason is not None:
        skip_or_fail(reason)
    server = start_jack_server()
    env = dict(os.environ, JACK_DEFAULT_SERVER=server.name)
    name = f"vr-{uuid.uuid4().hex[:6]}"
    vr = subprocess.Popen(cli("virtual-rig", "--plant", "ideal", "--name", name, "--seed", "1"),
                          stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True,
                          env=env, cwd=REPO)
    procs = [vr]
    try:
        line = vr.stderr.readline()
        assert "running" in line, line
        yield server, vr, name, env, procs
    finally:
        for p in procs:
            if p.poll() is None:
                try:
                    os.kill(p.pid, signal.SIGCONT)
                except ProcessLookupError:
                    pass
                p.kill()
                p.wait(timeout=10)
        stop_pid(server.proc)
        if server.proc.returncode == -signal.SIGKILL:  # killed here or by stop_pid's fallback:
            reclaim_server_slot(server.name)  # its registry slot stays taken until reclaimed


def _start_run(tmp_path: Path, name: str, env: dict) -> tuple[subprocess.Popen, Path]:
    # The ideal plant reads 1 FS per FS: uncalibrated, a 0.1 "g" rms target is 0.1 FS.
    spec = tmp_path / "flat.yaml"
    spec.write_text(
        "name: stall\n"
        "profile: {units: g2/Hz, breakpoints: [{f_hz: 20, asd: 1.0e-5},\n"
        "                                      {f_hz: 1000, asd: 1.0e-5}]}\n"
        "schedule: {steps_db: [-3, 0], hold_s: 1.0, full_level_s: 60.0}\n"
        "control: {fs_hz: 48000, frame_length: 4096}\n"
        "seed: 2\n", encoding="utf-8")
    out = tmp_path / "runs"
    proc = subprocess.Popen(cli("run", str(spec), "--rig", f"audio:{name}", "--uncalibrated",
                                "--unattended",
                                "--out", str(out), "--json"),
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env,
                            cwd=REPO)
    return proc, out


def _wait_for_stage(out: Path, stage: str, proc: subprocess.Popen, timeout_s: float = 60.0):
    end = time.monotonic() + timeout_s
    while time.monotonic() < end:
        assert proc.poll() is None, proc.stderr.read() if proc.stderr else ""
        for events in out.glob("*/events.jsonl"):
            if f'"{stage}' in events.read_text(encoding="utf-8"):
                return events.parent
        time.sleep(0.1)
    raise AssertionError(f"the run did not reach {stage} in {timeout_s} s")


@pytest.mark.parametrize("how", ["sigstop_virtual_rig", "sigkill_jackd"])
def test_a_stalled_audio_server_ends_the_run_with_its_status(stack, tmp_path: Path, how):
    server, vr, name, env, procs = stack
    proc, out = _start_run(tmp_path, name, env)
    procs.append(proc)
    run_dir = _wait_for_stage(out, "equalize", proc)
    victim = vr.pid if how == "sigstop_virtual_rig" else server.proc.pid
    os.kill(victim, signal.SIGSTOP if how == "sigstop_virtual_rig" else signal.SIGKILL)
    t0 = time.monotonic()
    try:
        stdout, stderr = proc.communicate(timeout=STALL_EXIT_BOUND_S + 20)
    except subprocess.TimeoutExpired:
        proc.kill()
        raise AssertionError("the run hung after the audio server stalled") from None
    took = time.monotonic() - t0
    print(f"{how}: stall to exit {took:.2f} s")
    assert proc.returncode == 19, stderr
    assert took < STALL_EXIT_BOUND_S
    assert "Traceback" not in stderr
    summary = json.loads((run_dir / "summary.json").read_text(encoding="utf-8"))
    assert summary["status"] == "aborted" and summary["trip"]["rule"] == "audio_stall"
    kinds = [json.loads(line)["kind"] for line in
             (run_dir / "events.jsonl").read_text(encoding="utf-8").splitlines()]
    assert "stall" in kinds and "trip" in kinds
    assert json.loads(stdout)["exit_status"] == 19


def test_sigterm_is_honoured_while_the_server_is_stopped(stack, tmp_path: Path):
    server, vr, name, env, procs = stack
    proc, out = _start_run(tmp_path, name, env)
    procs.append(proc)
    run_dir = _wait_for_stage(out, "equalize", proc)
    os.kill(vr.pid, signal.SIGSTOP)
    time.sleep(0.5)  # the stream has stopped delivering; the stall timeout has not fired yet
    t0 = time.monotonic()
    proc.send_signal(signal.SIGTERM)
    try:
        proc.communicate(timeout=STALL_EXIT_BOUND_S + 20)
    except subprocess.TimeoutExpired:
        proc.kill()
        raise AssertionError("SIGTERM was not honoured while the server was stopped") from None
    took = time.monotonic() - t0
    print(f"SIGTERM during a stall: exit after {took:.2f} s")
    assert took < STALL_EXIT_BOUND_S
    assert proc.returncode in (19, 130, 143)
    assert (run_dir / "summary.json").exists()  # the record was closed
