"""Plots and a text summary from a run folder (matplotlib is optional: the ``plot`` extra).

:func:`render_report` reads a run folder with :func:`liveshape.record.writer.load_run` (complete or
killed midway) and writes, into ``<run>/report/`` by default:

``control.png``      control against target ASD on log-log axes (last update) with the alarm
                     and abort bands
``drive.png``        drive PSD of the first and the last update
``frf.png``          H1 magnitude and phase, and coherence (last update)
``convergence.png``  rms error and maximum line deviation per update
``level.png``        test level (dB) against run time, from the events (and updates)
``summary.txt``      status, abort reason, grms, error figures, DOF, time at full level,
                     calibrated or not

matplotlib is imported inside :func:`render_report` and drawn through its Agg canvas
(``matplotlib.figure.Figure``, no pyplot, so no global figure state).
"""

from __future__ import annotations

import math
import os
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from liveshape.atomic import atomic_write, atomic_write_text
from liveshape.errors import ConfigError
from liveshape.record.writer import RunData, load_run
from liveshape.schema import Where
from liveshape.testdef.tolerance import Tolerance, tolerance_from_mapping

__all__ = ["MissingPlotExtra", "ReportResult", "render_report", "summary_text"]

MATPLOTLIB_MISSING = "matplotlib is not installed: pip install 'liveshape[plot]'"


class MissingPlotExtra(ConfigError):
    """The optional plotting library is missing (one line naming the ``plot`` extra)."""


@dataclass(frozen=True)
class ReportResult:
    """What :func:`render_report` wrote.

    Attributes
    ----------
    run_dir, out_dir : Path
        The run folder read and the folder written.
    pngs : dict of str to Path
        Plot name (``control``, ``drive``, ``frf``, ``convergence``, ``level``) to file.
    summary_path : Path
        ``summary.txt``.
    summary : str
        Its text.
    """

    run_dir: Path
    out_dir: Path
    pngs: dict[str, Path]
    summary_path: Path
    summary: str


# --------------------------------------------------------------------------------------------
# Figures from the record


def _tolerance(run: RunData) -> tuple[Tolerance, str]:
    data = run.spec.get("tolerance")
    if data is None:
        return Tolerance(), "built-in"
    try:
        return tolerance_from_mapping(data, Where(str(run.root / "spec.yaml")).key("tolerance")), ""
    except ConfigError as exc:
        return Tolerance(), f"built-in ({exc})"


def _band(f_hz: np.ndarray, target: np.ndarray) -> np.ndarray:
    return np.isfinite(target) & (target > 0) & (f_hz > 0)


def _grms(psd: np.ndarray, band: np.ndarray, df_hz: float) -> float:
    """Rms of a one-sided PSD over the band: sqrt(sum G(f_k) df) (rectangle rule on the lines)."""
    vals = psd[band]
    vals = vals[np.isfinite(vals)]
    return float(math.sqrt(max(float(vals.sum()) * df_hz, 0.0))) if vals.size else float("nan")


def _last_number(run: RunData, name: str) -> float | None:
    arr = run.updates.numbers.get(name)
    if arr is None:
        return None
    ok = np.isfinite(arr)
    return float(arr[ok][-1]) if ok.any() else None


def _level_track(run: RunData) -> tuple[np.ndarray, np.ndarray]:
    """Level in dB against run time: the events with ``level_db`` in their data (level steps).

    A record without such events falls back to the level each update file gives.
    """
    t, lv = [], []
    for ev in run.events:
        value = ev.data.get("level_db") if isinstance(ev.data, Mapping) else None
        if value is not None and math.isfinite(ev.t_s) and _finite(value):
            t.append(ev.t_s)
            lv.append(float(value))
    levels = run.updates.numbers.get("level_db")
    if not t and levels is not None:
        for ts, value in zip(run.updates.t_s, levels, strict=True):
            if np.isfinite(value):
                t.append(float(ts))
                lv.append(float(value))
    order = np.argsort(np.asarray(t, dtype=float), kind="stable")
    t_arr, lv_arr = np.asarray(t, dtype=float)[order], np.asarray(lv, dtype=float)[order]
    ends = [ev.t_s for ev in run.events if math.isfinite(ev.t_s)]
    if t_arr.size and ends and max(ends) > t_arr[-1]:  # hold the last level to the last event
        t_arr, lv_arr = np.append(t_arr, max(ends)), np.append(lv_arr, lv_arr[-1])
    return t_arr, lv_arr


def _finite(x: Any) -> bool:
    try:
        return math.isfinite(float(x))
    except (TypeError, ValueError):
        return False


def _fmt(x: Any, spec: str, unit: str = "") -> str:
    if not _finite(x):
        return "n/a"
    return f"{float(x):{spec}}{' ' + unit if unit else ''}"


# --------------------------------------------------------------------------------------------
# The text summary


def summary_text(run: RunData) -> str:
    """The run's summary as plain text (no plotting library needed).

    A run killed before it closed has no ``summary.json``: its figures are then taken from the
    last update file and said to be so.
    """
    s = dict(run.summary or {})
    up = run.updates
    lines = [f"liveshape run report: {run.meta.get('name', run.root.name)}",
             f"folder:          {run.root}",
             f"started (UTC):   {run.meta.get('created_utc', 'n/a')}"]
    if run.summary is None:
        lines.append("status:          incomplete (no summary.json: the run did not close; "
                     "figures below are from the last update)")
    else:
        lines.append(f"status:          {s.get('status', 'unknown')}")
    if s.get("abort_reason"):
        lines.append(f"abort reason:    {s['abort_reason']}")
    if s.get("error"):
        lines.append(f"error:           {s['error']}")
    control, target = s.get("control_grms_g"), s.get("target_grms_g")
    if up.n and (control is None or target is None):
        band = _band(up.f_hz, up.target_psd[-1])
        df = float(up.f_hz[1] - up.f_hz[0]) if up.f_hz.size > 1 else float("nan")
        control = _grms(up.control_psd[-1], band, df) if control is None else control
        target = _grms(up.target_psd[-1], band, df) if target is None else target
    err = (20 * math.log10(float(control) / float(target))
           if _finite(control) and _finite(target) and float(control) > 0 < float(target)
           else None)
    lines.append(f"grms control:    {_fmt(control, '.3f', 'g')}   target: "
                 f"{_fmt(target, '.3f', 'g')}   ({_fmt(err, '+.2f', 'dB')})")
    rms_err = s.get("final_rms_error_db", _last_number(run, "rms_error_db"))
    max_dev = s.get("final_max_dev_db", _last_number(run, "max_dev_db"))
    lines.append(f"rms error:       {_fmt(rms_err, '+.2f', 'dB')}")
    lines.append(f"max line dev.:   {_fmt(max_dev, '+.2f', 'dB')}")
    n_al = s.get("final_lines_outside_alarm", _last_number(run, "lines_outside_alarm"))
    n_ab = s.get("final_lines_outside_abort", _last_number(run, "lines_outside_abort"))
    lines.append(f"lines outside:   alarm {_fmt(n_al, '.0f')}   abort {_fmt(n_ab, '.0f')}")
    lines.append(f"updates:         {up.n}   to tolerance: "
                 f"{_fmt(s.get('updates_to_tolerance'), '.0f')}")
    lines.append(f"DOF:             {_fmt(s.get('dof', _last_number(run, 'dof')), '.0f')}")
    lines.append(f"time at 0 dB:    {_fmt(s.get('time_at_full_level_s'), '.1f', 's')}")
    cal = s.get("calibrated", run.calibrated)
    source = (run.meta.get("calibration") or {}).get("source", "")
    if cal is None:
        lines.append("calibration:     not recorded")
    elif cal:
        lines.append(f"calibration:     calibrated{f' ({source})' if source else ''}")
    else:
        lines.append("calibration:     UNCALIBRATED: levels are relative, not physical g")
    lines.append(f"events:          {len(run.events)}"
                 + (f" ({run.skipped_event_lines} unreadable line(s) skipped)"
                    if run.skipped_event_lines else ""))
    return "\n".join(lines) + "\n"


# --------------------------------------------------------------------------------------------
# Plots


def _import_matplotlib() -> tuple[Any, Any]:
    try:
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.figure import Figure
    except ImportError:
        raise MissingPlotExtra(MATPLOTLIB_MISSING) from None
    return Figure, FigureCanvasAgg


def _log_axis(axis: Any) -> None:
    """Log frequency axis labelled in plain numbers at 1, 2, 5 per decade."""
    from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter

    axis.set_major_locator(LogLocator(base=10.0, subs=(1.0, 2.0, 5.0)))
    axis.set_major_formatter(FuncFormatter(lambda x, _pos: f"{x:g}"))
    axis.set_minor_formatter(NullFormatter())


def _save(fig: Any, canvas_cls: Any, path: Path) -> Path:
    canvas_cls(fig)
    # Atomic: a full disk leaves no half-written PNG (the temporary file is removed).
    atomic_write(path, lambda fh: fig.savefig(fh, dpi=110, format="png"))
    return path


def _no_data(fig: Any, message: str) -> None:
    ax = fig.add_subplot(1, 1, 1)
    ax.text(0.5, 0.5, message, ha="center", va="center", transform=ax.transAxes)
    ax.set_axis_off()


def _plot_control(fig: Any, run: RunData, tol: Tolerance, tol_note: str, units: str) -> None:
    up = run.updates
    f, target, control = up.f_hz, up.target_psd[-1], up.control_psd[-1]
    band = _band(f, target)
    if not band.any():
        _no_data(fig, "no target lines in the last update")
        return
    fb, tb = f[band], target[band]
    alarm = 10.0 ** (tol.alarm_db_at(fb) / 10.0)
    abort = 10.0 ** (tol.abort_db_at(fb) / 10.0)
    ax = fig.add_subplot(1, 1, 1)
    ax.fill_between(fb, tb / abort, tb * abort, color="#e9d3cf", lw=0, label="abort band")
    ax.fill_between(fb, tb / alarm, tb * alarm, color="#efe6c8", lw=0, label="alarm band")
    ax.plot(fb, tb, color="#333333", lw=1.4, label="target")
    ax.plot(fb, np.where(control[band] > 0, control[band], np.nan), color="#2f6f9f", lw=1.0,
            label="control")
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xlim(fb[0], fb[-1])
    _log_axis(ax.xaxis)
    ax.set_xlabel("frequency (Hz)")
    ax.set_ylabel(f"ASD ({units})")
    note = f", tolerance {tol_note}" if tol_note else ""
    ax.set_title(f"control vs target, update {int(up.index[-1])} at {up.t_s[-1]:.1f} s{note}",
                 fontsize=10)
    ax.grid(True, which="both", color="#dddddd", lw=0.5)
    ax.legend(loc="best", fontsize=8)


def _plot_drive(fig: Any, run: RunData) -> None:
    up = run.updates
    f = up.f_hz
    ax = fig.add_subplot(1, 1, 1)
    pos = f > 0
    for k, style in ((0, dict(color="#999999", lw=0.8)), (-1, dict(color="#2f6f9f", lw=1.0))):
        d = up.drive_psd[k][pos]
        ax.plot(f[pos], np.where(d > 0, d, np.nan), label=f"update {int(up.index[k])}", **style)
        if up.n == 1:
            break
    band = _band(f, up.target_psd[-1])
    if band.any():
        ax.axvspan(f[band][0], f[band][-1], color="#f2f2f2", zorder=0, label="test band")
    ax.set_xscale("log")
    ax.set_yscale("log")
    _log_axis(ax.xaxis)
    ax.set_xlabel("frequency (Hz)")
    ax.set_ylabel("drive PSD (FS²/Hz)")
    ax.set_title("drive", fontsize=10)
    ax.grid(True, which="both", color="#dddddd", lw=0.5)
    ax.legend(loc="best", fontsize=8)


def _plot_frf(fig: Any, run: RunData, units: str) -> None:
    up = run.updates
    f, h, coh = up.f_hz, up.h1[-1], up.coherence[-1]
    pos = (f > 0) & np.isfinite(h)
    if not pos.any():
        _no_data(fig, "no FRF recorded")
        return
    axes = fig.subplots(3, 1, sharex=True, gridspec_kw={"height_ratios": [2, 1.2, 1]})
    mag = np.abs(h[pos])
    with np.errstate(divide="ignore"):
        axes[0].plot(f[pos], 20 * np.log10(mag), color="#2f6f9f", lw=1.0)
    axes[0].set_ylabel(f"|H1| (dB re 1 {units})")
    axes[0].set_title(f"FRF estimate H1 and coherence, update {int(up.index[-1])}", fontsize=10)
    axes[1].plot(f[pos], np.degrees(np.angle(h[pos])), color="#2f6f9f", lw=0.8)
    axes[1].set_ylabel("phase (deg)")
    axes[1].set_ylim(-185, 185)
    axes[1].set_yticks([-180, -90, 0, 90, 180])
    axes[2].plot(f[pos], coh[pos], color="#555555", lw=0.8)
    axes[2].set_ylim(0, 1.05)
    axes[2].set_ylabel("coherence")
    axes[2].set_xlabel("frequency (Hz)")
    band = _band(f, up.target_psd[-1])
    for ax in axes:
        ax.set_xscale("log")
        _log_axis(ax.xaxis)
        ax.grid(True, which="both", color="#dddddd", lw=0.5)
        if band.any():
            ax.axvspan(f[band][0], f[band][-1], color="#f4f4f4", zorder=0)


def _plot_convergence(fig: Any, run: RunData, tol: Tolerance) -> None:
    up = run.updates
    ax = fig.add_subplot(1, 1, 1)
    drawn = False
    for name, label, color in (("rms_error_db", "rms error", "#2f6f9f"),
                               ("max_dev_db", "max line deviation", "#b5533c")):
        values = up.numbers.get(name)
        if values is not None and np.isfinite(values).any():
            ax.plot(up.index, values, marker="o", ms=3, lw=1.0, color=color, label=label)
            drawn = True
    if not drawn:
        ax.text(0.5, 0.5, "no error figures recorded", ha="center", va="center",
                transform=ax.transAxes)
    for limit, color, label in ((tol.alarm_db, "#c9a227", "alarm"),
                                (tol.abort_db, "#b5533c", "abort")):
        ax.axhline(limit, color=color, lw=0.8, ls="--", label=f"{label} ±{limit:g} dB")
        ax.axhline(-limit, color=color, lw=0.8, ls="--")
    ax.axhline(0.0, color="#888888", lw=0.6)
    ax.set_xlabel("update")
    ax.set_ylabel("dB")
    ax.set_title("error per update", fontsize=10)
    ax.grid(True, color="#dddddd", lw=0.5)
    ax.legend(loc="best", fontsize=8)


def _plot_level(fig: Any, run: RunData) -> None:
    t, lv = _level_track(run)
    ax = fig.add_subplot(1, 1, 1)
    if t.size == 0:
        ax.text(0.5, 0.5, "no level recorded", ha="center", va="center", transform=ax.transAxes)
    else:
        ax.step(t, lv, where="post", color="#2f6f9f", lw=1.2)
    ax.axhline(0.0, color="#888888", lw=0.6)
    ax.set_xlabel("run time (s)")
    ax.set_ylabel("level (dB re full test level)")
    ax.set_title("test level", fontsize=10)
    ax.grid(True, color="#dddddd", lw=0.5)


def render_report(
    run_dir: str | os.PathLike[str], *, out_dir: str | os.PathLike[str] | None = None
) -> ReportResult:
    """Write the report plots and ``summary.txt`` of a run folder.

    Parameters
    ----------
    run_dir : path
        A run folder (complete, or from a run killed midway).
    out_dir : path, optional
        Where to write; default ``<run_dir>/report``.

    Returns
    -------
    ReportResult

    Raises
    ------
    ConfigError
        One line when ``run_dir`` is not a readable run folder; :class:`MissingPlotExtra` when
        matplotlib is not installed.
    """
    run = load_run(run_dir)
    figure_cls, canvas_cls = _import_matplotlib()
    out = Path(out_dir) if out_dir is not None else run.root / "report"
    made = [p for p in (out, *out.parents) if not p.exists()]
    try:
        out.mkdir(parents=True, exist_ok=True)
    except (FileExistsError, NotADirectoryError):
        raise ConfigError(f"{out}: report folder is a file, expected a folder") from None
    except OSError as exc:
        raise ConfigError(f"{out}: cannot make report folder ({exc.strerror})") from None
    tol, tol_note = _tolerance(run)
    uncal = run.calibrated is False
    units = "g²/Hz, uncalibrated" if uncal else "g²/Hz"
    frf_units = "g/FS, uncalibrated" if uncal else "g/FS"
    pngs: dict[str, Path] = {}
    try:
        return _render(run, out, figure_cls, canvas_cls, tol, tol_note, units, frf_units, pngs)
    except OSError as exc:
        # Nothing half-made stays behind: the plots written so far and the folders made here.
        for path in pngs.values():
            path.unlink(missing_ok=True)
        (out / "summary.txt").unlink(missing_ok=True)
        for folder in made:
            try:
                folder.rmdir()
            except OSError:
                pass
        raise ConfigError(f"{out}: cannot write the report ({exc.strerror or exc})") from None


def _render(run: Any, out: Path, figure_cls: Any, canvas_cls: Any, tol: Any, tol_note: Any,
            units: str, frf_units: str, pngs: dict[str, Path]) -> ReportResult:
    """Draw and write every plot and ``summary.txt`` into ``out`` (see :func:`render_report`)."""

    def figure(name: str, size: tuple[float, float], draw: Any, *args: Any) -> None:
        fig = figure_cls(figsize=size)
        # Fixed margins: an automatic layout engine costs more than the drawing itself.
        fig.subplots_adjust(left=0.1, right=0.97, bottom=0.6 / size[1], top=1 - 0.35 / size[1],
                            hspace=0.12)
        if run.updates.n == 0 and name != "level":
            _no_data(fig, "no control update was recorded")
        else:
            draw(fig, run, *args)
        pngs[name] = _save(fig, canvas_cls, out / f"{name}.png")

    figure("control", (8.0, 5.0), _plot_control, tol, tol_note, units)
    figure("drive", (8.0, 4.0), _plot_drive)
    figure("frf", (8.0, 6.5), _plot_frf, frf_units)
    figure("convergence", (8.0, 4.0), _plot_convergence, tol)
    figure("level", (8.0, 3.5), _plot_level)
    text = summary_text(run)
    text += "plots:           " + ", ".join(p.name for p in pngs.values()) + "\n"
    summary_path = out / "summary.txt"
    atomic_write_text(summary_path, text)
    return ReportResult(run_dir=run.root, out_dir=out, pngs=pngs, summary_path=summary_path,
                        summary=text)
