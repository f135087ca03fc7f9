"""Kurtosis in the loop (control.kurtosis): the control response's kurtosis held on a target.

Outside references: the kurtosis of a Gaussian scale mixture, 3 E[a⁴] / E[a²]² (Andrews & Mallows,
J. R. Stat. Soc. B 36(1), 1974); the truncated-normal moments behind the clip rule (Johnson, Kotz
& Balakrishnan, Continuous Univariate Distributions 1, 2nd ed., ch. 13 [from memory]); Welch
(1967) for the expected periodogram of a windowed segment.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

from liveshape.control.controller import Controller
from liveshape.control.drivestream import DriveStream
from liveshape.control.kurtosisloop import KurtosisLoop, max_drive_kurtosis
from liveshape.dsp.nongauss import clipped_kurtosis
from liveshape.errors import ConfigError
from liveshape.rigs.plant import load_plant
from liveshape.rigs.sim import SimRig
from liveshape.testdef.spec import load_spec

EXAMPLE = Path(__file__).resolve().parents[1] / "examples" / "handlebar-nav-unit.yaml"


def test_the_drive_kurtosis_cap_is_what_the_clip_leaves_intact():
    for clip in (4.0, 5.5, 7.0):
        k = max_drive_kurtosis(clip)
        # the clipped-moment formula keeps k within 2 % at this clip, and 2 % more would not be
        assert clipped_kurtosis(k, clip) >= 0.98 * k * (1 - 1e-6)
        assert clipped_kurtosis(min(k * 1.05, 20.0), clip) < 0.98 * min(k * 1.05, 20.0)
    assert max_drive_kurtosis(None) == 20.0


def _mixture(rng, kurtosis: float, n: int) -> np.ndarray:
    """Gaussian scale mixture with a² ~ gamma(s)/s: kurtosis 3 (1 + 1/s) (Andrews & Mallows)."""
    if kurtosis <= 3.0:
        return rng.standard_normal(n)
    s = 1.0 / (kurtosis / 3.0 - 1.0)
    a2 = rng.standard_gamma(s, n // 256 + 1) / s
    return rng.standard_normal(n) * np.repeat(np.sqrt(a2), 256)[:n]


def test_the_law_converges_on_a_plant_that_scales_the_excess():
    # a "plant" that passes 60 % of the drive's excess kurtosis to the control: the drive
    # must settle near 3 + 2 / 0.6 = 6.33 for a control target of 5
    rng = np.random.default_rng(4)
    loop = KurtosisLoop(5.0, None, interval_samples=200_000, block_samples=400_000)
    for _ in range(30):
        control_k = 3.0 + 0.6 * (loop.drive - 3.0)
        assert loop.push(_mixture(rng, control_k, 200_000), full_level=False)
    assert loop.drive == pytest.approx(3.0 + 2.0 / 0.6, abs=0.6)
    assert loop.averaged == pytest.approx(5.0, abs=0.4)


def test_segment_power_follows_the_frame_gains():
    # Welch (1967): each frame enters a segment's expected periodogram with the product of the
    # windows' powers, here times that frame's a²; the ratio measured/expected averages to 1
    fs, n = 48_000.0, 1024
    band = np.zeros(n // 2 + 1, dtype=bool)
    band[10:200] = True
    psd = np.zeros(n // 2 + 1)
    psd[band] = 1e-6
    h = 0.5 - 0.5 * np.cos(2 * np.pi * np.arange(n) / n)
    scale = 2.0 / (fs * float(h @ h))
    ratios, bursts = [], []
    for seed in range(60):
        ds = DriveStream(fs, n, seed=seed, clip_sigma=None, rms_max_fs=1.0, peak_max_fs=100.0,
                         rate_db_s=6.0, fade_s=0.001, history=200_000)
        ds.set_psd(psd)
        ds.fade(1.0, 0.001)
        ds.synth.set_kurtosis(8.0)
        x = np.concatenate([ds.read(512) for _ in range(200)])
        for start in range(20_000, 90_000, 4_999):
            seg = x[start:start + n]
            p = np.mean(np.abs(np.fft.rfft((seg - seg.mean()) * h))[band] ** 2 * scale)
            ratios.append(p / float(np.mean(ds.segment_psd(start, band))))
            bursts.append(ds.segment_burst(start))
    ratios = np.array(ratios)
    assert np.std(bursts) > 0.3  # the bursts are real: the segments' power varies a lot
    # each ratio is a χ² mean over 190 lines (about ±10 %); 840 of them average to 1 ± 1 %
    assert np.mean(ratios) == pytest.approx(1.0, abs=0.02)


def test_closed_loop_control_kurtosis_on_the_loudspeaker_rig():
    spec = load_spec(EXAMPLE, {"control.kurtosis": 5.0, "safety.clip_sigma": 7.0,
                               "schedule.full_level_s": 60.0})
    rig = SimRig(load_plant("loudspeaker"), spec.control.fs_hz, seed=2)
    ctl = Controller(spec, rig.calibration)
    resp = np.zeros(4096)
    while not ctl.finished:
        resp = rig.process(ctl.exchange(resp))
    res = ctl.result()
    assert res.status == "completed" and res.verdict.verdict == "pass", res.abort_reason
    k = res.kurtosis
    # the bound, 5 ± 0.5, and the estimate's own batch-means error stated beside it
    assert k["std_error"] is not None and k["blocks"] >= 2
    assert abs(k["kurtosis"] - 5.0) <= 0.5
    # the record length ±0.1 (90 %) needs follows the 1/N variance of the estimate once the
    # blocks are independent: N = n (1.645 σ / 0.1)² (normal quantile 1.645 [from memory])
    want = k["samples"] * (1.645 * k["std_error"] / 0.1) ** 2
    assert k["samples_for_0_1"] == pytest.approx(want, rel=1e-6, abs=1.0)
    assert any(e.kind == "kurtosis" for e in ctl.events)


def test_a_clip_level_that_would_cap_the_kurtosis_is_refused_in_one_line():
    with pytest.raises(ConfigError) as err:
        load_spec(EXAMPLE, {"control.kurtosis": 6.0})  # the example clips at 4 sigma
    msg = str(err.value)
    assert "\n" not in msg and "safety.clip_sigma" in msg and "control.kurtosis = 6" in msg
    need = float(msg.split("give at least ")[1].split()[0])
    assert clipped_kurtosis(6.0, need) >= 0.98 * 6.0 * (1 - 1e-6)
    assert not math.isnan(need)
    # the README's figures: K = 6 needs 6.31, K = 5 needs 5.47
    assert "give at least 6.31" in msg
    with pytest.raises(ConfigError, match="give at least 5.47"):
        load_spec(EXAMPLE, {"control.kurtosis": 5.0})


def test_gaussian_runs_do_not_change():
    # without control.kurtosis the drive has no frame gains at all
    spec = load_spec(EXAMPLE)
    assert spec.control.kurtosis is None
    rig = SimRig(load_plant("loudspeaker"), spec.control.fs_hz, seed=2)
    ctl = Controller(spec, rig.calibration)
    assert ctl._kurt is None and ctl._out.synth.kurtosis_target == 3.0
