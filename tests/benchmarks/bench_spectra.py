"""Speed and memory of the streaming spectra (figures, not pass/fail tests).

Run with ``python -m tests.benchmarks`` (all of them) or
``python -m tests.benchmarks.bench_spectra`` (this one).
"""

from __future__ import annotations

import time
import tracemalloc
from collections.abc import Callable

import numpy as np

from liveshape.spectra import CrossSpectrum, PsdAverager, estimate_delay

FS_HZ = 48_000.0
NPERSEG = 4096


def _rate(push: Callable[[np.ndarray, np.ndarray], None], x: np.ndarray, y: np.ndarray,
          block: int) -> float:
    """Samples per second of ``push`` over the whole record in blocks of ``block``."""
    t0 = time.perf_counter()
    for i in range(0, x.size, block):
        push(x[i:i + block], y[i:i + block])
    return x.size / (time.perf_counter() - t0)


def run(report: Callable[[str, float, str], None]) -> None:
    rng = np.random.default_rng(0)
    n = int(20 * FS_HZ)
    x = rng.standard_normal(n)
    y = 0.5 * x + 0.1 * rng.standard_normal(n)

    for averaging, n_avg in (("linear", None), ("exponential", 32)):
        for block in (256, 1024, 48_000):
            cs = CrossSpectrum(FS_HZ, NPERSEG, averaging=averaging, n_avg=n_avg)
            rate = _rate(cs.push, x, y, block)
            report(f"spectra.cross_{averaging}_block{block}_realtime_factor", rate / FS_HZ, "x")

    cs = CrossSpectrum(FS_HZ, NPERSEG, delay_samples=2400)
    rate = _rate(cs.push, x, y, 1024)
    report("spectra.cross_delayed_block1024_realtime_factor", rate / FS_HZ, "x")

    short = x[: int(FS_HZ)]
    cs = CrossSpectrum(FS_HZ, NPERSEG)
    rate = _rate(cs.push, short, short, 1)
    report("spectra.cross_block1_samples_per_s", rate, "samples/s")

    pa = PsdAverager(FS_HZ, NPERSEG)
    rate = _rate(lambda a, _b: pa.push(a), x, y, 1024)
    report("spectra.psd_block1024_realtime_factor", rate / FS_HZ, "x")

    # memory held between pushes does not grow with the samples pushed
    tracemalloc.start()
    cs = CrossSpectrum(FS_HZ, NPERSEG, averaging="exponential", n_avg=32, delay_samples=2400)
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
