"""Warm start (run --warm-start RUN_DIR): the stored drive is used only on the same rig.

Outside references: the rig's own analytic FRF (the simulated plant's physics) for the "same
plant" figure; the rest are the program's promises (refusals in one line, exit status 2, nothing
driven and no record folder when refused).
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from liveshape.control.warmstart import CONFIRM_DB, WarmStart, confirm, mismatch
from liveshape.record.runfolder import load_run
from liveshape.session import run_session
from liveshape.testdef.spec import load_spec

REPO = Path(__file__).resolve().parents[1]
EXAMPLE = REPO / "examples" / "handlebar-nav-unit.yaml"


def _cli(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "liveshape", *args], capture_output=True,
                          text=True, cwd=REPO, timeout=600)


def _events(run_dir: Path) -> list[dict]:
    return [json.loads(x) for x in (run_dir / "events.jsonl").read_text().splitlines()]


def _full_level_at(run_dir: Path) -> float:
    return next(e["t_s"] for e in _events(run_dir)
                if e["kind"] == "stage" and e["data"]["stage"] == "full_level")


@pytest.fixture(scope="module")
def earlier(tmp_path_factory: pytest.TempPathFactory) -> Path:
    spec = load_spec(EXAMPLE)
    session = run_session(spec, out_dir=tmp_path_factory.mktemp("earlier"), fast=True, seed=1)
    assert session.result.status == "completed"
    return session.run_dir


def test_warm_start_on_the_same_rig_uses_the_stored_drive_and_reaches_full_level_sooner(
        earlier, tmp_path):
    spec = load_spec(EXAMPLE)
    first_drive = []

    def snap(s):
        if s.stage == "equalize" and not first_drive:
            first_drive.append(np.asarray(s.drive_psd) / 10 ** (s.gain_db / 10))

    warm = run_session(spec, out_dir=tmp_path / "warm", fast=True, seed=3, warm_start=earlier,
                       on_snapshot=snap, view_hz=1e9)
    cold = run_session(spec, out_dir=tmp_path / "cold", fast=True, seed=3)
    assert warm.result.status == cold.result.status == "completed"
    ev = _events(warm.run_dir)
    ok = [e for e in ev if e["kind"] == "warm_start"]
    assert ok and ok[0]["data"]["h_change_p95_db"] <= CONFIRM_DB
    assert ok[0]["data"]["from_run"] == str(earlier)
    meta = json.loads((warm.run_dir / "run.json").read_text())
    assert meta["extra"]["warm_start"]["from_run"] == str(earlier)
    # the loop started from the stored drive: the drive at the start of equalize (full-level
    # PSD, the played one divided by the level) is the earlier run's last drive
    stored = load_run(earlier).updates.arrays["new_drive_psd"][-1]
    np.testing.assert_allclose(first_drive[0], stored, rtol=1e-6)
    # and the first level step comes sooner than a cold start's
    assert _full_level_at(warm.run_dir) < _full_level_at(cold.run_dir) - 2.0


def test_warm_start_is_refused_on_another_rig_before_anything_runs(earlier, tmp_path):
    out = tmp_path / "runs"
    proc = _cli("run", str(EXAMPLE), "--fast", "--rig", "sim:bench", "--out", str(out),
                "--warm-start", str(earlier))
    assert proc.returncode == 2
    lines = proc.stderr.strip().splitlines()
    assert "Traceback" not in proc.stderr
    err = [x for x in lines if "--warm-start" in x]
    assert len(err) == 1 and "the rig differs" in err[0] and "bench" in err[0], proc.stderr
    assert not out.exists() or not any(out.iterdir())  # no record folder: nothing was driven


def test_warm_start_is_refused_with_other_lines_or_an_unfinished_run(earlier, tmp_path):
    spec = load_spec(EXAMPLE, {"control.lines": 2048})
    from liveshape.errors import ConfigError

    with pytest.raises(ConfigError, match="frame_length differs"):
        run_session(spec, out_dir=tmp_path / "a", fast=True, warm_start=earlier)
    aborted = run_session(load_spec(EXAMPLE, {"faults": []}), out_dir=tmp_path / "b",
                          fast=True, seed=1, warm_start=None)
    assert aborted.result.status == "completed"
    from liveshape.testdef.spec import parse_fault

    bad = run_session(load_spec(EXAMPLE, {"faults": [parse_fault("sensor_detached@15")]}),
                      out_dir=tmp_path / "c", fast=True, seed=1)
    assert bad.result.status == "aborted"
    with pytest.raises(ConfigError, match="not 'completed'"):
        run_session(load_spec(EXAMPLE), out_dir=tmp_path / "d", fast=True,
                    warm_start=bad.run_dir)
    assert not (tmp_path / "a").exists() and not (tmp_path / "d").exists()


def test_a_plant_that_changed_since_falls_back_to_a_cold_start(earlier, tmp_path):
    # the plant's gain 2 dB lower than when the drive was equalized (a fault from t = 0.1 s,
    # before the identification): every line moves, so the stored drive is not used
    from liveshape.testdef.spec import parse_fault

    spec = load_spec(EXAMPLE, {"faults": [parse_fault("plant_gain@0.1=-2.5")]})
    s = run_session(spec, out_dir=tmp_path, fast=True, seed=3, warm_start=earlier)
    assert s.result.status == "completed"
    ev = _events(s.run_dir)
    rejected = [e for e in ev if e["kind"] == "warm_start_rejected"]
    assert rejected and rejected[0]["data"]["h_change_p95_db"] > CONFIRM_DB
    assert not any(e["kind"] == "warm_start" for e in ev)


def test_confirm_and_mismatch_rules():
    n = 100
    h = np.full(n, 2.0 + 0j)
    coh = np.ones(n)
    w = WarmStart(np.zeros(10), h, coh, "r", 1)
    assert confirm(h, coh, w, coherence_min=0.5)[0]
    moved = h.copy()
    moved[:10] *= 10 ** (6 / 20)  # 10 % of the lines 6 dB off: a resonance that moved
    ok, p95, lines = confirm(moved, coh, w, coherence_min=0.5)
    assert not ok and p95 == pytest.approx(6.0) and lines == n
    f = np.arange(5.0)
    base = dict(fs_now=48e3, fs_then=48e3, f_hz_now=f, f_hz_then=f)
    rig = {"kind": "sim", "plant": {"name": "loudspeaker", "payload": {"mass_kg": 0.05}}}
    cal = {"out_v_per_fs": 1.0, "in_v_per_fs": 1.0, "accel_mv_per_g": 100.0, "calibrated": True}
    assert mismatch(rig_now=rig, rig_then=rig, cal_now=cal, cal_then=cal, **base) is None
    heavier = {"kind": "sim", "plant": {"name": "loudspeaker", "payload": {"mass_kg": 0.06}}}
    why = mismatch(rig_now=heavier, rig_then=rig, cal_now=cal, cal_then=cal, **base)
    assert why == "the rig differs (rig.plant.payload.mass_kg = 0.05 there, 0.06 now)"
    why = mismatch(rig_now=rig, rig_then=rig, cal_now={**cal, "accel_mv_per_g": 98.0},
                   cal_then=cal, **base)
    assert "calibration differs" in why and "accel_mv_per_g" in why
    assert "sample rate" in mismatch(rig_now=rig, rig_then=rig, cal_now=cal, cal_then=cal,
                                     **{**base, "fs_now": 44.1e3})
    # an audio rig's block size is not the hardware: it may differ
    a = {"kind": "audio", "device": "X", "block_size": 1024}
    assert mismatch(rig_now=a, rig_then={**a, "block_size": 512}, cal_now=cal, cal_then=cal,
                    **base) is None
    assert "rig.device" in mismatch(rig_now=a, rig_then={**a, "device": "Y"}, cal_now=cal,
                                    cal_then=cal, **base)
