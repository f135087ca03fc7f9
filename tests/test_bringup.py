"""The guided bring-up: meter figures against scipy, the hold in the controller, the CLI rule.

Outside references: scipy.signal.coherence / welch (Welch 1967, Hann, 50 % overlap) for the
meter's coherence and SNR; the definitions of rms and of a peak in dB re full scale; the
coherence of a linear system with uncorrelated output noise, γ² = S/(S+N) (Bendat & Piersol,
Random Data, 4th ed., coherence with extraneous output noise) for the SNR threshold.
"""

from __future__ import annotations

import json
import math
import os
import pty
import subprocess
import sys
import threading
from pathlib import Path

import numpy as np
import pytest
from scipy import signal as sps

from liveshape.control.bringup import BringUpStage, snr_min_db
from liveshape.control.connect import CONNECT_SEGMENTS

REPO = Path(__file__).resolve().parents[1]
FS = 48000.0
N = 4096


def _band(lo_hz: float = 20.0, hi_hz: float = 2000.0) -> np.ndarray:
    f = np.arange(N // 2 + 1) * FS / N
    return (f >= lo_hz) & (f <= hi_hz)


def _stage(background: np.ndarray, *, g_per_fs: float = 10.0, out_v: float | None = 2.0,
           max_lag: int = 2048) -> BringUpStage:
    return BringUpStage(fs_hz=FS, nperseg=N, band=_band(), background=background,
                        max_lag=max_lag, g_per_fs=g_per_fs, out_v_per_fs=out_v,
                        silent_floor_fs=1e-6, coherence_min=0.5)


def _plant(x: np.ndarray, delay: int, gain: float, noise_rms: float,
           rng: np.random.Generator) -> np.ndarray:
    b, a = sps.butter(2, [50.0, 1500.0], btype="band", fs=FS)
    y = gain * sps.lfilter(b, a, x)
    y = np.concatenate([np.zeros(delay), y[: x.size - delay]])
    return y + noise_rms * rng.standard_normal(x.size)


def test_meter_figures_match_scipy() -> None:
    rng = np.random.default_rng(1)
    delay = 300
    st = _stage(0.001 * rng.standard_normal(8 * N))
    n = st.record_len
    x = 0.01 * rng.standard_normal(n)
    y = _plant(x, delay, 3.0, 0.001, rng)
    # feed in blocks, as the controller does
    for i in range(0, n, 1000):
        st.feed(x[i:i + 1000], y[i:i + 1000], t_s=i / FS)
    r = st.reading
    # the cross-correlation peak: the pure delay plus the band-pass impulse response's peak lag
    # (a few samples; Bendat & Piersol, cross-correlation of a white input)
    assert r is not None and 0 <= r.delay_samples - delay <= 10
    d = r.delay_samples
    band = _band()
    xa, ya = x[: n - d], y[d:]
    # coherence: scipy's Welch-based magnitude-squared coherence on the delay-aligned record
    _, coh = sps.coherence(xa, ya, fs=FS, window="hann", nperseg=N, noverlap=N // 2)
    assert r.coherence == pytest.approx(float(np.mean(coh[band])), rel=1e-6)
    # SNR: band power of the response over that of the background (both Welch PSDs)
    _, pyy = sps.welch(ya, fs=FS, window="hann", nperseg=N, noverlap=N // 2)
    _, pbg = sps.welch(st.background, fs=FS, window="hann", nperseg=N, noverlap=N // 2)
    assert r.snr_db == pytest.approx(10 * math.log10(pyy[band].sum() / pbg[band].sum()), abs=1e-6)
    # rms (definition), g from the chain's g per FS, volts from the output's V per FS
    assert r.response_rms_fs == pytest.approx(float(np.sqrt(np.mean(ya**2))), rel=1e-9)
    assert r.response_rms_g == pytest.approx(10.0 * r.response_rms_fs, rel=1e-12)
    assert r.drive_rms_fs == pytest.approx(float(np.sqrt(np.mean(x**2))), rel=1e-9)
    assert r.drive_rms_v == pytest.approx(2.0 * r.drive_rms_fs, rel=1e-12)
    # headroom: the largest |sample| in dB below full scale
    assert r.headroom_db == pytest.approx(-20 * math.log10(np.max(np.abs(y))), rel=1e-9)
    assert r.usable and r.reason == ""


def test_meter_refuses_a_response_that_does_not_follow_the_drive() -> None:
    # Gain at minimum: the control input sees only its own noise; the coherence is the bias of
    # 16 segments (about 1/16, Bendat & Piersol) and the SNR about 0 dB.
    rng = np.random.default_rng(2)
    st = _stage(0.001 * rng.standard_normal(8 * N), out_v=None)
    n = st.record_len
    x = 0.01 * rng.standard_normal(n)
    st.feed(x, 0.001 * rng.standard_normal(n), t_s=1.0)
    r = st.reading
    assert not r.usable and "coherence" in r.reason and r.drive_rms_v is None
    assert r.coherence < 0.5 and abs(r.snr_db) < 1.0
    assert st.confirm() == (False, r.reason)
    assert st.confirmed is None


def test_snr_threshold_from_coherence() -> None:
    # γ² = S/(S+N) for uncorrelated output noise (Bendat & Piersol): S/N = γ²/(1-γ²)
    for c in (0.1, 0.5, 0.9, 0.99):
        snr = 10 ** (snr_min_db(c) / 10)
        assert snr / (1 + snr) == pytest.approx(c, rel=1e-12)
    assert snr_min_db(0.5) == pytest.approx(0.0, abs=1e-12)
    assert snr_min_db(0.0) == -math.inf and snr_min_db(1.0) == math.inf


def test_record_length_is_the_connection_records() -> None:
    st = _stage(np.zeros(N), max_lag=100)
    assert st.record_len == (CONNECT_SEGMENTS + 1) * (N // 2) + 100


# --------------------------------------------------------------------------- the controller


class _GainKnob:
    """The simulated rig with an amplifier gain knob between the drive and the plant."""

    def __init__(self, rig, gain: float) -> None:
        self.rig, self.gain = rig, gain

    def process(self, drive: np.ndarray) -> np.ndarray:
        return self.rig.process(self.gain * np.asarray(drive))


def _short_spec():
    from liveshape.testdef.spec import load_spec

    return load_spec(REPO / "examples" / "handlebar-nav-unit.yaml",
                     {"schedule.full_level_s": 2.0})


def test_hold_keeps_the_connection_level_until_a_usable_confirmation() -> None:
    from liveshape.control.controller import Controller
    from liveshape.session import build_sim_rig

    spec = _short_spec()
    rig, cal, _ = build_sim_rig(spec, 3)
    knob = _GainKnob(rig, 0.0)  # the gain at minimum: nothing reaches the shaker
    flag = threading.Event()
    ctl = Controller(spec, cal, seed=3, bring_up=flag)
    level = spec.safety.connect_level_fs
    resp = np.zeros(4096)
    pressed_early = raised = False
    confirmed_at = None
    peak_rms_before = 0.0
    while not ctl.finished and ctl.t_s < 120:
        drive = ctl.exchange(resp)
        resp = knob.process(drive)
        if confirmed_at is None:
            # the drive never exceeds the connection level (block rms, a little scatter)
            peak_rms_before = max(peak_rms_before, float(np.sqrt(np.mean(drive**2))))
        r = ctl.bring_up_reading
        if ctl.stage == "bring_up" and r is not None:
            if not pressed_early:
                flag.set()  # Enter at minimum gain: refused
                pressed_early = True
            elif not raised and not flag.is_set():
                knob.gain = 1.0  # the user raises the gain
                raised = True
            elif raised and r.usable and not flag.is_set():
                flag.set()
        if confirmed_at is None and any(e.kind == "bring_up_confirmed" for e in ctl._log.all):
            confirmed_at = ctl.t_s
    kinds = [e.kind for e in ctl._log.all]
    assert "bring_up_refused" in kinds
    assert kinds.index("bring_up_refused") < kinds.index("bring_up_confirmed")
    assert confirmed_at is not None and ctl.result().status == "completed"
    # at most the connection level, with the block-rms scatter of 4096 samples (well under 20 %)
    assert peak_rms_before < 1.2 * level
    conf = next(e for e in ctl._log.all if e.kind == "bring_up_confirmed")
    assert conf.data["usable"] and conf.data["response_rms_g"] > 0
    # the connection after the confirmation is measured at the raised gain
    after = [e for e in ctl._log.all if e.kind == "connect" and e.data.get("after_bring_up")]
    assert after and after[0].data["mean_coherence"] > 0.9


# --------------------------------------------------------------------------- the command line


def _cli(*args: str) -> list[str]:
    return [sys.executable, "-m", "liveshape", *args]


def test_bring_up_without_a_terminal_is_refused_before_anything(tmp_path: Path) -> None:
    out = tmp_path / "runs"
    proc = subprocess.run(_cli("run", "examples/handlebar-nav-unit.yaml", "--bring-up",
                               "--fast", "--out", str(out)),
                          stdin=subprocess.DEVNULL, capture_output=True, text=True, cwd=REPO,
                          timeout=120)
    assert proc.returncode == 2
    assert proc.stderr.count("\n") == 1 and "not a terminal" in proc.stderr
    assert "--unattended" in proc.stderr and "Traceback" not in proc.stderr
    assert not out.exists() or not any(out.iterdir())


def run_with_enter(args: list[str], *, cwd: Path, env: dict | None = None,
                   timeout: float = 600) -> tuple[int, str, str, list[str]]:
    """Run ``args`` with a terminal on stdin; press Enter once the meter says 'usable'."""
    master, slave = pty.openpty()
    proc = subprocess.Popen(args, stdin=slave, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True, cwd=cwd, env=env)
    os.close(slave)
    err: list[str] = []
    seen: list[str] = []

    def read_err() -> None:
        for line in proc.stderr:
            err.append(line)
            if "usable: press Enter" in line and not seen:
                seen.append(line)
                os.write(master, b"\n")

    t = threading.Thread(target=read_err, daemon=True)
    t.start()
    try:
        out, _ = proc.communicate(timeout=timeout)
    finally:
        os.close(master)
    t.join(5)
    return proc.returncode, out, "".join(err), seen


def test_bring_up_with_enter_runs_and_records_the_confirmation(tmp_path: Path) -> None:
    rc, out, err, seen = run_with_enter(
        # 6 s at full level: about 120 DOF in the full-level average, so the verdict is not at
        # the mercy of a 40-DOF estimate's scatter against the ±3 dB alarm band
        _cli("run", "examples/handlebar-nav-unit.yaml", "--bring-up", "--fast", "--json",
             "--duration", "6", "--out", str(tmp_path / "runs")), cwd=REPO)
    assert rc == 0, err
    assert seen, err
    assert "Raise the amplifier gain slowly" in err and "Press Enter to go on" in err
    summary = json.loads(out)
    events = [json.loads(line) for line in
              (Path(summary["run_dir"]) / "events.jsonl").read_text().splitlines()]
    conf = [e for e in events if e["kind"] == "bring_up_confirmed"]
    assert len(conf) == 1 and conf[0]["data"]["response_rms_fs"] > 0
    assert conf[0]["t_s"] > 0


# --------------------------------------------------------------------------- what is shown


def test_panel_and_safety_notice_say_what_the_run_does() -> None:
    import io
    from types import SimpleNamespace

    from liveshape.control.bringup import MeterReading
    from liveshape.views import dashboard as dash

    def render(x) -> str:
        console = dash.make_console(file=io.StringIO(), width=200)
        console.print(x)
        return " ".join(console.file.getvalue().split())

    r = MeterReading(t_s=4.0, response_rms_fs=0.002, response_rms_g=0.02, background_rms_fs=1e-5,
                     snr_db=0.3, coherence=0.12, headroom_db=48.0, drive_rms_fs=0.01,
                     drive_rms_v=0.02, delay_samples=3584, usable=False,
                     reason="coherence 0.12 < 0.5")
    refused = SimpleNamespace(kind="bring_up_refused",
                              message="Enter refused: coherence 0.12 < 0.5")
    snap = SimpleNamespace(stage="bring_up", bring_up=r, drive_rms_fs=0.01,
                           recent_events=(refused,))
    text = render(dash.bring_up_panel(snap))
    assert ("Bring-up: the drive is held at the connection level, 0.01 FS rms; nothing louder "
            "plays until you confirm.") in text
    assert ("Raise the amplifier gain slowly until the meter says 'usable'. Press Enter to go on, "
            "Ctrl-C to stop.") in text
    assert ("response 0.002 FS rms = 0.02 g rms | SNR 0.3 dB | coherence 0.12 | input headroom "
            "48.0 dB | drive 0.0100 FS rms = 0.02 V rms") in text
    assert "not usable yet: coherence 0.12 < 0.5 (Enter refused: coherence 0.12 < 0.5)" in text
    ok = render(dash.bring_up_panel(SimpleNamespace(
        stage="bring_up", drive_rms_fs=0.01, recent_events=(),
        bring_up=MeterReading(**{**r.to_dict(), "usable": True, "reason": ""}))))
    assert "usable: press Enter to go on" in ok
    # the cautions: a real rig is asked to raise the gain; --unattended says no one asks
    assert "raise it when the meter asks you" in render(dash.safety_notice("audio"))
    unattended = render(dash.safety_notice("audio", bring_up=False))
    assert "--unattended: no pause to set the amplifier gain; it must be set already" in unattended
    assert "when the meter asks" not in unattended
    survey = render(dash.safety_notice("audio", bring_up=None))
    assert "Set the amplifier gain before the start: the survey does not pause for it" in survey
    assert "when the meter asks" not in survey


def test_ctrl_c_during_the_hold_ramps_down_and_stops(tmp_path: Path) -> None:
    import signal
    import time

    master, slave = pty.openpty()
    proc = subprocess.Popen(_cli("run", "examples/handlebar-nav-unit.yaml", "--bring-up",
                                 "--json", "--out", str(tmp_path / "runs")),
                            stdin=slave, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True, cwd=REPO)
    os.close(slave)
    try:
        for line in proc.stderr:
            if "usable: press Enter" in line:
                break
        time.sleep(0.5)
        proc.send_signal(signal.SIGINT)  # what Ctrl-C sends
        out, _ = proc.communicate(timeout=60)
    finally:
        os.close(master)
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert proc.returncode == 130
    summary = json.loads(out)
    assert summary["status"] == "stopped"
    events = [json.loads(x) for x in
              (Path(summary["run_dir"]) / "events.jsonl").read_text().splitlines()]
    kinds = [e["kind"] for e in events]
    assert "stop" in kinds and "bring_up_confirmed" not in kinds and "identify" not in kinds
