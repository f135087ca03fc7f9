"""Realtime audio benchmark: a closed-loop run through JACK with a CPU-busy numpy thread.

A private ``jackd -d dummy`` at 48 kHz with 256-frame periods, the virtual rig (loudspeaker
preset) in its own process, and in this process the controller, the full-duplex stream with
256-frame blocks and a thread doing numpy work (FFTs and array math) the whole time.

Figures: drive underflows (callbacks that found the drive ring dry, target 0) and PortAudio's
own underflow flags; callback and update (``exchange``) duration median and max; this process's
CPU in % of one core, and the part of it that is not the busy thread; the loop delay measured by
bursts (calibration.measure_loop_delay) and by the controller, minus the virtual rig's true delay
(target 0 samples).

Duration: ``LIVESHAPE_BENCH_AUDIO_S`` seconds of run (default 120);
``LIVESHAPE_BENCH_AUDIO_BUSY=0`` leaves the busy thread out (for comparison).
"""

from __future__ import annotations

import os
import resource
import threading
import time

import numpy as np

FS = 48000.0
BLOCK = 256
#: Drive produced ahead: 32 blocks of 256 = 171 ms, above the controller's slowest update.
LEAD = 32


def _busy(stop: threading.Event, cpu_s: list[float]) -> None:
    """Single-threaded numpy work (FFTs and array math; no multithreaded BLAS, which would
    take both cores away from the audio server rather than test this process)."""
    rng = np.random.default_rng(0)
    v = rng.standard_normal(1 << 16)
    t0 = time.thread_time()
    while not stop.is_set():
        spec = np.fft.rfft(v)
        v = np.fft.irfft(spec * np.exp(-np.abs(spec) * 1e-3), n=v.size)
        np.tanh(v, out=v)
        v += 1e-3 * rng.standard_normal(v.size)
    cpu_s.append(time.thread_time() - t0)


def _spec(duration_s: float):
    from liveshape.dsp.profile import Profile
    from liveshape.testdef.spec import ControlSettings, SafetyLimits, Schedule, TestSpec
    from liveshape.testdef.tolerance import Tolerance

    prof = Profile((20.0, 1000.0), (1.0 / 980.0, 1.0 / 980.0), "flat 1 grms")
    return TestSpec(name="bench", profile=prof, tolerance=Tolerance(),
                    schedule=Schedule(steps_db=(-6.0, -3.0, 0.0), hold_s=2.0,
                                      full_level_s=10 * duration_s),
                    control=ControlSettings(fs_hz=FS), safety=SafetyLimits(), seed=1)


def run(report) -> None:
    from tests.jackserver import jack_session, missing_reason, virtual_rig

    reason = missing_reason()
    if reason is not None:
        report("audio_bench_skipped", 1, f"flag ({reason})")
        return
    from liveshape.control.controller import Controller
    from liveshape.rigs import audio
    from liveshape.rigs import calibration as cal
    from liveshape.rigs.jackrig import jack_loop_delay_samples
    from liveshape.rigs.plant import load_plant
    from liveshape.rigs.sim import SimRig

    duration_s = float(os.environ.get("LIVESHAPE_BENCH_AUDIO_S", "120"))
    plant = load_plant("loudspeaker")
    truth = SimRig(plant, FS, seed=0)
    imp = np.zeros(8192)
    imp[0] = 1.0
    main_lobe = int(np.argmax(np.abs(truth.process(imp))))  # lag of the impulse-response peak
    with jack_session(fs_hz=int(FS), period_frames=BLOCK) as server, \
            virtual_rig("loudspeaker", seed=1, in_process=False):
        # the JACK path; the plant's own delay (card delay and its impulse-response peak) is
        # main_lobe, from the plant's impulse response
        true_delay = jack_loop_delay_samples(server.period_frames, BLOCK)
        rig = audio.AudioRig("liveshape-plant", FS, block_size=BLOCK, lead_blocks=LEAD)
        burst = cal.measure_loop_delay(rig, repeats=5)
        report("audio_burst_delay_error", burst.samples - true_delay - main_lobe, "samples")
        report("audio_burst_delay_spread", burst.spread_samples, "samples")

        ctl = Controller(_spec(duration_s), SimRig(plant, FS).calibration, seed=2)
        rig = audio.AudioRig("liveshape-plant", FS, block_size=BLOCK, lead_blocks=LEAD)
        stop, busy_cpu = threading.Event(), []
        busy = threading.Thread(target=_busy, args=(stop, busy_cpu), daemon=True)
        with_busy = os.environ.get("LIVESHAPE_BENCH_AUDIO_BUSY", "1") != "0"
        if with_busy:
            busy.start()
        t_end = time.monotonic() + duration_s
        r0, w0 = resource.getrusage(resource.RUSAGE_SELF), time.monotonic()
        try:
            result = rig.run(ctl, should_stop=lambda: time.monotonic() >= t_end)
        finally:
            stop.set()
            if with_busy:
                busy.join()
        r1, w1 = resource.getrusage(resource.RUSAGE_SELF), time.monotonic()
    st = rig.stats
    wall = w1 - w0
    cpu = (r1.ru_utime - r0.ru_utime) + (r1.ru_stime - r0.ru_stime)
    report("audio_busy_thread", int(with_busy), "flag")
    report("audio_run_duration", wall, "s")
    report("audio_run_status", result.status, "")
    if result.abort_reason:
        report("audio_run_stop_reason", repr(result.abort_reason), "")
    report("audio_drive_underflows", st.dry_blocks, "blocks")
    report("audio_portaudio_output_underflows", st.output_underflows, "flags")
    report("audio_portaudio_input_overflows", st.input_overflows, "flags")
    report("audio_callback_median", 1e6 * st.callback_median_s, "us")
    report("audio_callback_max", 1e6 * st.callback_max_s, "us")
    report("audio_update_median", 1e3 * st.update_median_s, "ms")
    report("audio_update_max", 1e3 * st.update_max_s, "ms")
    report("audio_block_period", 1e3 * BLOCK / FS, "ms")
    report("audio_lead", 1e3 * LEAD * BLOCK / FS, "ms")
    report("audio_process_cpu", 100.0 * cpu / wall, "% of one core")
    report("audio_process_cpu_without_busy_thread",
           100.0 * (cpu - (busy_cpu[0] if busy_cpu else 0.0)) / wall, "% of one core")
    if ctl.loop_delay_samples is not None:
        measured = ctl.loop_delay_samples - LEAD * BLOCK  # minus the exchange lead
        report("audio_controller_delay_error", measured - true_delay - main_lobe, "samples")
