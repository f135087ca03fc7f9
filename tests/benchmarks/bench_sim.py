"""Speed of the simulated rig alone (figures, not pass/fail tests).

For each packaged plant preset, white-noise drive (0.1 FS rms) in blocks of 4096 samples at
48 kHz, as the controller feeds it; the figure is audio seconds simulated per CPU second
(:func:`time.process_time`). The presets' noise, coil heating and protections are all on. A second
figure per preset runs the same rig with a sensor_gain and a resonance_shift fault to show the
cost of the model swaps. Target: well above 50x real time, so that rig plus controller stay above
it.

Run with ``python -m tests.benchmarks sim`` or ``python -m tests.benchmarks.bench_sim``.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from typing import NamedTuple

import numpy as np

from liveshape.rigs.plant import load_plant, preset_names
from liveshape.rigs.sim import SimRig

FS_HZ = 48_000.0
BLOCK = 4096
AUDIO_S = 20.0


class _Fault(NamedTuple):
    kind: str
    at_s: float
    value: float | None = None
    duration_s: float | None = None


def _speed(rig: SimRig, seconds: float) -> float:
    n_blocks = int(seconds * FS_HZ) // BLOCK
    x = 0.1 * np.random.default_rng(0).standard_normal(BLOCK * n_blocks)
    t0 = time.process_time()
    for i in range(n_blocks):
        rig.process(x[i * BLOCK:(i + 1) * BLOCK])
    cpu = time.process_time() - t0
    return n_blocks * BLOCK / FS_HZ / max(cpu, 1e-9)


def run(report: Callable[[str, float, str], None]) -> None:
    for name in preset_names():
        plant = load_plant(name)
        report(f"sim_{name}_48k_block{BLOCK}", _speed(SimRig(plant, FS_HZ, seed=1), AUDIO_S),
               "x realtime")
        if plant.payload.resonances:
            faults = [_Fault("sensor_gain", 2.0, 0.8, 5.0), _Fault("resonance_shift", 4.0, 1.05)]
            rig = SimRig(plant, FS_HZ, seed=1, faults=faults)
            report(f"sim_{name}_48k_block{BLOCK}_faults", _speed(rig, AUDIO_S), "x realtime")


if __name__ == "__main__":
    from tests.benchmarks.__main__ import report as _report

    run(_report)
