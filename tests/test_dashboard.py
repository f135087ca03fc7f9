"""Tests of the terminal views, rendered into StringIO consoles.

Outside references: the chi-square confidence interval of a PSD estimate (Bendat & Piersol,
Random Data; computed here with scipy.stats.chi2), Welch's (1967) equivalent DOF of overlapped
Hann segments (c(1) = 1/6 at 50 % overlap), the NAVMAT P-9492 screening profile and the exact
integral of a power-law segment (docs/methods.md, "Profile integrals"), the decibel definition
10·log10 of a power ratio, and the terminal sizes 80×24 (the VT100's screen, DEC VT100 User
Guide, 1978) and 140×45 [common practice for a wide terminal].
"""

from __future__ import annotations

import io
import math
import re
from types import SimpleNamespace

import numpy as np
import pytest
import scipy.stats

from liveshape.control.runstate import ControlSnapshot, Event, RunResult
from liveshape.control.safety import Trip
from liveshape.dsp.profile import Profile
from liveshape.testdef.tolerance import Tolerance
from liveshape.views import dashboard as dash
from liveshape.views import runtext

WIDTH = 120


def _render(renderable, width: int = WIDTH) -> str:
    console = dash.make_console(file=io.StringIO(), width=width)
    console.print(renderable)
    return console.file.getvalue()


def _navmat() -> Profile:
    # NAVMAT P-9492 screening spectrum: 20-80 Hz +3 dB/oct, 80-350 Hz 0.04 g²/Hz, 350-2000 Hz
    # -3 dB/oct (NAVMAT P-9492, 1979); end values 0.01 and 0.007 g²/Hz [calc: 0.04 (20/80)^0.9966
    # = 0.0100 and 0.04 (2000/350)^-0.9966 = 0.0070, rounded].
    return Profile((20.0, 80.0, 350.0, 2000.0), (0.01, 0.04, 0.04, 0.007), name="navmat")


_F_HZ = np.arange(513) * 8000 / 1024


def _snapshot(**kw) -> ControlSnapshot:
    """A real controller snapshot filled with demo values (the controller's own numbers are
    tested in test_controller.py; here only how they are shown)."""
    target = _navmat().asd_at(_F_HZ)
    values = dict(
        t_s=42.0, stage="full_level", status="running", level_db=0.0, gain_db=-1.5,
        step_index=4, n_steps=5, elapsed_s=42.0, remaining_s=55.0, time_at_full_level_s=5.0,
        full_level_s=60.0, control_grms_g=5.912, target_grms_g=6.058, drive_rms_fs=0.231,
        drive_rms_limit_fs=0.5, drive_peak_fs=0.93, drive_peak_limit_fs=1.0, f_hz=_F_HZ,
        control_psd=target * 10 ** (0.5 / 10), target_psd=target, drive_psd=target * 1e-3,
        alarm_db=np.full(_F_HZ.size, 3.0), abort_db=np.full(_F_HZ.size, 6.0), max_dev_db=3.7,
        min_dev_db=-2.4, lines_outside_alarm=17, lines_outside_abort=2, rms_error_db=-0.21,
        dof=120.0, chi2_lo_db=float("nan"), chi2_hi_db=float("nan"), updates=31,
        loop_delay_samples=1536, trip=None,
        recent_events=(
            Event(1.5, "stage", "identify: low-level noise", {}),
            Event(30.0, "level", "level 0 dB", {"level_db": 0.0}),
            Event(40.0, "alarm", "17 lines outside alarm", {"lines": 17}),
        ),
    )
    values.update(kw)
    return ControlSnapshot(**values)


def test_dashboard_shows_the_numbers():
    out = _render(dash.dashboard(_snapshot()))
    assert "full level" in out
    assert "level +0.0 dB" in out and "step 5 of 5" in out
    assert "elapsed 0:42" in out and "left at full level 0:55" in out
    assert "at full level 0:05 of 1:00" in out
    assert "5.912 / 6.058 g" in out
    # 20 log10(5.912 / 6.058) = -0.21 dB (decibels of an amplitude ratio).
    assert f"({20 * math.log10(5.912 / 6.058):+.2f} dB)" in out
    assert "+3.70 dB / -2.40 dB" in out
    assert "17 alarm" in out and "2 abort" in out
    assert "0.231 of 0.500 FS  (46 %)" in out and "0.930 of 1.000 FS  (93 %)" in out
    assert "17 lines outside alarm" in out and "identify: low-level noise" in out
    assert "─ target" in out and "● control" in out


@pytest.mark.parametrize("dof", [16.0, 60.0, 120.0, 240.0])
def test_dashboard_chi2_band_matches_chi_square(dof):
    # 90 % interval of the true PSD about an estimate with nu DOF: nu/chi2_{0.95}, nu/chi2_{0.05}
    # (Bendat & Piersol); e.g. nu = 120 gives -0.87 / +0.98 dB.
    lo = 10 * math.log10(dof / scipy.stats.chi2.ppf(0.95, dof))
    hi = 10 * math.log10(dof / scipy.stats.chi2.ppf(0.05, dof))
    out = _render(dash.dashboard(_snapshot(dof=dof)))  # band not given: computed from dof
    assert f"DOF                       {dof:.0f}   90 % χ² band {lo:+.2f} / {hi:+.2f} dB" in out


def test_dashboard_shows_the_snapshot_chi2_band_as_given():
    out = _render(dash.dashboard(_snapshot(dof=120.0, chi2_lo_db=-0.5, chi2_hi_db=0.75)))
    assert "90 % χ² band -0.50 / +0.75 dB" in out
    out = _render(dash.dashboard(_snapshot(dof=0.0)))  # no estimate yet
    assert "90 % χ² band — / — dB" in out


def test_dashboard_without_spectrum_and_nan_numbers():
    snap = _snapshot(stage="connect", f_hz=np.zeros(0), control_grms_g=float("nan"),
                     dof=0.0, recent_events=(), lines_outside_alarm=-1, lines_outside_abort=-1,
                     target_psd=np.zeros(0), control_psd=None, drive_psd=np.zeros(0),
                     alarm_db=np.zeros(0), abort_db=np.zeros(0))
    out = _render(dash.dashboard(snap))
    assert "connect" in out and "no spectrum yet" in out and "none yet" in out
    assert "— / 6.058 g" in out
    assert "— alarm  — abort" in out  # -1: no decision yet


def _plot_rows(text) -> list[str]:
    lines = text.plain.splitlines()
    return [ln for ln in lines if "│" in ln]


def _grid(rows: list[str]) -> list[str]:
    return [ln.split("│", 1)[1] for ln in rows]


def test_plot_control_on_target_hides_target_line():
    # 4097 lines over one decade: every column holds lines, so every column gets a control mark.
    f = np.linspace(0, 4000, 4097)
    t = np.where((f >= 200) & (f <= 2000), 0.04, 0.0)
    text = dash.spectrum_plot(f, t, t, 3.0, 6.0, width=60, height=15)
    grid = _grid(_plot_rows(text))
    assert sum(row.count("●") for row in grid) == 60
    assert not any("─" in row for row in grid)
    (target_row,) = [i for i, row in enumerate(grid) if "●" in row]
    # The flat target sits on the row labelled with its own value (0.04 is not a label; the
    # limits at ±3 and ±6 dB are symmetric about it, so it is the middle of the abort marks).
    colons = [i for i, row in enumerate(grid) if ":" in row]
    assert target_row == (colons[0] + colons[-1]) / 2


def test_plot_control_beyond_abort_is_marked_outside():
    f = np.linspace(0, 4000, 4097)
    t = np.where((f >= 200) & (f <= 2000), 0.04, 0.0)
    # The plot spans the abort limits and 2 dB more: +7.5 dB is beyond abort and on the plot.
    text = dash.spectrum_plot(f, t * 10**0.75, t, 3.0, 6.0, width=60, height=15)
    grid = _grid(_plot_rows(text))
    control_rows = {i for i, row in enumerate(grid) if "●" in row}
    abort_rows = [i for i, row in enumerate(grid) if ":" in row]
    assert max(control_rows) < min(abort_rows)  # above the upper abort limit
    end = text.plain.index("└")  # spans of the plot area (the legend comes after the axis)
    styles = {span.style for span in text.spans
              if span.end <= end and "●" in text.plain[span.start:span.end]}
    assert styles == {dash.PALETTE.abort}
    # Off the plot: drawn as arrows on the edge rows.
    text = dash.spectrum_plot(f, t * 1e-4, t, 3.0, 6.0, width=60, height=15)
    assert _grid(_plot_rows(text))[-1].count("▼") == 60
    text = dash.spectrum_plot(f, t * 10.0, t, 3.0, 6.0, width=60, height=15)
    assert _grid(_plot_rows(text))[0].count("▲") == 60


def test_plot_slope_follows_the_y_labels():
    # A -3.0103 dB/oct target over 20-2000 Hz falls 20 dB (exponent n = -1: a2/a1 = f1/f2).
    f = np.linspace(0, 4000, 8193)
    t = np.where((f >= 20) & (f <= 2000), 0.1 * (20.0 / np.maximum(f, 1e-9)), 0.0)
    text = dash.spectrum_plot(f, None, t, 3.0, 6.0, width=70, height=25)
    rows = _plot_rows(text)
    grid = _grid(rows)
    label = {ln.split("│")[0].strip(): i for i, ln in enumerate(rows) if ln.split("│")[0].strip()}
    rows_per_10db = label["0.01"] - label["0.1"]
    first = next(i for i, row in enumerate(grid) if row[0] == "─")
    last = next(i for i, row in enumerate(grid) if row[-1] == "─")
    # Labels and marks are each rounded to the nearest row: allow one row either way.
    assert abs((last - first) - 2 * rows_per_10db) <= 1
    assert first == pytest.approx(label["0.1"], abs=1)


def _welch_segments_for_dof(target: float) -> int:
    # Welch (1967): nu = 2K / (1 + 2 (1 - 1/K) c(1)^2) for Hann at 50 % overlap, c(1) = 1/6.
    k = 1
    while 2 * k / (1 + 2 * (1 - 1 / k) / 36) < target:
        k += 1
    return k


def test_check_table_profile_figures():
    from types import SimpleNamespace

    control = SimpleNamespace(fs_hz=48000.0, frame_length=8192, target_dof=120.0,
                              averaging="exponential")
    out = _render(dash.check_table(_navmat(), Tolerance(), control))
    # Exact integral of the NAVMAT profile: 6.06 grms (published rounded as 6.0), x_rms 0.194 mm
    # ([calc] from the closed-form segment integrals, docs/methods.md, "Profile integrals").
    grms = float(re.search(r"grms\s+([\d.]+) g", out).group(1))
    assert grms == pytest.approx(6.06, abs=0.005)  # published to two decimals
    assert "0.194 mm" in out
    assert "20 – 2000 Hz" in out
    # ±3 dB/oct segments: 10 log10(4) / log2(4) = 3.0103 dB/oct.
    assert out.count("+3.01") == 1 and out.count("-3.01") == 1
    assert "±3 / ±6 dB" in out and "±1 / ±1.5 dB" in out
    k = _welch_segments_for_dof(120.0)
    seconds = ((k - 1) * 4096 + 8192) / 48000.0
    assert f"{seconds:.2f} s ({k} segments, Hann 50 %)" in out
    df = 48000.0 / 8192
    in_band = math.floor(2000 / df) - math.ceil(20 / df) + 1
    assert f"{in_band} in band" in out
    # Segment areas add up to grms² (the shares add to 100 %).
    shares = [float(x) for x in re.findall(r"(\d+\.\d) %", out)]
    assert sum(shares) == pytest.approx(100.0, abs=0.15)  # three values rounded to 0.05 each


def test_check_table_with_feasibility_rows():
    from types import SimpleNamespace

    class Feas:  # demo budgets in the flat form of Feasibility.to_dict()
        def to_dict(self):
            return {"feasible": False, "excursion_rms_m": 0.0007, "excursion_peak_3sigma_m": 0.0021,
                    "excursion_limit_m": 0.002, "excursion_headroom_db": -0.42,
                    "drive_rms_fs": 0.2, "drive_peak_3sigma_fs": 0.6, "drive_limit_fs": 1.0,
                    "drive_headroom_db": 2.2, "card_input_rms_fs": 0.1,
                    "card_input_peak_3sigma_fs": 0.3, "card_input_limit_fs": 1.0,
                    "card_input_headroom_db": 10.5, "coil_power_w": 0.25,
                    "limits_exceeded": "excursion", "unreachable": "none"}

    control = SimpleNamespace(fs_hz=8000.0, frame_length=1024, target_dof=60.0,
                              averaging="linear")
    out = _render(dash.check_table(_navmat(), Tolerance(), control, Feas()))
    assert "rig feasibility" in out and re.search(r"feasible\s+no", out)
    # Metres shown in millimetres; a negative headroom is over, under 3 dB tight.
    assert re.search(r"excursion\s+0.7 mm\s+2.1 mm\s+2 mm\s+-0.4 dB\s+over", out)
    assert re.search(r"drive\s+0.2 FS\s+0.6 FS\s+1 FS\s+\+2.2 dB\s+tight", out)
    assert re.search(r"card input\s+0.1 FS\s+0.3 FS\s+1 FS\s+\+10.5 dB\s+ok", out)
    assert re.search(r"coil power\s+0.25 W", out) and re.search(r"limits exceeded\s+excursion", out)


def test_check_table_with_real_feasibility():
    from liveshape.rigs.feasibility import assess
    from liveshape.rigs.plant import load_plant

    prof = Profile((20.0, 40.0, 400.0), (0.0005, 0.002, 0.002), name="demo")
    feas = assess(prof, load_plant("loudspeaker"), fs_hz=48000.0, frame_length=8192)
    control = SimpleNamespace(fs_hz=48000.0, frame_length=8192, target_dof=120.0,
                              averaging="linear")
    out = _render(dash.check_table(prof, Tolerance(), control, feas))
    assert "rig budgets" in out and "excursion" in out
    mm = f"{feas.excursion.rms * 1e3:.3g} mm"
    assert mm in out


def test_run_summary_and_synth_summary():
    out = _render(dash.run_summary({
        "status": "aborted", "abort_reason": "lines_abort: 4 lines beyond 6 dB",
        "control_grms_g": 5.5, "target_grms_g": 6.058, "final_rms_error_db": -0.84,
        "final_max_dev_db": 7.2, "final_lines_outside_alarm": 40,
        "final_lines_outside_abort": 4, "updates_to_tolerance": None, "dof": 120,
        "time_at_full_level_s": 12.25, "calibrated": False,
    }))
    for word in ("aborted", "lines_abort: 4 lines beyond 6 dB", "5.500 / 6.058 g", "-0.84 dB",
                 "40 / 4", "12.2 s", "calibrated"):
        assert word in out, word
    # final_max_dev_db is the largest |deviation| of a line: a magnitude, no forced sign.
    assert re.search(r"final worst line \|deviation\|\s+7.20 dB", out) and "+7.20" not in out
    out = _render(dash.synth_summary({"path": "drive.wav", "duration_s": 60.0,
                                      "rms_fs": 0.25, "crest_factor": 4.0, "kurtosis": 2.98}))
    assert re.search(r"duration\s+60 s", out) and re.search(r"rms\s+0.25 FS", out)
    assert re.search(r"kurtosis\s+2.98", out) and "drive.wav" in out


def test_print_error_one_line_no_markup():
    console = dash.make_console(file=io.StringIO(), width=60)
    msg = "bench.yaml: control.fs_hz = [bold]0[/bold] must be > 0 " + "x" * 80
    dash.print_error(console, msg + "\nsecond line")
    out = console.file.getvalue()
    assert out == f"liveshape: {msg}\n"


def test_safety_notice_words():
    out = _render(dash.safety_notice())
    for word in ("hearing protection", "payload", "fixture", "amplifier gain", "minimum",
                 "moving parts", "Ctrl-C", "ramps down", "safety rules"):
        assert word in out, word


def test_progress_bar_clips_and_finishes():
    console = dash.make_console(file=io.StringIO(), width=80)
    with dash.progress_bar(console, "writing drive", transient=False) as progress:
        for x in (0.0, 0.25, float("nan"), 0.5, 1.7):
            progress(x)
    out = console.file.getvalue()
    assert "writing drive" in out and "100%" in out


def test_live_view_rate_limit_and_flush():
    now = [0.0]
    console = dash.make_console(file=io.StringIO(), width=WIDTH)
    with dash.LiveView(console, refresh_hz=5.0, clock=lambda: now[0]) as view:
        assert view.update(_snapshot(stage="identify"))
        now[0] = 0.1  # sooner than 1/5 s: dropped, kept for flush
        assert not view.update(_snapshot(stage="equalize"))
        now[0] = 0.15
        assert not view.update(_snapshot(stage="ramp_down"))
    assert view.builds == 2  # the first and the flushed last one
    assert "ramp down" in console.file.getvalue()


def test_run_summary_from_run_result_with_trip():
    res = RunResult(
        status="aborted", abort_reason="control silent for 2 updates",
        trip=Trip("response_silent", "control silent for 2 updates", 12.0, {"rms_fs": 0.0}),
        updates_to_tolerance=None, final_rms_error_db=float("nan"),
        final_max_dev_db=float("nan"), final_lines_outside_alarm=-1,
        final_lines_outside_abort=-1, control_grms_g=0.01, target_grms_g=6.058, dof=120.0,
        time_at_full_level_s=0.0, updates=9,
    )
    out = _render(dash.run_summary(res))
    assert re.search(r"abort rule\s+response_silent", out)
    assert "control silent for 2 updates" in out
    assert re.search(r"updates\s+9", out) and "0.010 / 6.058 g" in out
    assert re.search(r"lines outside alarm / abort\s+— / —", out)
    assert "detail" not in out  # the trip's own fields are not repeated as rows


def test_drive_table_limits_delay_and_trip():
    out = _render(dash.dashboard(_snapshot(drive_rms_limit_fs=float("nan"))))
    assert "0.231 of — FS" in out  # no limit given
    snap = _snapshot(trip=Trip("drive_limit", "drive rms 0.6 FS"), drive_rms_fs=0.6)
    out = _render(dash.dashboard(snap))
    assert "drive_limit: drive rms 0.6 FS" in out and "0.600 of 0.500 FS  (120 %)" in out
    assert "1536 samples" in out and "gain" in out and "-1.5 dB" in out


def test_check_table_same_from_report_mapping_and_objects():
    from liveshape.control.checks import check_report
    from liveshape.testdef.spec import spec_from_mapping

    points = [{"f_hz": f, "asd": a} for f, a in zip(_navmat().f_hz, _navmat().asd_g2_hz,
                                                    strict=True)]
    spec = spec_from_mapping(
        {"name": "navmat", "profile": {"units": "g2/Hz", "breakpoints": points},
         "tolerance": {"bands": [{"f_lo_hz": 20, "f_hi_hz": 40, "alarm_db": 4.5,
                                  "abort_db": 7.5}]}},
        source="navmat.yaml",
    )
    from_report = _render(dash.check_table(check_report(spec)))
    from_objects = _render(dash.check_table(spec.profile, spec.tolerance, spec.control))
    assert "band 20 – 40 Hz" in from_report and "±4.5 / ±7.5 dB" in from_report
    # The same figures either way (the averaging word, in both now, is left out of the match).
    def words(text: str) -> list[str]:
        return text.replace(f" ({spec.control.averaging} averaging)", "").split()

    assert words(from_report) == words(from_objects)


def test_plot_legend_shows_limits_that_vary_by_band():
    f = np.linspace(0, 4000, 4097)
    t = np.where((f >= 20) & (f <= 2000), 0.04, 0.0)
    alarm = np.where(f < 40, 4.5, 3.0)
    abort = np.where(f < 40, 7.5, 6.0)
    text = dash.spectrum_plot(f, t, t, alarm, abort).plain
    assert "alarm ±3…4.5 dB" in text and "abort ±6…7.5 dB" in text


def test_dashboard_of_a_real_controller_snapshot():
    from pathlib import Path

    from liveshape.control.controller import Controller
    from liveshape.rigs.plant import load_plant
    from liveshape.rigs.sim import SimRig
    from liveshape.testdef.spec import load_spec

    example = Path(__file__).resolve().parents[1] / "examples" / "handlebar-nav-unit.yaml"
    spec = load_spec(example, {"control.fs_hz": 8000, "control.lines": 512,
                               "control.target_dof": 60})
    rig = SimRig(load_plant("loudspeaker"), spec.control.fs_hz, seed=1)
    ctl = Controller(spec, rig.calibration, seed=2)
    response = np.zeros(1024)
    while ctl.last_update is None or ctl.last_update.index < 2:
        response = rig.process(ctl.exchange(response))
    snap = ctl.snapshot()
    out = _render(dash.dashboard(snap))
    assert "equalize" in out
    assert f"{snap.control_grms_g:.3f} / {snap.target_grms_g:.3f} g" in out
    assert f"{snap.lines_outside_alarm} alarm" in out and f"{snap.lines_outside_abort} abort" in out
    # The band shown is the 90 % chi-square interval at the snapshot's DOF (Bendat & Piersol;
    # scipy.stats.chi2 as reference).
    nu = snap.dof
    lo = 10 * math.log10(nu / scipy.stats.chi2.ppf(0.95, nu))
    hi = 10 * math.log10(nu / scipy.stats.chi2.ppf(0.05, nu))
    assert f"{nu:.0f}   90 % χ² band {lo:+.2f} / {hi:+.2f} dB" in out
    assert snap.recent_events[-1].message in out


# --------------------------------------------------------------------------------------------
# The live view at 80×24 and 140×45


def _render_sized(renderable, width: int, height: int) -> list[str]:
    from rich.cells import cell_len

    console = dash.make_console(file=io.StringIO(), width=width)
    console.height = height
    console.print(renderable)
    lines = console.file.getvalue().rstrip("\n").split("\n")
    assert all(cell_len(line) <= width for line in lines)
    return lines


def _long_snapshot(**kw):
    """Demo values as wide as they get: hours of run, many updates, limits that vary by band."""
    alarm = np.where(_F_HZ < 40, 4.5, 3.0)
    return _snapshot(elapsed_s=99 * 3600.0, t_s=99 * 3600.0, remaining_s=36000.0,
                     full_level_s=36000.0, time_at_full_level_s=35999.0, updates=12345,
                     drive_rms_fs=0.4567,
                     drive_rms_limit_fs=0.5, drive_peak_fs=0.999, max_dev_db=-13.25,
                     min_dev_db=-18.5, rms_error_db=-10.75, lines_outside_alarm=4096,
                     lines_outside_abort=4096, dof=1234.0, alarm_db=alarm, abort_db=alarm + 3,
                     **kw)


@pytest.mark.parametrize("make", [_snapshot, _long_snapshot])
def test_dashboard_fits_80_by_24(make):
    lines = _render_sized(dash.dashboard(make(), width=80, height=24), 80, 24)
    assert len(lines) <= 23  # one row left for the cursor, so nothing scrolls off
    text = "\n".join(lines)
    # The tolerance state, stage, level and step on the first row inside the panel.
    assert re.search(r"ABORT PENDING\s+full level\s+level \+0\.0 dB\s+step 5/5", lines[1])
    # Each key number whole on one row (a wrapped value would be cut across two).
    snap = make()
    esc = re.escape
    for pattern in (r"grms\s+" + esc(f"{snap.control_grms_g:.3f} / {snap.target_grms_g:.3f} g"),
                    r"rms error\s+" + esc(f"{snap.rms_error_db:+.2f} dB"),
                    r"max/min dev\s+" + esc(f"{snap.max_dev_db:+.1f}/{snap.min_dev_db:+.1f} dB"),
                    rf"outside\s+{snap.lines_outside_alarm} alarm  {snap.lines_outside_abort} "
                    "abort",
                    rf"DOF\s+{snap.dof:.0f}  χ² ",
                    rf"drive rms\s+{snap.drive_rms_fs:.3f}/0\.500 FS",
                    rf"drive peak\s+{snap.drive_peak_fs:.3f}/1\.000 FS",
                    r"to full level\s+reached", r"at full level\s+\d+:\d\d(:\d\d)? of ",
                    r"left at full level\s+\d+:\d\d"):
        assert re.search(pattern, text), pattern
    # The smaller spectrum plot with its axes and legend, and the last events.
    assert "└" in text and "Hz" in text and "● control" in text
    # Nothing cut short either (the legend writes limits that vary by band as 3…4.5).
    assert "…" not in re.sub(r"\d…\d", "", text)
    assert "17 lines outside alarm" in text


@pytest.mark.parametrize("make", [_snapshot, _long_snapshot])
def test_dashboard_fits_140_by_45(make):
    lines = _render_sized(dash.dashboard(make(), width=140, height=45), 140, 45)
    assert len(lines) <= 44
    text = "\n".join(lines)
    assert re.search(r"liveshape\s+ABORT PENDING\s+full level\s+level \+0\.0 dB\s+"
                     r"step 5 of 5", text)
    assert re.search(r"elapsed \S+\s+to full level reached\s+at full level \S+ of \S+\s+"
                     r"left at full level \S+", text)
    snap = make()
    for pattern in (rf"grms control / target\s+{snap.control_grms_g:.3f} / ",
                    r"line deviation max / min\s+"
                    + re.escape(f"{snap.max_dev_db:+.2f} dB / {snap.min_dev_db:+.2f} dB"),
                    rf"DOF\s+{snap.dof:.0f}\s+90 % χ² band [-+]\d\.\d\d / \+\d\.\d\d dB",
                    r"rms\s+\d\.\d{3} of 0\.500 FS  \(\d+ %\)"):
        assert re.search(pattern, text), pattern
    assert "events" in text and "identify: low-level noise" in text


def test_live_view_takes_the_console_size():
    console = dash.make_console(file=io.StringIO(), width=80)
    console.height = 24
    with dash.LiveView(console, refresh_hz=5.0, clock=lambda: 0.0) as view:
        view.update(_snapshot())
    out = console.file.getvalue()
    assert re.search(r"left at full level\s+0:55", out)  # the compact layout's rows


@pytest.mark.parametrize("state, word, role", [
    ("in tolerance", "IN TOLERANCE", "ok"), ("alarm", "ALARM", "alarm"),
    ("abort pending", "ABORT PENDING", "abort"),
])
def test_tolerance_state_in_words_and_colour(state, word, role):
    snap = _snapshot(tolerance_state=state)
    text = dash._cell(runtext.header_pieces(snap, compact=True))
    start = text.plain.index(word)
    styles = {str(span.style) for span in text.spans
              if span.start <= start < span.end}
    assert styles == {getattr(dash.PALETTE, role)}


def test_tolerance_state_from_the_numbers_when_the_snapshot_has_none():
    def state(**kw):
        return runtext.tolerance_state(_snapshot(**kw))

    assert state() == "abort pending"  # 2 lines beyond the abort limit
    assert state(lines_outside_abort=0) == "alarm"
    assert state(lines_outside_abort=0, lines_outside_alarm=0) == "in tolerance"
    assert state(lines_outside_abort=-1, lines_outside_alarm=-1) == ""  # no estimate yet
    lines = _render_sized(dash.dashboard(_snapshot(lines_outside_abort=-1,
                                                   lines_outside_alarm=-1), width=80,
                                         height=24), 80, 24)
    assert "NO ESTIMATE YET" in lines[1]
    ended = _render_sized(dash.dashboard(_snapshot(status="aborted"), width=80, height=24),
                          80, 24)
    assert "ABORTED" in ended[1]


def test_steps_to_full_level_and_time_left_at_full_level():
    lines = "\n".join(_render_sized(dash.dashboard(
        _snapshot(step_index=1, stage="equalize", level_db=-9.0, time_at_full_level_s=0.0,
                  remaining_s=60.0), width=140, height=45), 140, 45))
    assert re.search(r"to full level 3 steps\s+at full level 0:00 of 1:00\s+"
                     r"left at full level 1:00", lines)
    one = runtext.to_full_level_text(_snapshot(step_index=3))
    assert one == "1 step"


def test_result_labels_have_units_and_no_raw_keys():
    out = _render(dash.run_summary({
        "status": "completed", "calibration": {"accel_mv_per_g": 100.0, "g_per_fs": 10.0,
                                               "out_v_per_fs": 1.0, "loop_delay_samples": 1536},
        "rig": {"excursion_last_peak_m": 7.833e-12, "excursion_peak_m": 0.0002154, "t_s": 70.3,
                "active_faults": []},
    }))
    for pattern in (r"calibration accelerometer sensitivity\s+100 mV/g",
                    r"calibration g per full scale\s+10 g/FS",
                    r"calibration output\s+1 V/FS", r"calibration loop delay\s+1536 samples",
                    r"rig excursion last peak\s+0 mm", r"rig excursion peak\s+0.2154 mm",
                    r"rig run time\s+70.3 s", r"rig active faults\s+none"):
        assert re.search(pattern, out), pattern
    assert "e-1" not in out and "mv per" not in out and "g per 10" not in out
    out = _render(dash.synth_summary({"target_grms": 4.258, "rms_g": 4.25}))
    assert re.search(r"target\s+4.258 g rms", out)


def test_result_rows_show_the_verdict_and_full_level_average():
    out = _render(dash.run_summary({
        "status": "completed", "verdict": "fail", "verdict_rule": "pass: demo rule",
        "verdict_reasons": ["3 lines outside the alarm limit"], "full_level_dof": 364.4,
        "full_level_rms_error_db": 0.0019, "full_level_max_dev_db": 3.4,
        "full_level_min_dev_db": -0.9, "full_level_lines_outside_alarm": 3,
        "full_level_lines_outside_abort": 0, "full_level_control_grms_g": 1.107,
        "alarm_fraction": 0.25, "max_alarm_fraction": 0.1,
    }))
    for pattern in (r"verdict\s+FAIL", r"reason\s+3 lines outside the alarm limit",
                    r"rule\s+pass: demo rule", r"full-level average\s+364 DOF, 1.107 g",
                    r"rms error\s+\+0.00 dB", r"line deviation max / min\s+\+3.40 dB / -0.90 dB",
                    r"lines outside alarm / abort\s+3 / 0",
                    r"time in alarm\s+25 % of the full-level time \(at most 10 %\)"):
        assert re.search(pattern, out), pattern
    assert "verdict_reasons" not in out and "['" not in out


@pytest.mark.parametrize("kind, plant, present, absent", [
    ("sim", "bench", "Simulated rig (bench): nothing is driven", "Loudspeaker"),
    ("sim", "presets/loudspeaker.yaml", "Loudspeaker shakers are loud", "Shakers can be"),
    ("audio", None, "Shakers can be loud", "Simulated"),
])
def test_safety_notice_fits_the_rig(kind, plant, present, absent):
    lines = _render_sized(dash.safety_notice(kind, plant), 80, 24)
    text = "\n".join(lines)
    assert present in text and absent not in text
    bullets = [line for line in lines if "•" in line]
    assert len(bullets) == 6
    assert len(lines) == 6 + 2 + (kind == "sim")  # one row per caution: none wraps


def test_feasibility_rows_say_what_binds_and_what_would_help():
    from liveshape.views.checktext import feasibility_rows

    rows, used = feasibility_rows({
        "binding_limit": "excursion", "headroom_left": "card output +4.0 dB",
        "reachable_level_db": -5.83, "lowest_controllable_hz": 14.65,
        "lowest_limited_by": "excursion", "advice": ["run at -5.8 dB re the target", "or b"]})
    assert rows == [
        ("binding limit", "excursion"), ("headroom left", "card output +4.0 dB"),
        ("reachable level", "5.8 dB below the target"),
        ("lowest frequency held at full level", "14.65 Hz (below it: excursion)"),
        ("to make it feasible", "run at -5.8 dB re the target"),
        ("to make it feasible", "or b")]
    assert {"binding_limit", "advice", "reachable_level_db"} <= used
    rows, _ = feasibility_rows({"binding_limit": "SNR", "reachable_level_db": None,
                                "lowest_controllable_hz": None})
    assert ("reachable level", "none: no level keeps every budget and the SNR rule") in rows
    assert ("lowest frequency held at full level",
            "none: no lower band edge holds the full level") in rows
    assert feasibility_rows({"feasible": True}) == ([], set())


def test_long_profile_table_sums_up_the_middle_segments():
    # A measured profile of 100 points: 10 rows, one row for the 79 between, 10 rows. The
    # summary row's area is the sum of those segments' areas (the integral of the ASD over a
    # band is the sum over its parts [common practice]).
    from liveshape.control.checks import check_report
    from liveshape.testdef.spec import spec_from_mapping
    from liveshape.views import checktext

    f = np.geomspace(20.0, 2000.0, 100)
    pts = [{"f_hz": float(x), "asd": 0.01 * (1.2 if i % 2 else 1.0)} for i, x in enumerate(f)]
    spec = spec_from_mapping({"profile": {"breakpoints": pts}}, source="long.yaml")
    report = check_report(spec, None)
    segs = report["segments"]
    assert len(segs) == 99
    rows = checktext.segment_rows(report)
    assert len(rows) == 2 * checktext.SEGMENT_ENDS + 1
    mid = segs[checktext.SEGMENT_ENDS:-checktext.SEGMENT_ENDS]
    summary = rows[checktext.SEGMENT_ENDS]
    assert f"{len(mid)} segments" in summary[2]
    assert float(summary[4]) == pytest.approx(sum(s["area_g2"] for s in mid), rel=1e-3)
    short = {**report, "segments": segs[:checktext.MAX_SEGMENT_ROWS]}
    assert len(checktext.segment_rows(short)) == checktext.MAX_SEGMENT_ROWS


# The standard acceleration of gravity g0 = 9.80665 m/s² (3rd CGPM, 1901): an amplitude in g is
# g0 times as many m/s², an ASD in g²/Hz g0² times as many (m/s²)²/Hz.
G0 = 9.80665


def test_si_units_convert_amplitudes_and_spectra_for_display():
    from liveshape.testdef.chain import ACCEL_UNITS

    snap = _snapshot()
    si = runtext.in_units(snap, ACCEL_UNITS["m/s2"])
    assert si["control_grms_g"] == pytest.approx(snap.control_grms_g * G0, rel=1e-12)
    assert si["target_grms_g"] == pytest.approx(snap.target_grms_g * G0, rel=1e-12)
    np.testing.assert_allclose(si["control_psd"], snap.control_psd * G0**2, rtol=1e-12)
    np.testing.assert_allclose(si["target_psd"], snap.target_psd * G0**2, rtol=1e-12)
    assert runtext.in_units(snap, ACCEL_UNITS["g"]) is snap  # g is shown as recorded
    for width, height in ((80, 24), (140, 45)):
        lines = _render_sized(dash.dashboard(si, width=width, height=height), width, height)
        text = "\n".join(lines)
        assert f"{snap.control_grms_g * G0:.3f} / {snap.target_grms_g * G0:.3f} m/s²" in text
        assert "(m/s²)²/Hz" in text and "g²/Hz" not in text.replace("(m/s²)²/Hz", "")
    # The plot's y ticks follow the data: the NAVMAT plateau 0.04 g²/Hz is 3.85 (m/s²)²/Hz,
    # so the ticks are between 1 and 10 rather than near 0.01-0.1.
    plot = dash.spectrum_plot(si["f_hz"], si["control_psd"], si["target_psd"],
                              asd_unit=si["asd_unit"]).plain
    assert re.search(r"^\s*[1-9](\.\d+)?\s*│", plot, re.M)


def test_si_units_in_the_run_result_rows():
    from liveshape.testdef.chain import ACCEL_UNITS

    result = {"status": "completed", "control_grms_g": 1.103, "target_grms_g": 1.106,
              "verdict": "pass", "full_level_dof": 364.0, "full_level_control_grms_g": 1.104}
    out = _render(dash.run_summary(result, ACCEL_UNITS["m/s2"]))
    assert f"{1.103 * G0:.3f} / {1.106 * G0:.3f} m/s²" in out
    assert f"364 DOF, {1.104 * G0:.3f} m/s²" in out
    assert "accel_unit" not in out and "asd_unit" not in out
    assert "1.103 / 1.106 g" in _render(dash.run_summary(result))


def test_live_view_shows_the_chosen_units():
    from liveshape.testdef.chain import ACCEL_UNITS

    console = dash.make_console(file=io.StringIO(), width=140)
    console.height = 45
    with dash.LiveView(console, refresh_hz=5.0, clock=lambda: 0.0,
                       units=ACCEL_UNITS["m/s2"]) as view:
        view.update(_snapshot())
    assert "m/s²" in console.file.getvalue()


def test_dashboard_shows_each_input_its_limit_and_the_notches():
    inputs = {"strategy": "maximum", "inputs": [
        {"channel": 1, "name": "table", "role": "control", "grms_g": 0.98},
        {"channel": 2, "name": "bracket", "role": "monitor", "grms_g": 1.43,
         "limit_margin_db": -0.28, "limit_f_hz": 351.6},
        {"channel": 3, "name": "lid", "role": "monitor", "grms_g": 2.1,
         "limit_margin_db": 0.7, "limit_f_hz": 612.0}],
        "notched_lines": 31, "notch_deepest_db": -16.8, "notch_f_hz": [252.0, 427.7],
        "extremal_bias_db": 0.3}
    out = _render(dash.dashboard(_snapshot(inputs=inputs)))
    assert re.search(r"control 1 table\s+0.980 grms", out)
    assert re.search(r"monitor 2 bracket\s+1.430 grms  limit -0.28 dB at 352 Hz", out)
    assert "limit +0.70 dB at 612 Hz" in out
    assert "31 lines 252-428 Hz, deepest -16.8 dB" in out
    assert "maximum control bias" in out and "+0.30 dB" in out
    # a monitor over its limit is shown as an alarm, one under it is not
    roles = {label: pieces[0][1] for label, pieces in runtext.input_rows(inputs)}
    assert roles["monitor 3 lid"] == "alarm" and roles["monitor 2 bracket"] == "value"
