"""Non-Gaussian drive files: kurtosis and PSD of a 10-minute 48 kHz record (figures).

``liveshape synth`` with a kurtosis target of 6 (random frame gains, see
:mod:`liveshape.dsp.nongauss`) on the NAVMAT P-9492 screening profile of ``bench_synth``
(frame 8192), clip level 7 sigma (above the 6.3 sigma that kurtosis 6 needs), seed 1.
Printed: the measured kurtosis (target 6 +- 0.3) with its standard error from the scatter of
independent blocks and the record length for +-0.1 at 90 %, and the fraction of lines whose Welch
PSD lies in the 90 % chi-square band (target >= 0.88, as for Gaussian), beside the same figures
for the Gaussian file of the same seed.

Run with ``python -m tests.benchmarks nongauss``.
"""

from __future__ import annotations

import tempfile
import time
from pathlib import Path

from tests.benchmarks.bench_synth import FS_HZ, _spec

DURATION_S = 600.0


def _closed_loop(report) -> None:
    """Closed-loop control kurtosis, target 5, example spec on the loudspeaker rig, 60 s."""
    from pathlib import Path

    import numpy as np

    from liveshape.control.controller import Controller
    from liveshape.rigs.plant import load_plant
    from liveshape.rigs.sim import SimRig
    from liveshape.testdef.spec import load_spec

    path = Path(__file__).resolve().parents[2] / "examples" / "handlebar-nav-unit.yaml"
    spec = load_spec(path, {"control.kurtosis": 5.0, "safety.clip_sigma": 7.0,
                            "schedule.full_level_s": 60.0})
    rig = SimRig(load_plant("loudspeaker"), spec.control.fs_hz, seed=2)
    ctl = Controller(spec, rig.calibration)
    resp = np.zeros(4096)
    while not ctl.finished:
        resp = rig.process(ctl.exchange(resp))
    res = ctl.result()
    k = res.kurtosis
    report("closed_loop_control_kurtosis_target5", k["kurtosis"], f"± {k['std_error']:.3f} "
           f"(batch means, {k['blocks']} blocks)")
    report("closed_loop_drive_kurtosis", k["drive_kurtosis"], "")
    report("closed_loop_kurtosis_verdict", res.verdict.verdict, "")
    report("closed_loop_kurtosis_samples_for_0_1", k["samples_for_0_1"] / spec.control.fs_hz,
           "s of full level for ±0.1 at 90 %")


def run(report) -> None:
    from liveshape.record.drivefile import make_drive_file

    _closed_loop(report)

    spec = _spec()
    with tempfile.TemporaryDirectory(prefix="liveshape-bench-") as tmp:
        for k in (6.0, 3.0):
            out = Path(tmp) / f"k{k:g}.wav"
            t0 = time.perf_counter()
            res = make_drive_file(
                spec, out, duration_s=DURATION_S, fs_hz=FS_HZ, seed=1, clip_sigma=7.0, kurtosis=k
            )
            wall = time.perf_counter() - t0
            kc = res.kurtosis_check
            key = f"nongauss.synth_k{k:g}_10min"
            report(f"{key}_kurtosis", res.kurtosis, "")
            report(f"{key}_kurtosis_std_error", kc["std_error"], f"({kc['n_blocks']} blocks)")
            report(f"{key}_kurtosis_90pct_halfwidth", kc["accuracy_90"], "")
            report(f"{key}_minutes_for_0.1_at_90pct", kc["samples_for_0.1"] / FS_HZ / 60, "min")
            report(f"{key}_crest_factor", res.crest_factor, "")
            report(f"{key}_psd_fraction_inside", res.psd_check.fraction_inside, "")
            report(f"{key}_psd_mean_dev", res.psd_check.mean_dev_db, "dB")
            report(f"{key}_wall_time", wall, "s")


if __name__ == "__main__":
    from tests.benchmarks.__main__ import report as _report

    run(_report)
