"""The JACK virtual rig with several inputs: one capture port per input, through a private
JACK server (dummy driver; tests/jackserver.py). Fails, not skips, when ``CI=true`` and the audio
stack is missing (conftest.py).

Outside references: the loop delay through a JACK cycle is one server period (a path through
JACK clients includes the JACK period length, jack_iodelay(1) manual page; the tester -> plant ->
tester cycle is broken by one period), plus the plant card's ``delay_samples``; the loopback's
first-order AC couplings evaluated with scipy.signal.butter/sosfilt; the coherence of a noisy
linear path, 1/(1 + N/S) (Bendat & Piersol, *Random Data*, 4th ed., §6.1.3 [section from memory]);
the base-excitation
transmissibility peak near f_n (Rao, *Mechanical Vibrations*, 5th ed., §3.6).
"""

from __future__ import annotations

import subprocess
import sys
import time
import uuid
from pathlib import Path

import numpy as np
import pytest
import scipy.signal
from jackserver import lag_of

from liveshape.rigs.jackrig import (
    VirtualRig,
    import_jack,
    input_port_name,
    jack_loop_delay_samples,
    parse_inputs,
)

INPUTS = ((1, "control"), (2, "mode:bracket"), (3, "reference"))


class PlayRecord:
    """A JACK client that plays a fixed buffer to the plant's drive and records its inputs, in
    the same callback (preallocated buffers only)."""

    def __init__(self, server: str, play: np.ndarray, n_in: int) -> None:
        jack = import_jack()
        self.client = jack.Client(f"tester-{uuid.uuid4().hex[:6]}", no_start_server=True,
                                  servername=server)
        self.play, self.pos = play, 0
        self.rec = np.zeros((n_in, play.size), np.float32)
        self.out = self.client.outports.register("play")
        self.ins = [self.client.inports.register(f"in_{k}") for k in range(n_in)]

        def process(frames: int) -> None:
            k = min(frames, self.play.size - self.pos)
            buf = self.out.get_array()
            buf[:] = 0.0
            if k > 0:
                buf[:k] = self.play[self.pos:self.pos + k]
                for i, p in enumerate(self.ins):
                    self.rec[i, self.pos:self.pos + k] = p.get_array()[:k]
                self.pos += k

        self.client.set_process_callback(process)


@pytest.mark.jack
def test_each_input_arrives_on_its_own_port_with_the_right_content(jack_server) -> None:
    fs = int(jack_server.fs_hz)
    play = (0.05 * np.random.default_rng(3).standard_normal(4 * fs)).astype(np.float32)
    name = f"plant-{uuid.uuid4().hex[:6]}"
    with VirtualRig("loudspeaker", server_name=jack_server.name, client_name=name, seed=2,
                    inputs=INPUTS, loopback=False) as rig:
        jack = import_jack()
        probe = jack.Client(f"probe-{uuid.uuid4().hex[:6]}", no_start_server=True,
                            servername=jack_server.name)
        ports = [p.name for p in probe.get_ports(f"{name}:")]
        probe.close()
        assert sorted(ports) == sorted([f"{name}:drive_in"] + [
            f"{name}:{input_port_name(c)}" for c, _ in INPUTS])
        t = PlayRecord(jack_server.name, play, len(INPUTS))
        t.client.activate()
        try:
            for k, (c, _) in enumerate(INPUTS):
                t.client.connect(f"{name}:{input_port_name(c)}", t.ins[k])
            t.client.connect(t.out, f"{name}:drive_in")
            deadline = time.monotonic() + 15.0
            while t.pos < play.size and time.monotonic() < deadline:
                time.sleep(0.1)
        finally:
            t.client.deactivate()
            t.client.close()
        assert rig.processor.errors == 0, rig.processor.last_error
    assert t.pos == play.size
    ctrl, mon, ref = (r.astype(float) for r in t.rec)
    # the loopback: one JACK period plus the card's 1536 samples behind the drive
    lag = lag_of(play.astype(float), ref)
    assert lag == jack_loop_delay_samples(jack_server.period_frames, 0, host_period=True,
                                          plant_delay=1536)
    # ... equal to the drive through the card's 1 V/FS out, 1 V/FS in and its 7 Hz and 5 Hz
    # first-order couplings; compared where the drive reached the plant (the connection is made
    # after the tester starts, so the first periods of the drive are lost)
    sos = np.vstack([scipy.signal.butter(1, fc, "highpass", fs=fs, output="sos")
                     for fc in (7.0, 5.0)])
    delayed = np.concatenate([np.zeros(lag), play[:-lag].astype(float)])
    start = int(np.argmax(np.abs(ref) > 0.01)) + fs // 2  # the couplings settled (τ < 35 ms)
    expect = scipy.signal.sosfilt(sos, delayed)
    seg = slice(start, play.size)
    resid = ref[seg] - expect[seg]
    # the filter's start differs by a decaying transient only (the drive's start is lost);
    # what remains is the card's -100 dBFS noise and float32 ports (≈ 1e-8)
    assert np.std(resid) < 3e-5, np.std(resid)
    gain = np.dot(ref[seg], expect[seg]) / np.dot(expect[seg], expect[seg])
    assert gain == pytest.approx(1.0, abs=1e-3)
    f, coh = scipy.signal.coherence(delayed[seg], ref[seg], fs, nperseg=4096)
    band = (f > 50) & (f < 5000)
    assert coh[band].min() > 0.999
    # the control responds to the drive (same delay), the monitor to the control with the
    # bracket's 350 Hz, Q 15 mode on top
    f, coh_c = scipy.signal.coherence(delayed[seg], ctrl[seg], fs, nperseg=4096)
    assert np.median(coh_c[band]) > 0.99
    f, gcc = scipy.signal.welch(ctrl[seg], fs, nperseg=8192)
    _, gcm = scipy.signal.csd(ctrl[seg], mon[seg], fs, nperseg=8192)
    sel = (f > 100) & (f < 1000)
    peak = f[sel][np.argmax(np.abs(gcm[sel] / gcc[sel]))]
    assert abs(peak - 350.0) < 3 * (f[1] - f[0])
    assert not np.allclose(ctrl[seg], mon[seg])


def test_inputs_option_is_read_and_bad_items_are_one_line() -> None:
    from liveshape.errors import ConfigError

    assert parse_inputs("1=control, 4=mode:bracket,2=reference") == (
        (1, "control"), (4, "mode:bracket"), (2, "reference"))
    for bad in ("1=control,x", "0=control", "1=", "a=control"):
        with pytest.raises(ConfigError) as exc:
            parse_inputs(bad)
        assert str(exc.value).startswith(f"--inputs = {bad!r}: item ")


@pytest.mark.parametrize("value, words", [
    ("1=control,2=mode:nothing", "inputs: channel 2 ('mode:nothing'): names no source of plant "
     "'loudspeaker'"),
    ("1=control,x", "--inputs = '1=control,x': item 'x' is not CHANNEL=SOURCE"),
])
def test_virtual_rig_command_refuses_bad_inputs_before_jack(value, words, tmp_path) -> None:
    root = str(Path(__file__).resolve().parents[1])
    r = subprocess.run([sys.executable, "-m", "liveshape", "virtual-rig", "--inputs", value],
                       capture_output=True, text=True, cwd=tmp_path, timeout=60,
                       env={"PYTHONPATH": root, "PATH": "/usr/bin:/bin"})
    assert r.returncode == 2
    assert r.stdout == "" and r.stderr.count("\n") == 1 and words in r.stderr, r.stderr


def test_plant_processor_fills_every_input_and_never_raises() -> None:
    from liveshape.rigs.jackrig import PlantProcessor

    proc = PlantProcessor("loudspeaker", 48000.0, seed=1, inputs=INPUTS, loopback=False)
    assert proc.inputs == (1, 2, 3)
    drive = 0.05 * np.random.default_rng(1).standard_normal(1024)
    outs = [np.full(1024, np.nan, np.float32) for _ in INPUTS]
    proc.run_inputs(drive, outs)
    assert all(np.all(np.isfinite(o)) for o in outs) and proc.errors == 0
    proc.run_inputs(np.zeros(7), outs)  # a wrong-length period: silenced and counted
    assert proc.errors == 1 and all(np.all(o == 0.0) for o in outs)


@pytest.mark.jack
def test_a_subprocess_virtual_rig_registers_one_port_per_input(jack_server) -> None:
    name = f"plant-{uuid.uuid4().hex[:6]}"
    with VirtualRig("loudspeaker", server_name=jack_server.name, client_name=name,
                    inputs=INPUTS, in_process=False):
        jack = import_jack()
        probe = jack.Client(f"probe-{uuid.uuid4().hex[:6]}", no_start_server=True,
                            servername=jack_server.name)
        ports = sorted(p.name for p in probe.get_ports(f"{name}:", is_output=True))
        probe.close()
    assert ports == sorted([f"{name}:loop_out"] + [f"{name}:{input_port_name(c)}"
                                                   for c, _ in INPUTS])


@pytest.mark.jack
def test_the_stream_reads_the_inputs_in_port_order(jack_server) -> None:
    # PortAudio numbers a JACK client's ports in the order they were registered: input_1 is
    # stream input 0, and so on; the audio rig reads the control, a monitor and the reference
    # (as its loopback) through the real stream
    from jackserver import virtual_rig

    from liveshape.rigs import audio

    fs = int(jack_server.fs_hz)
    with virtual_rig("loudspeaker", seed=5, inputs=INPUTS, loopback=False):
        rig = audio.AudioRig("liveshape-plant", fs, control_channel=0, monitor_channel=1,
                             loopback=(None, 2))
        drive = 0.05 * np.random.default_rng(8).standard_normal(2 * fs)
        rec = rig.play_record(drive, tail_s=0.3)
    d = rec.drive_fs.astype(float)
    ref, ctrl, mon = (x.astype(float) for x in (rec.loopback_fs, rec.response_fs,
                                                   rec.monitor_fs))
    # the path: one JACK period, one 1024-frame stream block, the card's 1536 samples
    lag = lag_of(d, ref)
    assert lag == jack_loop_delay_samples(jack_server.period_frames, 1024, plant_delay=1536)
    sos = np.vstack([scipy.signal.butter(1, fc, "highpass", fs=fs, output="sos")
                     for fc in (7.0, 5.0)])
    expect = scipy.signal.sosfilt(sos, np.concatenate([np.zeros(lag), d[:-lag]]))
    # the whole drive arrives (the stream starts on silence): float32 stream samples and the
    # card's -100 dBFS noise are all that differ
    assert np.std(ref - expect) < 3e-5
    f, gcc = scipy.signal.welch(ctrl[lag:], fs, nperseg=8192)
    _, gcm = scipy.signal.csd(ctrl[lag:], mon[lag:], fs, nperseg=8192)
    sel = (f > 100) & (f < 1000)
    assert abs(f[sel][np.argmax(np.abs(gcm[sel] / gcc[sel]))] - 350.0) < 3 * (f[1] - f[0])
    _, coh = scipy.signal.coherence(d[:-lag], ctrl[lag:], fs, nperseg=4096)
    assert np.median(coh[(f[:coh.size] > 50) & (f[:coh.size] < 5000)]) > 0.99
