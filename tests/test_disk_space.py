"""Free space and write errors of a run record: estimate, refusal, safe stop (exit 21), cleanup.

The low-space stop is tested two ways: with the free-space look-up replaced (runs anywhere) and
on a real small tmpfs that another writer fills while the run goes (needs root to mount; skipped
when not root, except under CI, where it fails instead). The full-disk write error is real too:
the tmpfs is filled to the last byte while the free-space look-up is told there is plenty.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import threading
import time
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

from liveshape.cli import main
from liveshape.control.runplan import nominal_run_s
from liveshape.control.safety import EXIT_STATUS
from liveshape.record import diskspace
from liveshape.record.writer import load_run
from liveshape.session import record_estimate, run_session
from liveshape.testdef.spec import load_spec

REPO = Path(__file__).resolve().parents[1]
EXAMPLE = REPO / "examples" / "handlebar-nav-unit.yaml"
IN_CI = os.environ.get("CI", "").lower() == "true"


def test_disk_space_rule_has_its_own_exit_status() -> None:
    assert EXIT_STATUS["disk_space"] == 21


@pytest.fixture(scope="module")
def finished_run(tmp_path_factory: pytest.TempPathFactory) -> Path:
    spec = load_spec(EXAMPLE)
    session = run_session(spec, out_dir=tmp_path_factory.mktemp("runs"), fast=True)
    assert session.result.status == "completed"
    return session.run_dir


def test_nominal_length_and_size_estimate_match_a_real_run(finished_run: Path) -> None:
    # A float32 mono WAV holds 4 bytes per sample plus a short header (RIFF/WAVE, EBU Tech
    # 3306 for the header layout [from memory]); the run's length is its sample count / fs.
    spec = load_spec(EXAMPLE)
    run = load_run(finished_run)
    fs = spec.control.fs_hz
    run_s = sf.info(str(run.drive_wav)).frames / fs
    nominal = nominal_run_s(spec)
    assert 0.8 < nominal / run_s < 1.25, (nominal, run_s)
    est = record_estimate(spec)
    actual = sum(p.stat().st_size for p in finished_run.rglob("*") if p.is_file())
    assert 0.8 < est.total_bytes / actual < 1.3, (est.total_bytes, actual)
    assert record_estimate(spec, record_signals=False).signal_bytes == 0


def test_run_prints_the_estimate_at_the_start(tmp_path: Path) -> None:
    proc = subprocess.run(
        [sys.executable, "-m", "liveshape", "run", str(EXAMPLE), "--fast", "--json",
         "--duration", "1", "--record", "spectra", "--out", str(tmp_path)],
        capture_output=True, text=True, cwd=REPO, timeout=600)
    assert proc.returncode in (0, 4), proc.stderr
    assert "record estimate: about" in " ".join(proc.stderr.split())


def test_too_little_free_space_refuses_the_run(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                               capsys: pytest.CaptureFixture[str]) -> None:
    spec = load_spec(EXAMPLE)
    need = int(diskspace.SIZE_MARGIN * record_estimate(spec).total_bytes) + \
        diskspace.RESERVE_BYTES
    monkeypatch.setattr(diskspace, "free_bytes", lambda path: need - 1)
    status = main(["run", str(EXAMPLE), "--fast", "--out", str(tmp_path / "runs")])
    err = [ln for ln in capsys.readouterr().err.splitlines() if ln.strip()]
    assert status == 2 and len(err) == 1 and "free" in err[0] and "--out" in err[0], err
    assert list(tmp_path.iterdir()) == []
    # One byte more and the check lets it through (the bound is the documented one).
    monkeypatch.setattr(diskspace, "free_bytes", lambda path: need)
    assert diskspace.check_free_space(tmp_path, record_estimate(spec)) == need


def _assert_safe_disk_stop(run_dir: Path, *, trip_event: bool = True) -> dict:
    run = load_run(run_dir)
    assert run.summary is not None, "the record was not closed"
    s = run.summary
    assert s["status"] == "aborted" and s["abort_rule"] == "disk_space", s
    assert s["exit_status"] == 21
    assert s["trip"]["rule"] == "disk_space"
    if trip_event:  # after a failed write nothing but the summary is written
        assert any(e.kind == "trip" and e.data.get("rule") == "disk_space" for e in run.events)
    assert not (run_dir / ".space-reserve").exists()
    assert not [p for p in run_dir.rglob("*.tmp")]
    return s


def test_low_free_space_stops_the_run_safely(tmp_path: Path,
                                             monkeypatch: pytest.MonkeyPatch) -> None:
    # Plenty of room at the start; 40 s into the run another writer leaves 10 MB.
    spec = load_spec(EXAMPLE)
    clock = {"calls": 0}

    def free(path: Path) -> int:
        clock["calls"] += 1
        return 10**12 if clock["calls"] < 80 else 10 * 2**20  # 80 looks x 0.5 s = 40 s

    monkeypatch.setattr(diskspace, "free_bytes", free)
    session = run_session(spec, out_dir=tmp_path, fast=True)
    assert session.result.exit_status == 21
    s = _assert_safe_disk_stop(session.run_dir)
    assert "below the reserve" in s["abort_reason"]
    # The drive ramps down as for any trip: the last block is silent and no step is larger
    # than the largest step of the running drive (a cosine fade, no cut).
    drive, fs = sf.read(str(session.run_dir / "drive.wav"), dtype="float64")
    assert np.max(np.abs(drive[-64:])) < 1e-6
    trip_t = next(e.t_s for e in load_run(session.run_dir).events if e.kind == "trip")
    i = int(trip_t * fs)
    before = np.max(np.abs(np.diff(drive[max(0, i - fs):i])))
    after = np.max(np.abs(np.diff(drive[i:])))
    assert after <= 1.05 * before


# -- real small file systems (root) ---------------------------------------------------------


@pytest.fixture
def small_tmpfs(tmp_path: Path) -> Iterator[Path]:
    where = tmp_path / "small"
    where.mkdir()
    ok = os.geteuid() == 0 and subprocess.run(
        ["mount", "-t", "tmpfs", "-o", "size=256m", "tmpfs", str(where)],
        capture_output=True).returncode == 0
    if not ok:
        if IN_CI:
            pytest.fail("the real full-disk tests need root (a tmpfs mount) and must run in CI")
        pytest.skip("needs root to mount a small tmpfs")
    try:
        yield where
    finally:
        subprocess.run(["umount", "-l", str(where)], check=False)


def _fill_when_the_run_starts(root: Path, leave_bytes: int, done: threading.Event) -> None:
    """Wait for a run folder under ``root``, then fill the file system to ``leave_bytes``."""
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline and not done.is_set():
        if any((p / "drive.wav").exists() for p in root.glob("runs/*")):
            break
        time.sleep(0.02)
    time.sleep(0.5)
    free = os.statvfs(root).f_bavail * os.statvfs(root).f_frsize
    with open(root / "ballast", "wb") as fh:
        try:
            fh.write(bytes(max(0, free - leave_bytes)))
        except OSError:
            pass


def test_a_filling_disk_stops_a_real_run(small_tmpfs: Path) -> None:
    # Another program fills the disk during the run down to 16 MB: stop, exit 21, closed record.
    done = threading.Event()
    filler = threading.Thread(target=_fill_when_the_run_starts,
                              args=(small_tmpfs, 16 * 2**20, done), daemon=True)
    filler.start()
    proc = subprocess.run(
        [sys.executable, "-m", "liveshape", "run", str(EXAMPLE), "--fast", "--json",
         "--duration", "120", "--out", str(small_tmpfs / "runs")],
        capture_output=True, text=True, cwd=REPO, timeout=600)
    done.set()
    filler.join(5)
    assert "Traceback" not in proc.stderr, proc.stderr
    assert proc.returncode == 21, proc.stderr
    summary = json.loads(proc.stdout)
    assert summary["abort_rule"] == "disk_space"
    _assert_safe_disk_stop(Path(summary["run_dir"]))


def test_a_full_disk_write_error_stops_the_run_and_closes_the_record(
        small_tmpfs: Path, monkeypatch: pytest.MonkeyPatch,
        capsys: pytest.CaptureFixture[str]) -> None:
    # The free-space look-up says "plenty" (as on a file system that reports it wrongly); the
    # disk is then filled to the last byte: the failed write itself stops the run.
    monkeypatch.setattr(diskspace, "free_bytes", lambda path: 10**12)
    done = threading.Event()
    filler = threading.Thread(target=_fill_when_the_run_starts,
                              args=(small_tmpfs, 0, done), daemon=True)
    filler.start()
    status = main(["run", str(EXAMPLE), "--fast", "--json", "--duration", "120",
                   "--out", str(small_tmpfs / "runs")])
    done.set()
    filler.join(5)
    cap = capsys.readouterr()
    assert status == 21, cap.err
    assert "Traceback" not in cap.err
    summary = json.loads(cap.out)
    s = _assert_safe_disk_stop(Path(summary["run_dir"]), trip_event=False)
    assert "cannot be written" in s["abort_reason"]


# -- temporary files on SIGTERM ---------------------------------------------------------------


def test_synth_killed_by_sigterm_leaves_no_temporary_file(tmp_path: Path) -> None:
    out = tmp_path / "x.wav"
    proc = subprocess.Popen(
        [sys.executable, "-m", "liveshape", "synth", str(EXAMPLE), "--duration", "3000",
         "-o", str(out), "--json"],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, cwd=REPO)
    try:
        deadline = time.monotonic() + 120
        while time.monotonic() < deadline:
            tmps = list(tmp_path.glob(".x.wav.*.tmp"))
            if tmps and tmps[0].stat().st_size > 1_000_000:
                break
            time.sleep(0.05)
        else:
            pytest.fail("synth did not start writing")
        proc.send_signal(signal.SIGTERM)
        _out, err = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert proc.returncode == 143, err
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert len(lines) == 1 and "SIGTERM" in lines[0], err
    assert list(tmp_path.iterdir()) == []
