"""Tests of the report: report.pdf, summary.txt and (when asked) PNG plots from a run folder.

Most run folders here are DEMO DATA: made-up spectra written through RunRecorder (a NAVMAT-shaped
target, a control that scatters less each update, a single-degree-of-freedom FRF); the last
tests use real simulated runs (completed, aborted by a detached sensor, stopped). Outside
references: the PNG file signature (ISO/IEC 15948 / RFC 2083: the eight bytes 89 50 4E 47 0D 0A
1A 0A, then an IHDR chunk with width and height); the PDF file structure (ISO 32000-1: page
objects ``/Type /Page`` with ``/Contents``, Flate-compressed content streams, text shown by
``Tj``/``TJ`` string operators); the grms of the NAVMAT P-9492 profile (NAVMAT P-9492, 1979;
exact integral docs/methods.md, "Profile integrals"); the decibel definition; the kurtosis
m4/m2² as computed by scipy.stats.kurtosis(fisher=False) and the crest factor peak/rms
[common practice].
"""

from __future__ import annotations

import builtins
import datetime as dt
import json
import math
import re
import struct
import sys
import zlib

import numpy as np
import pytest
import scipy.stats

from liveshape.dsp.profile import Profile
from liveshape.errors import ConfigError
from liveshape.record.report import (
    MATPLOTLIB_MISSING,
    MissingPlotExtra,
    render_report,
    summary_text,
)
from liveshape.record.writer import RunRecorder

FS_HZ = 4096
FRAME = 512
NOW = dt.datetime(2024, 3, 4, 5, 6, 7, tzinfo=dt.timezone.utc)
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
NAVMAT = Profile((20.0, 80.0, 350.0, 2000.0), (0.01, 0.04, 0.04, 0.007), name="navmat")


def _demo_run(tmp_path, *, close: bool = True, calibrated: bool = True, n_updates: int = 6):
    """Write a demo run folder (invented numbers, for plotting only)."""
    rng = np.random.default_rng(11)
    f = np.arange(FRAME // 2 + 1) * FS_HZ / FRAME
    target = NAVMAT.asd_at(f)
    fn, zeta = 300.0, 0.05
    r = f / fn
    h1 = 2.0 / (1 - r**2 + 2j * zeta * r)  # demo SDOF-shaped FRF, g/FS
    rec = RunRecorder.create(
        tmp_path / "runs", name="demo", fs_hz=FS_HZ, now=NOW,
        spec_mapping={"name": "demo", "tolerance": {"alarm_db": 3.0, "abort_db": 6.0}},
        rig_mapping={"kind": "sim"},
        calibration={"calibrated": calibrated, "source": "sim:loudspeaker"},
    )
    t_s = 0.0
    for level in (-12.0, -6.0, 0.0):
        rec.event(t_s, "level", f"level {level:g} dB", {"level_db": level})
        t_s += 2.0
    for i in range(1, n_updates + 1):
        scatter_db = rng.normal(0.0, 4.0 / i, f.size)
        control = target * 10 ** (scatter_db / 10)
        band = target > 0
        dev = scatter_db[band]
        rec.update(
            i, 6.0 + i, f, control, target, np.abs(h1) ** -2 * target + 1e-9, h1,
            np.clip(0.97 - 0.2 * (r < 0.1), 0, 1),
            rms_error_db=float(10 * np.log10(control[band].sum() / target[band].sum())),
            max_dev_db=float(np.max(np.abs(dev))), level_db=0.0, dof=120.0,
            lines_outside_alarm=int(np.sum(np.abs(dev) > 3)),
            lines_outside_abort=int(np.sum(np.abs(dev) > 6)),
        )
    rec.signals(rng.normal(0, 0.1, 1024), rng.normal(0, 0.1, 1024))
    if close:
        rec.close({
            "status": "completed", "abort_reason": None, "updates_to_tolerance": 3,
            "final_rms_error_db": -0.12, "final_max_dev_db": 2.4,
            "final_lines_outside_alarm": 0, "final_lines_outside_abort": 0,
            "control_grms_g": 6.01, "target_grms_g": 6.06, "dof": 120.0,
            "time_at_full_level_s": 60.0,
        })
    return rec.root


def _png_size(path) -> tuple[int, int]:
    data = path.read_bytes()
    assert data[:8] == PNG_SIGNATURE
    length, kind = struct.unpack(">I4s", data[8:16])
    assert kind == b"IHDR" and length == 13
    return struct.unpack(">II", data[16:24])


_OBJ = re.compile(rb"(?:^|\n)(\d+) 0 obj\b")
_STREAM = re.compile(rb"stream\r?\n(.*)\r?\nendstream", re.S)
_SHOW = re.compile(rb"\[(.*?)\]\s*TJ|\((.*?)(?<!\\)\)\s*Tj", re.S)
_STRING = re.compile(rb"\((.*?)(?<!\\)\)", re.S)


def _pdf_string(raw: bytes) -> str:
    """A PDF literal string's bytes with its escapes undone (ISO 32000-1 §7.3.4.2)."""
    out = re.sub(rb"\\([0-7]{1,3})", lambda m: bytes([int(m.group(1), 8) & 0xFF]), raw)
    out = re.sub(rb"\\(.)", rb"\1", out)
    return out.decode("latin-1")


def _pdf_pages(path) -> list[str]:
    """Text of each page of a PDF, page order (a small reader for what matplotlib writes).

    Page objects are found by ``/Type /Page`` (not ``/Pages``) and read in the order of the
    page tree's ``/Kids``; each text-showing operator gives one line of the page's text.
    """
    data = path.read_bytes()
    assert data.startswith(b"%PDF-")
    heads = list(_OBJ.finditer(data))
    ends = [m.start() for m in heads[1:]] + [len(data)]
    objs = {int(m.group(1)): data[m.end():end] for m, end in zip(heads, ends, strict=True)}
    kids = next(re.search(rb"/Kids \[(.*?)\]", body, re.S).group(1)
                for body in objs.values() if b"/Type /Pages" in body)
    pages = []
    for ref in re.findall(rb"(\d+) 0 R", kids):
        body = objs[int(ref)]
        assert re.search(rb"/Type /Page\b(?!s)", body)
        contents = int(re.search(rb"/Contents (\d+) 0 R", body).group(1))
        raw = _STREAM.search(objs[contents]).group(1)
        flate = b"/FlateDecode" in objs[contents].split(b"stream", 1)[0]
        stream = zlib.decompressobj().decompress(raw) if flate else raw
        lines = []
        for m in _SHOW.finditer(stream):
            if m.group(1) is not None:
                lines.append("".join(_pdf_string(x) for x in _STRING.findall(m.group(1))))
            else:
                lines.append(_pdf_string(m.group(2)))
        pages.append("\n".join(lines))
    return pages


def test_report_writes_pdf_and_summary_and_pngs_only_when_asked(tmp_path):
    root = _demo_run(tmp_path)
    res = render_report(root)
    assert res.out_dir == root / "report"
    assert res.pdf_path == root / "report" / "report.pdf"
    assert res.pngs == {} and not list(res.out_dir.glob("*.png"))
    pages = _pdf_pages(res.pdf_path)
    assert len(pages) == len(res.pages) == 5  # 4 pages of figures, 1 page of events
    text = res.summary_path.read_text()
    assert text == res.summary
    for words in ("status:          completed", "6.010 g", "target: 6.060 g",
                  f"({20 * math.log10(6.01 / 6.06):+.2f} dB)", "rms error:       -0.12 dB",
                  "worst line |dev|: 2.40 dB", "alarm 0   abort 0", "to tolerance: 3",
                  "DOF:             120", "time at 0 dB:    60.0 s",
                  "calibrated (sim:loudspeaker)", "updates:         6", "report.pdf (5 pages)"):
        assert words in text, words
    res = render_report(root, png=True)
    assert set(res.pngs) == {"control", "drive", "frf", "convergence", "level"}
    for name, path in res.pngs.items():
        w, h = _png_size(path)
        # figsize (inches) x 110 dpi, as saved.
        assert w == 880, name
        assert h in (550, 440, 715, 770, 385), name


def test_report_from_killed_run_uses_last_update(tmp_path):
    root = _demo_run(tmp_path, close=False, calibrated=False)
    with open(root / "events.jsonl", "a", encoding="utf-8") as fh:
        fh.write('{"t_s": 9.0, "kind": "lev')  # cut by the kill
    out = tmp_path / "elsewhere"
    res = render_report(root, out_dir=out)
    assert res.out_dir == out and res.pdf_path.parent == out
    text = res.summary
    assert "incomplete" in text and "UNCALIBRATED" in text
    assert "1 unreadable line(s) skipped" in text
    # Target grms from the lines: sqrt(sum ASD df) against the exact integral 6.06 g of the
    # NAVMAT profile [calc, docs/methods.md]. The rectangle rule on lines differs from the
    # integral by at most about half a line of ASD at each band edge plus the curvature between
    # lines; bound
    # it by the edge terms df/2 (a_first + a_last) relative to the mean square.
    df = FS_HZ / FRAME
    exact = NAVMAT.grms
    edge_ms = df / 2 * (0.01 + 0.007) * 2
    target = float(text.split("target: ")[1].split(" g")[0])
    assert target == pytest.approx(exact, rel=edge_ms / exact**2 + 5e-4)  # + display rounding


def test_report_with_no_updates(tmp_path):
    rec = RunRecorder.create(
        tmp_path, name="empty", spec_mapping={}, rig_mapping={}, calibration={}, fs_hz=1000,
        now=NOW,
    )
    rec.event(0.0, "stage", "connect", {"level_db": -12.0})
    rec.close({"status": "aborted", "abort_reason": "loop open: no response"})
    res = render_report(rec.root)
    assert "loop open: no response" in res.summary
    assert "calibration:     not recorded" in res.summary
    pages = _pdf_pages(res.pdf_path)
    assert len(pages) == 5
    assert "no control spectrum was recorded" in pages[0]
    assert all("ABORTED at 0.0 s: loop open: no response" in p for p in pages)


def test_missing_matplotlib_is_one_line(tmp_path, monkeypatch):
    root = _demo_run(tmp_path, n_updates=1)
    real_import = builtins.__import__

    def no_matplotlib(name, *args, **kwargs):
        if name == "matplotlib" or name.startswith("matplotlib."):
            raise ImportError(f"No module named {name!r}")
        return real_import(name, *args, **kwargs)

    for mod in [m for m in sys.modules if m == "matplotlib" or m.startswith("matplotlib.")]:
        monkeypatch.delitem(sys.modules, mod)
    monkeypatch.setattr(builtins, "__import__", no_matplotlib)
    with pytest.raises(MissingPlotExtra) as info:
        render_report(root)
    assert str(info.value) == MATPLOTLIB_MISSING
    assert str(info.value) == "matplotlib is not installed: pip install 'liveshape[plot]'"
    assert isinstance(info.value, ConfigError)
    assert not (root / "report").exists()


def test_bad_run_dir_is_one_line(tmp_path):
    with pytest.raises(ConfigError) as info:
        render_report(tmp_path / "missing")
    assert "run folder not found" in str(info.value) and "\n" not in str(info.value)
    (tmp_path / "plain").mkdir()
    with pytest.raises(ConfigError, match="not a run folder"):
        render_report(tmp_path / "plain")


def test_summary_text_needs_no_matplotlib(tmp_path):
    from liveshape.record.writer import load_run

    text = summary_text(load_run(_demo_run(tmp_path, n_updates=2)))
    assert text.startswith("liveshape run report: demo\n")


def test_level_track_follows_events_to_the_end(tmp_path):
    from liveshape.record.report import _level_track
    from liveshape.record.writer import load_run

    root = _demo_run(tmp_path, close=False, n_updates=2)
    rec_events = root / "events.jsonl"
    with open(rec_events, "a", encoding="utf-8") as fh:
        fh.write('{"t_s": 9.5, "kind": "stage", "message": "done", "data": {}}\n')
    t, lv = _level_track(load_run(root))
    # Level events at 0, 2, 4 s (-12, -6, 0 dB); the updates' own level_db figures are not
    # mixed in; the last level holds to the last event.
    np.testing.assert_array_equal(t, [0.0, 2.0, 4.0, 9.5])
    np.testing.assert_array_equal(lv, [-12.0, -6.0, 0.0, 0.0])


def test_report_of_a_real_simulated_run(tmp_path):
    import dataclasses
    from pathlib import Path

    from liveshape.control.controller import Controller
    from liveshape.rigs.plant import load_plant
    from liveshape.rigs.sim import SimRig
    from liveshape.testdef.spec import load_spec, spec_to_mapping

    example = Path(__file__).resolve().parents[1] / "examples" / "handlebar-nav-unit.yaml"
    spec = load_spec(example, {"control.fs_hz": 8000, "control.lines": 512,
                               "control.target_dof": 60, "schedule.full_level_s": 2,
                               "schedule.hold_s": 0.5})
    rig = SimRig(load_plant("loudspeaker"), spec.control.fs_hz, seed=1)
    ctl = Controller(spec, rig.calibration, seed=2)
    response, last = np.zeros(1024), None
    with RunRecorder.create(tmp_path, name=spec.name, spec_mapping=spec_to_mapping(spec),
                            rig_mapping={"kind": "sim"}, fs_hz=spec.control.fs_hz, now=NOW,
                            calibration=dataclasses.asdict(rig.calibration)) as rec:
        while not ctl.finished:
            response = rig.process(ctl.exchange(response))
            rec.events(ctl.drain_events())
            if ctl.last_update is not None and ctl.last_update is not last:
                last = ctl.last_update
                rec.update_from(last)
        result = ctl.result()
        rec.close(result)
    res = render_report(rec.root)
    text = res.summary
    assert "status:          completed" in text
    assert f"grms control:    {result.control_grms_g:.3f} g" in text
    assert f"target: {result.target_grms_g:.3f} g" in text
    assert f"DOF:             {result.dof:.0f}" in text
    assert f"updates:         {result.updates}" in text
    assert len(_pdf_pages(res.pdf_path)) >= 5


# --------------------------------------------------------------------------------------------
# The PDF's content


def _with_identity(root, **fields):
    """Add the identity fields a newer recorder writes at the top of run.json."""
    path = root / "run.json"
    meta = json.loads(path.read_text())
    meta.update(fields)
    path.write_text(json.dumps(meta))


def _with_summary(root, **fields):
    path = root / "summary.json"
    data = json.loads(path.read_text())
    data.update(fields)
    path.write_text(json.dumps(data))


def _full_level_file(root, *, worst_db: float, dof: float = 364.0):
    """Write decisions/full_level.npz: the target with every line +0.4 dB and one line at
    ``worst_db`` (demo numbers)."""
    f = np.arange(FRAME // 2 + 1) * FS_HZ / FRAME
    band = (f >= 20) & (f <= 2000)
    fb = f[band]
    target = NAVMAT.asd_at(fb)
    dev = np.full(fb.size, 0.4)
    dev[fb.size // 2] = worst_db
    control = target * 10 ** (dev / 10)
    (root / "decisions").mkdir(exist_ok=True)
    np.savez(root / "decisions" / "full_level.npz", f_hz=fb, control_psd_g2_hz=control,
             target_psd_g2_hz=target, alarm_db=np.full(fb.size, 3.0),
             abort_db=np.full(fb.size, 6.0), dof=np.asarray(dof))
    return fb, control, target


def test_first_page_identity_verdict_and_full_level_figures(tmp_path):
    root = _demo_run(tmp_path)
    _with_identity(root, software_version="9.8.7", spec_file="tests/demo.yaml",
                   spec_sha256="ab" * 32, operator="R. Tester", test_item="SN 0042")
    _with_summary(root, verdict="pass", verdict_reasons=[], verdict_rule="pass: demo rule",
                  full_level_dof=364.0, alarm_fraction=0.05, max_alarm_fraction=0.1)
    fb, control, target = _full_level_file(root, worst_db=-2.2)
    res = render_report(root)
    pages = _pdf_pages(res.pdf_path)
    first = pages[0]
    for words in ("demo", "tests/demo.yaml", "ab" * 32, "liveshape 9.8.7",
                  "2024-03-04T05:06:07+00:00", "R. Tester", "SN 0042", "PASS",
                  "rule: pass: demo rule", "full-level average, 364 DOF",
                  "5 % of the full-level time   (at most 10 %)", "reviewed by:", "signature:"):
        assert words in first, words
    # The figures are those of the stored average: rms error 10 log10(sum C / sum T) (a power
    # ratio in decibels), signed line deviations (the worst line is negative: no "+").
    rms_db = 10 * math.log10(control.sum() / target.sum())
    assert f"{rms_db:+.2f} dB   (alarm ±1 dB, abort ±1.5 dB)" in first
    assert "+0.40 dB / -2.20 dB" in first and "+-" not in first
    assert "alarm 0   abort 0" in first
    # 90 % chi-square band of a 364-DOF estimate (Bendat & Piersol, Random Data, 4th ed.,
    # §8.5.4), computed here with scipy.stats.chi2.
    import scipy.stats

    lo = 10 * math.log10(364 / scipy.stats.chi2.ppf(0.95, 364))
    hi = 10 * math.log10(364 / scipy.stats.chi2.ppf(0.05, 364))
    assert f"band {lo:+.2f} / {hi:+.2f} dB (364 DOF)" in first
    assert all("PASS" in p for p in pages)
    assert not any("ABORTED" in p or "STOPPED" in p for p in pages)


def test_first_page_falls_back_to_the_last_update_with_a_label(tmp_path):
    root = _demo_run(tmp_path)
    first = _pdf_pages(render_report(root).pdf_path)[0]
    assert "last update 6 at 12.0 s, 120 DOF (no full-level average in this record)" in first
    assert "NO VERDICT" in first


def test_first_page_falls_back_to_the_last_decision(tmp_path):
    from liveshape.record.report import decision_spectrum
    from liveshape.record.writer import load_run

    rec = RunRecorder.create(tmp_path, name="dec", spec_mapping={}, rig_mapping={},
                             calibration={}, fs_hz=FS_HZ, now=NOW)
    f = np.arange(FRAME // 2 + 1) * FS_HZ / FRAME
    target = NAVMAT.asd_at(f)
    for i, (dec_db, dof) in enumerate(((np.nan, 0.0), (-1.0, 240.0), (np.nan, 0.0)), start=1):
        rec.update(i, float(i), f, target * 2.0, target, target * 1e-3,
                   arrays={"decision_psd": target * 10 ** (dec_db / 10)}, decision_dof=dof,
                   dof=60.0)
    rec.close({"status": "completed"})
    d = decision_spectrum(load_run(rec.root))
    assert d.source == "decision" and d.dof == 240.0
    np.testing.assert_allclose(d.control_psd[target > 0], target[target > 0] * 10 ** -0.1)
    first = _pdf_pages(render_report(rec.root).pdf_path)[0]
    assert "last decision, update 2 at 2.0 s, 240 DOF (no full-level average" in first
    assert "-1.00 dB   (alarm ±1 dB" in first  # 10 log10 of the power ratio 10^-0.1


def test_failed_verdict_lists_its_reasons(tmp_path):
    root = _demo_run(tmp_path)
    _with_summary(root, verdict="fail", verdict_rule="pass: demo rule",
                  verdict_reasons=["4 lines outside the alarm limit in the full-level average",
                                   "rms error +1.20 dB outside the rms alarm limit of 1 dB"])
    _full_level_file(root, worst_db=4.0)
    res = render_report(root)
    first = _pdf_pages(res.pdf_path)[0]
    assert "FAIL" in first
    assert "4 lines outside the alarm limit in the full-level average" in first
    assert "rms error +1.20 dB outside the rms alarm limit of 1 dB" in first
    assert "alarm 1   abort 0" in first  # the one line at +4 dB, counted from the average
    assert "verdict:         FAIL" in res.summary


def _trip_run(tmp_path, status: str):
    root = _demo_run(tmp_path, close=False)
    with open(root / "events.jsonl", "a", encoding="utf-8") as fh:
        kind = "trip" if status == "aborted" else "stop"
        fh.write(json.dumps({"t_s": 13.25, "kind": kind, "message": "demo", "data": {}}) + "\n")
        fh.write(json.dumps({"t_s": 13.5, "kind": "stage", "message": "done",
                             "data": {"stage": "done"}}) + "\n")
    summary = {"status": status, "abort_reason": "sensor signal lost",
               "trip": {"rule": "loop_open"} if status == "aborted" else None,
               "abort_rule": "loop_open" if status == "aborted" else None,
               "verdict": "incomplete", "verdict_reasons": [f"run {status}"]}
    (root / "summary.json").write_text(json.dumps(summary))
    return root


@pytest.mark.parametrize("status, banner, marker", [
    ("aborted", "ABORTED at 13.2 s, rule loop_open: sensor signal lost",
     "aborted (loop_open) at 13.2 s"),
    ("stopped", "STOPPED at 13.2 s: sensor signal lost", "stopped at 13.2 s"),
])
def test_every_page_of_an_ended_run_carries_the_marker(tmp_path, status, banner, marker):
    res = render_report(_trip_run(tmp_path, status))
    pages = _pdf_pages(res.pdf_path)
    assert len(pages) == 5
    for p in pages:
        assert banner in p and "INCOMPLETE" in p
    assert pages[1].count(marker) == 2  # the marker line in both time plots
    assert f"INCOMPLETE: {status}, no pass" in res.summary


def test_event_log_is_paginated(tmp_path):
    from liveshape.record.report import EVENT_LINES_PER_PAGE

    root = _demo_run(tmp_path, close=False)
    n_extra = 2 * EVENT_LINES_PER_PAGE
    with open(root / "events.jsonl", "a", encoding="utf-8") as fh:
        for i in range(n_extra):
            fh.write(json.dumps({"t_s": 20.0 + i, "kind": "note", "message": f"note {i}",
                                 "data": {}}) + "\n")
    res = render_report(root)
    pages = _pdf_pages(res.pdf_path)
    n_events = 3 + n_extra
    n_log = math.ceil(n_events / EVENT_LINES_PER_PAGE)
    assert len(pages) == 4 + n_log
    assert f"event log ({n_log} of {n_log})" in pages[-1]
    assert f"note {n_extra - 1}" in pages[-1] and "note 0" in pages[4]
    assert f"page {len(pages)} of {len(pages)}" in pages[-1]


def test_error_plots_use_their_own_limits_and_whole_updates(tmp_path):
    from matplotlib.figure import Figure

    from liveshape.record.report import _tolerance, draw_line_error, draw_rms_error
    from liveshape.record.writer import load_run

    root = _demo_run(tmp_path)
    (root / "spec.yaml").write_text(
        "name: demo\ntolerance:\n  alarm_db: 3.0\n  abort_db: 6.0\n  rms_alarm_db: 1.0\n"
        "  rms_abort_db: 1.5\n  bands:\n"
        "  - {f_lo_hz: 20, f_hi_hz: 40, alarm_db: 4.5, abort_db: 7.5}\n")
    run = load_run(root)
    tol, note = _tolerance(run)
    assert note == ""
    fig = Figure()
    ax_rms, ax_line = fig.add_subplot(2, 1, 1), fig.add_subplot(2, 1, 2)
    draw_rms_error(ax_rms, run, tol)
    draw_line_error(ax_line, run, tol)

    def levels(ax):
        return sorted({round(float(line.get_ydata()[0]), 6) for line in ax.get_lines()
                       if len(set(np.asarray(line.get_ydata(), float))) == 1
                       and len(line.get_ydata()) == 2})

    assert levels(ax_rms) == [-1.5, -1.0, 0.0, 1.0, 1.5]
    assert levels(ax_line) == [-7.5, -6.0, -4.5, -3.0, 0.0, 3.0, 4.5, 6.0, 7.5]
    for ax in (ax_rms, ax_line):
        ticks = ax.xaxis.get_major_locator().tick_values(0.7, 6.3)
        assert np.all(ticks == np.round(ticks))


def test_signal_stats_match_scipy(tmp_path):
    import scipy.stats
    import soundfile

    from liveshape.record.report import signal_stats

    rng = np.random.default_rng(5)
    x = np.concatenate([rng.normal(0, 0.1, 30000), rng.laplace(0, 0.2, 50000)])
    path = tmp_path / "x.wav"
    soundfile.write(path, x.astype(np.float32), 10000, subtype="FLOAT")
    y = soundfile.read(path, dtype="float64")[0][30000:70000]
    st = signal_stats(path, 3.0, 7.0, block=4096)
    assert st.seconds == pytest.approx(4.0)
    # Kurtosis m4/m2² as scipy.stats.kurtosis(fisher=False) (Pearson's definition); crest
    # factor peak / rms [common practice].
    assert st.kurtosis == pytest.approx(scipy.stats.kurtosis(y, fisher=False), rel=1e-9)
    rms = math.sqrt(np.mean(y**2))
    assert st.rms == pytest.approx(rms, rel=1e-9)
    assert st.crest_factor == pytest.approx(np.max(np.abs(y)) / rms, rel=1e-9)
    assert signal_stats(path, 9.0, 9.0) is None


def test_report_failure_leaves_no_partial_pdf(tmp_path, monkeypatch):
    import liveshape.record.report as report

    root = _demo_run(tmp_path)

    def boom(*args, **kwargs):
        raise RuntimeError("drawing failed")

    monkeypatch.setattr(report, "draw_rms_error", boom)
    with pytest.raises(RuntimeError):
        render_report(root)
    assert not (root / "report" / "report.pdf").exists()
    assert not [p for p in (root / "report").iterdir() if p.suffix in (".pdf", ".tmp")]


def test_report_command_writes_pdf_and_pngs_when_asked(tmp_path, capsys):
    from liveshape.cli import main

    root = _demo_run(tmp_path)
    assert main(["report", str(root)]) == 0
    out = capsys.readouterr().out
    assert f"report: {root / 'report' / 'report.pdf'}" in out and ".png" not in out
    assert main(["report", str(root), "--png", "--out", str(tmp_path / "o")]) == 0
    out = capsys.readouterr().out
    assert f"control: {tmp_path / 'o' / 'control.png'}" in out
    assert main(["report", str(tmp_path / "nothing")]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "run folder not found" in err


# --------------------------------------------------------------------------------------------
# Real simulated runs: completed, aborted, stopped


def _sim_run(tmp_path, fault: str | None = None, stop_at_stage: str | None = None):
    from pathlib import Path

    from liveshape.session import StopFlag, run_session
    from liveshape.testdef.spec import load_spec, parse_fault

    example = Path(__file__).resolve().parents[1] / "examples" / "handlebar-nav-unit.yaml"
    overrides = {"control.fs_hz": 8000, "control.lines": 512, "control.target_dof": 60,
                 "schedule.full_level_s": 2, "schedule.hold_s": 0.5}
    if fault:
        overrides["faults"] = [parse_fault(fault)]
    spec = load_spec(example, overrides)
    flag = StopFlag()

    def snap(s):
        if stop_at_stage is not None and s.stage == stop_at_stage:
            flag.set("operator asked to stop")

    session = run_session(spec, out_dir=tmp_path, fast=True, block_size=512, stop=flag,
                          on_snapshot=snap, view_hz=1e9)  # a snapshot after every block
    return session


def _events_of(root):
    return [json.loads(line) for line in (root / "events.jsonl").read_text().splitlines()]


def test_report_of_real_completed_aborted_and_stopped_runs(tmp_path):
    import scipy.stats
    import soundfile

    done = _sim_run(tmp_path / "done")
    aborted = _sim_run(tmp_path / "aborted", fault="sensor_detached@5")
    stopped = _sim_run(tmp_path / "stopped", stop_at_stage="full_level")
    assert (done.result.status, aborted.result.status, stopped.result.status) == (
        "completed", "aborted", "stopped")

    pages = _pdf_pages(render_report(done.run_dir).pdf_path)
    assert len(pages) >= 5
    assert not any("ABORTED" in p or "STOPPED" in p for p in pages)
    summary = json.loads((done.run_dir / "summary.json").read_text())
    assert summary["verdict"].upper() in pages[0].split("\n")  # the verdict's headline
    dof = summary["full_level_dof"]
    assert f"full-level average, {dof:.0f} DOF" in pages[0]
    for words in ("response rms, 0.5 s blocks", "control rms per update", "rms alarm ±1 dB",
                  "target rms at the level", "test level"):
        assert words in pages[1], words
    for words in ("drive PSD", "FRF estimate H1", "coherence", "phase (deg)"):
        assert words in pages[2], words
    for words in ("largest line deviation", "smallest line deviation", "rms abort ±1.5 dB",
                  "alarm ±4.5 dB, 20-40 Hz"):
        assert words in pages[3], words
    assert "event log (1 of" in pages[4] and "done: completed" in pages[-1]
    # Kurtosis of the response over the time at full level, as scipy computes it.
    events = _events_of(done.run_dir)
    full = next(e for e in events if e["kind"] == "level" and e["data"]["level_db"] == 0.0)
    start = full["t_s"] + full["data"]["ramp_s"]
    end = next(e["t_s"] for e in events
               if e["kind"] == "stage" and e["data"].get("stage") == "ramp_down")
    y, fs = soundfile.read(done.run_dir / "response.wav", dtype="float64")
    seg = y[int(round(start * fs)): int(round(end * fs))]
    kurt = scipy.stats.kurtosis(seg, fisher=False)  # Pearson's kurtosis m4/m2²
    assert f"response kurtosis / crest\n{kurt:.2f} / " in pages[0]

    trip = next(e for e in _events_of(aborted.run_dir) if e["kind"] == "trip")
    pages = _pdf_pages(render_report(aborted.run_dir).pdf_path)
    banner = f"ABORTED at {trip['t_s']:.1f} s, rule {aborted.result.abort_rule}"
    assert all(banner in p for p in pages)

    stop = next(e for e in _events_of(stopped.run_dir) if e["kind"] == "stop")
    pages = _pdf_pages(render_report(stopped.run_dir).pdf_path)
    assert all(f"STOPPED at {stop['t_s']:.1f} s: operator asked to stop" in p for p in pages)


def test_signals_of_a_run_stopped_in_a_ramp_come_from_the_step_before(tmp_path):
    from liveshape.record.report import _signal_window
    from liveshape.record.writer import load_run

    rec = RunRecorder.create(tmp_path, name="ramp", spec_mapping={}, rig_mapping={},
                             calibration={}, fs_hz=1000, now=NOW)
    rec.event(10.0, "level", "level -3 dB", {"level_db": -3.0, "ramp_s": 0.5})
    rec.event(20.0, "level", "level 0 dB", {"level_db": 0.0, "ramp_s": 0.5})
    rec.event(20.2, "stop", "stop: asked", {})  # inside the ramp to 0 dB
    rec.event(20.5, "stage", "ramp down", {"stage": "ramp_down"})
    rec.close({"status": "stopped"})
    start, end, words = _signal_window(load_run(rec.root))
    assert (start, end) == (10.5, 20.0)
    assert "-3 dB (full level not reached)" in words


def test_report_of_a_record_without_signals(tmp_path):
    rec = RunRecorder.create(tmp_path, name="nowav", spec_mapping={}, rig_mapping={},
                             calibration={}, fs_hz=FS_HZ, now=NOW, signals=False)
    f = np.arange(FRAME // 2 + 1) * FS_HZ / FRAME
    target = NAVMAT.asd_at(f)
    drive = np.where(target > 0, 1e-6, 0.0)
    rec.update(1, 1.0, f, target, target, drive, dof=60.0)
    rec.close({"status": "completed"})
    first = _pdf_pages(render_report(rec.root).pdf_path)[0]
    # Drive rms from the last update's drive PSD: sqrt(sum G df) over the lines with a target.
    rms = math.sqrt(1e-6 * np.count_nonzero(target > 0) * FS_HZ / FRAME)
    assert f"{rms:.3f} FS in the band, last update" in first and "no drive.wav, so no peak" in first
    assert "not available (no drive.wav)" in first and "not available (no response.wav)" in first


def test_report_in_si_units(tmp_path, capsys):
    # g0 = 9.80665 m/s² (3rd CGPM, 1901): the same record reported in m/s² shows every
    # acceleration g0 times larger (ASDs g0² times), and nothing else changes.
    from liveshape.cli import main
    from liveshape.record.writer import load_run
    from liveshape.testdef.chain import ACCEL_UNITS

    root = _demo_run(tmp_path)
    g = summary_text(load_run(root))
    si = summary_text(load_run(root), ACCEL_UNITS["m/s2"])
    assert "grms control:    6.010 g   target: 6.060 g" in g
    assert f"rms control:     {6.01 * 9.80665:.3f} m/s²   target: {6.06 * 9.80665:.3f} m/s²" in si
    assert [x for x in g.splitlines() if "control" not in x] == \
        [x for x in si.splitlines() if "control" not in x]
    assert main(["report", str(root), "--units", "m/s2", "--out", str(tmp_path / "si")]) == 0
    first = _pdf_pages(tmp_path / "si" / "report.pdf")[0]
    assert "m/s²" in first and "(m/s²)²/Hz" in first


def test_report_units_option_is_checked(tmp_path, capsys):
    from liveshape.cli import main

    root = _demo_run(tmp_path)
    with pytest.raises(SystemExit) as exc:
        main(["report", str(root), "--units", "furlong"])
    assert exc.value.code == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "--units" in err and "furlong" in err
    assert not (root / "report").exists()


def test_the_report_reads_the_control_column_of_a_run_with_several_inputs(tmp_path):
    import types

    import soundfile

    from liveshape.record.report import control_column, signal_stats

    rng = np.random.default_rng(3)
    y = np.column_stack([0.3 * rng.standard_normal(48000), 0.05 * rng.standard_normal(48000)])
    path = tmp_path / "response.wav"
    soundfile.write(path, y.astype(np.float32), 48000, subtype="FLOAT")
    run = types.SimpleNamespace(rig={"inputs": [{"channel": 1, "role": "monitor"},
                                               {"channel": 2, "role": "control"}]})
    assert control_column(run) == 1
    assert control_column(types.SimpleNamespace(rig={"kind": "sim"})) == 0
    st = signal_stats(path, column=control_column(run))
    # rms and kurtosis of the control column as numpy and scipy compute them
    x = y[:, 1].astype(np.float32).astype(float)
    assert st.rms == pytest.approx(float(np.sqrt(np.mean(x**2))), rel=1e-9)
    assert st.kurtosis == pytest.approx(float(scipy.stats.kurtosis(x, fisher=False)), rel=1e-6)
