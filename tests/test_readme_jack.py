"""The README's JACK virtual-rig example, line by line as printed, through a private server.

Each line of the README's code block runs through ``bash -c`` exactly as printed, with two
substitutions only: the server name ``lab`` becomes a unique name (several test sessions share
this machine), and a trailing ``&`` becomes a background process this test owns (so it can end
it by its id). ``liveshape`` resolves to the installed command of the interpreter running the
tests. The run's stdin and stdout are a terminal (a pseudo-terminal): the bring-up waits for
Enter, which is typed once the meter says the response is usable.

Outside references: an independent JACK client (the tap) records the program's drive output as
the audio server carries it; the rms of a block is its definition; the connection level is the
test file's ``safety.connect_level_fs`` default (0.01 FS rms).
"""

from __future__ import annotations

import fcntl
import json
import os
import pty
import re
import shutil
import signal
import struct
import subprocess
import sys
import termios
import threading
import uuid
from pathlib import Path

import numpy as np
import pytest

pytestmark = pytest.mark.jack

REPO = Path(__file__).resolve().parents[1]
CONNECT_LEVEL_FS = 0.01


def readme_jack_lines() -> list[str]:
    readme = (REPO / "README.md").read_text(encoding="utf-8")
    m = re.search(r"\n  ```sh\n((?:  .*\n)+?)  ```\n", readme)
    assert m, "the README's JACK example block is missing"
    lines = [line.strip() for line in m.group(1).splitlines() if line.strip()]
    assert lines[0].startswith("jackd ") and "virtual-rig" in lines[2] and " run " in lines[3]
    return lines


def _own(line: str, server: str) -> str:
    return line.replace("-n lab ", f"-n {server} ").replace("JACK_DEFAULT_SERVER=lab ",
                                                             f"JACK_DEFAULT_SERVER={server} ")


def _end(proc: subprocess.Popen) -> bool:
    """End a process group this test started (SIGTERM, then SIGKILL), by its id; True when it
    had to be killed."""
    if proc.poll() is None:
        os.killpg(proc.pid, signal.SIGTERM)
        try:
            proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait(timeout=10)
            return True
    return False


def test_readme_jack_example_completes_with_the_bring_up(tmp_path: Path) -> None:
    from jackserver import missing_reason, skip_or_fail

    reason = missing_reason()
    if reason is not None:
        skip_or_fail(reason)
    lines = readme_jack_lines()
    server = f"lab-{uuid.uuid4().hex[:8]}"
    shutil.copytree(REPO / "examples", tmp_path / "examples")
    env = dict(os.environ, PYTHONPATH=str(REPO),
               PATH=f"{Path(sys.executable).parent}{os.pathsep}{os.environ.get('PATH', '')}")
    env.pop("JACK_DEFAULT_SERVER", None)
    owned: list[subprocess.Popen] = []
    tap_file = tmp_path / "tap.npy"
    try:
        # 1. the server (backgrounded in the README)
        assert lines[0].endswith("&")
        owned.append(subprocess.Popen(["bash", "-c", _own(lines[0][:-1].strip(), server)],
                                      cwd=tmp_path, env=env, start_new_session=True,
                                      stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL))
        # 2. wait until it takes clients
        wait = subprocess.run(["bash", "-c", _own(lines[1], server)], cwd=tmp_path, env=env,
                              capture_output=True, text=True, timeout=30)
        assert wait.returncode == 0, wait.stderr
        # 3. the virtual rig, which writes the chain's calibration file
        assert lines[2].endswith("&")
        vr = subprocess.Popen(["bash", "-c", _own(lines[2][:-1].strip(), server)],
                              cwd=tmp_path, env=env, start_new_session=True,
                              stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
        owned.append(vr)
        ready = vr.stderr.readline()
        assert "running" in ready and "--calibration lab-chain.yaml" in ready, ready
        cal = (tmp_path / "lab-chain.yaml").read_text()
        assert "liveshape_calibration: 1" in cal
        # an independent tap on the program's output port, in its own process
        tap = subprocess.Popen([sys.executable, str(REPO / "tests" / "tapprocess.py"), server,
                                "PortAudio:out_0", str(tap_file)], cwd=tmp_path, env=env,
                               stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True,
                               start_new_session=True)
        owned.append(tap)
        assert tap.stdout.readline().strip() == "ready"
        # 4. the run, on a terminal; Enter once the meter says usable
        rc, screen, enter_frame = _run_on_a_terminal(_own(lines[3], server), tmp_path, env, tap)
        tap.stdin.close()
        tap.wait(timeout=30)
    finally:
        killed = [_end(proc) for proc in reversed(owned)]
        if killed and killed[-1]:  # the server (owned[0]) was killed: free its registry slot
            from jackserver import reclaim_server_slot

            reclaim_server_slot(server)
    assert rc == 0, screen[-3000:]
    assert "Raise the amplifier gain slowly" in screen and "usable: press Enter" in screen
    runs = list((tmp_path / "runs").iterdir())
    assert len(runs) == 1
    summary = json.loads((runs[0] / "summary.json").read_text())
    assert summary["status"] == "completed" and summary["verdict"] == "pass"
    assert summary["calibration"]["calibrated"] is True
    events = [json.loads(x) for x in (runs[0] / "events.jsonl").read_text().splitlines()]
    kinds = [e["kind"] for e in events]
    assert kinds.count("bring_up_confirmed") == 1
    assert kinds.index("bring_up_confirmed") < kinds.index("identify")
    # The independent tap: nothing above the connection level before Enter was typed. Block
    # rms over 0.1 s (4800 samples of band-limited noise scatter by a few %), so 1.2 x the level
    # is far outside the scatter and far below the test level.
    drive = np.load(tap_file)[:, 0].astype(float)
    assert enter_frame is not None and drive.size > enter_frame
    block = 4800
    before = drive[: enter_frame - enter_frame % block].reshape(-1, block)
    rms_before = np.sqrt(np.mean(before**2, axis=1))
    assert rms_before.size > 10 and rms_before.max() < 1.2 * CONNECT_LEVEL_FS
    assert rms_before.max() > 0.8 * CONNECT_LEVEL_FS  # the held drive was there
    after = drive[enter_frame:]
    n = after.size - after.size % block
    # the test level came after the Enter
    assert np.sqrt(np.mean(after[:n].reshape(-1, block) ** 2, axis=1)).max() > \
        3 * CONNECT_LEVEL_FS


def _run_on_a_terminal(line: str, cwd: Path, env: dict,
                       tap: subprocess.Popen) -> tuple[int, str, int | None]:
    """Run ``line`` on a pseudo-terminal; type Enter when the meter says usable.

    Returns the exit status, the screen output and the tap's frame count when Enter was typed.
    """
    master, slave = pty.openpty()
    fcntl.ioctl(slave, termios.TIOCSWINSZ, struct.pack("HHHH", 50, 200, 0, 0))
    proc = subprocess.Popen(["bash", "-c", line], cwd=cwd, env=env, stdin=slave, stdout=slave,
                            stderr=slave, start_new_session=True)
    os.close(slave)
    screen: list[str] = []
    state: dict = {"enter_frame": None}

    def read() -> None:
        while True:
            try:
                chunk = os.read(master, 65536)
            except OSError:
                return
            if not chunk:
                return
            screen.append(chunk.decode("utf-8", "replace"))
            text = "".join(screen[-8:])
            if state["enter_frame"] is None and "usable: press Enter" in text:
                tap.stdin.write("mark\n")
                tap.stdin.flush()
                got = tap.stdout.readline().strip()
                while got == "connected":
                    state["connected"] = True
                    got = tap.stdout.readline().strip()
                state["enter_frame"] = int(got)
                os.write(master, b"\n")

    reader = threading.Thread(target=read, daemon=True)
    reader.start()
    try:
        rc = proc.wait(timeout=400)
    finally:
        _end(proc)
        reader.join(5)
        os.close(master)
    assert state.get("connected"), f"the tap never saw the program's output port {state}"
    return rc, "".join(screen), state["enter_frame"]
