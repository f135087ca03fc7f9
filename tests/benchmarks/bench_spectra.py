"""Speed and memory of the streaming spectra (figures, not pass/fail tests).

Run with ``python -m tests.benchmarks`` (all of them) or
``python -m tests.benchmarks.bench_spectra`` (this one).

Speed is audio-seconds per CPU-second at 48 kHz (``time.process_time``, all threads counted, so
a threaded BLAS call cannot hide behind the wall clock), for both streaming classes, linear and
exponential averaging, ``nperseg`` 8192 and 4096 and blocks of 256, 1024 and 4096 samples, plus
the 65536-sample blocks the drive-file writer pushes. Each figure is the best of ``REPEATS``
runs on a fresh object: the machine is shared, and the best run is the least disturbed one.
"""

from __future__ import annotations

import time
import tracemalloc
from collections.abc import Callable

import numpy as np

from liveshape.dsp.spectra import CrossSpectrum, PsdAverager, estimate_delay

FS_HZ = 48_000.0
NPERSEGS = (8192, 4096)
BLOCKS = (256, 1024, 4096)
DRIVE_FILE_BLOCK = 1 << 16
RECORD_S = 20.0
SPEED_RECORD_S = 6.0
REPEATS = 3


def _audio_s_per_cpu_s(push: Callable[[np.ndarray, np.ndarray], None], x: np.ndarray,
                       y: np.ndarray, block: int) -> float:
    """Audio seconds pushed per CPU second over the whole record in blocks of ``block``."""
    t0 = time.process_time()
    for i in range(0, x.size, block):
        push(x[i:i + block], y[i:i + block])
    return x.size / FS_HZ / max(time.process_time() - t0, 1e-9)


def _best_rate(make: Callable[[], object], cross: bool, x: np.ndarray, y: np.ndarray,
               block: int) -> float:
    """Best of ``REPEATS`` runs of :func:`_audio_s_per_cpu_s`, each on a new object."""
    best = 0.0
    for _ in range(REPEATS):
        obj = make()
        push = obj.push if cross else (lambda a, _b, p=obj: p.push(a))
        best = max(best, _audio_s_per_cpu_s(push, x, y, block))
    return best


def run(report: Callable[[str, float, str], None]) -> None:
    rng = np.random.default_rng(0)
    n = int(RECORD_S * FS_HZ)
    x = rng.standard_normal(n)
    y = 0.5 * x + 0.1 * rng.standard_normal(n)

    xs, ys = x[: int(SPEED_RECORD_S * FS_HZ)], y[: int(SPEED_RECORD_S * FS_HZ)]
    for nperseg in NPERSEGS:
        for averaging, n_avg in (("linear", None), ("exponential", 32)):
            for block in BLOCKS:
                for name, cls in (("cross", CrossSpectrum), ("psd", PsdAverager)):
                    rate = _best_rate(
                        lambda c=cls, n=nperseg, a=averaging, k=n_avg: c(
                            FS_HZ, n, averaging=a, n_avg=k),
                        name == "cross", xs, ys, block,
                    )
                    report(f"spectra.{name}_{averaging}_n{nperseg}_block{block}", rate,
                           "audio-s/CPU-s")
        rate = _best_rate(lambda n=nperseg: PsdAverager(FS_HZ, n), False, x, y,
                          DRIVE_FILE_BLOCK)
        report(f"spectra.psd_linear_n{nperseg}_block{DRIVE_FILE_BLOCK}", rate, "audio-s/CPU-s")

    rate = _best_rate(lambda: CrossSpectrum(FS_HZ, 4096, delay_samples=2400), True, xs, ys,
                      1024)
    report("spectra.cross_delayed_n4096_block1024", rate, "audio-s/CPU-s")

    short = x[: int(FS_HZ)]
    cs = CrossSpectrum(FS_HZ, 4096)
    rate = _audio_s_per_cpu_s(cs.push, short, short, 1)
    report("spectra.cross_n4096_block1", rate * FS_HZ, "samples/CPU-s")

    # memory held between pushes does not grow with the samples pushed
    tracemalloc.start()
    cs = CrossSpectrum(FS_HZ, 4096, averaging="exponential", n_avg=32, delay_samples=2400)
    cs.push(x[:1024], y[:1024])
    base = tracemalloc.get_traced_memory()[0]
    for i in range(1024, n, 1024):
        cs.push(x[i:i + 1024], y[i:i + 1024])
    grown = tracemalloc.get_traced_memory()[0] - base
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    report("spectra.cross_state_growth_over_20s", grown / 1024, "KiB")
    report("spectra.cross_peak_traced_memory", peak / 1024, "KiB")

    rec = x[: int(2 * FS_HZ)]
    lagged = np.concatenate((np.zeros(1234), rec[:-1234]))
    t0 = time.perf_counter()
    est = estimate_delay(rec, lagged, max_lag=int(0.2 * FS_HZ))
    report("spectra.estimate_delay_2s_ms", (time.perf_counter() - t0) * 1e3, "ms")
    report("spectra.estimate_delay_error", abs(est.samples - 1234), "samples")


if __name__ == "__main__":
    run(lambda name, value, unit: print(f"{name}: {value:.6g} {unit}"))
