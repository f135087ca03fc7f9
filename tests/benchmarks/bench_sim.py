"""Speed of the simulated rig alone (figures, not pass/fail tests).

For each packaged plant preset, white-noise drive (0.1 FS rms) in blocks of 1024 and of 4096
samples at 48 kHz, as the controller feeds it; the figure is audio seconds simulated per CPU second
(:func:`time.process_time`), the best of three runs (other load on the machine only slows a run
down). The presets' noise, coil heating and protections are all on. A second
figure per preset runs the same rig with a sensor_gain and a resonance_shift fault to show the
cost of the model swaps (the coil-heating swaps are in every figure: the presets heat their coils).
Target: well above 50x real time, so that rig plus controller stay above it.

Run with ``python -m tests.benchmarks sim`` or ``python -m tests.benchmarks.bench_sim``.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from functools import partial
from typing import NamedTuple

import numpy as np

from liveshape.rigs.plant import load_plant, preset_names
from liveshape.rigs.sim import SimRig

FS_HZ = 48_000.0
BLOCKS = (1024, 4096)
REPEATS = 3
AUDIO_S = 20.0


class _Fault(NamedTuple):
    kind: str
    at_s: float
    value: float | None = None
    duration_s: float | None = None


def _speed(make_rig: Callable[[], SimRig], block: int, seconds: float) -> float:
    n_blocks = int(seconds * FS_HZ) // block
    x = 0.1 * np.random.default_rng(0).standard_normal(block * n_blocks)
    best = 0.0
    for _ in range(REPEATS):
        rig = make_rig()
        t0 = time.process_time()
        for i in range(n_blocks):
            rig.process(x[i * block:(i + 1) * block])
        cpu = time.process_time() - t0
        best = max(best, n_blocks * block / FS_HZ / max(cpu, 1e-9))
    return best


def run(report: Callable[[str, float, str], None]) -> None:
    for name in preset_names():
        plant = load_plant(name)
        faults = [_Fault("sensor_gain", 2.0, 0.8, 5.0), _Fault("resonance_shift", 4.0, 1.05)]
        for block in BLOCKS:
            report(f"sim_{name}_48k_block{block}",
                   _speed(partial(SimRig, plant, FS_HZ, seed=1), block, AUDIO_S), "x realtime")
            if plant.payload.resonances:
                report(f"sim_{name}_48k_block{block}_faults",
                       _speed(partial(SimRig, plant, FS_HZ, seed=1, faults=faults), block,
                              AUDIO_S),
                       "x realtime")


if __name__ == "__main__":
    from tests.benchmarks.__main__ import report as _report

    run(_report)
