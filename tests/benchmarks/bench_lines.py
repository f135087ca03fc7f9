"""Lines not caused by the drive: false-alarm rate of the harmonic F-test and hum detection.

Figures:

* false-alarm rate of :func:`liveshape.dsp.lines.harmonic_f_test` on white Gaussian noise
  (blocks of 4096, NW = 4, K = 7, Fourier frequencies 16 bins apart so the tests are nearly
  independent) measured against the nominal p = 0.1, 0.01, 0.001, with the count's binomial
  standard deviation;
* false findings per block of :func:`liveshape.dsp.lines.find_extraneous_lines` (padded grid)
  on noise, against its bound ``false_per_block`` (0.5 and 0.01);
* detection of 50 Hz mains hum with two harmonics on the simulated loudspeaker rig (8 kHz,
  blocks of 8192 = 1.02 s, flat random drive plus an 80 Hz sine-on-random tone in the drive),
  the hum's mean square per line set 20, 10 and 0 dB above the control PSD x 1 Hz at the
  weakest of its lines: fraction of blocks with all three lines found, worst frequency error,
  rms amplitude error, blocks flagging the drive tone, other findings per block.

Run with ``python -m tests.benchmarks lines``.
"""

from __future__ import annotations

import math
import time

import numpy as np
from scipy import signal

FS_HZ = 8000.0
BLOCK = 8192
N_BLOCKS = 40
TONE_HZ = 80.0


def _false_alarms(report) -> None:
    from liveshape.dsp.lines import f_threshold, find_extraneous_lines, harmonic_f_test

    rng = np.random.default_rng(1)
    n, blocks = 4096, 400
    fstats = []
    for _ in range(blocks):
        f, fs_, _ = harmonic_f_test(rng.standard_normal(n), float(n))
        fstats.append(fs_[np.arange(16, f.size - 16, 16)])
    fstats = np.concatenate(fstats)
    for p in (0.1, 0.01, 0.001):
        rate = float(np.mean(fstats > f_threshold(p, 7)))
        sd = math.sqrt(p * (1 - p) / fstats.size)
        report(f"lines.fa_rate_p{p:g}", rate, f"(nominal {p:g}, binomial sd {sd:.2g}, "
               f"{fstats.size} tests)")
    for bound, blocks in ((0.5, 300), (0.01, 300)):
        found = sum(len(find_extraneous_lines(rng.standard_normal(n), None, float(n),
                                              false_per_block=bound)) for _ in range(blocks))
        report(f"lines.false_findings_per_block_bound{bound:g}", found / blocks,
               f"(bound {bound:g}, {blocks} blocks of {n})")


def _hum_detection(report) -> None:
    from liveshape.dsp.lines import find_extraneous_lines
    from liveshape.rigs.hum import HumSpec
    from liveshape.rigs.plant import load_plant
    from liveshape.rigs.sim import SimRig

    plant = load_plant("loudspeaker")
    n = N_BLOCKS * BLOCK
    t = np.arange(n) / FS_HZ
    rng = np.random.default_rng(2)
    drive = 0.02 * rng.standard_normal(n) + 0.02 * np.cos(2 * math.pi * TONE_HZ * t)
    rig0 = SimRig(plant, FS_HZ, seed=3)
    g_per_fs = rig0.calibration.g_per_fs
    ctrl0 = rig0.process(drive) * g_per_fs
    f, g = signal.welch(ctrl0, FS_HZ, nperseg=BLOCK)
    lines_hz = np.array([50.0, 100.0, 150.0])
    g_lines = np.interp(lines_hz, f, g)  # g²/Hz of the control at the lines (tone excluded)
    for margin_db in (20.0, 10.0, 0.0):
        level = math.sqrt(float(g_lines.max()) * 1.0 * 10 ** (margin_db / 10))
        spec = HumSpec(50.0, 3, level, drift_hz=0.05, drift_period_s=20.0)
        rig = SimRig(plant, FS_HZ, seed=3, hum=spec)
        ctrl = rig.process(drive) * g_per_fs
        all_found, f_err, a_err, tone_flagged, others = 0, 0.0, [], 0, 0
        t0 = time.perf_counter()
        for b in range(N_BLOCKS):
            sl = slice(b * BLOCK, (b + 1) * BLOCK)
            found = find_extraneous_lines(ctrl[sl], drive[sl], FS_HZ, band_hz=(10.0, 1000.0))
            hits = []
            for h in lines_hz:
                near = [x for x in found if abs(x.f_hz - h) < 0.5]
                if near:
                    hits.append(near[0])
                    f_err = max(f_err, abs(near[0].f_hz - h))
                    a_err.append(near[0].amplitude_g / math.sqrt(2) / level - 1)
            all_found += len(hits) == 3
            tone_flagged += any(abs(x.f_hz - TONE_HZ) < 0.5 for x in found)
            others += sum(1 for x in found if min(abs(x.f_hz - lines_hz)) >= 0.5
                          and abs(x.f_hz - TONE_HZ) >= 0.5)
        wall = time.perf_counter() - t0
        key = f"lines.hum_{margin_db:g}dB"
        report(f"{key}_level_g_rms", level, "g per line")
        report(f"{key}_blocks_all_found", all_found / N_BLOCKS, f"(of {N_BLOCKS})")
        report(f"{key}_worst_freq_error", f_err, "Hz (drift ±0.05 Hz x harmonic)")
        if a_err:
            report(f"{key}_rms_amplitude_error", float(np.sqrt(np.mean(np.square(a_err)))),
                   "(relative)")
        report(f"{key}_blocks_flagging_drive_tone", tone_flagged / N_BLOCKS, "")
        report(f"{key}_other_findings_per_block", others / N_BLOCKS, "")
        report(f"{key}_time_per_block", wall / N_BLOCKS * 1e3, "ms")


def run(report) -> None:
    _false_alarms(report)
    _hum_detection(report)


if __name__ == "__main__":
    from tests.benchmarks.__main__ import report as _report

    run(_report)
