"""Lines the drive does not cause (mains hum): found, held, taken out of the control.

Outside references: the simulated hum's own truth (frequencies, level per line, drift; the rig
knows them); Thomson's harmonic F-test (Proc. IEEE 70(9), 1982, §XIII) for the false findings
per block, bounded with the Poisson law (scipy.stats); the least-squares sine fit (IEEE Std 1057)
behind the removal.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from scipy import signal, stats

from liveshape.control.controller import Controller
from liveshape.control.humguard import HumGuard
from liveshape.rigs.hum import HumSource
from liveshape.session import build_sim_rig
from liveshape.testdef.hum_spec import HumSpec
from liveshape.testdef.spec import load_spec

FS = 48_000.0
EXAMPLE = Path(__file__).resolve().parents[1] / "examples" / "handlebar-nav-unit.yaml"


def _stream(seconds: float, *, hum: HumSpec | None, tone_hz: float | None = None, seed=1):
    """Blocks of (drive FS, random control FS, hum FS) at 10 g/FS."""
    rng = np.random.default_rng(seed)
    sos = signal.butter(4, [20 / (FS / 2), 1000 / (FS / 2)], "band", output="sos")
    zi = np.zeros((sos.shape[0], 2))
    src = None if hum is None else HumSource(hum, FS, seed=seed)
    n = 4096
    for k in range(int(seconds * FS / n)):
        x = rng.standard_normal(n) * 0.05
        if tone_hz is not None:
            x = x + 0.05 * np.cos(2 * np.pi * tone_hz * (k * n + np.arange(n)) / FS)
        y, zi = signal.sosfilt(sos, 2 * x, zi=zi)
        h = np.zeros(n) if src is None else src.block(n) / 10.0
        yield k * n, x, y, h


def test_hum_is_found_at_its_lines_and_removed_while_it_drifts():
    spec = HumSpec(mains_hz=50.0, harmonics=3, level_g=0.3, drift_hz=0.1, drift_period_s=20.0)
    g = HumGuard(FS, (20.0, 1000.0), g_per_fs=10.0)
    resid, hums = [], []
    for n0, x, y, h in _stream(30.0, hum=spec):
        out = g.push(x, y + h, n0, n0 / FS)
        if n0 / FS > 10.0:
            resid.append(out - y)
            hums.append(h)
    found = sorted(line.f_hz + line.rate_hz for line in g.held)
    # the rig's truth: 50, 100, 150 Hz give or take the ±0.1 Hz drift (×h for harmonic h)
    assert found == pytest.approx([50.0, 100.0, 150.0], abs=0.5)
    for line in g.held:
        assert line.rms_g == pytest.approx(0.3, rel=0.15)  # level_g per line
    r, h = np.concatenate(resid), np.concatenate(hums)
    assert 20 * np.log10(np.std(h) / np.std(r)) >= 15.0  # taken out by 15 dB at least


def test_a_tone_in_the_drive_is_caused_by_the_drive():
    g = HumGuard(FS, (20.0, 1000.0), g_per_fs=10.0)
    for n0, x, y, _ in _stream(20.0, hum=None, tone_hz=120.0):
        g.push(x, y, n0, n0 / FS)
    assert not g.held  # sine-on-random tones are not flagged


def test_no_line_is_held_on_random_alone():
    # A held line needs findings in two consecutive blocks at the same frequency; each block has
    # at most false_per_block false findings on average (the F-test's threshold), so over B
    # blocks the expected number of holds is far below B · false_per_block², and the chance of
    # even one is bounded by the Poisson law with that mean
    g = HumGuard(FS, (20.0, 1000.0), g_per_fs=10.0, false_per_block=0.01)
    blocks = 0
    for n0, x, y, _ in _stream(60.0, hum=None, seed=4):
        g.push(x, y, n0, n0 / FS)
        blocks = n0 // g._n_detect
    mean_holds = blocks * 0.01  # generous: one false finding per block followed by any
    assert stats.poisson.sf(len(g.held) - 1, mean_holds) > 1e-3 if g.held else True
    assert not g.held


def test_a_line_that_stops_is_released():
    spec = HumSpec(mains_hz=60.0, harmonics=1, level_g=0.3, drift_hz=0.0, drift_period_s=20.0)
    g = HumGuard(FS, (20.0, 1000.0), g_per_fs=10.0, release=3)
    for n0, x, y, h in _stream(20.0, hum=spec):
        g.push(x, y + (h if n0 / FS < 10.0 else 0.0), n0, n0 / FS)
    kinds = [k for k, _ in g.drain()]
    assert kinds == ["found", "gone"] and not g.held


def _run(hum: dict | None):
    ov = {"schedule.full_level_s": 30.0}
    if hum is not None:
        ov["rig.hum"] = hum
    spec = load_spec(EXAMPLE, ov)
    rig, cal, _ = build_sim_rig(spec, 2)
    ctl = Controller(spec, cal)
    resp = np.zeros(4096)
    while not ctl.finished:
        resp = rig.process(ctl.exchange(resp))
    return ctl


def test_the_loop_holds_its_drive_and_verdict_through_hum_20_db_above_the_control():
    # 1 g rms per line at 50, 100, 150 Hz: about 20 dB above the control ASD · df there
    # (0.002 g²/Hz · 5.86 Hz = 0.012 g², against 1 g²)
    hummed = _run({"mains_hz": 50, "harmonics": 3, "level_g": 1.0, "drift_hz": 0.1})
    clean = _run(None)
    res = hummed.result()
    assert res.status == "completed" and res.verdict.verdict == "pass", res.verdict.reasons
    assert sorted(round(ln["f_hz"]) for ln in res.lines) == [50, 100, 150]
    assert all(ln["rms_g"] == pytest.approx(1.0, rel=0.25) for ln in res.lines)
    assert clean.result().lines == []  # searched, nothing held without hum
    kinds = [e.kind for e in hummed.events]
    assert kinds.count("line_found") == 3
    # the drive: the same on every line away from the hum, and on the held lines within the
    # loop's own line-to-line scatter of a few tenths of a dB plus interpolation (2 dB)
    band = hummed._band
    a, b = hummed._out.psd[band], clean._out.psd[band]
    d = 10 * np.log10(a / b)
    held = hummed._hum_mask()
    assert np.max(np.abs(d[held])) <= 2.0
    assert np.median(np.abs(d[~held])) <= 0.1


def test_the_summary_the_screen_and_the_report_name_the_lines(tmp_path):
    import io

    from liveshape.record.report import _figure_rows
    from liveshape.record.runfolder import load_run
    from liveshape.session import run_session
    from liveshape.views import dashboard

    spec = load_spec(EXAMPLE, {"schedule.full_level_s": 6.0,
                               "rig.hum": {"mains_hz": 60, "harmonics": 2, "level_g": 1.0}})
    session = run_session(spec, out_dir=tmp_path, fast=True, seed=2)
    summary = session.summary()
    lines = summary["lines_not_caused_by_drive"]
    assert sorted(round(ln["f_hz"]) for ln in lines) == [60, 120]
    assert all(ln["cause"] == "not caused by the drive" for ln in lines)
    console = dashboard.make_console(file=io.StringIO(), width=140)
    console.print(dashboard.run_summary(summary))
    assert "lines not from the drive" in console.file.getvalue()
    run = load_run(session.run_dir)
    rows, _ = _figure_rows(run, None, spec.tolerance, {}, "")
    assert any(r[0] == "lines not from the drive" and "g rms" in r[1]
               and ("59." in r[1] or "60." in r[1]) for r in rows)
