"""The audio rig through a real audio server: JACK (dummy driver) with the virtual rig client.

Realtime-paced by design (a few seconds per run). One private server for the session
(conftest.py, tests/jackserver.py); PortAudio is re-initialized after the server and each virtual
rig start, so the import order of sounddevice does not matter.

Outside references: the known values of the simulated plant (its card scales and delay), the
JACK period (a path through JACK clients includes one JACK period, jack_iodelay(1) manual page;
docs/methods.md, "Loop delay through JACK"), the
raised-cosine fade bound g(d) = (1 - cos(pi d / R)) / 2 at distance d from silence (calculus),
scipy.signal.sosfreqz for the loopback cable.
"""

from __future__ import annotations

import _thread
import threading

import numpy as np
import pytest
from jackserver import virtual_rig
from scipy import signal

from liveshape.errors import DeviceError
from liveshape.rigs import audio
from liveshape.rigs import calibration as cal
from liveshape.rigs.jackrig import CableModel, JackTap, PlantProcessor, jack_loop_delay_samples
from liveshape.rigs.plant import load_plant, plant_from_mapping
from liveshape.schema import Where

FS = 48000.0
PLANT = "liveshape-plant"

#: A chain with distinct, known scales: 2 V/FS out, 4 V/FS in, 3 Hz and 2 Hz AC coupling,
#: 100 samples of card delay, flat ideal shaker (20 g/V) and a 100 mV/g sensor.
SCALED = {
    "name": "scaled",
    "card": {"out_v_per_fs": 2.0, "in_v_per_fs": 4.0, "out_highpass_hz": 3.0,
             "in_highpass_hz": 2.0, "delay_samples": 100, "in_noise_fs_rms": 1e-6},
    "shaker": {"model": "ideal", "g_per_v": 1.0},
}


def scaled_plant():
    return plant_from_mapping(SCALED, Where("test plant"))


# -- offline parts of the virtual rig (no server) ---------------------------------------------


def test_cable_model_matches_its_card_filters_delay_and_scale() -> None:
    plant = scaled_plant()
    cable = CableModel(plant.card, FS)
    cable._noise = 0.0
    x = np.zeros(96000)
    x[0] = 0.5
    h = np.concatenate([cable.process(x[:5000]), cable.process(x[5000:])]) / 0.5
    assert np.all(h[:100] == 0.0)  # the card's delay
    sos = np.vstack([signal.butter(1, f, "highpass", fs=FS, output="sos") for f in (3.0, 2.0)])
    w = 2 * np.pi * np.array([1.0, 3.0, 10.0, 1000.0]) / FS
    want = 0.5 * signal.sosfreqz(sos, worN=w)[1] * np.exp(-1j * w * 100)  # gain 2 V / 4 V
    got = np.array([np.sum(h * np.exp(-1j * wk * np.arange(h.size))) for wk in w])
    # the impulse response is cut after 2 s = 25 time constants of the 2 Hz corner
    # (exp(-25) ~ 1e-11); the rest is float32 rounding of the output (~1e-7 per sample)
    np.testing.assert_allclose(got, want, rtol=1e-4, atol=1e-5)


def test_plant_processor_fills_outputs_in_place_and_never_raises() -> None:
    proc = PlantProcessor("ideal", FS, seed=1)
    drive = np.full(256, 0.25, np.float32)
    out = np.zeros(256, np.float32)
    loop_out = np.zeros(256, np.float32)
    proc.run(drive, out, drive, loop_out)
    assert proc.errors == 0 and proc.periods == 1
    assert np.all(out[:32] == pytest.approx(0.0, abs=1e-6))  # ideal preset: 32 samples delay
    assert np.allclose(out[32:], 0.25, atol=1e-6) and np.allclose(loop_out[32:], 0.25)
    proc.run(np.zeros(256, np.float32), np.zeros(10, np.float32))  # wrong output size
    assert proc.errors == 1 and proc.last_error.startswith("ValueError")


def test_jack_path_delay_rule() -> None:
    assert jack_loop_delay_samples(1024, 512) == 1536
    assert jack_loop_delay_samples(1024, 512, host_period=True, plant_delay=32) == 1056


# -- through the server -----------------------------------------------------------------------


def raised_cosine(d, r):
    return 0.5 - 0.5 * np.cos(np.pi * np.clip(d, 0, r) / r)


def edge_report(x: np.ndarray, r: int) -> tuple[int, float]:
    """Silence boundaries in ``x`` and the worst ratio |x[b +- d]| / (peak g(d)), d = 1..r.

    A ratio <= 1 means every sample near the edge of silence lies inside the raised-cosine
    envelope of an r-sample fade of the largest drive sample; an abrupt start or cut gives a
    ratio of order (drive sample / peak) / g(1) ~ 1e5.
    """
    peak = float(np.max(np.abs(x)))
    zero = x == 0.0
    edges = np.flatnonzero(zero[:-1] != zero[1:])
    g = raised_cosine(np.arange(1, r + 1), r)
    worst = 0.0
    for e in edges:
        if zero[e]:  # silence ends at e: signal starts at e + 1
            seg = x[e + 1 : e + 1 + r]
        else:  # signal ends at e: silence from e + 1
            seg = x[max(0, e + 1 - r) : e + 1][::-1]
        worst = max(worst, float(np.max(np.abs(seg) / (peak * g[: seg.size]))))
    return edges.size, worst


@pytest.mark.jack
def test_devices_list_the_virtual_rig_and_settings_are_checked(jack_server) -> None:
    with virtual_rig("ideal", seed=1):
        devs = {d.name: d for d in audio.list_devices()}
        assert PLANT in devs, sorted(devs)
        d = devs[PLANT]
        assert "JACK" in d.host_api and d.full_duplex
        assert (d.max_input_channels, d.max_output_channels, d.default_fs_hz) == (2, 2, FS)
        with pytest.raises(DeviceError, match="does not support fs_hz = 44100"):
            audio.check_settings(PLANT, 44100)
        with pytest.raises(DeviceError, match="has 2 input channel.*needs 3"):
            audio.check_settings(PLANT, FS, input_channels=3)
        with pytest.raises(DeviceError, match="close matches: liveshape-plant"):
            audio.check_settings("liveshape-plnat", FS)


@pytest.mark.jack
@pytest.mark.parametrize(("block", "host_period"), [(1024, False), (512, False), (1024, True)])
def test_loop_delay_through_the_stream_is_the_known_path_delay(jack_server, block, host_period):
    plant = scaled_plant()
    with virtual_rig(plant, seed=2):
        rig = audio.AudioRig(PLANT, FS, block_size=block, loopback=(1, 1),
                             host_period=host_period)
        for channel in ("control", "loopback"):
            d = cal.measure_loop_delay(rig, channel=channel, repeats=3)
            want = jack_loop_delay_samples(jack_server.period_frames, block,
                                           host_period=host_period,
                                           plant_delay=plant.card.delay_samples)
            assert d.per_burst == (want,) * 3, (channel, d)  # error target: 0 samples
        assert rig.stats.dry_blocks == 0


@pytest.mark.jack
def test_volts_per_full_scale_through_the_stream(jack_server) -> None:
    plant = scaled_plant()
    with virtual_rig(plant, seed=3), JackTap(["PortAudio:out_0"]) as tap:
        rig = audio.AudioRig(PLANT, FS, loopback=(1, 1))

        def voltmeter(f_hz, level_fs):
            # an ideal true-rms meter across the card output: the tap sees the stream's output
            # port; the card turns FS into volts by out_v_per_fs (the plant's known value)
            start = tap.frames + int(0.3 * FS)  # after the source's 0.2 s ramp
            while tap.frames < start + int(0.5 * FS):
                threading.Event().wait(0.02)
            x = tap.data()[start : start + int(0.5 * FS), 0].astype(float)
            return float(np.sqrt(np.mean(x**2))) * plant.card.out_v_per_fs

        original = rig.start
        rig.start = lambda src, **kw: original(src, on_open=tap.connect, **kw)
        out = cal.calibrate_output(rig, voltmeter, level_fs=0.5)
        del rig.start
        # 0.5 s of a 400 Hz tone is 200 whole periods: the rms is exact up to float32 rounding
        assert out.v_per_fs == pytest.approx(plant.card.out_v_per_fs, rel=1e-4)
        inp = cal.calibrate_input(rig, out_v_per_fs=out.v_per_fs)
        # 400 Hz through 3 Hz and 2 Hz first-order corners loses 4.1e-5 of the amplitude
        assert inp.v_per_fs == pytest.approx(plant.card.in_v_per_fs, rel=2e-4)


# -- closed loop through the server -----------------------------------------------------------

N_FRAME = 4096  # df = 11.7 Hz at 48 kHz: the update timing of the controller tests, twice as fast
#: Drive blocks produced ahead: 170 ms. The controller's slowest exchange (the connection
#: analysis) took 38 ms unloaded; the tests share two cores with other work and the in-process
#: plant, so they keep a margin of 4x (bench_audio measures the update times).
LEAD = 8


def make_spec(*, steps=(-3.0, 0.0), hold_s=1.0, full_s=3.0, faults=(), seed=1):
    from liveshape.dsp.profile import Profile
    from liveshape.testdef.spec import ControlSettings, SafetyLimits, Schedule, TestSpec
    from liveshape.testdef.tolerance import Tolerance

    prof = Profile((20.0, 1000.0), (1.0 / 980.0, 1.0 / 980.0), "flat 1 grms")
    return TestSpec(
        name="jack", profile=prof, tolerance=Tolerance(),
        schedule=Schedule(steps_db=steps, hold_s=hold_s, full_level_s=full_s),
        control=ControlSettings(fs_hz=FS, frame_length=N_FRAME), safety=SafetyLimits(),
        faults=tuple(faults), seed=seed)


def tapped_run(rig, controller, tap, **kw):
    """Run ``controller`` through ``rig`` with ``tap`` connected before the stream starts."""
    events: list = []

    def on_block(_block):
        events.extend(controller.drain_events())

    result = rig.run(controller, on_open=tap.connect, on_block=on_block, **kw)
    events.extend(controller.drain_events())
    threading.Event().wait(0.1)  # let the tap record the closing zero blocks
    return result, events, tap.data()[:, 0]


def assert_no_step(x: np.ndarray, block: int) -> None:
    """Every start and end of drive is inside the raised-cosine envelope of a one-block fade
    (the callback's own fade; the controller's ramps are longer and lie below it)."""
    n_edges, worst = edge_report(x, block)
    assert n_edges >= 2, "the tap saw no start and end of the drive"
    assert worst <= 1.0 + 1e-5, f"drive left the fade envelope by a factor {worst:.3g}"
    peak = float(np.max(np.abs(x)))
    edge = np.flatnonzero((x[:-1] == 0.0) != (x[1:] == 0.0))
    # the first and last non-zero samples: at most g(1) = 2.4e-6 of the peak at R = 1024
    assert max(abs(float(x[e + 1] if x[e] == 0.0 else x[e])) for e in edge) <= peak * 2.4e-6


@pytest.mark.jack
def test_closed_loop_converges_through_the_real_stream(jack_server) -> None:
    from liveshape.control.controller import Controller
    from liveshape.rigs.sim import SimRig

    spec = make_spec()
    with virtual_rig("loudspeaker", seed=4) as vr, JackTap(["PortAudio:out_0"]) as tap:
        rig = audio.AudioRig(PLANT, FS, block_size=1024, lead_blocks=LEAD)
        ctl = Controller(spec, vr.processor.calibration, seed=1)
        result, events, drive = tapped_run(rig, ctl, tap)
    st = rig.stats
    assert result.status == "completed", result.abort_reason
    assert result.time_at_full_level_s >= spec.schedule.full_level_s
    assert abs(result.final_rms_error_db) < spec.tolerance.rms_alarm_db
    assert result.final_lines_outside_abort == 0
    assert st.dry_blocks == 0 and st.callback_errors == 0
    # the controller's measured delay = exchange lead + JACK path + a lag on the main lobe of
    # the plant's own impulse response (its band-limited correlation peak need not be the
    # broadband peak sample): |h(lag)| >= max|h| / 2
    probe = SimRig(load_plant("loudspeaker"), FS, seed=0)
    imp = np.zeros(8192)
    imp[0] = 1.0
    h = np.abs(probe.process(imp))
    path = LEAD * 1024 + jack_loop_delay_samples(jack_server.period_frames, 1024)
    lag = ctl.loop_delay_samples - path
    assert 0 <= lag < h.size and h[lag] >= 0.5 * h.max(), (lag, int(np.argmax(h)))
    assert_no_step(drive, 1024)  # start and normal stop


@pytest.mark.jack
def test_ctrl_c_ramps_down_and_stops(jack_server) -> None:
    from liveshape.control.controller import Controller

    with virtual_rig("ideal", seed=5) as vr, JackTap(["PortAudio:out_0"]) as tap:
        rig = audio.AudioRig(PLANT, FS, lead_blocks=LEAD)
        ctl = Controller(make_spec(full_s=60.0), vr.processor.calibration, seed=2)
        timer = threading.Timer(4.0, _thread.interrupt_main)  # Ctrl-C in the middle of identify
        timer.start()
        try:
            result, events, drive = tapped_run(rig, ctl, tap)
        finally:
            timer.cancel()
    assert result.status == "stopped" and "Ctrl-C" in result.abort_reason
    assert np.max(np.abs(drive)) > 1e-3  # it was really driving when interrupted
    assert_no_step(drive, 1024)


@pytest.mark.jack
def test_plant_fault_aborts_with_a_ramp(jack_server) -> None:
    from liveshape.control.controller import Controller
    from liveshape.testdef.spec import FaultSpec

    faults = [FaultSpec("sensor_detached", at_s=7.0)]  # plant time since the rig started
    with virtual_rig("ideal", seed=6, faults=faults) as vr, JackTap(["PortAudio:out_0"]) as tap:
        rig = audio.AudioRig(PLANT, FS, lead_blocks=LEAD)
        ctl = Controller(make_spec(full_s=60.0), vr.processor.calibration, seed=3)
        result, events, drive = tapped_run(rig, ctl, tap)
    assert result.status == "aborted", result
    assert result.trip is not None
    assert_no_step(drive, 1024)


@pytest.mark.jack
def test_virtual_rig_killed_mid_run_is_a_controlled_abort(jack_server) -> None:
    from liveshape.control.controller import Controller
    from liveshape.rigs.sim import SimRig

    truth = SimRig(load_plant("ideal"), FS).calibration
    with virtual_rig("ideal", seed=7, in_process=False) as vr, \
            JackTap(["PortAudio:out_0"]) as tap:
        rig = audio.AudioRig(PLANT, FS, lead_blocks=LEAD)
        ctl = Controller(make_spec(full_s=60.0), truth, seed=4)
        timer = threading.Timer(6.0, vr.kill)
        timer.start()
        try:
            result, events, drive = tapped_run(rig, ctl, tap)
        finally:
            timer.cancel()
    assert result.status == "aborted" and result.trip is not None, result
    assert_no_step(drive, 1024)


class LateController:
    """Wraps a controller and stalls once for ``stall_s`` inside exchange (too slow on purpose)."""

    def __init__(self, ctl, at_call: int, stall_s: float) -> None:
        self.ctl, self.at, self.stall_s, self.calls = ctl, at_call, stall_s, 0
        self.reported = 0

    def exchange(self, response):
        self.calls += 1
        if self.calls == self.at:
            threading.Event().wait(self.stall_s)
        return self.ctl.exchange(response)

    def report_underflow(self, count):
        self.reported += count
        self.ctl.report_underflow(count)

    def __getattr__(self, name):
        return getattr(self.ctl, name)


@pytest.mark.jack
def test_underflows_are_counted_reported_and_abort_the_run(jack_server) -> None:
    from liveshape.control.controller import Controller

    with virtual_rig("ideal", seed=8) as vr, JackTap(["PortAudio:out_0"]) as tap:
        rig = audio.AudioRig(PLANT, FS, lead_blocks=LEAD)
        ctl = Controller(make_spec(full_s=60.0), vr.processor.calibration, seed=5)
        # call 30 is 0.64 s in (the silent background look); 0.5 s is 3x the 170 ms lead
        late = LateController(ctl, at_call=30, stall_s=0.5)
        result, events, drive = tapped_run(rig, late, tap)
    st = rig.stats
    assert st.dry_blocks >= 1 and late.reported == st.dry_blocks
    assert result.status == "aborted" and result.trip.rule == "controller_late"
    t_stall = 30 * 1024 / FS
    assert t_stall <= result.trip.t_s <= t_stall + 0.5 + LEAD * 1024 / FS  # this stall tripped it
    assert_no_step(drive, 1024)


def test_missing_audio_stack_skips_locally_and_fails_in_ci(monkeypatch) -> None:
    from jackserver import skip_or_fail

    monkeypatch.setenv("CI", "true")
    with pytest.raises(pytest.fail.Exception, match="cannot run in CI: no jackd"):
        skip_or_fail("no jackd")
    monkeypatch.setenv("CI", "false")
    with pytest.raises(pytest.skip.Exception):
        skip_or_fail("no jackd")


@pytest.mark.jack
def test_serve_announces_itself_and_returns_when_the_server_stops(jack_server) -> None:
    import os
    import subprocess
    import sys
    from pathlib import Path

    from jackserver import start_jack_server, stop_server

    other = start_jack_server()  # a second private server, never seen by PortAudio
    root = str(Path(__file__).resolve().parents[1])
    env = dict(os.environ, PYTHONPATH=root + os.pathsep + os.environ.get("PYTHONPATH", ""))
    proc = subprocess.Popen(
        [sys.executable, "-m", "liveshape.rigs.jackrig", "--plant", "ideal", "--server",
         other.name, "--name", "plant-x", "--no-loopback"],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env)
    try:
        assert proc.stdout.readline().split() == ["ready", "plant-x", "48000", "1024"]
    finally:
        stop_server(other)
    assert proc.wait(timeout=10) == 0
    proc.stdout.close()
    proc.stderr.close()


def test_jackrig_command_line_refuses_unknown_options() -> None:
    from liveshape.errors import ConfigError
    from liveshape.rigs.jackrig import main

    with pytest.raises(ConfigError, match="option '--plnt' is unknown"):
        main(["--plnt", "ideal"])


@pytest.mark.jack
@pytest.mark.parametrize("how", ["trip", "ctrl_c"])
def test_the_drive_is_quiet_at_the_port_within_the_stop_time(jack_server, how) -> None:
    # The README's promise: a trip or a stop ramps the drive down within 0.25 s. The drive
    # already queued ahead (LEAD blocks, 0.17 s) must not play at full level first. Measured
    # from the callback's output position when the worker saw the trip or stop to the end of
    # the fade, and checked on the independent tap: the drive ends with no step.
    from liveshape.control.controller import Controller
    from liveshape.testdef.spec import FaultSpec

    faults = [FaultSpec("sensor_detached", at_s=7.0)] if how == "trip" else []
    with virtual_rig("ideal", seed=9, faults=faults) as vr, \
            JackTap(["PortAudio:out_0"]) as tap:
        rig = audio.AudioRig(PLANT, FS, lead_blocks=LEAD, stop_fade_s=0.25)
        ctl = Controller(make_spec(full_s=60.0), vr.processor.calibration, seed=3)
        timer = threading.Timer(5.0, _thread.interrupt_main) if how == "ctrl_c" else None
        if timer is not None:
            timer.start()
        try:
            result, events, drive = tapped_run(rig, ctl, tap)
        finally:
            if timer is not None:
                timer.cancel()
    assert result.status == ("aborted" if how == "trip" else "stopped"), result
    core = rig._core
    assert core.fade_asked_frame >= 0 and core.fade_done_frame > core.fade_asked_frame
    stop_s = (core.fade_done_frame - core.fade_asked_frame) / FS
    print(f"{how}: decision to quiet at the port {stop_s:.3f} s")
    assert stop_s <= 0.25 - 1024 / FS  # leaves a block for the worker's reaction
    assert np.max(np.abs(drive)) > 1e-3
    assert_no_step(drive, 1024)
