"""The audio rig without an audio server: the callback core, device selection, the worker.

The callback core (StreamCore) is exercised directly; the worker and its stop/underflow/error
handling run against a fake sounddevice module whose stream calls the callback from a thread
(paced at 1 ms, so runs take a fraction of a second). The same code through a real JACK server
is in test_jack.py.
"""

from __future__ import annotations

import _thread
import subprocess
import sys
import threading
import time
import types

import numpy as np
import pytest

from liveshape.errors import DeviceError
from liveshape.rigs import audio
from liveshape.rigs.audio import AudioRig, DeviceInfo, check_settings, match_device
from liveshape.rigs.ring import BufferSource, StreamCore

B = 256


def raised_cosine(p: np.ndarray, r: int) -> np.ndarray:
    """g(p) = (1 - cos(pi p / R)) / 2, the raised-cosine (Hann half-window) fade."""
    return 0.5 - 0.5 * np.cos(np.pi * np.clip(p, 0, r) / r)


def make_core(**kw) -> StreamCore:
    args = dict(block_size=B, input_channels=1, output_channels=1, drive_channel=0,
                loopback_out=None, drive_capacity=16 * B, input_capacity=64 * B,
                stop_zero_blocks=3)
    args.update(kw)
    return StreamCore(**args)


def call(core: StreamCore, frames: int = B, n_out: int = 1, n_in: int = 1):
    out = np.full((frames, n_out), np.nan, np.float32)  # the core must overwrite every sample
    stop = core.process(np.zeros((frames, n_in), np.float32), out, frames)
    assert not np.isnan(out).any()
    return out, stop


# -- the callback core ------------------------------------------------------------------------


def test_start_fades_in_with_the_raised_cosine_then_passes_exactly() -> None:
    core = make_core()
    rng = np.random.default_rng(1)
    x = np.clip(0.3 * rng.standard_normal(4 * B), -1, 1).astype(np.float32)
    core.write_drive(x)
    out = np.concatenate([call(core)[0][:, 0] for _ in range(4)])
    g = raised_cosine(np.arange(1, B + 1), B)
    np.testing.assert_allclose(out[:B], x[:B] * g, rtol=1e-6, atol=1e-7)
    np.testing.assert_array_equal(out[B:], x[B:])


def test_fade_slope_is_within_the_raised_cosine_bound() -> None:
    """A constant A faded in changes by at most A*pi/(2R) per sample (max of d/dp of g)."""
    core = make_core()
    a = 0.8
    core.write_drive(np.full(2 * B, a, np.float32))
    out = np.concatenate([call(core)[0][:, 0] for _ in range(2)])
    steps = np.abs(np.diff(np.concatenate([[0.0], out])))
    assert steps.max() <= a * np.pi / (2 * B) * (1 + 1e-6)  # calculus: max |g'| = pi/(2R)


@pytest.mark.parametrize("frames", [1, 100, 256, 999])
def test_fades_do_not_depend_on_the_callback_size(frames: int) -> None:
    """Any host period gives the same samples as one big callback (gain is per sample)."""
    rng = np.random.default_rng(frames)
    x = np.clip(0.3 * rng.standard_normal(3000), -1, 1).astype(np.float32)
    ref = make_core(max_frames=4096)
    ref.write_drive(x)
    want = call(ref, frames=3000)[0][:, 0]
    core = make_core(max_frames=4096)
    core.write_drive(x)
    got = []
    done = 0
    while done < 3000:
        k = min(frames, 3000 - done)
        got.append(call(core, frames=k)[0][:, 0])
        done += k
    np.testing.assert_allclose(np.concatenate(got), want, rtol=0, atol=1e-7)


def test_dry_ring_fades_the_held_value_counts_and_keeps_the_timeline() -> None:
    core = make_core()
    blocks = [np.full(B, 0.1 * (k + 1), np.float32) for k in range(6)]
    core.write_drive(np.concatenate(blocks[:2]))
    call(core)
    call(core)
    out2, _ = call(core)  # slot 2: nothing queued
    g_fall = raised_cosine(B - np.arange(1, B + 1), B)
    np.testing.assert_allclose(out2[:, 0], 0.2 * g_fall, rtol=1e-6, atol=1e-7)
    assert out2[-1, 0] == 0.0
    assert (core.dry_blocks, core.dry_frames) == (1, B)
    core.write_drive(np.concatenate(blocks[2:]))  # block 2 arrives late: it must be skipped
    out3, _ = call(core)
    g_rise = raised_cosine(np.arange(1, B + 1), B)
    np.testing.assert_allclose(out3[:, 0], 0.4 * g_rise, rtol=1e-6)  # slot 3 plays block 3
    out4, _ = call(core)
    np.testing.assert_array_equal(out4[:, 0], blocks[4])
    assert core.dry_blocks == 1


def test_drain_stop_plays_out_fades_then_zero_blocks_then_stop() -> None:
    core = make_core(stop_zero_blocks=3)
    core.write_drive(np.full(3 * B, 0.5, np.float32))
    call(core)
    core.request_stop(now=False)
    a, _ = call(core)
    b, _ = call(core)
    np.testing.assert_array_equal(np.concatenate([a, b])[:, 0], 0.5)  # queued drive plays out
    fade, stop = call(core)  # ring empty: fade from the held value (not an underflow)
    assert not stop and fade[0, 0] < 0.5 and fade[-1, 0] == 0.0
    assert core.dry_blocks == 0
    results = [call(core) for _ in range(4)]
    assert [s for _, s in results] == [False, False, False, True]
    assert all(np.all(o == 0.0) for o, _ in results)
    assert core.finished


def test_stop_now_fades_within_one_block() -> None:
    core = make_core()
    rng = np.random.default_rng(3)
    x = np.clip(0.25 * rng.standard_normal(8 * B), -1, 1).astype(np.float32)
    core.write_drive(x)
    call(core)
    call(core)
    core.request_stop(now=True)
    out, _ = call(core)
    g_fall = raised_cosine(B - np.arange(1, B + 1), B)
    np.testing.assert_allclose(out[:, 0], x[2 * B : 3 * B] * g_fall, rtol=1e-5, atol=1e-7)
    nxt, _ = call(core)
    assert np.all(nxt == 0.0)


def test_output_is_clipped_to_full_scale_and_copied_to_loopback() -> None:
    core = make_core(output_channels=3, drive_channel=2, loopback_out=0)
    core.write_drive(np.full(2 * B, 3.0, np.float32))
    call(core, n_out=3)
    out, _ = call(core, n_out=3)
    assert np.all(out[:, 2] == 1.0) and np.all(out[:, 0] == 1.0) and np.all(out[:, 1] == 0.0)


def test_input_is_stored_in_order_and_status_flags_are_counted() -> None:
    core = make_core(input_channels=2)
    x = np.arange(2 * 3 * B, dtype=np.float32).reshape(-1, 2)
    for k in range(3):
        core.process(x[k * B : (k + 1) * B], np.zeros((B, 1), np.float32), B)
    np.testing.assert_array_equal(core.read_input(3 * B), x)
    core.count_status(True, False)
    core.count_status(False, True)
    core.count_status(True, True)
    assert (core.input_overflows, core.output_underflows) == (2, 2)


def test_internal_error_silences_and_stops_without_raising() -> None:
    core = make_core(drive_channel=1, output_channels=2)
    core.write_drive(np.full(B, 0.5, np.float32))
    out = np.full((B, 1), 7.0, np.float32)  # one channel too few: indexing fails inside
    assert core.process(np.zeros((B, 1), np.float32), out, B) is False
    assert core.errors == 1 and np.all(out == 0.0)


# -- device selection and messages ------------------------------------------------------------

DEVICES = [
    DeviceInfo(0, "HDA Intel PCH: ALC255 Analog (hw:0,0)", "ALSA", 2, 2, 44100.0, True),
    DeviceInfo(1, "Scarlett 2i2 USB: Audio (hw:1,0)", "ALSA", 2, 2, 48000.0, True),
    DeviceInfo(2, "pulse", "ALSA", 32, 32, 44100.0, True),
    DeviceInfo(3, "HDMI 0 (hw:0,3)", "ALSA", 0, 8, 44100.0, False),
]


def test_match_device_by_index_name_and_part() -> None:
    assert match_device(DEVICES, 2).name == "pulse"
    assert match_device(DEVICES, "2").name == "pulse"
    assert match_device(DEVICES, "pulse").index == 2
    assert match_device(DEVICES, "scarlett").index == 1


def test_match_device_has_no_default_device() -> None:
    # A real card is driven only when the user names it: no device is an error listing them all.
    for missing in (None, "", "  "):
        with pytest.raises(DeviceError, match="needs a device") as err:
            match_device(DEVICES, missing)
        text = str(err.value)
        assert "\n" not in text
        assert all(f"{d.index}: {d.name}" in text for d in DEVICES)


def test_match_device_errors_are_one_line_with_close_matches() -> None:
    with pytest.raises(DeviceError, match="ambiguous") as amb:
        match_device(DEVICES, "hw:0")
    assert "\n" not in str(amb.value)
    with pytest.raises(DeviceError, match="not found; close matches: pulse"):
        match_device(DEVICES, "pluse")
    with pytest.raises(DeviceError, match="index 9 does not exist"):
        match_device(DEVICES, 9)
    with pytest.raises(DeviceError, match="no audio devices"):
        match_device([], "scarlett")


def test_check_settings_reports_too_few_channels() -> None:
    with pytest.raises(DeviceError, match="has 2 input channel.*needs 3"):
        check_settings("scarlett", 48000, input_channels=3, devices=DEVICES)
    with pytest.raises(DeviceError, match="has 0 input channel"):
        check_settings("HDMI", 48000, devices=DEVICES)
    assert check_settings("scarlett", 48000, input_channels=2, devices=DEVICES).index == 1


@pytest.mark.parametrize(
    ("portaudio_text", "expected"),
    [  # PortAudio's Pa_GetErrorText wording (from memory of pa_front.c)
        ("Invalid sample rate [PaErrorCode -9997]", "does not support fs_hz = 44100"),
        ("Device unavailable [PaErrorCode -9985]", "is busy"),
        ("Invalid number of channels [PaErrorCode -9998]", "refuses the channel count"),
    ],
)
def test_portaudio_errors_become_clear_messages(portaudio_text: str, expected: str) -> None:
    err = audio.device_error(portaudio_text, DEVICES[1], 44100)
    assert expected in str(err) and "Scarlett" in str(err)


def test_missing_portaudio_is_one_line_naming_the_system_package(monkeypatch) -> None:
    class NoPortAudio:
        def find_spec(self, name, path=None, target=None):
            if name == "sounddevice":
                raise OSError("PortAudio library not found")
            return None

    monkeypatch.delitem(sys.modules, "sounddevice", raising=False)
    monkeypatch.setattr(sys, "meta_path", [NoPortAudio(), *sys.meta_path])
    with pytest.raises(DeviceError) as err:
        audio.list_devices()
    assert str(err.value) == audio.PORTAUDIO_MISSING
    assert "apt-get install libportaudio2" in str(err.value)


def test_missing_sounddevice_package_is_a_device_error(monkeypatch) -> None:
    monkeypatch.setitem(sys.modules, "sounddevice", None)
    with pytest.raises(DeviceError, match="pip install sounddevice"):
        audio.import_sounddevice()


def test_importing_the_rigs_does_not_import_sounddevice_or_jack() -> None:
    code = (
        "import sys\n"
        "import liveshape.rigs.audio, liveshape.rigs.jackrig, liveshape.rigs.calibration\n"
        "print('sounddevice' in sys.modules, 'jack' in sys.modules)\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.split() == ["False", "False"]


# -- the worker, against a fake sounddevice ---------------------------------------------------


class FakeCallbackStop(Exception):
    pass


class FakePortAudioError(Exception):
    pass


class FakeStream:
    """Calls the callback from a thread every ``period_s`` (2 ms: 2.7x faster than 256 frames
    at 48 kHz); input = the previous output block."""

    period_s = 0.002
    instances: list[FakeStream] = []

    def __init__(self, *, device, samplerate, blocksize, dtype, channels, callback,
                 finished_callback, clip_off, **kw):
        assert dtype == "float32" and clip_off is False and blocksize > 0
        self.n_in, self.n_out = channels
        self.b = blocksize
        self.callback, self.finished = callback, finished_callback
        self.played: list[np.ndarray] = []
        self.freeze = threading.Event()
        self._abort = threading.Event()
        self.aborted = False
        FakeStream.instances.append(self)

    def start(self):
        self._thread = threading.Thread(target=self._loop, daemon=True)
        self._thread.start()

    def _loop(self):
        prev = np.zeros((self.b, max(self.n_in, self.n_out)), np.float32)
        while not self._abort.is_set():
            if self.freeze.is_set():
                time.sleep(self.period_s)
                continue
            out = np.full((self.b, self.n_out), np.nan, np.float32)
            try:
                self.callback(prev[:, : self.n_in].copy(), out, self.b, None, 0)
            except FakeCallbackStop:
                self.played.append(out.copy())
                break
            self.played.append(out.copy())
            prev = np.zeros_like(prev)
            prev[:, : self.n_out] = out
            time.sleep(self.period_s)
        self.finished()

    def abort(self):
        self.aborted = True
        self._abort.set()
        self._thread.join()

    def close(self):
        self._abort.set()


@pytest.fixture
def fake_sd(monkeypatch):
    FakeStream.instances = []
    mod = types.SimpleNamespace(
        Stream=FakeStream, CallbackStop=FakeCallbackStop, PortAudioError=FakePortAudioError
    )
    monkeypatch.setattr(audio, "import_sounddevice", lambda: mod)
    monkeypatch.setattr(
        audio, "check_settings",
        lambda *a, **k: DeviceInfo(0, "fake", "fake", 2, 2, 48000.0, True),
    )
    return mod


def fake_rig(**kw) -> AudioRig:
    args = dict(block_size=B, lead_blocks=3, stall_timeout_s=0.5)
    args.update(kw)
    rig = AudioRig("fake", 48000, **args)
    rig._poll_s = 0.0002
    return rig


def played(k: int = -1) -> np.ndarray:
    return np.concatenate(FakeStream.instances[k].played)


def test_run_plays_the_source_and_pairs_drive_with_response_slots(fake_sd) -> None:
    rng = np.random.default_rng(5)
    x = np.clip(0.3 * rng.standard_normal(20 * B), -1, 1).astype(np.float32)
    x[:B] = 0.0
    rig = fake_rig(loopback=(1, 1), lead_blocks=8)  # 16 ms of slack against a busy machine
    rec = rig.play_record(x, pad_s=0.0, tail_s=0.0)
    out = played()
    n = x.size
    np.testing.assert_array_equal(out[:n, 0], x)  # leading silence: the start fade acts on zeros
    np.testing.assert_array_equal(out[:n, 1], x)  # loopback output carries the same drive
    np.testing.assert_array_equal(rec.drive_fs[:n], x)
    # the fake returns each output block as the next input block: a delay of exactly B samples
    np.testing.assert_array_equal(rec.response_fs[B:n], x[: n - B])
    np.testing.assert_array_equal(rec.loopback_fs[B:n], x[: n - B])
    # after the last block the held last sample fades out over one block, then silence
    g_fall = raised_cosine(B - np.arange(1, B + 1), B)
    np.testing.assert_allclose(out[n : n + B, 0], x[-1] * g_fall, rtol=1e-6, atol=1e-7)
    assert np.all(out[n + B :] == 0.0)
    st = rig.stats
    assert st.dry_blocks == 0 and st.updates == -(-n // B) and st.callback_errors == 0


class SlowSource(BufferSource):
    """Stalls once inside exchange: a controller deliberately too slow."""

    def __init__(self, x, stall_at: int, stall_s: float):
        super().__init__(x, B)
        self.calls, self.stall_at, self.stall_s = 0, stall_at, stall_s

    def exchange(self, response):
        self.calls += 1
        if self.calls == self.stall_at:
            threading.Event().wait(self.stall_s)
        return super().exchange(response)


def test_slow_source_underflows_are_counted_reported_and_faded(fake_sd) -> None:
    n = 150 * B
    x = (0.2 + 0.05 * np.arange(n) / n).astype(np.float32)  # each value marks its own slot
    src = SlowSource(x, stall_at=10, stall_s=0.05)  # 50 ms = about 25 callbacks of 2 ms
    rig = fake_rig(lead_blocks=2)
    rig.run(src)
    st = rig.stats
    assert st.dry_blocks >= 1
    assert src.underflows == st.dry_blocks  # every dry block reached the source
    out = played()[:, 0]
    # no step anywhere: the largest change is the raised-cosine slope bound for A = 0.25
    assert np.abs(np.diff(out)).max() <= 0.25 * np.pi / (2 * B) * (1 + 1e-6)
    # the timeline is kept: every sample is the one scheduled for its slot (x increases
    # strictly, so a shifted sample cannot match), silence, or in a fade block: the start,
    # and one out and one in per dry spell
    same = out[:n] == x
    assert same.sum() > 60 * B
    assert 1 <= st.dry_spells <= st.dry_blocks
    assert np.count_nonzero(~same & (out[:n] != 0.0)) <= (1 + 2 * st.dry_spells) * B


def test_should_stop_asks_the_source_to_stop(fake_sd) -> None:
    src = BufferSource(np.full(2000 * B, 0.1, np.float32), B)
    calls = []
    rig = fake_rig()
    rig.run(src, should_stop=lambda: len(calls) > 20, on_block=calls.append)
    assert src.stop_reason == "stop requested"
    assert len(calls) < 200
    assert np.all(played()[-3 * B :] == 0.0)


def test_ctrl_c_asks_the_source_to_stop_and_waits_for_the_ramp(fake_sd) -> None:
    src = BufferSource(np.full(5000 * B, 0.1, np.float32), B)
    timer = threading.Timer(0.05, _thread.interrupt_main)
    timer.start()
    try:
        fake_rig().run(src)
    finally:
        timer.cancel()
    assert "Ctrl-C" in src.stop_reason
    assert not FakeStream.instances[-1].aborted
    assert np.all(played()[-3 * B :] == 0.0)


class FailingSource(BufferSource):
    def exchange(self, response):
        self.n = getattr(self, "n", 0) + 1
        if self.n == 15:
            raise RuntimeError("equalizer blew up")
        return super().exchange(response)


def test_source_error_fades_out_and_is_raised_after_the_stream_stops(fake_sd) -> None:
    src = FailingSource(np.full(100 * B, 0.5, np.float32), B)
    with pytest.raises(RuntimeError, match="equalizer blew up"):
        fake_rig().run(src)
    out = played()[:, 0]
    assert np.abs(np.diff(out)).max() <= 0.5 * np.pi / (2 * B) * (1 + 1e-6)
    assert np.all(out[-3 * B :] == 0.0)


def test_stalled_stream_is_a_device_error(fake_sd) -> None:
    src = BufferSource(np.full(1000 * B, 0.1, np.float32), B)
    rig = fake_rig(stall_timeout_s=0.1, stop_timeout_s=0.2)
    timer = threading.Timer(0.03, lambda: FakeStream.instances[-1].freeze.set())
    timer.start()
    with pytest.raises(DeviceError, match="stalled"):
        rig.run(src)
    assert FakeStream.instances[-1].aborted  # a frozen stream cannot ramp: abort is the fallback


def test_bad_drive_block_shape_is_refused(fake_sd) -> None:
    class Short(BufferSource):
        def exchange(self, response):
            return np.zeros(B - 1, np.float32)

    with pytest.raises(ValueError, match="shape"):
        fake_rig().run(Short(np.zeros(10 * B), B))


def test_device_names_are_importable_from_audio() -> None:
    # the device logic lives in rigs.devices (handed the sounddevice module, never importing
    # it); rigs.audio keeps the names importable, the three that need PortAudio as wrappers
    from liveshape.rigs import devices

    for name in ("DeviceInfo", "match_device", "device_error"):
        assert getattr(audio, name) is getattr(devices, name)
    for name in ("list_devices", "check_settings", "rescan_devices"):
        assert getattr(audio, name).__module__ == "liveshape.rigs.audio"
