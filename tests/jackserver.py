"""Helpers that run a private JACK server (dummy driver) for the JACK tests and benchmarks.

Recipe (options from the jackd(1) and jack_wait(1) manual pages; verified on this machine)::

    jackd --no-realtime -n NAME -d dummy -r 48000 -p 1024 &
    JACK_DEFAULT_SERVER=NAME jack_wait -w -t 10

The server gets a unique name per session and is killed by its PID at the end. The dummy driver
runs in real time, so everything that goes through it is realtime-paced by design.

PortAudio (sounddevice) lists JACK devices only if the server, and each JACK client to be used
as a device, existed when PortAudio initialized. Rather than relying on import order, the helpers
re-initialize PortAudio with :func:`liveshape.rigs.audio.rescan_devices` after starting the server
and after starting a virtual rig (no stream may be open at that moment).
"""

from __future__ import annotations

import contextlib
import os
import shutil
import signal
import subprocess
import uuid
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

import pytest


@dataclass
class JackServer:
    """A running private jackd."""

    name: str
    pid: int
    fs_hz: float
    period_frames: int
    proc: subprocess.Popen


def missing_reason() -> str | None:
    """Why the JACK tests cannot run here (None: everything is installed)."""
    for exe in ("jackd", "jack_wait"):
        if shutil.which(exe) is None:
            return f"{exe} not found (apt-get install jackd2)"
    try:
        import jack  # noqa: F401
    except (ImportError, OSError) as exc:
        return f"JACK-Client unusable: {exc}"
    from liveshape.errors import DeviceError
    from liveshape.rigs import audio

    try:
        audio.import_sounddevice()
    except DeviceError as exc:
        return str(exc)
    return None


def skip_or_fail(reason: str) -> None:
    """Skip locally; fail when ``CI=true`` (a missing audio stack must not hide in CI)."""
    if os.environ.get("CI") == "true":
        pytest.fail(f"JACK tests cannot run in CI: {reason}")
    pytest.skip(reason)


def start_jack_server(
    *, fs_hz: int = 48000, period_frames: int = 1024, timeout_s: float = 10.0
) -> JackServer:
    """Start ``jackd -d dummy`` under a unique name and wait until it accepts clients."""
    name = f"liveshape-test-{os.getpid()}-{uuid.uuid4().hex[:6]}"
    proc = subprocess.Popen(
        ["jackd", "--no-realtime", "-n", name, "-d", "dummy", "-r", str(fs_hz),
         "-p", str(period_frames)],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )
    env = dict(os.environ, JACK_DEFAULT_SERVER=name)
    wait = subprocess.run(
        ["jack_wait", "-w", "-t", str(int(timeout_s))], env=env, capture_output=True, text=True
    )
    if wait.returncode != 0 or proc.poll() is not None:
        stop_pid(proc)
        if proc.returncode == -signal.SIGKILL:
            reclaim_server_slot(name)
        raise RuntimeError(f"jackd {name} did not start: {wait.stdout.strip()} {wait.stderr}")
    return JackServer(name=name, pid=proc.pid, fs_hz=float(fs_hz),
                      period_frames=period_frames, proc=proc)


def reclaim_server_slot(name: str, timeout_s: float = 10.0) -> None:
    """Free the registry slot of a server that was killed with SIGKILL.

    jackd keeps its servers in a shared-memory registry of 8 slots; a server killed with
    SIGKILL leaves its slot behind, and jackd reclaims a dead server's slot only when a server
    of the same name starts (jack2, common/shm.c, ``jack_register_server``). So a server of that
    name is started and stopped cleanly, which unregisters it.
    """
    proc = subprocess.Popen(
        ["jackd", "--no-realtime", "-n", name, "-d", "dummy", "-r", "48000", "-p", "1024"],
        stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    env = dict(os.environ, JACK_DEFAULT_SERVER=name)
    subprocess.run(["jack_wait", "-w", "-t", str(int(timeout_s))], env=env, capture_output=True)
    if proc.poll() is None:
        os.kill(proc.pid, signal.SIGTERM)  # a clean exit unregisters it; no SIGKILL here
        try:
            proc.wait(timeout=timeout_s)
        except subprocess.TimeoutExpired:
            stop_pid(proc)


def stop_pid(proc: subprocess.Popen) -> None:
    """End one process we started: SIGTERM by its PID, SIGKILL if it lingers."""
    if proc.poll() is None:
        os.kill(proc.pid, signal.SIGTERM)
        try:
            proc.wait(timeout=5)
        except subprocess.TimeoutExpired:
            os.kill(proc.pid, signal.SIGKILL)
            proc.wait(timeout=5)


def stop_server(server: JackServer) -> None:
    """Stop a server we started; if it had to be killed (SIGKILL, e.g. on a loaded machine that
    kept it from exiting within the grace time), free its registry slot, or the 8-slot registry
    fills up over a test session and later servers cannot start."""
    stop_pid(server.proc)
    if server.proc.returncode == -signal.SIGKILL:
        reclaim_server_slot(server.name)


@contextlib.contextmanager
def jack_session(**kwargs: Any) -> Iterator[JackServer]:
    """A private server for the duration of the block; ``JACK_DEFAULT_SERVER`` points at it."""
    server = start_jack_server(**kwargs)
    old = os.environ.get("JACK_DEFAULT_SERVER")
    os.environ["JACK_DEFAULT_SERVER"] = server.name
    from liveshape.rigs import audio

    try:
        audio.rescan_devices()
        yield server
    finally:
        if old is None:
            os.environ.pop("JACK_DEFAULT_SERVER", None)
        else:
            os.environ["JACK_DEFAULT_SERVER"] = old
        # PortAudio must let go of the server before it dies (its JACK host asserts otherwise)
        audio.rescan_devices(between=lambda: stop_server(server))


@contextlib.contextmanager
def virtual_rig(plant: Any, **kwargs: Any) -> Iterator[Any]:
    """A started :class:`~liveshape.rigs.jackrig.VirtualRig`, visible to PortAudio."""
    from liveshape.rigs import audio
    from liveshape.rigs.jackrig import VirtualRig

    rig = VirtualRig(plant, **kwargs).start()
    try:
        audio.rescan_devices()
        yield rig
    finally:
        rig.stop()


def lag_of(x: Any, y: Any) -> int:
    """Lag of ``y`` behind ``x`` in samples, from the circular cross-correlation peak of the
    zero-padded signals (no wrap-around)."""
    import numpy as np

    n = x.size + y.size
    c = np.fft.irfft(np.fft.rfft(y, n) * np.conj(np.fft.rfft(x, n)), n)
    k = int(np.argmax(np.abs(c)))
    return k if k < n // 2 else k - n
