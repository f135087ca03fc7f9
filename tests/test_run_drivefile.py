"""Drive files from a run (``liveshape synth --from-run``): the run's last equalized drive.

References: scipy.signal.welch is the reference estimator; chi-square bounds per Bendat & Piersol,
Random Data (estimate / true ~ chi2(dof) / dof), Welch 1967 for the DOF of 50 % overlapped Hann
segments. Statistical checks fail by chance with probability about 1e-4.
"""

from __future__ import annotations

import json
import math
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from scipy import signal, stats

from liveshape.dsp.synth import sine_window
from liveshape.record.runfolder import load_run

REPO = Path(__file__).resolve().parents[1]
P_FAIL = 1e-4


def cli(*args, cwd):
    return subprocess.run(
        [sys.executable, "-m", "liveshape", *args], capture_output=True, text=True, cwd=cwd
    )


@pytest.fixture(scope="module")
def run_dir(tmp_path_factory):
    out = tmp_path_factory.mktemp("runs")
    r = cli("run", str(REPO / "examples" / "handlebar-nav-unit.yaml"), "--fast", "--seed", "1",
            "--out", str(out), "--json", cwd=out)  # fmt: skip
    assert r.returncode == 0, r.stderr
    (d,) = [p for p in out.iterdir() if p.is_dir()]
    return d


def expected_welch(psd, n):
    # Each line of an overlap-added sine-window frame seen through an aligned Hann segment of
    # scipy's welch: independent frames at offsets -N/2, 0, N/2 add their leakage powers.
    h = signal.get_window("hann", n)
    ws = sine_window(n)
    kern = np.zeros(n)
    for o in (-n // 2, 0, n // 2):
        g = np.zeros(n)
        lo, hi = max(o, 0), min(n + o, n)
        g[lo:hi] = h[lo:hi] * ws[lo - o : hi - o]
        kern += np.abs(np.fft.fft(g)) ** 2
    kern /= kern.sum()
    out = np.zeros(psd.size)
    for j in np.flatnonzero(psd):
        out += psd[j] * np.roll(kern, j)[: psd.size]
    return out


def test_file_from_a_run_matches_its_drive_spectrum_and_names_the_run(run_dir, tmp_path):
    r = cli("synth", "--from-run", str(run_dir), "--duration", "40", "--seed", "3",
            "-o", "d.wav", "--json", cwd=tmp_path)  # fmt: skip
    assert r.returncode == 0, r.stderr
    side = json.loads((tmp_path / "d.json").read_text())
    assert side == json.loads(r.stdout)
    run = load_run(run_dir)
    assert side["source_run"] == str(run_dir.resolve())
    assert side["spec_sha256"] == run.meta["spec_sha256"]
    assert side["calibration"] == run.meta["calibration"]
    assert side["playback"].startswith("open-loop")
    # the last update's drive spectrum on all lines
    n = int(run.spec["control"]["frame_length"])
    u = run.updates
    drive = u.arrays["new_drive_psd"][-1]
    assert side["source_update"] == int(u.index[-1])
    psd = np.zeros(n // 2 + 1)
    psd[np.rint(u.f_hz / (run.fs_hz / n)).astype(int)] = drive
    x, fs = sf.read(tmp_path / "d.wav", dtype="float64")
    assert fs == run.fs_hz and x.size == 40 * fs
    fw, pxx = signal.welch(x, fs, window="hann", nperseg=n, noverlap=n // 2, detrend=False)
    k = (x.size - n) // (n // 2) + 1
    w = signal.get_window("hann", n)
    c = np.sum(w[: n // 2] * w[n // 2 :]) / np.sum(w**2)
    dof = 2 * k / (1 + 2 * c**2 * (k - 1) / k)  # Welch 1967
    nz = np.flatnonzero(psd)
    sel = nz[3:-3]  # band edges rounded by the windows
    r_db = 10 * np.log10(pxx[sel] / expected_welch(psd, n)[sel])
    lo = 10 * math.log10(stats.chi2.ppf(0.05, dof) / dof)
    hi = 10 * math.log10(stats.chi2.ppf(0.95, dof) / dof)
    inside = np.mean((r_db > lo) & (r_db < hi))
    m = sel.size // 2  # adjacent Hann lines correlated: every other line independent
    blo, _ = stats.binom.interval(1 - P_FAIL, m, 0.9)
    assert inside >= blo / m
    # level in FS as the run played it (Parseval on the drive spectrum)
    rms = math.sqrt(np.sum(drive) * fs / n)
    assert side["target_rms_fs"] == pytest.approx(rms, rel=1e-9)
    assert np.std(x) == pytest.approx(rms, rel=0.03)


def _copy(run_dir, tmp_path):
    d = tmp_path / "copy"
    shutil.copytree(run_dir, d)
    return d


def test_aborted_run_is_refused_unless_forced(run_dir, tmp_path):
    d = _copy(run_dir, tmp_path)
    summ = json.loads((d / "summary.json").read_text())
    summ["status"] = "aborted"
    (d / "summary.json").write_text(json.dumps(summ))
    r = cli("synth", "--from-run", str(d), "--duration", "5", "-o", "a.wav", cwd=tmp_path)
    assert r.returncode == 2
    assert len(r.stderr.strip().splitlines()) == 1 and "'aborted'" in r.stderr
    assert not (tmp_path / "a.wav").exists()
    r = cli("synth", "--from-run", str(d), "--duration", "5", "-o", "a.wav", "--force",
            cwd=tmp_path)  # fmt: skip
    assert r.returncode == 0, r.stderr
    assert json.loads((tmp_path / "a.json").read_text())["source_status"] == "aborted"


def test_run_without_update_is_refused(run_dir, tmp_path):
    d = _copy(run_dir, tmp_path)
    shutil.rmtree(d / "updates")
    (d / "updates").mkdir()
    r = cli("synth", "--from-run", str(d), "--duration", "5", "-o", "a.wav", cwd=tmp_path)
    assert r.returncode == 2
    assert len(r.stderr.strip().splitlines()) == 1 and "no drive update" in r.stderr
    assert list(tmp_path.glob("*.wav")) == []
