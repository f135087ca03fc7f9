"""The resonance survey: picking against analytic FRFs, the H1 error formula against a Monte
Carlo, the survey on the simulated rig against the plant's own FRF, and the before/after
compare."""

from __future__ import annotations

import json
import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy import signal

from liveshape.control.survey import SurveySettings, SurveySource
from liveshape.dsp.resonance import compare_resonances, find_resonances, h1_magnitude_error
from liveshape.rigs.plant import load_plant
from liveshape.rigs.sim import SimRig
from liveshape.testdef.spec import FaultSpec

REPO = Path(__file__).resolve().parents[1]
SPEC = REPO / "examples" / "handlebar-nav-unit.yaml"
FS = 48_000.0
DF = FS / 32768


def sdof(fn_hz: float, q: float, f_hz: np.ndarray) -> np.ndarray:
    """H(s) = ωn² / (s² + (ωn/Q) s + ωn²) evaluated by scipy.signal.freqs (the reference)."""
    wn = 2 * math.pi * fn_hz
    _, h = signal.freqs([wn**2], [1.0, wn / q, wn**2], worN=2 * math.pi * f_hz)
    return h


@pytest.mark.parametrize("fn, q", [(350.0, 15.0), (120.0, 8.0), (800.0, 25.0)])
def test_peak_and_q_of_an_sdof(fn, q):
    f = np.arange(1, 16385) * DF
    found = find_resonances(f, sdof(fn, q, f), np.ones(f.size), 1e6, band_hz=(20, 2000))
    peaks = [r for r in found if r.kind == "peak"]
    assert len(peaks) == 1
    r = peaks[0]
    # |H| of a 2nd-order low-pass peaks at fn·√(1 − 1/(2Q²)) (Rao, Mechanical Vibrations,
    # 5th ed., §3.4); between lines the parabola on the dB magnitude is good to a few % of df
    # [common practice, bound measured here: 0.05 df]
    assert r.f_hz == pytest.approx(fn * math.sqrt(1 - 1 / (2 * q * q)), abs=0.05 * DF)
    # half-power bandwidth: Q ≈ fn/(f2 − f1) for light damping (Ewins, Modal Testing, §4.3);
    # the exact half-power width of this H differs from fn/Q by O(1/Q²)
    assert r.q == pytest.approx(q, rel=1.5 / q**2 + 0.01)


def test_dip_of_an_inverse_sdof():
    f = np.arange(1, 16385) * DF
    found = find_resonances(f, 1 / sdof(345.0, 11.0, f), np.ones(f.size), 1e6, band_hz=(20, 2000))
    dips = [r for r in found if r.kind == "dip"]
    assert len(dips) == 1
    assert dips[0].f_hz == pytest.approx(345.0 * math.sqrt(1 - 1 / (2 * 11.0**2)), abs=0.05 * DF)


def test_h1_magnitude_error_matches_a_monte_carlo():
    # Bendat & Piersol, Random Data, 4th ed., Table 9.6: ε[|H1|] = √(1−γ²)/(|γ|√(2 n_d)).
    # y = x + noise with noise variance 1/9 gives γ² = 0.9; non-overlapped Hann segments are
    # independent, n_d = 64.
    rng = np.random.default_rng(11)
    n, nd = 1024, 64
    rel = []
    for _ in range(8):
        x = rng.standard_normal(n * nd)
        y = x + rng.standard_normal(x.size) / 3.0
        _, pxx = signal.welch(x, nperseg=n, noverlap=0)
        _, pxy = signal.csd(x, y, nperseg=n, noverlap=0)
        rel.append(np.abs(pxy / pxx)[5:-5] - 1.0)
    measured = float(np.std(np.concatenate(rel)))
    predicted = float(h1_magnitude_error(np.array([0.9]), 2 * nd)[0])
    # 8 × 503 values, not all independent (adjacent Hann lines correlate): 15 % [measured bound]
    assert measured == pytest.approx(predicted, rel=0.15)


def survey(seed: int, shift: float | None = None, duration_s: float = 20.0):
    faults = () if shift is None else (FaultSpec("resonance_shift", 0.0, shift),)
    rig = SimRig(load_plant("loudspeaker"), FS, seed=seed, faults=faults)
    src = SurveySource(SurveySettings(FS, 0.02, duration_s, (20.0, 1000.0), seed=seed),
                       g_per_fs=rig.calibration.g_per_fs, block_size=4096)
    r = np.zeros(4096)
    while not src.finished:
        r = rig.process(src.exchange(r))
    return rig, src.result()


@pytest.fixture(scope="module")
def before():
    return survey(3)


def test_survey_finds_the_plants_own_features(before):
    rig, res = before
    assert res.status == "completed" and res.dof > 100
    # truth: the simulated chain's analytic FRF (g/FS) on a 0.01 Hz grid
    f = np.arange(20.0, 1000.0, 0.01)
    h = rig.frf(f) * rig.calibration.g_per_fs
    truth = find_resonances(f, h, np.ones(f.size), 1e9, band_hz=(20, 1000))
    got = {r.kind: r for r in res.resonances}
    for t in truth:
        r = got[t.kind]
        # within the line spacing plus 3σ of the estimate
        assert abs(r.f_hz - t.f_hz) <= DF + 3 * r.f_sigma_hz, (t, r)
        assert r.level_db == pytest.approx(t.level_db, abs=0.3 + 3 * r.level_sigma_db)
        assert r.q == pytest.approx(t.q, rel=0.1)
    # the dip sits at the payload's fixed-base mode, 350 Hz at Q 15 (the dynamic-absorber
    # zero: Den Hartog, Mechanical Vibrations, §3.2), lowered by damping as for an SDOF peak
    assert got["dip"].f_hz == pytest.approx(350.0, rel=0.02)


@pytest.mark.parametrize("shift, flagged", [(1.03, True), (1.005, False)])
def test_compare_flags_a_3pct_shift_not_a_half_pct_one(before, shift, flagged):
    _, b = before
    _, a = survey(4, shift)
    changes = compare_resonances(b.resonances, a.resonances)
    assert len(changes) == 2 and all(c.after is not None for c in changes)
    for c in changes:
        assert c.shift_pct == pytest.approx(100 * (shift - 1), abs=0.6)
        assert bool(c.flagged) is flagged


def test_stop_fades_out_and_says_stopped():
    rig = SimRig(load_plant("loudspeaker"), FS, seed=1)
    src = SurveySource(SurveySettings(FS, 0.02, 20.0, (20.0, 1000.0)), block_size=1024)
    r = np.zeros(1024)
    drive = []
    while not src.finished:
        if src.t_s >= 5.0:
            src.request_stop("test")
        d = src.exchange(r)
        drive.append(d)
        r = rig.process(d)
    x = np.concatenate(drive)
    assert src.result().status == "stopped"
    # the fade is a per-sample ramp: no sample-to-sample step larger than at full level
    i = int(5.0 * FS)
    assert np.max(np.abs(np.diff(x[i:]))) <= np.max(np.abs(np.diff(x[i - 48000:i]))) * 1.01
    assert np.all(x[-1024:] == 0.0)


def cli(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "liveshape", *args], capture_output=True,
                          text=True, cwd=REPO, timeout=300)


def test_cli_survey_and_compare(tmp_path):
    p1 = cli("survey", str(SPEC), "--out", str(tmp_path), "--json", "--seed", "1")
    p2 = cli("survey", str(SPEC), "--out", str(tmp_path), "--json", "--seed", "2",
             "--fault", "resonance_shift@0=1.03")
    assert p1.returncode == p2.returncode == 0, p1.stderr + p2.stderr
    a, b = json.loads(p1.stdout)["record"], json.loads(p2.stdout)["record"]
    assert (Path(a) / "frf.csv").read_text().startswith("f_hz,h1_mag_g_per_fs")
    cmp = cli("survey", "--compare", a, b)
    assert cmp.returncode == 5 and "FLAG: frequency moved" in cmp.stdout
    same = cli("survey", "--compare", a, a)
    assert same.returncode == 0 and "0 change(s) flagged" in same.stdout


@pytest.mark.parametrize("args, match", [
    (("survey",), "give a test definition SPEC"),
    (("survey", "--compare", "nowhere", "nowhere"), "nowhere: survey folder not found"),
    (("survey", str(SPEC), "--level", "0.9"), "--level = 0.9 FS is above"),
    (("survey", str(SPEC), "--duration", "0.5"), "duration = 0.5 s must be 1-3600 s"),
])
def test_cli_survey_errors_are_one_line(tmp_path, args, match):
    p = cli(*args, "--out", str(tmp_path)) if args[1:2] != ("--compare",) else cli(*args)
    assert p.returncode == 2 and "Traceback" not in p.stderr
    lines = [ln for ln in p.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1 and match in lines[0], p.stderr
    assert not any(tmp_path.iterdir())
