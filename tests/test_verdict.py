"""The verdict and the record a lab hands in: verdict rule, full-level average, identity, exports,
and an independent recomputation of the run's claims from its response signal.

The independent check reads ``response.wav`` and the calibration in the record, estimates the
full-level control spectrum with ``scipy.signal.welch`` (the reference, not the project's own
estimator) and holds the record's stored spectrum and summary figures against it within χ²
bounds.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import stat
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from scipy import signal, stats

from liveshape.control.verdict import FullLevelAverage, decide_verdict
from liveshape.record.writer import load_run

REPO = Path(__file__).resolve().parents[1]
SPEC = REPO / "examples" / "handlebar-nav-unit.yaml"
DB = 10.0 / math.log(10.0)


def cli(*args: str) -> list[str]:
    return [sys.executable, "-m", "liveshape", *args]


def run_json(out: Path, *args: str, umask: int | None = None,
             spec: Path = SPEC) -> tuple[int, dict, str]:
    def pre() -> None:
        if umask is not None:
            os.umask(umask)

    proc = subprocess.run(cli("run", str(spec), "--fast", "--json", "--out", str(out), *args),
                          capture_output=True, text=True, cwd=REPO, timeout=600,
                          preexec_fn=pre)
    assert "Traceback" not in proc.stderr, proc.stderr
    return proc.returncode, json.loads(proc.stdout), proc.stderr


@pytest.fixture(scope="module")
def passed(tmp_path_factory: pytest.TempPathFactory) -> tuple[int, dict, str]:
    return run_json(tmp_path_factory.mktemp("pass"), "--seed", "1", "--operator", "R. Okafor",
                    "--test-item", "nav unit SN 0042", umask=0o027)


# -- the rule, on made-up spectra ------------------------------------------------------------

N = 40
TARGET = np.full(N, 0.01)
ALARM = np.full(N, 3.0)
ABORT = np.full(N, 6.0)


def verdict_of(control: np.ndarray, *, status: str = "completed", decisions=(True,) * 10,
               max_fraction: float = 0.1):
    avg = FullLevelAverage(N)
    avg.push(control, 200.0, 50.0)
    for d in decisions:
        avg.count_decision(d)
    return decide_verdict(status, avg, TARGET, alarm_db=ALARM, abort_db=ABORT, rms_alarm_db=1.0,
                          max_alarm_fraction=max_fraction, df_hz=5.0, status_reason="why")


def test_on_target_passes():
    v = verdict_of(TARGET.copy())
    assert v.verdict == "pass" and v.reasons == () and v.dof == 200.0


def test_one_line_beyond_alarm_fails_with_its_deviation():
    c = TARGET.copy()
    c[7] *= 10 ** (3.2 / 10)  # +3.2 dB: beyond the ±3 dB alarm (IEC 60068-2-64 ±3 dB)
    v = verdict_of(c)
    assert v.verdict == "fail"
    assert len(v.reasons) == 1 and "1 of 40 lines" in v.reasons[0] and "3.20 dB" in v.reasons[0]


def test_rms_beyond_rms_alarm_fails():
    v = verdict_of(TARGET * 10 ** (1.2 / 10))  # every line +1.2 dB: lines fine, rms not
    assert v.verdict == "fail" and len(v.reasons) == 1 and "rms error" in v.reasons[0]


@pytest.mark.parametrize("n_alarm, verdict", [(1, "pass"), (2, "fail")])
def test_time_in_alarm_limit(n_alarm, verdict):
    # 1 of 10 decisions = 10 % is allowed at max_alarm_fraction 0.1; 2 of 10 is not
    v = verdict_of(TARGET.copy(), decisions=(False,) * n_alarm + (True,) * (10 - n_alarm))
    assert v.verdict == verdict and v.alarm_fraction == pytest.approx(n_alarm / 10)


@pytest.mark.parametrize("status", ["aborted", "stopped"])
def test_a_run_that_did_not_complete_has_no_pass(status):
    v = verdict_of(TARGET.copy(), status=status)
    assert v.verdict == "incomplete" and v.reasons == (f"run {status}: why",)


def test_no_full_level_estimate_is_incomplete():
    avg = FullLevelAverage(N)
    v = decide_verdict("completed", avg, TARGET, alarm_db=ALARM, abort_db=ABORT,
                       rms_alarm_db=1.0, max_alarm_fraction=0.1, df_hz=5.0)
    assert v.verdict == "incomplete" and v.judgement is None


def test_pooled_estimate_scatter_matches_the_summed_dof():
    # Bendat & Piersol, Random Data, 4th ed., §8.5.4: a PSD estimate with ν DOF scatters as
    # χ²_ν/ν, variance 2/ν. Pooling K independent estimates of ν_i DOF weighted by ν_i gives
    # one with Σν_i DOF. Eight χ²_20 estimates pool to 160 DOF.
    rng = np.random.default_rng(5)
    lines = 20000
    avg = FullLevelAverage(lines)
    for _ in range(8):
        avg.push(rng.chisquare(20, lines) / 20, 20.0, 0.0)
    assert avg.dof == 160.0
    var = float(np.var(avg.psd, ddof=1))
    # sample variance of n values: var·(n−1)/σ² ~ χ²_{n−1}; 5σ of that (≈ ±5·√(2/n))
    assert var == pytest.approx(2 / 160, rel=5 * math.sqrt(2 / lines))
    assert float(np.mean(avg.psd)) == pytest.approx(1.0, abs=5 * math.sqrt(2 / 160 / lines))


# -- a passed run, end to end ----------------------------------------------------------------

def test_passed_run_has_verdict_in_summary_and_json(passed):
    rc, data, _ = passed
    assert rc == 0 and data["status"] == "completed" and data["verdict"] == "pass"
    assert data["verdict_reasons"] == [] and "alarm limit" in data["verdict_rule"]
    summary = json.loads((Path(data["run_dir"]) / "summary.json").read_text())
    assert summary["verdict"] == "pass" and summary["full_level_dof"] == data["full_level_dof"]
    # the whole full-level record pools more DOF than one decision estimate
    assert summary["full_level_dof"] > summary["dof"]


def test_run_json_names_version_spec_hash_operator_and_item(passed):
    from liveshape import __version__

    run = load_run(passed[1]["run_dir"])
    # sha256 of the test file as read, computed here with hashlib (FIPS 180-4)
    assert run.meta["spec_sha256"] == hashlib.sha256(SPEC.read_bytes()).hexdigest()
    assert run.meta["software_version"] == __version__
    assert run.meta["operator"] == "R. Okafor" and run.meta["test_item"] == "nav unit SN 0042"


def test_record_files_follow_the_umask(passed):
    # With umask 027 a plain open() makes files 0640 (POSIX open(2): mode & ~umask); the
    # atomically written record files must match the WAVs, not mkstemp's 0600.
    root = Path(passed[1]["run_dir"])
    for name in ("run.json", "spec.yaml", "rig.yaml", "summary.json", "events.jsonl",
                 "drive.wav", "spectra.csv", "updates/0001.npz", "decisions/full_level.npz"):
        assert stat.S_IMODE((root / name).stat().st_mode) == 0o640, name


def test_decision_estimates_back_every_summary_figure(passed):
    data = passed[1]
    run = load_run(data["run_dir"])
    u = run.updates
    dec = u.arrays["decision_psd"]
    rows = [i for i in range(u.index.size) if np.all(np.isfinite(dec[i]))]
    assert rows, "no decision estimate stored"
    k = rows[-1]
    dev = DB * np.log(dec[k] / u.target_psd[k])
    alarm = np.asarray(run.full_level["alarm_db"])
    # the summary's final_* figures are the last decision's, recomputed from the record
    assert data["final_max_dev_db"] == pytest.approx(float(np.max(np.abs(dev))), abs=1e-9)
    assert data["final_rms_error_db"] == pytest.approx(
        DB * math.log(dec[k].sum() / u.target_psd[k].sum()), abs=1e-9)
    assert data["final_lines_outside_alarm"] == int(np.count_nonzero(np.abs(dev) > alarm))
    assert data["dof"] == pytest.approx(u.numbers["decision_dof"][k])
    # and the full-level figures are the stored full-level average's
    full = run.full_level
    fdev = DB * np.log(full["control_psd_g2_hz"] / full["target_psd_g2_hz"])
    assert data["full_level_max_dev_db"] == pytest.approx(float(fdev.max()), abs=1e-9)
    assert data["full_level_min_dev_db"] == pytest.approx(float(fdev.min()), abs=1e-9)
    assert data["full_level_dof"] == pytest.approx(float(full["dof"]))


def test_claims_hold_against_scipy_welch_of_the_response(passed):
    """Recompute the full-level control from response.wav with scipy.signal.welch."""
    data = passed[1]
    run = load_run(data["run_dir"])
    y, fs = sf.read(str(run.response_wav), dtype="float64")
    cal = run.meta["calibration"]
    g_per_fs = cal["in_v_per_fs"] / (cal["accel_mv_per_g"] * 1e-3)
    n = int(run.spec["control"]["frame_length"])
    stage = {e.data.get("stage"): e.t_s for e in run.events if e.kind == "stage"}
    i0 = int(stage["full_level"] * fs) + n  # one frame in: the drive has settled
    i1 = int(stage["ramp_down"] * fs)  # the ramp-down starts here
    f, pyy = signal.welch(y[i0:i1], fs, window="hann", nperseg=n, noverlap=n // 2,
                          detrend=False, scaling="density")
    full = run.full_level
    idx = np.rint(np.asarray(full["f_hz"]) / (fs / n)).astype(int)
    ref = pyy[idx] * g_per_fs**2
    mine = np.asarray(full["control_psd_g2_hz"])
    # Welch (1967) equivalent DOF of K Hann segments at 50 % overlap:
    # ν = 2K / (1 + 2ρ²(1/2)) with ρ²(1/2) = 1/36 for the Hann window (Harris 1978, Table 1
    # overlap correlation 16.7 %), less the end effect; 2K/(1 + 2/36) is close enough here.
    k = 1 + (i1 - i0 - n) // (n // 2)
    nu_ref = 2 * k / (1 + 2 / 36)
    nu_mine = float(full["dof"])
    # per line: log ratio of two χ² estimates; treating them as independent (they share data,
    # so the true scatter is smaller) gives σ_dB = 4.343·√(2/ν1 + 2/ν2) (Bendat & Piersol,
    # Random Data, 4th ed., §8.5.4); Bonferroni over the lines for a 1e-3 family error.
    sigma = DB * math.sqrt(2 / nu_ref + 2 / nu_mine)
    z = stats.norm.isf(1e-3 / (2 * idx.size))
    dev = DB * np.log(mine / ref)
    assert np.max(np.abs(dev)) <= z * sigma, (np.max(np.abs(dev)), z * sigma)
    # band sums: Satterthwaite's effective DOF of a sum of χ² lines, times 1 + 2(4/9 + 1/36)
    # for the correlation of adjacent Hann lines (|ρ| = 2/3 and 1/6 from the window's cosine
    # coefficients) — 5σ
    target = np.asarray(full["target_psd_g2_hz"])

    def band_var(p: np.ndarray, nu: float) -> float:
        return float(np.sum(p**2) * 2 / nu / np.sum(p) ** 2) * (1 + 2 * (4 / 9 + 1 / 36))

    rms_ref = DB * math.log(ref.sum() / target.sum())
    tol = 5 * DB * math.sqrt(band_var(ref, nu_ref) + band_var(mine, nu_mine))
    assert data["full_level_rms_error_db"] == pytest.approx(rms_ref, abs=tol)
    # the independent estimate confirms the pass: every line inside the alarm limit
    ref_dev = DB * np.log(ref / target)
    assert np.all(np.abs(ref_dev) < np.asarray(full["alarm_db"]))
    assert data["full_level_lines_outside_alarm"] == 0
    assert data["full_level_control_grms_g"] == pytest.approx(
        math.sqrt(ref.sum() * fs / n), rel=math.log(10) / 20 * tol)


def test_spectra_csv_rows_match_the_stored_average(passed):
    root = Path(passed[1]["run_dir"])
    lines = (root / "spectra.csv").read_text().splitlines()
    head = lines[0].split(",")
    assert head[0] == "f_hz" and "target_g2_hz" in head and "coherence" in head
    rows = [dict(zip(head, r.split(","), strict=True)) for r in lines[1:]]
    full = load_run(root).full_level
    assert len(rows) == full["f_hz"].size
    ctrl = np.array([float(r["control_g2_hz"]) for r in rows])
    np.testing.assert_allclose(ctrl, full["control_psd_g2_hz"], rtol=1e-8)
    # the limit columns are the target times 10^(±limit/10), limit in dB per line
    tgt = np.array([float(r["target_g2_hz"]) for r in rows])
    for col, sign, key in (("alarm_high_g2_hz", 1, "alarm_db"), ("alarm_low_g2_hz", -1, "alarm_db"),
                           ("abort_high_g2_hz", 1, "abort_db")):
        got = np.array([float(r[col]) for r in rows])
        np.testing.assert_allclose(got, tgt * 10 ** (sign * full[key] / 10), rtol=1e-8)
    assert all(r["control_source"] == "full_level" for r in rows)


# -- failed, aborted and stopped runs --------------------------------------------------------

def test_a_run_outside_alarm_but_inside_abort_fails_with_its_reasons(tmp_path):
    # The block loop (one update per ~3 s estimate): the sensor loses a quarter of its
    # sensitivity at 55 s (−2.5 dB); the loop pulls the measured control back, but two
    # full-level decisions are in alarm first (demo scenario). The fast loop corrects the same
    # change within a decision window, so it passes (tests/test_fastloop.py).
    block = tmp_path / "block-loop.yaml"
    block.write_text(SPEC.read_text().replace("  update_gain: 0.5\n",
                                              "  update_gain: 0.5\n  loop: block\n"))
    rc, data, _ = run_json(tmp_path, "--seed", "1", "--fault", "sensor_gain@55=0.75",
                           spec=block)
    assert data["status"] == "completed" and data["verdict"] == "fail"
    assert rc == 4
    assert any("decisions in alarm" in r for r in data["verdict_reasons"])


def test_an_aborted_run_has_no_pass(tmp_path):
    rc, data, _ = run_json(tmp_path, "--seed", "1", "--fault", "sensor_detached@30")
    assert data["status"] == "aborted" and data["verdict"] == "incomplete"
    assert data["verdict_reasons"][0].startswith("run aborted: ")
    assert rc == data["exit_status"] != 0


def test_a_stopped_run_has_no_pass():
    from liveshape.control.controller import Controller, run_offline
    from liveshape.session import build_sim_rig
    from liveshape.testdef.spec import load_spec

    spec = load_spec(SPEC)
    rig, cal, _ = build_sim_rig(spec, 3)
    ctrl = Controller(spec, cal, seed=3)
    res = run_offline(ctrl, rig, 4096, max_s=15.0)
    assert res.status == "stopped" and res.verdict.verdict == "incomplete"
    assert res.exit_status == 130


def test_record_spectra_only_leaves_out_the_wavs(tmp_path):
    rc, data, _ = run_json(tmp_path, "--seed", "2", "--duration", "4", "--record", "spectra")
    root = Path(data["run_dir"])
    assert rc == 0 and not (root / "drive.wav").exists() and not (root / "response.wav").exists()
    assert (root / "decisions" / "full_level.npz").is_file()
    summary = json.loads((root / "summary.json").read_text())
    assert summary["record"]["signals_recorded"] is False
