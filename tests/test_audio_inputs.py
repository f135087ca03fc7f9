"""A real card (or JACK client) with several inputs: the audio rig reads every input of
``rig.inputs`` and hands them to the source as ``(samples, inputs)`` blocks in list order.

Offline, a fake sounddevice stream puts a different known ramp on every card input, so a column
that comes from the wrong card channel cannot match. Through a private JACK server (dummy driver,
tests/jackserver.py; fails, not skips, when ``CI=true``), the virtual rig's three ports
(control, a monitor with the bracket mode, the loopback) are read by one stream.

Outside references: a loopback cable carries a copy of the drive, so after the loop delay the
reference input is the drive through the interface's AC couplings (two first-order high-passes
at 7 Hz and 5 Hz, evaluated with scipy.signal.butter/sosfilt); the loop delay through JACK is
one server period plus the stream's block plus the plant card's delay (jack_iodelay(1) manual
page on the period in a client path); the coherence of a noisy linear path is 1/(1 + N/S)
(Bendat & Piersol, *Random Data*, 4th ed., §6.1.3 [section from memory]); the base-excitation
transmissibility peak near f_n (Rao, *Mechanical Vibrations*, 5th ed., §3.6).
"""

from __future__ import annotations

import json
import threading
import time
import types
from pathlib import Path

import numpy as np
import pytest
import scipy.signal
import soundfile as sf
from jackserver import lag_of

from liveshape import session as session_mod
from liveshape.control.runstate import RunResult
from liveshape.errors import ConfigError
from liveshape.record.runfolder import load_run
from liveshape.rigs import audio, devices
from liveshape.rigs.audio import AudioRig
from liveshape.rigs.devices import DeviceInfo
from liveshape.testdef.spec import load_spec

B = 256
REPO = Path(__file__).resolve().parents[1]
EXAMPLE = REPO / "examples" / "handlebar-nav-unit.yaml"
CARD = DeviceInfo(index=5, name="Four-in card", host_api="ALSA", max_input_channels=4,
                  max_output_channels=2, default_fs_hz=48000.0, full_duplex=True)


class FakeStop(Exception):
    pass


class FakePortAudioError(Exception):
    pass


def pattern(channel: int, frame: np.ndarray) -> np.ndarray:
    """What the fake card puts on input ``channel`` (from 0) at stream frame ``frame``: a level
    of its own plus a ramp, exact in float32 (multiples of 2**-16 below 1)."""
    return ((channel + 1) * 0.125 + (frame % 1024) / 65536.0).astype(np.float32)


class ChannelStream:
    """A fake full-duplex stream: every input channel carries :func:`pattern`; the callback is
    called from a thread every ``period_s``."""

    period_s = 0.001
    instances: list[ChannelStream] = []

    def __init__(self, *, device, samplerate, blocksize, dtype, channels, callback,
                 finished_callback, clip_off, **kw):
        assert dtype == "float32" and blocksize > 0
        self.n_in, self.n_out = channels
        self.b = blocksize
        self.callback, self.finished = callback, finished_callback
        self._abort = threading.Event()
        ChannelStream.instances.append(self)

    def start(self):
        self._thread = threading.Thread(target=self._loop, daemon=True)
        self._thread.start()

    def _loop(self):
        frame = 0
        while not self._abort.is_set():
            t = frame + np.arange(self.b)
            indata = np.stack([pattern(c, t) for c in range(self.n_in)], axis=1)
            out = np.zeros((self.b, self.n_out), np.float32)
            try:
                self.callback(indata, out, self.b, None, 0)
            except FakeStop:
                break
            frame += self.b
            time.sleep(self.period_s)
        self.finished()

    def abort(self):
        self._abort.set()
        self._thread.join()

    def close(self):
        self._abort.set()


@pytest.fixture
def fake_card(monkeypatch):
    """sounddevice replaced by :class:`ChannelStream`; the device list is :data:`CARD` (the
    real device checks run on it)."""
    ChannelStream.instances = []
    mod = types.SimpleNamespace(Stream=ChannelStream, CallbackStop=FakeStop,
                                PortAudioError=FakePortAudioError)
    monkeypatch.setattr(audio, "import_sounddevice", lambda: mod)
    monkeypatch.setattr(audio, "check_settings", lambda device, fs, **kw: devices.check_settings(
        None, device, fs, devices=[CARD], **kw))
    return mod


class Taker:
    """A source that plays silence for ``n_blocks`` and keeps every response block it gets."""

    def __init__(self, block: int, n_blocks: int, drive_fs: float = 0.0, seed: int = 0) -> None:
        self.block, self.n_blocks = block, n_blocks
        self.received: list[np.ndarray] = []
        self.drives: list[np.ndarray] = []
        self.rng = np.random.default_rng(seed)
        self.drive_fs = drive_fs
        self.status = "running"

    @property
    def finished(self) -> bool:
        return len(self.received) >= self.n_blocks

    def exchange(self, response: np.ndarray) -> np.ndarray:
        self.received.append(np.array(response, copy=True))
        d = (self.drive_fs * self.rng.standard_normal(self.block)).astype(np.float32)
        self.drives.append(d)
        return d

    def request_stop(self, reason: str) -> None:
        self.status = "stopped"


def _run(rig: AudioRig, n_blocks: int) -> Taker:
    rig._poll_s = 0.0002
    src = Taker(B, n_blocks)
    rig.run(src)
    return src


@pytest.mark.parametrize("cols", [(2, 0, 3), (0, 1), (3, 2, 1, 0)])
def test_exchange_gets_the_card_inputs_as_columns_in_the_given_order(fake_card, cols) -> None:
    rig = AudioRig("card", 48000, block_size=B, lead_blocks=3, input_channels=cols)
    assert rig.input_channels == max(cols) + 1  # the stream opens up to the highest input
    src = _run(rig, 40)
    assert ChannelStream.instances[-1].n_in == max(cols) + 1
    pre, got = src.received[:3], src.received[3:]
    assert all(r.shape == (B, len(cols)) and not r.any() for r in pre)  # pre-roll: silence
    assert all(r.shape == (B, len(cols)) and r.flags.c_contiguous for r in got)
    x = np.concatenate(got)
    frame = np.arange(x.shape[0])
    for j, c in enumerate(cols):  # column j is card input cols[j], sample for sample
        np.testing.assert_array_equal(x[:, j], pattern(c, frame))


def test_one_listed_input_gives_a_one_dimensional_block(fake_card) -> None:
    rig = AudioRig("card", 48000, block_size=B, lead_blocks=2, input_channels=(2,))
    src = _run(rig, 20)
    assert all(r.shape == (B,) for r in src.received)
    x = np.concatenate(src.received[2:])
    np.testing.assert_array_equal(x, pattern(2, np.arange(x.size)))


def test_the_block_record_carries_the_same_columns(fake_card) -> None:
    rig = AudioRig("card", 48000, block_size=B, lead_blocks=2, input_channels=(3, 1))
    rig._poll_s = 0.0002
    blocks = []
    src = Taker(B, 20)
    rig.run(src, on_block=blocks.append)
    # every slot is recorded, also those played out after the source finished
    assert len(blocks) >= len(src.received) - 2
    for b, r in zip(blocks, src.received[2:], strict=False):
        np.testing.assert_array_equal(b.response_fs, r)
    assert all(b.loopback_fs is None and b.monitor_fs is None for b in blocks)
    x = np.concatenate([b.response_fs for b in blocks])
    frame = np.arange(x.shape[0])
    assert x.shape[1] == 2
    np.testing.assert_array_equal(x[:, 0], pattern(3, frame))
    np.testing.assert_array_equal(x[:, 1], pattern(1, frame))


def test_input_channels_with_a_loopback_or_monitor_or_twice_is_refused() -> None:
    with pytest.raises(ValueError, match="replaces loopback"):
        AudioRig("card", 48000, input_channels=(0, 1), loopback=(None, 2))
    with pytest.raises(ValueError, match="replaces loopback"):
        AudioRig("card", 48000, input_channels=(0, 1), monitor_channel=2)
    with pytest.raises(ValueError, match="twice"):
        AudioRig("card", 48000, input_channels=(1, 1))
    with pytest.raises(ValueError, match=">= 0"):
        AudioRig("card", 48000, input_channels=(0, -1))


# -- the session ------------------------------------------------------------------------------


INPUTS_YAML = ("rig:\n  kind: audio\n  device: four\n  uncalibrated: true\n  inputs:\n"
               "    - {channel: 3, role: control, name: table}\n"
               "    - {channel: %d, role: monitor, name: bracket}\n"
               "    - {channel: %d, role: reference}\n")


def _spec(tmp_path: Path, channels: tuple[int, int] = (1, 2)):
    text = EXAMPLE.read_text().replace("rig:\n  kind: sim\n  plant: loudspeaker\n",
                                       INPUTS_YAML % channels)
    assert text != EXAMPLE.read_text()
    path = tmp_path / "t.yaml"
    path.write_text(text)
    return load_spec(path)


@pytest.mark.parametrize("channels, item", [((5, 2), 1), ((1, 6), 2)])
def test_an_input_beyond_the_device_is_one_line_and_makes_nothing(fake_card, tmp_path,
                                                                  channels, item) -> None:
    spec = _spec(tmp_path, channels)
    ch = channels[item - 1]
    out = tmp_path / "runs"
    with pytest.raises(ConfigError) as err:
        session_mod.run_audio_session(spec, out_dir=out)
    assert str(err.value) == (f"rig.inputs[{item}].channel = {ch}: audio device 'Four-in card' "
                              "has 4 input channel(s) (channels count from 1; see liveshape "
                              "devices)")
    assert not out.exists() and ChannelStream.instances == []  # nothing made, nothing opened
    with pytest.raises(ConfigError, match=rf"rig.inputs\[{item}\].channel = {ch}"):
        session_mod.check_audio_map(spec)  # what `liveshape check` runs


class StubController:
    """Stands in for the controller: keeps the blocks it gets, plays silence, ends after
    ``N`` blocks (the session's wiring is under test, not the control loop)."""

    N = 30
    last: StubController | None = None

    def __init__(self, spec, cal, **kw) -> None:
        self.spec = spec
        self.t_s = 0.0
        self.received: list[np.ndarray] = []
        self.status = "running"
        self.last_update = None
        StubController.last = self

    @property
    def finished(self) -> bool:
        return len(self.received) >= self.N

    def exchange(self, response):
        self.received.append(np.array(response, copy=True))
        self.t_s += 1024 / self.spec.control.fs_hz
        return np.zeros(1024, np.float32)

    def request_stop(self, reason):
        self.status = "stopped"

    def request_abort(self, rule, message, detail):
        self.status = "aborted"

    def drain_events(self):
        return []

    def full_level_arrays(self):
        return None

    def result(self):
        return RunResult("completed", None, None, None, float("nan"), float("nan"), -1, -1,
                         float("nan"), float("nan"), 0.0, 0.0, 0)


def test_the_session_reads_records_and_names_every_input_in_list_order(
        fake_card, tmp_path, monkeypatch) -> None:
    monkeypatch.setattr(session_mod, "Controller", StubController)
    spec = _spec(tmp_path)
    s = session_mod.run_audio_session(spec, out_dir=tmp_path / "runs", lead_blocks=2)
    ctrl = StubController.last
    assert ChannelStream.instances[-1].n_in == 3  # inputs 3, 1 and 2 need three channels
    got = np.concatenate(ctrl.received[2:])
    assert got.shape[1] == 3
    frame = np.arange(got.shape[0])
    for j, card_input in enumerate((3, 1, 2)):  # list order, channels counted from 1
        np.testing.assert_array_equal(got[:, j], pattern(card_input - 1, frame))
    wav, fs = sf.read(str(s.run_dir / "response.wav"), dtype="float32")
    # the record has the same columns (and the slots played out after the last exchange)
    assert fs == 48000 and wav.shape[1] == 3 and wav.shape[0] >= got.shape[0]
    np.testing.assert_array_equal(wav[:got.shape[0]], got)
    frame = np.arange(wav.shape[0])
    for j, card_input in enumerate((3, 1, 2)):
        np.testing.assert_array_equal(wav[:, j], pattern(card_input - 1, frame))
    rig = s.rig["inputs"]
    assert [(r["channel"], r["role"], r["name"]) for r in rig] == [
        (3, "control", "table"), (1, "monitor", "bracket"), (2, "reference", "reference2")]
    assert load_run(s.run_dir).rig["inputs"] == rig  # rig.yaml
    assert json.loads((s.run_dir / "summary.json").read_text())["rig"]["inputs"] == rig


# -- through JACK -----------------------------------------------------------------------------


@pytest.mark.jack
def test_jack_stream_gives_control_monitor_and_reference_columns(jack_server) -> None:
    from jackserver import virtual_rig

    from liveshape.rigs.jackrig import jack_loop_delay_samples

    fs = int(jack_server.fs_hz)
    block, lead = 1024, 4
    inputs = ((1, "control"), (2, "mode:bracket"), (3, "reference"))
    with virtual_rig("loudspeaker", seed=7, inputs=inputs, loopback=False):
        rig = audio.AudioRig("liveshape-plant", fs, block_size=block, lead_blocks=lead,
                             input_channels=(0, 1, 2))
        src = Taker(block, 2 * fs // block + lead, drive_fs=0.05, seed=11)
        rig.run(src)
    assert all(r.shape == (block, 3) for r in src.received)
    x = np.concatenate(src.received[lead:]).astype(float)  # stream slot 0 onwards
    d = np.concatenate(src.drives).astype(float)[:x.shape[0]]  # drive block j plays in slot j
    ctrl, mon, ref = x[:, 0], x[:, 1], x[:, 2]
    lag = lag_of(d, ref)
    assert lag == jack_loop_delay_samples(jack_server.period_frames, block, plant_delay=1536)
    # the reference is a copy of the drive: the delayed drive through the 7 Hz and 5 Hz
    # first-order couplings; compared past the first block (the stream fades in over it)
    sos = np.vstack([scipy.signal.butter(1, fc, "highpass", fs=fs, output="sos")
                     for fc in (7.0, 5.0)])
    expect = scipy.signal.sosfilt(sos, np.concatenate([np.zeros(lag), d[:-lag]]))
    seg = slice(lag + block, x.shape[0])
    assert np.corrcoef(ref[seg], expect[seg])[0, 1] > 0.99
    assert np.corrcoef(ref[seg], d[seg.start - lag:x.shape[0] - lag])[0, 1] > 0.99
    # the control responds to the drive: well above the card's -100 dBFS noise, coherent
    assert np.std(ctrl[seg]) > 100 * 1e-5
    f, coh = scipy.signal.coherence(d[seg.start - lag:x.shape[0] - lag], ctrl[seg], fs,
                                    nperseg=4096)
    band = (f > 50) & (f < 5000)
    assert np.median(coh[band]) > 0.99
    # column 1 is the bracket's monitor, not the control again: its 350 Hz mode on top
    assert not np.allclose(ctrl[seg], mon[seg])
    f, gcc = scipy.signal.welch(ctrl[seg], fs, nperseg=8192)
    _, gcm = scipy.signal.csd(ctrl[seg], mon[seg], fs, nperseg=8192)
    sel = (f > 100) & (f < 1000)
    assert abs(f[sel][np.argmax(np.abs(gcm[sel] / gcc[sel]))] - 350.0) < 3 * (f[1] - f[0])


def test_a_calibrated_run_needs_each_sensors_own_sensitivity(fake_card, tmp_path) -> None:
    from liveshape.rigs.calfile import write_calibration
    from liveshape.testdef.chain import ChainCalibration, InputChannelCal

    cal_path = tmp_path / "chain.yaml"
    write_calibration(cal_path, ChainCalibration(out_v_per_fs=1.0, in_v_per_fs=1.0,
                                                 accel_mv_per_g=100.0, source="file"))
    text = _spec(tmp_path).source
    spec = load_spec(text, overrides={"rig.uncalibrated": "false",
                                      "rig.calibration": str(cal_path)})
    with pytest.raises(ConfigError) as err:
        session_mod.run_audio_session(spec, out_dir=tmp_path / "runs", lead_blocks=2)
    msg = str(err.value)
    assert "\n" not in msg and str(cal_path) in msg
    assert "monitor input 1 (bracket)" in msg and "add {channel: 1, v_per_fs: ..., mv_per_g" in msg
    assert not (tmp_path / "runs").exists()  # refused before anything is made
    # with the monitor's own entry the check passes (the reference needs none)
    write_calibration(cal_path, ChainCalibration(
        out_v_per_fs=1.0, in_v_per_fs=1.0, accel_mv_per_g=100.0, source="file",
        inputs=(InputChannelCal(1, 1.0, 10.0),)))
    from liveshape.rigs.calfile import check_inputs_calibrated, load_calibration

    check_inputs_calibrated(load_calibration(cal_path), spec.rig.input_roles())
