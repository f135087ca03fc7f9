"""The JACK virtual rig: the simulated plant as a client of a real, realtime-paced audio server.

The only module that imports :mod:`jack` (the JACK-Client package), lazily. A client (default
name ``liveshape-plant``) has the ports

* ``drive_in`` -> plant -> ``response_out``: :meth:`liveshape.rigs.sim.SimRig.process` on every
  period (the same plant model and presets as the simulated rig);
* ``loop_in`` -> ``loop_out``: a loopback cable between a second card output and a second card
  input, with the card's scales, AC-coupling corners and delay (:class:`CableModel`);
* with ``inputs`` (``(channel, source)`` pairs, :class:`liveshape.rigs.sim.SimRig`): one capture
  port ``input_<channel>`` per input instead of ``response_out`` — the control, monitors,
  fixture points and the reference (the drive through the card, read back) — all from one
  :meth:`liveshape.rigs.sim.SimRig.process_inputs` per period.

Every JACK client with ports appears to PortAudio as a device of that name, so
``AudioRig("liveshape-plant", 48000)`` drives the plant through the real stream (PortAudio
connects the ports itself). PortAudio lists only clients that existed when it initialized: start
the server and the virtual rig first, then :func:`liveshape.rigs.audio.rescan_devices`.

Loop delay through JACK (measured on this machine, see :func:`jack_loop_delay_samples`): one
server period (the graph's feedback cycle is broken by one period) plus one stream block when the
PortAudio stream has a fixed block size (PortAudio's buffer adaptation), plus the plant card's
own ``delay_samples``.

:class:`JackTap` records any output ports (e.g. ``PortAudio:out_0``) independently of the stream,
so tests can check ramps and steps of the drive as it left the program.

Command line (until the main CLI has it)::

    python -m liveshape.rigs.jackrig --plant loudspeaker [--name liveshape-plant]
                                     [--server NAME] [--seed N] [--no-loopback]
                                     [--inputs 1=control,2=mode:bracket,3=reference]
"""

from __future__ import annotations

import math
import os
import signal
import subprocess
import sys
import threading
from collections.abc import Iterable, Sequence
from pathlib import Path
from typing import Any

import numpy as np
from scipy import signal as sps

from liveshape.errors import ConfigError, DeviceError
from liveshape.testdef.chain import ChainCalibration

DEFAULT_CLIENT = "liveshape-plant"
PORTS_IN = ("drive_in", "loop_in")
PORTS_OUT = ("response_out", "loop_out")


def input_port_name(channel: int) -> str:
    """The capture port of input ``channel`` (counted from 1) of a virtual rig with inputs."""
    return f"input_{int(channel)}"


def parse_inputs(text: str, where: str = "--inputs") -> tuple[tuple[int, str], ...]:
    """Read ``CHANNEL=SOURCE[,CHANNEL=SOURCE...]`` (e.g. ``1=control,2=mode:bracket,
    3=reference``) into the ``inputs`` of :class:`liveshape.rigs.sim.SimRig`; the sources are
    checked against the plant when the rig is built.

    Raises
    ------
    ConfigError
        One line naming the option, the item and the rule.
    """
    out = []
    for item in str(text).split(","):
        ch, eq, src = item.strip().partition("=")
        if not (eq and ch.strip().isdigit() and int(ch) >= 1 and src.strip()):
            raise ConfigError(f"{where} = {text!r}: item {item.strip()!r} is not CHANNEL=SOURCE "
                              "with a channel >= 1 (e.g. 1=control,2=mode:bracket,3=reference)")
        out.append((int(ch), src.strip()))
    return tuple(out)


def import_jack() -> Any:
    """Import JACK-Client; a missing package or library is a one-line :class:`DeviceError`."""
    try:
        import jack
    except ImportError:
        raise DeviceError(
            "the Python package JACK-Client is not installed (pip install JACK-Client)"
        ) from None
    except OSError:
        raise DeviceError(
            "JACK library not found: install the system package jackd2 (apt-get install jackd2)"
        ) from None
    return jack


def jack_loop_delay_samples(
    period_frames: int, block_size: int, *, host_period: bool = False, plant_delay: int = 0
) -> int:
    """Round-trip delay, stream output to stream input, through JACK and the virtual rig.

    One JACK period (a path through JACK clients includes the JACK period length, jack_iodelay(1)
    manual page; the cycle PortAudio -> plant -> PortAudio is broken by one period, see
    docs/methods.md, "Loop delay through JACK"), plus ``block_size`` when the PortAudio stream
    has a fixed block size (its buffer processor adds one block; measured here with blocks of
    256, 1024 and 2048 on a 1024-frame server), plus the plant card's own delay.
    """
    return int(period_frames) + (0 if host_period else int(block_size)) + int(plant_delay)


class CableModel:
    """A loopback cable from card output 2 to card input 2, in full scale.

    ``y = x * out_v_per_fs / in_v_per_fs``, through the card's first-order output and input
    high-pass corners (bilinear Butterworth, :func:`scipy.signal.butter`), delayed by the card's
    ``delay_samples``, plus the card's input noise (seeded). Stateful across blocks.
    """

    def __init__(self, card: Any, fs_hz: float, *, seed: int | None = None) -> None:
        self.gain = float(card.out_v_per_fs) / float(card.in_v_per_fs)
        stages = [
            sps.butter(1, f, "highpass", fs=fs_hz, output="sos")
            for f in (card.out_highpass_hz, card.in_highpass_hz)
            if f is not None
        ]
        self._sos = np.vstack(stages) if stages else None
        self._zi = None if self._sos is None else np.zeros((self._sos.shape[0], 2))
        self._delay = np.zeros(int(card.delay_samples))
        self._noise = float(card.in_noise_fs_rms)
        self._rng = np.random.default_rng(seed)

    def process(self, x_fs: np.ndarray) -> np.ndarray:
        """Cable output (FS) for one block of cable input (FS); same length."""
        x = np.clip(np.asarray(x_fs, float), -1.0, 1.0) * self.gain
        if self._delay.size:
            joined = np.concatenate((self._delay, x))
            x, self._delay = joined[: x.size], joined[x.size :]
        if self._sos is not None:
            x, self._zi = sps.sosfilt(self._sos, x, zi=self._zi)
        if self._noise:
            x = x + self._noise * self._rng.standard_normal(x.size)
        return np.clip(x, -1.0, 1.0)


class PlantProcessor:
    """The per-period work of the virtual rig, without JACK (testable offline).

    Parameters
    ----------
    plant : str or Path or Plant
        Preset name, plant YAML path, or a loaded :class:`liveshape.rigs.plant.Plant`.
    fs_hz : float
        The server's sample rate.
    seed, faults
        As for :class:`liveshape.rigs.sim.SimRig`.
    loopback : bool
        Also run the loopback cable.
    inputs : sequence of (int, str), optional
        The plant's inputs (``inputs`` of :class:`liveshape.rigs.sim.SimRig`), filled by
        :meth:`run_inputs`; None: the one control response of :meth:`run`.
    """

    def __init__(
        self,
        plant: Any,
        fs_hz: float,
        *,
        seed: int | None = None,
        faults: Iterable[Any] = (),
        loopback: bool = True,
        inputs: Sequence[tuple[int, str]] | None = None,
    ) -> None:
        from liveshape.rigs.plant import load_plant
        from liveshape.rigs.sim import SimRig

        self.plant = load_plant(plant) if isinstance(plant, (str, Path)) else plant
        self.fs_hz = float(fs_hz)
        seeds = np.random.SeedSequence(seed).spawn(2)
        self.sim = SimRig(self.plant, self.fs_hz, seed=int(seeds[0].generate_state(1)[0]),
                          faults=faults, inputs=inputs)
        self.inputs = None if inputs is None else self.sim.input_channels
        self.cable = (
            CableModel(self.plant.card, self.fs_hz, seed=int(seeds[1].generate_state(1)[0]))
            if loopback
            else None
        )
        self.periods = 0
        self.errors = 0
        self.last_error: str | None = None

    @property
    def calibration(self) -> ChainCalibration:
        """The plant's true chain units (card delay only; add the JACK path delay separately)."""
        return self.sim.calibration

    def run(
        self,
        drive: np.ndarray,
        response_out: np.ndarray,
        loop_in: np.ndarray | None = None,
        loop_out: np.ndarray | None = None,
    ) -> None:
        """Fill ``response_out`` (and ``loop_out``) in place for one period; never raises.

        An internal error silences the outputs (the controller then sees a silent rig) and is
        counted in ``errors``.
        """
        try:
            response_out[:] = self.sim.process(drive)
        except Exception as exc:  # noqa: BLE001 - a realtime callback must not raise
            response_out[:] = 0.0
            self._fail(exc)
        self._loop_and_count(loop_in, loop_out)

    def run_inputs(
        self,
        drive: np.ndarray,
        input_outs: Sequence[np.ndarray],
        loop_in: np.ndarray | None = None,
        loop_out: np.ndarray | None = None,
    ) -> None:
        """Fill every input's port buffer (rows of
        :meth:`liveshape.rigs.sim.SimRig.process_inputs`, in :attr:`inputs` order) for one
        period, and ``loop_out``; never raises (an error silences them and is counted)."""
        try:
            rows = self.sim.process_inputs(drive)
            for out, row in zip(input_outs, rows, strict=True):
                out[:] = row
        except Exception as exc:  # noqa: BLE001 - a realtime callback must not raise
            for out in input_outs:
                out[:] = 0.0
            self._fail(exc)
        self._loop_and_count(loop_in, loop_out)

    def _loop_and_count(self, loop_in: np.ndarray | None, loop_out: np.ndarray | None) -> None:
        """The loopback cable's period (silenced on an error) and the period count."""
        if loop_out is not None:
            try:
                loop_out[:] = 0.0 if self.cable is None else self.cable.process(loop_in)
            except Exception as exc:  # noqa: BLE001 - a realtime callback must not raise
                loop_out[:] = 0.0
                self._fail(exc)
        self.periods += 1

    def _fail(self, exc: Exception) -> None:
        self.errors += 1
        self.last_error = f"{exc.__class__.__name__}: {exc}"


def _open_client(jack: Any, name: str, server_name: str | None) -> Any:
    try:
        return jack.Client(name, use_exact_name=True, no_start_server=True,
                           servername=server_name)
    except jack.JackOpenError as exc:
        server = server_name or os.environ.get("JACK_DEFAULT_SERVER", "default")
        raise DeviceError(
            f"cannot open JACK client {name!r} on server {server!r} "
            f"(is jackd running, is the name free?): {exc}"
        ) from None


class VirtualRig:
    """The virtual rig, in this process or as a subprocess (``python -m liveshape.rigs.jackrig``).

    Use as a context manager or call :meth:`start` / :meth:`stop`. In process, :attr:`processor`
    gives the plant state; as a subprocess, :attr:`pid` can be killed to simulate a rig that
    disappears mid-run.
    """

    def __init__(
        self,
        plant: Any = "loudspeaker",
        *,
        server_name: str | None = None,
        client_name: str = DEFAULT_CLIENT,
        seed: int | None = None,
        faults: Sequence[Any] = (),
        loopback: bool = True,
        in_process: bool = True,
        inputs: Sequence[tuple[int, str]] | None = None,
    ) -> None:
        if not in_process and not isinstance(plant, (str, Path)):
            raise ValueError("a subprocess virtual rig needs a preset name or plant file path")
        if not in_process and faults:
            raise ValueError("faults are only supported for an in-process virtual rig")
        self.plant_arg = plant
        self.server_name = server_name
        self.client_name = client_name
        self.seed = seed
        self.faults = tuple(faults)
        self.loopback = loopback
        self.in_process = in_process
        self.inputs = None if inputs is None else tuple((int(c), str(s)) for c, s in inputs)
        self.processor: PlantProcessor | None = None
        self.xruns = 0
        self.period_frames: int | None = None
        self.fs_hz: float | None = None
        self._client: Any = None
        self._proc: subprocess.Popen | None = None
        self.server_gone = threading.Event()  # set when the JACK server shuts down

    @property
    def pid(self) -> int | None:
        """Process id of the subprocess rig (None in process)."""
        return None if self._proc is None else self._proc.pid

    def start(self, timeout_s: float = 10.0) -> VirtualRig:
        """Create the client and activate it (or start the subprocess and wait until ready)."""
        jack = import_jack()
        probe = _open_client(jack, f"{self.client_name}-probe", self.server_name)
        self.period_frames, self.fs_hz = int(probe.blocksize), float(probe.samplerate)
        probe.close()
        if self.in_process:
            self._start_in_process(jack)
        else:
            self._start_subprocess(timeout_s)
        return self

    def _start_in_process(self, jack: Any) -> None:
        client = _open_client(jack, self.client_name, self.server_name)
        try:
            proc = PlantProcessor(self.plant_arg, client.samplerate, seed=self.seed,
                                  faults=self.faults, loopback=self.loopback, inputs=self.inputs)
        except Exception:
            client.close()
            raise
        ins = [client.inports.register(n) for n in PORTS_IN[: 1 + self.loopback]]
        if self.inputs is not None:
            outs = [client.outports.register(input_port_name(c)) for c in proc.inputs]
            loop_outs = ([client.outports.register(PORTS_OUT[1])] if self.loopback else [])
        else:
            outs = [client.outports.register(n) for n in PORTS_OUT[: 1 + self.loopback]]

        def process(frames: int) -> None:
            if self.inputs is not None:
                bufs = [p.get_array() for p in outs]
                if loop_outs:
                    proc.run_inputs(ins[0].get_array(), bufs, ins[1].get_array(),
                                    loop_outs[0].get_array())
                else:
                    proc.run_inputs(ins[0].get_array(), bufs)
            elif self.loopback:
                proc.run(ins[0].get_array(), outs[0].get_array(), ins[1].get_array(),
                         outs[1].get_array())
            else:
                proc.run(ins[0].get_array(), outs[0].get_array())

        def xrun(delay_usecs: float) -> None:  # noqa: ARG001
            self.xruns += 1

        client.set_process_callback(process)
        client.set_xrun_callback(xrun)
        client.set_shutdown_callback(lambda status, reason: self.server_gone.set())
        client.activate()
        self.processor, self._client = proc, client

    def _start_subprocess(self, timeout_s: float) -> None:
        cmd = [sys.executable, "-m", "liveshape.rigs.jackrig", "--plant", str(self.plant_arg),
               "--name", self.client_name]
        if self.server_name:
            cmd += ["--server", self.server_name]
        if self.seed is not None:
            cmd += ["--seed", str(self.seed)]
        if not self.loopback:
            cmd.append("--no-loopback")
        if self.inputs is not None:
            cmd += ["--inputs", ",".join(f"{c}={s}" for c, s in self.inputs)]
        root = str(Path(__file__).resolve().parents[2])
        env = dict(os.environ)
        env["PYTHONPATH"] = root + os.pathsep + env.get("PYTHONPATH", "")
        self._proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                                      text=True, env=env)
        line: list[str] = []
        reader = threading.Thread(target=lambda: line.append(self._proc.stdout.readline()),
                                  daemon=True)
        reader.start()
        reader.join(timeout_s)
        if not line or not line[0].startswith("ready"):
            self._proc.kill()
            err = self._proc.communicate(timeout=5)[1].strip().splitlines()
            raise DeviceError(f"virtual rig did not start: {err[-1] if err else 'no output'}")

    def stop(self) -> None:
        """Deactivate and close the client, or end the subprocess (SIGTERM, then SIGKILL)."""
        if self._client is not None:
            try:
                self._client.deactivate()
                self._client.close()
            finally:
                self._client = None
        if self._proc is not None:
            if self._proc.poll() is None:
                self._proc.terminate()
                try:
                    self._proc.wait(timeout=5)
                except subprocess.TimeoutExpired:
                    self._proc.kill()
                    self._proc.wait(timeout=5)
            self._proc.stdout.close()
            self._proc.stderr.close()
            self._proc = None

    def kill(self) -> None:
        """Kill the subprocess rig abruptly (SIGKILL), as if it crashed."""
        if self._proc is None:
            raise RuntimeError("only a subprocess virtual rig can be killed")
        self._proc.kill()
        self._proc.wait(timeout=5)

    def __enter__(self) -> VirtualRig:
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.stop()


def serve(
    plant_name_or_path: str | Path,
    *,
    server_name: str | None = None,
    client_name: str = DEFAULT_CLIENT,
    seed: int | None = None,
    loopback: bool = True,
    ready: Any = None,
    inputs: Sequence[tuple[int, str]] | None = None,
) -> None:
    """Run the virtual rig until SIGINT/SIGTERM or until the JACK server shuts down.

    ``ready`` (optional callable) is called with the :class:`VirtualRig` once it is active.
    """
    done = threading.Event()
    rig = VirtualRig(plant_name_or_path, server_name=server_name, client_name=client_name,
                     seed=seed, loopback=loopback, in_process=True, inputs=inputs)
    old = {s: signal.signal(s, lambda *_: done.set()) for s in (signal.SIGINT, signal.SIGTERM)}
    try:
        rig.start()
        if ready is not None:
            ready(rig)
        while not done.wait(0.5) and not rig.server_gone.is_set():
            pass
    finally:
        for s, h in old.items():
            signal.signal(s, h)
        rig.stop()


class JackTap:
    """Record output ports of other JACK clients into a preallocated buffer (for checks).

    Parameters
    ----------
    sources : sequence of str
        Full port names to record, e.g. ``["PortAudio:out_0"]``.
    capacity_s : float
        Longest recording; later samples are counted in ``overflow_frames`` and dropped.
    """

    def __init__(
        self,
        sources: Sequence[str],
        *,
        capacity_s: float = 60.0,
        client_name: str = "liveshape-tap",
        server_name: str | None = None,
    ) -> None:
        self.sources = tuple(sources)
        self.capacity_s = float(capacity_s)
        self.client_name = client_name
        self.server_name = server_name
        self.frames = 0
        self.overflow_frames = 0
        self._client: Any = None
        self._buf: np.ndarray | None = None

    def start(self) -> JackTap:
        """Open the client, register one input per source and activate (not yet connected)."""
        jack = import_jack()
        client = _open_client(jack, self.client_name, self.server_name)
        n = int(math.ceil(self.capacity_s * client.samplerate))
        self._buf = buf = np.zeros((n, len(self.sources)), np.float32)
        ports = [client.inports.register(f"in_{i}") for i in range(len(self.sources))]

        def process(frames: int) -> None:
            pos = self.frames
            k = min(frames, n - pos)
            if k > 0:
                for i, p in enumerate(ports):
                    buf[pos : pos + k, i] = p.get_array()[:k]
                self.frames = pos + k
            if k < frames:
                self.overflow_frames += frames - max(k, 0)

        client.set_process_callback(process)
        client.activate()
        self._client, self._ports = client, ports
        return self

    def connect(self) -> None:
        """Connect every source port to the tap (the sources must exist now)."""
        for src, port in zip(self.sources, self._ports, strict=True):
            self._client.connect(src, port)

    def data(self) -> np.ndarray:
        """Copy of what was recorded so far, ``(frames, len(sources))``."""
        return self._buf[: self.frames].copy()

    def stop(self) -> None:
        if self._client is not None:
            self._client.deactivate()
            self._client.close()
            self._client = None

    def __enter__(self) -> JackTap:
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.stop()


def main(argv: Sequence[str] | None = None) -> int:
    """``python -m liveshape.rigs.jackrig``: serve a plant; prints ``ready NAME`` when active."""
    args = list(sys.argv[1:] if argv is None else argv)
    opts: dict[str, Any] = {"plant": "loudspeaker", "name": DEFAULT_CLIENT, "server": None,
                            "seed": None, "loopback": True, "inputs": None}
    valid = ("--plant", "--name", "--server", "--seed", "--inputs")
    while args:
        a = args.pop(0)
        if a == "--no-loopback":
            opts["loopback"] = False
        elif a in valid and args:
            opts[a[2:]] = args.pop(0)
        else:
            raise ConfigError(f"jackrig: option {a!r} is unknown or lacks a value "
                              f"(valid: {', '.join(valid)}, --no-loopback)")
    seed = None if opts["seed"] is None else int(opts["seed"])
    inputs = None if opts["inputs"] is None else parse_inputs(opts["inputs"])

    def ready(rig: VirtualRig) -> None:
        sys.stdout.write(f"ready {rig.client_name} {rig.fs_hz:g} {rig.period_frames}\n")
        sys.stdout.flush()

    serve(opts["plant"], server_name=opts["server"], client_name=opts["name"], seed=seed,
          loopback=opts["loopback"], ready=ready, inputs=inputs)
    return 0


if __name__ == "__main__":
    try:
        raise SystemExit(main())
    except (ConfigError, DeviceError) as exc:
        sys.stderr.write(f"jackrig: {exc}\n")
        raise SystemExit(2) from None
    except KeyboardInterrupt:
        raise SystemExit(130) from None
