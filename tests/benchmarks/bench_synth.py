"""Speed and memory of drive synthesis (figures, not pass/fail tests).

Synthesis of a 48 kHz float32 WAV of 10 and 60 minutes, measured side by side:

``stream``
    liveshape's :func:`~liveshape.record.drivefile.make_drive_file`: random-phase overlap-add frames
    streamed to disk, two passes (statistics, then writing with the Welch check).
``loop``
    The bare :class:`~liveshape.dsp.synth.RandomPhaseSynth` loop written with soundfile (one pass,
    no check, no scaling pass): the floor under ``stream``.
``naive``
    The whole record in one inverse FFT (random coefficients on ``n / 2 + 1`` lines, ``irfft``,
    scale to the peak, write at once), implemented only here, for comparison.

Each run is a fresh subprocess so its peak RSS is its own: the child's VmHWM from
``/proc/self/status`` (``ru_maxrss`` from :func:`os.wait4` where that is missing; on Linux it
also counts the parent's image from before ``exec``, which inflated the figure when the runner
had run memory-hungry benchmarks first). Targets for ``stream``: peak RSS < 200 MB at any
duration and at least 100x real time. WAVs go to a temporary folder and are deleted after each run.

Before the WAVs, ``synth.read_*``: audio seconds per CPU second of
:meth:`~liveshape.dsp.synth.RandomPhaseSynth.read` alone (best of 3 runs), 1024-sample blocks of
20-2000 Hz and 20-20000 Hz, and the controller's drive (20-1000 Hz clipped at 4 sigma, as in the
``control_alone_speed_*`` figures) in blocks of 1024 and 4096 samples.

The profile is the NAVMAT P-9492 screening shape (20-80 Hz +3 dB/oct to 0.04 g²/Hz, flat to
350 Hz, -3 dB/oct to 2000 Hz), a public broadband example.

Run with ``python -m tests.benchmarks synth`` or ``python -m tests.benchmarks.bench_synth``.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np

FS_HZ = 48_000
FRAME_LENGTH = 8192
DURATIONS_MIN = (10, 60)
METHODS = ("stream", "loop", "naive")
SEED = 1
_REPO = Path(__file__).resolve().parents[2]


def _spec():
    from liveshape.dsp.profile import Profile
    from liveshape.testdef.spec import ControlSettings, TestSpec

    asd_350 = 0.04
    prof = Profile(
        (20.0, 80.0, 350.0, 2000.0),
        (0.04 * (20 / 80), 0.04, asd_350, asd_350 * (350 / 2000)),  # +-3 dB/oct ~ f^(+-1)
        name="navmat-p9492-shape",
    )
    return TestSpec(
        name="bench", profile=prof, control=ControlSettings(fs_hz=FS_HZ, frame_length=FRAME_LENGTH)
    )


# ------------------------------------------------------------------------------ child side
def _child_stream(out: Path, duration_s: float) -> dict:
    from liveshape.record.drivefile import make_drive_file

    res = make_drive_file(_spec(), out, duration_s=duration_s, seed=SEED)
    return {"fraction_inside": res.psd_check.fraction_inside, "crest_factor": res.crest_factor}


def _child_loop(out: Path, duration_s: float) -> dict:
    import soundfile as sf

    from liveshape.dsp.synth import RandomPhaseSynth

    spec = _spec()
    synth = RandomPhaseSynth(FS_HZ, FRAME_LENGTH, seed=SEED, clip_sigma=4.0)
    synth.set_psd(spec.profile.lines(FS_HZ, FRAME_LENGTH))
    n = round(duration_s * FS_HZ)
    block = 1 << 16
    buf = np.empty(block)
    scale = 1.0 / (4.0 * synth.nominal_rms)  # the clip level is full scale
    with sf.SoundFile(out, "w", FS_HZ, 1, subtype="FLOAT", format="WAV") as wav:
        done = 0
        while done < n:
            m = min(block, n - done)
            x = synth.read(m, out=buf[:m])
            wav.write((x * scale).astype(np.float32))
            done += m
    return {"crest_factor": synth.stats.crest_factor}


def _child_naive(out: Path, duration_s: float) -> dict:
    import soundfile as sf

    spec = _spec()
    n = round(duration_s * FS_HZ)
    df = FS_HZ / n
    f = np.fft.rfftfreq(n, 1.0 / FS_HZ)
    psd = spec.profile.asd_at(f)
    rng = np.random.default_rng(SEED)
    amp = n * np.sqrt(psd * df / 2) / np.sqrt(2)  # complex Gaussian, mean square psd * df
    coef = (rng.standard_normal(f.size) + 1j * rng.standard_normal(f.size)) * amp
    x = np.fft.irfft(coef, n)
    x /= np.max(np.abs(x))
    sf.write(out, x.astype(np.float32), FS_HZ, subtype="FLOAT", format="WAV")
    return {}


def _child(method: str, out: str, duration_s: float) -> None:
    work = {"stream": _child_stream, "loop": _child_loop, "naive": _child_naive}[method]
    # imports before the clock starts: the figure is synthesis and writing, not start-up
    import soundfile  # noqa: F401

    import liveshape.record.drivefile  # noqa: F401
    import liveshape.testdef.spec  # noqa: F401

    _spec()
    t0 = time.perf_counter()
    extra = work(Path(out), duration_s)
    wall = time.perf_counter() - t0
    print(json.dumps({"wall_s": wall, "vm_hwm_mb": _vm_hwm_mb(), **extra}), flush=True)


def _vm_hwm_mb() -> float | None:
    """This process's own peak resident set (VmHWM, Linux), MB; None where unavailable.

    Unlike ``ru_maxrss`` of a child (which on Linux keeps the peak of the forked parent image
    from before ``exec``), VmHWM starts afresh with the new program, so a parent that holds a
    lot of memory does not inflate the child's figure.
    """
    try:
        with open("/proc/self/status", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) / 1024.0
    except OSError:
        return None
    return None


# ------------------------------------------------------------------------------ parent side
def _measure(method: str, duration_s: float, folder: Path) -> dict:
    """Run one synthesis in a fresh interpreter; return its wall time and peak RSS."""
    out = folder / f"{method}-{int(duration_s)}s.wav"
    cmd = [sys.executable, "-m", "tests.benchmarks.bench_synth", "--child", method, str(out),
           repr(float(duration_s))]  # fmt: skip
    with tempfile.TemporaryFile("w+") as log:
        proc = subprocess.Popen(cmd, cwd=_REPO, stdout=log)
        _, status, usage = os.wait4(proc.pid, 0)
        proc.returncode = os.waitstatus_to_exitcode(status)
        log.seek(0)
        text = log.read()
    for p in folder.iterdir():
        p.unlink()
    if proc.returncode != 0:
        raise RuntimeError(f"bench_synth child {method} {duration_s} s exited {proc.returncode}")
    result = json.loads(text.strip().splitlines()[-1])
    hwm = result.pop("vm_hwm_mb", None)
    result["peak_rss_mb"] = hwm if hwm is not None else usage.ru_maxrss / 1024.0  # Linux: kB
    return result


def _stream_rate(psd_band_hz: tuple[float, float], seconds: float, *, block: int = 1024,
                 clip_sigma: float | None = None) -> float:
    """Audio seconds per CPU second of RandomPhaseSynth.read alone at 48 kHz, best of 3 runs.

    ``time.process_time`` counts every thread of the process; the best run is the least
    disturbed one on a shared machine.
    """
    from liveshape.dsp.synth import RandomPhaseSynth

    best = 0.0
    for _ in range(3):
        synth = RandomPhaseSynth(FS_HZ, FRAME_LENGTH, seed=SEED, clip_sigma=clip_sigma)
        f = synth.f_hz
        synth.set_psd(np.where((f >= psd_band_hz[0]) & (f <= psd_band_hz[1]), 1e-3, 0.0))
        synth.set_gain(0.5)  # a steady gain other than 1, as in a test at a level
        out = np.empty(block)
        n = int(seconds * FS_HZ) // block
        t0 = time.process_time()
        for _ in range(n):
            synth.read(block, out=out)
        best = max(best, n * block / FS_HZ / max(time.process_time() - t0, 1e-9))
    return best


def run(report: Callable[[str, float, str], None]) -> None:
    report("synth.read_block1024_20_2000hz_realtime_factor", _stream_rate((20, 2000), 60), "x")
    report("synth.read_block1024_20_20000hz_realtime_factor", _stream_rate((20, 20000), 60), "x")
    # the controller's drive: the loudspeaker benchmark's 20-1000 Hz band, clipped at 4 sigma
    for block in (1024, 4096):
        rate = _stream_rate((20, 1000), 60, block=block, clip_sigma=4.0)
        report(f"synth.read_block{block}_20_1000hz_clip4_realtime_factor", rate, "x")
    with tempfile.TemporaryDirectory(prefix="liveshape-bench-") as tmp:
        folder = Path(tmp)
        for minutes in DURATIONS_MIN:
            duration_s = 60.0 * minutes
            for method in METHODS:
                r = _measure(method, duration_s, folder)
                key = f"synth.wav_{minutes}min_{method}"
                report(f"{key}_wall_time", r["wall_s"], "s")
                report(f"{key}_realtime_factor", duration_s / r["wall_s"], "x")
                report(f"{key}_peak_rss", r["peak_rss_mb"], "MB")
                if "fraction_inside" in r:
                    report(f"{key}_psd_fraction_inside", r["fraction_inside"], "")


if __name__ == "__main__":
    if len(sys.argv) == 5 and sys.argv[1] == "--child":
        _child(sys.argv[2], sys.argv[3], float(sys.argv[4]))
    else:
        from tests.benchmarks.__main__ import report as _report

        run(_report)
