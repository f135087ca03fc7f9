"""The test report of a run folder: one PDF (``report.pdf``) and a text summary.

:func:`render_report` reads a run folder with :func:`liveshape.record.writer.load_run` (complete or
killed midway) and writes, into ``<run>/report/`` by default:

``report.pdf``       the test report, A4 pages:

                     1. identity of the test (name, spec file and its SHA-256, software
                        version, start time UTC, rig, calibration, operator, test item), the
                        verdict in words with its reasons, control against target with the
                        alarm and abort bands and the χ² band of the estimate (the full-level
                        average when the record holds one, else the last update, labelled so),
                        and the figures: grms, rms error, largest and smallest line deviation,
                        lines outside, drive rms and peak against their limits, kurtosis and
                        crest factor of drive and response;
                     2. control rms and test level against run time, with the rms limits and
                        the abort or stop marker;
                     3. drive PSD, FRF estimate H1 (magnitude, phase) and coherence;
                     4. line deviation per update against the line limits of every tolerance
                        band, rms error per update against the rms limits;
                     5. … the event log, as many pages as it takes.

                     An aborted, stopped or unfinished run carries a banner naming the rule,
                     the reason and the run time on every page.
``summary.txt``      the same figures as plain text (also printed by ``liveshape report``)
``*.png``            only when asked (``png=True``): ``control``, ``drive``, ``frf``,
                     ``convergence``, ``level``

matplotlib is imported inside :func:`render_report` and drawn through
``matplotlib.figure.Figure`` (Agg canvas for PNG, ``PdfPages`` for the PDF; no pyplot, so no
global figure state). Each file is written to a temporary name and renamed, so a failed report
leaves no partial file.
"""

from __future__ import annotations

import dataclasses
import math
import os
import textwrap
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from liveshape.atomic import atomic_write, atomic_write_text
from liveshape.errors import ConfigError
from liveshape.record.writer import RunData, load_run
from liveshape.schema import Where
from liveshape.testdef.chain import G_UNIT, AccelUnit
from liveshape.testdef.tolerance import Tolerance, tolerance_from_mapping

__all__ = [
    "MissingPlotExtra",
    "ReportResult",
    "SignalStats",
    "decision_spectrum",
    "render_report",
    "signal_stats",
    "summary_text",
]

MATPLOTLIB_MISSING = "matplotlib is not installed: pip install 'liveshape[plot]'"
PDF_NAME = "report.pdf"
#: A4 portrait, inches (ISO 216: 210 x 297 mm).
A4_IN = (8.27, 11.69)
#: Event-log lines per PDF page.
EVENT_LINES_PER_PAGE = 78
#: Folder of the decision spectra in a run folder and the full-level average's file there.
DECISIONS_DIR = "decisions"
FULL_LEVEL_NAME = "full_level.npz"

_COLOURS = {"pass": "#2e7d32", "fail": "#c62828", "incomplete": "#b26a00", "none": "#555555"}


class MissingPlotExtra(ConfigError):
    """The optional plotting library is missing (one line naming the ``plot`` extra)."""


@dataclass(frozen=True)
class ReportResult:
    """What :func:`render_report` wrote.

    Attributes
    ----------
    run_dir, out_dir : Path
        The run folder read and the folder written.
    pdf_path : Path
        ``report.pdf``.
    pages : tuple of str
        Title of each PDF page, in order.
    pngs : dict of str to Path
        Plot name to file (empty unless PNGs were asked for).
    summary_path : Path
        ``summary.txt``.
    summary : str
        Its text.
    """

    run_dir: Path
    out_dir: Path
    pdf_path: Path
    pages: tuple[str, ...]
    pngs: dict[str, Path]
    summary_path: Path
    summary: str


# --------------------------------------------------------------------------------------------
# What the record says


_TOLERANCE_KEYS = ("alarm_db", "abort_db", "rms_alarm_db", "rms_abort_db", "bands")


def _tolerance(run: RunData) -> tuple[Tolerance, str]:
    data = run.spec.get("tolerance")
    if data is None:
        return Tolerance(), "built-in"
    where = Where(str(run.root / "spec.yaml")).key("tolerance")
    try:
        return tolerance_from_mapping(data, where), ""
    except ConfigError as exc:
        first = str(exc)
    if isinstance(data, Mapping):  # a record from a newer version may hold more keys
        known = {k: v for k, v in data.items() if k in _TOLERANCE_KEYS}
        try:
            return tolerance_from_mapping(known, where), ""
        except ConfigError:
            pass
    return Tolerance(), f"built-in ({first})"


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


def _finite(x: Any) -> bool:
    try:
        return math.isfinite(float(x))
    except (TypeError, ValueError):
        return False


def _fmt(x: Any, spec: str, unit: str = "") -> str:
    if not _finite(x):
        return "n/a"
    return f"{float(x):{spec}}{' ' + unit if unit else ''}"


def _spec_number(run: RunData, section: str, key: str) -> float | None:
    part = run.spec.get(section)
    value = part.get(key) if isinstance(part, Mapping) else None
    return float(value) if _finite(value) else None


def _level_track(run: RunData) -> tuple[np.ndarray, np.ndarray]:
    """Level in dB against run time: the events with ``level_db`` in their data (level steps).

    A record without such events falls back to the level each update file gives.
    """
    t, lv = [], []
    for ev in run.events:
        value = ev.data.get("level_db") if isinstance(ev.data, Mapping) else None
        if ev.kind == "level" and value is not None and math.isfinite(ev.t_s) and _finite(value):
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


@dataclass(frozen=True)
class _Ending:
    """How the run ended, for the banner of every page."""

    status: str
    word: str  # "" for a completed run
    t_s: float | None
    rule: str | None
    reason: str | None

    @property
    def banner(self) -> str:
        if not self.word:
            return ""
        at = f" at {self.t_s:.1f} s" if self.t_s is not None else ""
        rule = f", rule {self.rule}" if self.rule else ""
        reason = f": {self.reason}" if self.reason else ""
        return f"{self.word}{at}{rule}{reason}"


def _ending(run: RunData) -> _Ending:
    s = run.summary or {}
    status = run.status
    trip = s.get("trip") if isinstance(s.get("trip"), Mapping) else {}
    rule = s.get("abort_rule") or (trip or {}).get("rule")
    reason = s.get("abort_reason") or s.get("error")
    t_end = None
    kinds = {"aborted": ("trip", "abort"), "stopped": ("stop",), "crashed": ("crash",)}
    for ev in run.events:
        if ev.kind in kinds.get(status, ()) and math.isfinite(ev.t_s):
            t_end = ev.t_s
            break
    if t_end is None and status not in ("completed",):
        times = [ev.t_s for ev in run.events if math.isfinite(ev.t_s)]
        t_end = max(times) if times else None
    words = {"aborted": "ABORTED", "stopped": "STOPPED", "crashed": "CRASHED",
             "incomplete": "INCOMPLETE: the run did not close (no summary.json)"}
    word = "" if status == "completed" else words.get(status, status.upper())
    return _Ending(status=status, word=word, t_s=t_end, rule=rule, reason=reason)


def _verdict(run: RunData) -> tuple[str, str, list[str], str]:
    """``(key, words, reasons, rule)``; key is pass, fail, incomplete or none (no verdict)."""
    s = run.summary or {}
    v = s.get("verdict")
    reasons = [str(r) for r in (s.get("verdict_reasons") or [])]
    rule = str(s.get("verdict_rule") or "")
    if v in ("pass", "fail", "incomplete"):
        words = {"pass": "PASS", "fail": "FAIL", "incomplete": "INCOMPLETE: no verdict"}[v]
        if v == "incomplete" and run.status in ("aborted", "stopped"):
            words = f"INCOMPLETE: {run.status}, no pass"
        return v, words, reasons, rule
    if run.status in ("aborted", "stopped", "crashed", "incomplete"):
        return "incomplete", f"INCOMPLETE: {run.status}, no pass", reasons, rule
    return ("none", "NO VERDICT: this record was made before verdicts were recorded",
            reasons, rule)


def _full_level_window(run: RunData) -> tuple[float, float] | None:
    """Run time (s) from reaching full level (0 dB, ramp done) to leaving it, if it was reached."""
    start = end = None
    for ev in run.events:
        if not math.isfinite(ev.t_s):
            continue
        if start is None and ev.kind == "level" and _finite(ev.data.get("level_db")) \
                and float(ev.data["level_db"]) == 0.0:
            ramp = ev.data.get("ramp_s")
            start = ev.t_s + (float(ramp) if _finite(ramp) else 0.0)
        elif start is not None and end is None and (
                ev.kind in ("trip", "stop", "crash")
                or (ev.kind == "stage" and ev.data.get("stage") in ("ramp_down", "done"))):
            end = ev.t_s
    if start is None:
        return None
    if end is None:
        times = [ev.t_s for ev in run.events if math.isfinite(ev.t_s)]
        end = max(times) if times else start
    return (start, end) if end > start else None


def _signal_window(run: RunData) -> tuple[float, float | None, str]:
    """The stretch of the WAVs the drive and response figures are taken over, and its words.

    The time at full level when it was reached; otherwise the last level step held (from the
    end of its ramp to the end of the run); the whole record when no level step is recorded.
    """
    window = _full_level_window(run)
    if window is not None:
        return window[0], window[1], (f"{window[1] - window[0]:.1f} s at full level "
                                      f"({window[0]:.1f}–{window[1]:.1f} s)")
    levels = [ev for ev in run.events if ev.kind == "level" and math.isfinite(ev.t_s)
              and _finite(ev.data.get("level_db"))]
    stops = [ev.t_s for ev in run.events if math.isfinite(ev.t_s) and (
        ev.kind in ("trip", "stop", "crash")
        or (ev.kind == "stage" and ev.data.get("stage") in ("ramp_down", "done")))]
    for i in range(len(levels) - 1, -1, -1):  # the last level step held for a while
        ev = levels[i]
        ramp = ev.data.get("ramp_s")
        start = ev.t_s + (float(ramp) if _finite(ramp) else 0.0)
        ends = [t for t in stops if t >= ev.t_s]
        if i + 1 < len(levels):
            ends.append(levels[i + 1].t_s)
        end = min(ends) if ends else None
        if end is not None and end - start < 0.5:
            continue  # the ramp to this step was cut short: take the step before
        until = f"{end:.1f} s" if end is not None else "the end"
        return start, end, (f"{start:.1f} s to {until} at the last level held, "
                            f"{float(ev.data['level_db']):+g} dB (full level not reached)")
    return 0.0, None, "the whole record (no level step recorded)"


@dataclass(frozen=True)
class DecisionSpectrum:
    """The control spectrum the report judges: the full-level average or the last update."""

    f_hz: np.ndarray
    control_psd: np.ndarray
    target_psd: np.ndarray
    alarm_db: np.ndarray
    abort_db: np.ndarray
    dof: float
    source: str  # "full_level", "decision" or "update"
    label: str


def _read_full_level(run: RunData) -> dict[str, Any] | None:
    full = getattr(run, "full_level", None)
    if full is not None:
        return dict(full)
    path = run.root / DECISIONS_DIR / FULL_LEVEL_NAME
    if not path.is_file():
        return None
    try:
        with np.load(path, allow_pickle=False) as z:
            return {k: z[k] if z[k].ndim else z[k].item() for k in z.files}
    except (OSError, ValueError, EOFError) as exc:
        raise ConfigError(f"{path}: cannot read ({exc.__class__.__name__})") from None


def decision_spectrum(run: RunData, tol: Tolerance | None = None) -> DecisionSpectrum | None:
    """The spectrum the report's first page judges.

    ``decisions/full_level.npz`` (the time-averaged control over the whole full-level time,
    with its DOF) when the record holds one; otherwise the last update's estimate, labelled
    as such. None when there is neither.
    """
    tol = tol or _tolerance(run)[0]
    full = _read_full_level(run)
    keys = ("f_hz", "control_psd_g2_hz", "target_psd_g2_hz")
    if full is not None and all(k in full for k in keys):
        f = np.asarray(full["f_hz"], dtype=float)
        alarm = np.asarray(full.get("alarm_db", tol.alarm_db_at(f)), dtype=float)
        abort = np.asarray(full.get("abort_db", tol.abort_db_at(f)), dtype=float)
        dof = float(full.get("dof", math.nan))
        return DecisionSpectrum(
            f, np.asarray(full["control_psd_g2_hz"], dtype=float),
            np.asarray(full["target_psd_g2_hz"], dtype=float), alarm, abort, dof,
            "full_level", f"full-level average, {_fmt(dof, '.0f')} DOF")
    up = run.updates
    if up.n == 0:
        return None
    f = up.f_hz
    alarm = up.arrays.get("alarm_db")
    abort = up.arrays.get("abort_db")
    alarm = alarm[-1] if alarm is not None else tol.alarm_db_at(f)
    abort = abort[-1] if abort is not None else tol.abort_db_at(f)
    dec, ddof = up.arrays.get("decision_psd"), up.numbers.get("decision_dof")
    rows = [] if dec is None or ddof is None else [
        k for k in range(up.n) if np.isfinite(dec[k]).all() and _finite(ddof[k]) and ddof[k] > 0]
    if rows:  # the last tolerance decision: the pooled estimate behind the summary's figures
        k = rows[-1]
        label = (f"last decision, update {int(up.index[k])} at {up.t_s[k]:.1f} s, "
                 f"{float(ddof[k]):.0f} DOF (no full-level average in this record)")
        return DecisionSpectrum(f, dec[k], up.target_psd[k], np.asarray(alarm, float),
                                np.asarray(abort, float), float(ddof[k]), "decision", label)
    dof = _last_number(run, "dof")
    label = (f"last update {int(up.index[-1])} at {up.t_s[-1]:.1f} s, {_fmt(dof, '.0f')} DOF "
             "(no full-level average in this record)")
    return DecisionSpectrum(f, up.control_psd[-1], up.target_psd[-1], np.asarray(alarm, float),
                            np.asarray(abort, float), float(dof) if dof else math.nan,
                            "update", label)


@dataclass(frozen=True)
class _Figures:
    control_grms_g: float
    target_grms_g: float
    rms_error_db: float
    max_dev_db: float
    min_dev_db: float
    lines_outside_alarm: int
    lines_outside_abort: int
    lines: int


def _figures(d: DecisionSpectrum) -> _Figures | None:
    band = _band(d.f_hz, d.target_psd) & np.isfinite(d.control_psd)
    if not band.any():
        return None
    df = float(d.f_hz[1] - d.f_hz[0]) if d.f_hz.size > 1 else float("nan")
    c, t = d.control_psd[band], d.target_psd[band]
    dev = 10.0 * np.log10(np.maximum(c, 1e-300) / t)
    ratio = float(c.sum()) / float(t.sum())
    return _Figures(
        control_grms_g=math.sqrt(float(c.sum()) * df), target_grms_g=math.sqrt(float(t.sum()) * df),
        rms_error_db=10.0 * math.log10(ratio) if ratio > 0 else -math.inf,
        max_dev_db=float(dev.max()), min_dev_db=float(dev.min()),
        lines_outside_alarm=int(np.count_nonzero(np.abs(dev) > d.alarm_db[band])),
        lines_outside_abort=int(np.count_nonzero(np.abs(dev) > d.abort_db[band])),
        lines=int(band.sum()))


@dataclass(frozen=True)
class SignalStats:
    """Moments of one recorded signal over a stretch of the run.

    Attributes
    ----------
    rms, peak : float
        Root mean square and largest absolute sample, in the signal's unit (FS).
    crest_factor : float
        peak / rms.
    kurtosis : float
        n m4 / m2² (3 for a Gaussian signal; the ``fisher=False`` convention).
    seconds : float
        Length of the stretch, s.
    """

    rms: float
    peak: float
    crest_factor: float
    kurtosis: float
    seconds: float


def control_column(run: Any) -> int:
    """Column of the response WAV that holds the control: the first ``control`` input of the
    run's ``rig.inputs`` (0 for a run with one input)."""
    inputs = (getattr(run, "rig", None) or {}).get("inputs") if isinstance(
        getattr(run, "rig", None), Mapping) else None
    for i, r in enumerate(inputs or ()):
        if isinstance(r, Mapping) and r.get("role") == "control":
            return i
    return 0


def signal_stats(path: Path, start_s: float = 0.0, end_s: float | None = None,
                 *, block: int = 1 << 18, column: int = 0) -> SignalStats | None:
    """rms, peak, crest factor and kurtosis of one channel (``column``, default the first) of a
    WAV file over a stretch.

    Read in blocks (a long run's WAV need not fit in memory) and merged exactly with
    :class:`liveshape.dsp.moments.RunningMoments`. None when the stretch holds no sample.
    """
    import soundfile

    from liveshape.dsp.moments import RunningMoments

    mom = RunningMoments()
    try:
        with soundfile.SoundFile(str(path)) as fh:
            fs = float(fh.samplerate)
            first = max(int(round(start_s * fs)), 0)
            last = fh.frames if end_s is None else min(int(round(end_s * fs)), fh.frames)
            if last <= first:
                return None
            fh.seek(first)
            left = last - first
            while left > 0:
                data = fh.read(min(block, left), dtype="float64", always_2d=True)
                if data.shape[0] == 0:
                    break
                mom.update(data[:, column])
                left -= data.shape[0]
    except (RuntimeError, OSError) as exc:
        raise ConfigError(f"{path}: cannot read WAV ({exc})") from None
    if mom.n == 0:
        return None
    rms = mom.rms
    return SignalStats(rms=rms, peak=mom.peak, crest_factor=mom.peak / rms if rms > 0 else
                       math.nan, kurtosis=mom.kurtosis, seconds=mom.n / fs)


def _rms_track(path: Path, block_s: float = 0.5,
               column: int = 0) -> tuple[np.ndarray, np.ndarray] | None:
    """Rms of one channel (``column``) of a WAV in consecutive ``block_s`` blocks: (mid time s,
    rms)."""
    import soundfile

    try:
        with soundfile.SoundFile(str(path)) as fh:
            fs = float(fh.samplerate)
            n = max(int(round(block_s * fs)), 1)
            t, r = [], []
            pos = 0
            for data in fh.blocks(blocksize=n, dtype="float64", always_2d=True):
                x = data[:, column]
                if x.size:
                    t.append((pos + x.size / 2) / fs)
                    r.append(math.sqrt(float(np.dot(x, x)) / x.size))
                pos += x.size
    except (RuntimeError, OSError):
        return None
    return (np.asarray(t), np.asarray(r)) if t else None


def _calibration_date(run: RunData) -> str:
    cal = run.meta.get("calibration") or {}
    if isinstance(cal, Mapping) and cal.get("date"):
        return str(cal["date"])
    path = (run.spec.get("rig") or {}).get("calibration") if isinstance(
        run.spec.get("rig"), Mapping) else None
    if path and Path(str(path)).is_file():
        from liveshape.testdef.config import read_yaml_file

        try:
            data = read_yaml_file(Path(str(path)))
        except ConfigError:
            return "not readable"
        if isinstance(data, Mapping) and data.get("date"):
            return str(data["date"])
    return "not recorded"


def _identity_rows(run: RunData) -> list[tuple[str, str]]:
    m = run.meta
    s = run.summary or {}
    rec = s.get("record") if isinstance(s.get("record"), Mapping) else {}
    spec_file = m.get("spec_file") or "not recorded"
    sha = m.get("spec_sha256")
    rig = run.rig
    if rig.get("kind") == "sim":
        plant = rig.get("plant")
        name = plant.get("name") if isinstance(plant, Mapping) else plant
        rig_text = f"simulated rig, plant {name or 'unnamed'}"
    elif rig.get("kind") == "audio":
        rig_text = (f"audio interface {rig.get('device', '?')} ({rig.get('host_api', '?')}), "
                    f"block {rig.get('block_size', '?')} samples")
    else:
        rig_text = str(rig.get("kind") or "not recorded")
    cal = m.get("calibration") if isinstance(m.get("calibration"), Mapping) else {}
    if not cal:
        cal_text = "not recorded"
    elif cal.get("calibrated") is False:
        cal_text = "UNCALIBRATED: levels are relative (full scale), not physical g"
    else:
        cal_text = f"{cal.get('source') or 'calibrated'}, dated {_calibration_date(run)}"
    version = m.get("software_version")
    return [
        ("test", str(m.get("name", run.root.name))),
        ("spec file", str(spec_file)),
        ("spec SHA-256", str(sha) if sha else "not recorded"),
        ("software", f"liveshape {version}" if version else "not recorded in this record"),
        ("started (UTC)", str(m.get("created_utc", "n/a"))),
        ("closed (UTC)", str(rec.get("closed_utc", "not closed"))),
        ("rig", rig_text),
        ("calibration", cal_text),
        ("operator", str(m.get("operator") or "not given")),
        ("test item", str(m.get("test_item") or "not given")),
        ("record", str(run.root)),
    ]


# --------------------------------------------------------------------------------------------
# The text summary


def summary_text(run: RunData, units: AccelUnit = G_UNIT) -> str:
    """The run's summary as plain text (no plotting library needed).

    A run killed before it closed has no ``summary.json``: its figures are then taken from the
    last update file and said to be so. ``units`` is the display unit of acceleration (the
    record is in g).
    """
    s = dict(run.summary or {})
    up = run.updates
    key, words, reasons, _rule = _verdict(run)
    lines = [f"liveshape run report: {run.meta.get('name', run.root.name)}",
             f"folder:          {run.root}",
             f"started (UTC):   {run.meta.get('created_utc', 'n/a')}"]
    if run.summary is None:
        lines.append("status:          incomplete (no summary.json: the run did not close; "
                     "figures below are from the last update)")
    else:
        lines.append(f"status:          {s.get('status', 'unknown')}")
    lines.append(f"verdict:         {words}")
    lines += [f"                 - {r}" for r in reasons]
    if s.get("abort_reason"):
        word = "stop reason: " if run.status == "stopped" else "abort reason:"
        lines.append(f"{word}    {s['abort_reason']}")
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
    k = units.per_g
    control = float(control) * k if _finite(control) else control
    target = float(target) * k if _finite(target) else target
    word = "rms control:" if k != 1.0 else "grms control:"
    lines.append(f"{word:<17}{_fmt(control, '.3f', units.amplitude)}   target: "
                 f"{_fmt(target, '.3f', units.amplitude)}   ({_fmt(err, '+.2f', 'dB')})")
    rms_err = s.get("final_rms_error_db", _last_number(run, "rms_error_db"))
    lines.append(f"rms error:       {_fmt(rms_err, '+.2f', 'dB')}")
    if "final_max_dev_db" in s:  # the largest |deviation| of the final decision: no sign
        lines.append(f"worst line |dev|: {_fmt(s['final_max_dev_db'], '.2f', 'dB')}")
    else:
        lines.append(f"line dev. max / min: {_fmt(_last_number(run, 'max_dev_db'), '+.2f', 'dB')}"
                     f" / {_fmt(_last_number(run, 'min_dev_db'), '+.2f', 'dB')}")
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
# Drawing (matplotlib objects passed in; nothing global)


def _import_matplotlib() -> tuple[Any, Any, Any]:
    try:
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.backends.backend_pdf import PdfPages
        from matplotlib.figure import Figure
    except ImportError:
        raise MissingPlotExtra(MATPLOTLIB_MISSING) from None
    return Figure, FigureCanvasAgg, PdfPages


def _log_axis(axis: Any) -> None:
    """Log frequency axis labelled in plain numbers at 1, 2, 5 per decade."""
    from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter

    axis.set_major_locator(LogLocator(base=10.0, subs=(1.0, 2.0, 5.0)))
    axis.set_major_formatter(FuncFormatter(lambda x, _pos: f"{x:g}"))
    axis.set_minor_formatter(NullFormatter())


def _legend(ax: Any, **kwargs: Any) -> None:
    """A legend when something on the axes has a label."""
    if ax.get_legend_handles_labels()[0]:
        ax.legend(**kwargs)


def _no_data(ax: Any, message: str) -> None:
    ax.text(0.5, 0.5, message, ha="center", va="center", transform=ax.transAxes, fontsize=9)
    ax.set_axis_off()


def _mark_end(ax: Any, ending: _Ending) -> None:
    """A vertical line at the abort or stop time, labelled."""
    if ending.word and ending.t_s is not None and ending.status in ("aborted", "stopped",
                                                                    "crashed"):
        colour = "#c62828" if ending.status != "stopped" else "#b26a00"
        label = ending.word.lower() + (f" ({ending.rule})" if ending.rule else "")
        ax.axvline(ending.t_s, color=colour, lw=1.4, ls="-", label=f"{label} at "
                   f"{ending.t_s:.1f} s")


def draw_control(ax: Any, d: DecisionSpectrum | None, units: str) -> None:
    """Control against target with the alarm and abort bands and the 90 % χ² band."""
    if d is None:
        _no_data(ax, "no control spectrum was recorded")
        return
    band = _band(d.f_hz, d.target_psd)
    if not band.any():
        _no_data(ax, "no target lines in the recorded spectrum")
        return
    fb, tb, cb = d.f_hz[band], d.target_psd[band], d.control_psd[band]
    alarm = 10.0 ** (d.alarm_db[band] / 10.0)
    abort = 10.0 ** (d.abort_db[band] / 10.0)
    ax.fill_between(fb, tb / abort, tb * abort, color="#f3d6d2", lw=0, label="abort band")
    ax.fill_between(fb, tb / alarm, tb * alarm, color="#f4ebc8", lw=0, label="alarm band")
    ax.plot(fb, tb, color="#222222", lw=1.3, label="target")
    cpos = np.where(cb > 0, cb, np.nan)
    if _finite(d.dof) and d.dof > 0:
        from liveshape.dsp.spectral_stats import chi2_interval_db

        lo, hi = chi2_interval_db(d.dof, 0.90)
        ax.fill_between(fb, cpos * 10 ** (lo / 10), cpos * 10 ** (hi / 10), color="#2f6f9f",
                        alpha=0.22, lw=0,
                        label=f"90 % χ² band {lo:+.2f} / {hi:+.2f} dB ({d.dof:.0f} DOF)")
    ax.plot(fb, cpos, color="#2f6f9f", lw=0.9, label="control")
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xlim(fb[0], fb[-1])
    _log_axis(ax.xaxis)
    ax.set_xlabel("frequency (Hz)", fontsize=8)
    ax.set_ylabel(f"ASD ({units})", fontsize=8)
    ax.set_title(f"control vs target: {d.label}", fontsize=9)
    ax.tick_params(labelsize=7)
    ax.grid(True, which="both", color="#dddddd", lw=0.5)
    _legend(ax, loc="lower center", fontsize=7, ncol=3)


def draw_drive(ax: Any, run: RunData, psd_limit_note: str = "") -> None:
    up = run.updates
    f = up.f_hz
    pos = f > 0
    for k, style in ((0, dict(color="#999999", lw=0.8)), (-1, dict(color="#2f6f9f", lw=1.0))):
        d = up.drive_psd[k][pos]
        ax.plot(f[pos], np.where(d > 0, d, np.nan),
                label=f"update {int(up.index[k])} at {up.t_s[k]:.1f} s", **style)
        if up.n == 1:
            break
    band = _band(f, up.target_psd[-1])
    if band.any():
        ax.axvspan(f[band][0], f[band][-1], color="#f2f2f2", zorder=0, label="test band")
    ax.set_xscale("log")
    ax.set_yscale("log")
    _log_axis(ax.xaxis)
    ax.set_xlabel("frequency (Hz)", fontsize=8)
    ax.set_ylabel("drive PSD (FS²/Hz)", fontsize=8)
    ax.set_title("drive PSD as played (first and last update)" + psd_limit_note, fontsize=9)
    ax.tick_params(labelsize=7)
    ax.grid(True, which="both", color="#dddddd", lw=0.5)
    _legend(ax, loc="best", fontsize=7)


def draw_frf(axes: Sequence[Any], run: RunData, units: str, per_g: float = 1.0) -> None:
    """|H1| (in ``units``, the record's g/FS times ``per_g``), phase and coherence."""
    up = run.updates
    f, h, coh = up.f_hz, up.h1[-1] * per_g, up.coherence[-1]
    pos = (f > 0) & np.isfinite(h)
    if not pos.any():
        for ax in axes:
            _no_data(ax, "no FRF recorded")
        return
    mag = np.abs(h[pos])
    with np.errstate(divide="ignore"):
        axes[0].plot(f[pos], 20 * np.log10(mag), color="#2f6f9f", lw=1.0)
    axes[0].set_ylabel(f"|H1| (dB re 1 {units})", fontsize=8)
    axes[0].set_title(f"FRF estimate H1 and coherence, update {int(up.index[-1])}", fontsize=9)
    axes[1].plot(f[pos], np.degrees(np.angle(h[pos])), color="#2f6f9f", lw=0.8)
    axes[1].set_ylabel("phase (deg)", fontsize=8)
    axes[1].set_ylim(-185, 185)
    axes[1].set_yticks([-180, -90, 0, 90, 180])
    axes[2].plot(f[pos], coh[pos], color="#555555", lw=0.8)
    axes[2].set_ylim(0, 1.05)
    axes[2].set_ylabel("coherence", fontsize=8)
    axes[2].set_xlabel("frequency (Hz)", fontsize=8)
    band = _band(f, up.target_psd[-1])
    for ax in axes:
        ax.set_xscale("log")
        _log_axis(ax.xaxis)
        ax.tick_params(labelsize=7)
        ax.grid(True, which="both", color="#dddddd", lw=0.5)
        if band.any():
            ax.axvspan(f[band][0], f[band][-1], color="#f4f4f4", zorder=0)


def _input_names(full: Mapping[str, Any]) -> list[str]:
    """Names of the inputs with a full-level PSD in ``full`` (the record's order)."""
    return [k[len("input_"):-len("_psd_g2_hz")] for k in full
            if k.startswith("input_") and k.endswith("_psd_g2_hz")]


def _limit_points(run: RunData) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Each limited monitor's breakpoints (Hz, g²/Hz) from the run's spec."""
    out = {}
    rig = run.spec.get("rig") if isinstance(run.spec, Mapping) else None
    for r in (rig or {}).get("inputs") or ():
        lim = r.get("limit") if isinstance(r, Mapping) else None
        pts = lim.get("breakpoints") if isinstance(lim, Mapping) else None
        if pts:
            try:
                out[str(r.get("name"))] = (np.array([float(p["f_hz"]) for p in pts]),
                                           np.array([float(p["asd"]) for p in pts]))
            except (KeyError, TypeError, ValueError):
                continue
    return out


def draw_inputs(axes: Sequence[Any], run: RunData, asd_units: str, per_g: float = 1.0) -> None:
    """Several inputs at full level: each input's PSD with the target and the monitors' limits
    (notched lines shaded), each monitor's transmissibility over the first control input and its
    coherence."""
    full = run.full_level or {}
    f = np.asarray(full.get("f_hz", ()), dtype=float)
    names = _input_names(full)
    if not names or f.size == 0:
        for ax in axes:
            _no_data(ax, "no full-level average of the inputs")
        return
    colours = ["#2f6f9f", "#c05a1a", "#4a8a3a", "#8a4a9a", "#777777"]
    ax = axes[0]
    ax.plot(f, np.asarray(full["target_psd_g2_hz"]) * per_g**2, color="#222222", lw=0.9,
            ls="--", label="target")
    limits = _limit_points(run)
    for i, name in enumerate(names):
        c = colours[i % len(colours)]
        ax.plot(f, np.asarray(full[f"input_{name}_psd_g2_hz"]) * per_g**2, color=c, lw=0.9,
                label=name)
        if name in limits:
            lf, la = limits[name]
            ax.plot(lf, la * per_g**2, color=c, lw=1.4, ls=":", label=f"{name} limit")
    notch = full.get("notch_deepest_db")
    if notch is not None:
        on = np.asarray(notch) < -0.25
        for a, b in _runs(on):
            for x in axes:
                x.axvspan(f[a], f[b - 1], color="#f6e3c8", zorder=0)
    ax.set_yscale("log")
    ax.set_ylabel(f"ASD ({asd_units})", fontsize=8)
    ax.set_title("each input at full level; shaded: lines notched by a limit", fontsize=9)
    ax.legend(fontsize=6.5, loc="best")
    monitors = [n for n in names if f"input_{n}_trans_mag" in full]
    for i, name in enumerate(names):
        if name not in monitors:
            continue
        c = colours[i % len(colours)]
        axes[1].plot(f, np.asarray(full[f"input_{name}_trans_mag"]), color=c, lw=0.9, label=name)
        axes[2].plot(f, np.asarray(full[f"input_{name}_trans_coherence"]), color=c, lw=0.8)
    if not monitors:
        _no_data(axes[1], "no monitor input")
    axes[1].set_yscale("log")
    axes[1].set_ylabel("|monitor / control|", fontsize=8)
    axes[2].set_ylim(0, 1.05)
    axes[2].set_ylabel("coherence", fontsize=8)
    axes[2].set_xlabel("frequency (Hz)", fontsize=8)
    for x in axes:
        x.set_xscale("log")
        _log_axis(x.xaxis)
        x.tick_params(labelsize=7)
        x.grid(True, which="both", color="#dddddd", lw=0.5)


def _runs(mask: np.ndarray) -> list[tuple[int, int]]:
    """``(start, end)`` index pairs of the runs of True in ``mask``."""
    m = np.concatenate([[False], np.asarray(mask, dtype=bool), [False]])
    d = np.flatnonzero(np.diff(m.astype(int)))
    return list(zip(d[0::2], d[1::2], strict=True))


def _line_limit_sets(tol: Tolerance) -> list[tuple[str, float, float]]:
    """``(where, alarm_db, abort_db)`` for the base limits and each tolerance band."""
    out = [("elsewhere" if tol.bands else "all lines", tol.alarm_db, tol.abort_db)]
    for b in tol.bands:
        out.append((f"{b.f_lo_hz:g}-{b.f_hi_hz:g} Hz", b.alarm_db, b.abort_db))
    return out


def draw_line_error(ax: Any, run: RunData, tol: Tolerance) -> None:
    """Largest and smallest line deviation per update against the line limits of every band."""
    from matplotlib.ticker import MaxNLocator

    up = run.updates
    drawn = False
    for name, label, colour in (("max_dev_db", "largest line deviation", "#b5533c"),
                                ("min_dev_db", "smallest line deviation", "#2f6f9f")):
        values = up.numbers.get(name)
        if values is not None and np.isfinite(values).any():
            ax.plot(up.index, values, marker="o", ms=3, lw=1.0, color=colour, label=label)
            drawn = True
    if not drawn:
        ax.text(0.5, 0.5, "no line deviations recorded", ha="center", va="center",
                transform=ax.transAxes)
    styles = ("--", ":", "-.", (0, (5, 1, 1, 1)))
    for i, (where, alarm, abort) in enumerate(_line_limit_sets(tol)):
        ls = styles[i % len(styles)]
        for limit, colour, word in ((alarm, "#c9a227", "alarm"), (abort, "#c62828", "abort")):
            ax.axhline(limit, color=colour, lw=0.8, ls=ls, label=f"{word} ±{limit:g} dB, {where}")
            ax.axhline(-limit, color=colour, lw=0.8, ls=ls)
    ax.axhline(0.0, color="#888888", lw=0.6)
    ax.xaxis.set_major_locator(MaxNLocator(integer=True))
    ax.set_xlabel("update", fontsize=8)
    ax.set_ylabel("line deviation (dB)", fontsize=8)
    ax.set_title("line deviation per update (each update's own estimate)", fontsize=9)
    ax.tick_params(labelsize=7)
    ax.grid(True, color="#dddddd", lw=0.5)
    _legend(ax, loc="upper right", fontsize=6.5, ncol=2)


def draw_rms_error(ax: Any, run: RunData, tol: Tolerance) -> None:
    """rms error per update against the rms alarm and abort limits."""
    from matplotlib.ticker import MaxNLocator

    up = run.updates
    values = up.numbers.get("rms_error_db")
    if values is not None and np.isfinite(values).any():
        ax.plot(up.index, values, marker="o", ms=3, lw=1.0, color="#2f6f9f", label="rms error")
    else:
        ax.text(0.5, 0.5, "no rms error recorded", ha="center", va="center",
                transform=ax.transAxes)
    for limit, colour, word in ((tol.rms_alarm_db, "#c9a227", "rms alarm"),
                                (tol.rms_abort_db, "#c62828", "rms abort")):
        ax.axhline(limit, color=colour, lw=0.8, ls="--", label=f"{word} ±{limit:g} dB")
        ax.axhline(-limit, color=colour, lw=0.8, ls="--")
    ax.axhline(0.0, color="#888888", lw=0.6)
    ax.xaxis.set_major_locator(MaxNLocator(integer=True))
    ax.set_xlabel("update", fontsize=8)
    ax.set_ylabel("rms error (dB)", fontsize=8)
    ax.set_title("rms error per update", fontsize=9)
    ax.tick_params(labelsize=7)
    ax.grid(True, color="#dddddd", lw=0.5)
    _legend(ax, loc="upper right", fontsize=7)


def _time_limits(ax: Any, run: RunData) -> None:
    """Run-time axis from 0 to the last event (so the time plots line up)."""
    times = [ev.t_s for ev in run.events if math.isfinite(ev.t_s)]
    if run.updates.n:
        times.append(float(run.updates.t_s[-1]))
    if times and max(times) > 0:
        ax.set_xlim(0.0, max(times) * 1.01)


def draw_level(ax: Any, run: RunData, ending: _Ending) -> None:
    t, lv = _level_track(run)
    if t.size == 0:
        ax.text(0.5, 0.5, "no level recorded", ha="center", va="center", transform=ax.transAxes)
    else:
        ax.step(t, lv, where="post", color="#2f6f9f", lw=1.2, label="test level")
    window = _full_level_window(run)
    if window is not None:
        ax.axvspan(*window, color="#e8f1e8", zorder=0, label="at full level")
    _mark_end(ax, ending)
    ax.axhline(0.0, color="#888888", lw=0.6)
    low = float(lv.min()) if lv.size else -12.0
    ax.set_ylim(low - 1.0, 1.5)
    _time_limits(ax, run)
    ax.set_xlabel("run time (s)", fontsize=8)
    ax.set_ylabel("level (dB re full level)", fontsize=8)
    ax.set_title("test level", fontsize=9)
    ax.tick_params(labelsize=7)
    ax.grid(True, color="#dddddd", lw=0.5)
    _legend(ax, loc="lower right", fontsize=7)


def draw_control_rms(ax: Any, run: RunData, tol: Tolerance, ending: _Ending,
                     g_per_fs: float | None, units: str, per_g: float = 1.0) -> None:
    """Control rms against run time: the response in 0.5 s blocks (from the WAV) and each
    update's estimate, against the target rms at the level played and its rms limits; in
    ``units`` (g times ``per_g``)."""
    up = run.updates
    drawn = False
    if run.response_wav is not None and g_per_fs:
        track = _rms_track(run.response_wav, column=control_column(run))
        if track is not None:
            ax.plot(track[0], track[1] * g_per_fs * per_g, color="#9bb7cf", lw=0.8,
                    label="response rms, 0.5 s blocks (whole band)")
            drawn = True
    if up.n:
        df = float(up.f_hz[1] - up.f_hz[0]) if up.f_hz.size > 1 else float("nan")
        c_rms, t_rms = [], []
        for k in range(up.n):
            band = _band(up.f_hz, up.target_psd[k])
            c_rms.append(_grms(up.control_psd[k], band, df) * per_g)
            t_rms.append(_grms(up.target_psd[k], band, df) * per_g)
        t_arr, tr = up.t_s, np.asarray(t_rms)
        ax.plot(t_arr, c_rms, "o", ms=3.5, color="#2f6f9f", label="control rms per update (band)")
        ax.step(t_arr, tr, where="mid", color="#222222", lw=1.0, label="target rms at the level")
        for limit, colour, word in ((tol.rms_alarm_db, "#c9a227", "rms alarm"),
                                    (tol.rms_abort_db, "#c62828", "rms abort")):
            k = 10 ** (limit / 20)
            ax.step(t_arr, tr * k, where="mid", color=colour, lw=0.8, ls="--",
                    label=f"{word} ±{limit:g} dB")
            ax.step(t_arr, tr / k, where="mid", color=colour, lw=0.8, ls="--")
        drawn = True
    if not drawn:
        ax.text(0.5, 0.5, "no control rms recorded", ha="center", va="center",
                transform=ax.transAxes)
    window = _full_level_window(run)
    if window is not None:
        ax.axvspan(*window, color="#e8f1e8", zorder=0, label="at full level")
    _mark_end(ax, ending)
    _time_limits(ax, run)
    ax.set_xlabel("run time (s)", fontsize=8)
    ax.set_ylabel(f"rms ({units})", fontsize=8)
    ax.set_title("control rms against run time", fontsize=9)
    ax.tick_params(labelsize=7)
    ax.grid(True, color="#dddddd", lw=0.5)
    _legend(ax, loc="upper left", fontsize=7)


# --------------------------------------------------------------------------------------------
# The PDF pages


class _Page:
    """One A4 figure with a header, a footer and the run's ending banner."""

    def __init__(self, figure_cls: Any, title: str, run: RunData, ending: _Ending,
                 verdict_key: str, verdict_words: str) -> None:
        self.fig = figure_cls(figsize=A4_IN)
        self.title = title
        fig = self.fig
        name = run.meta.get("name", run.root.name)
        fig.text(0.06, 0.975, f"liveshape test report: {name}", fontsize=10, weight="bold",
                 va="top")
        fig.text(0.94, 0.975, verdict_words.split(":")[0], fontsize=10, weight="bold",
                 va="top", ha="right", color=_COLOURS.get(verdict_key, "#555555"))
        fig.text(0.06, 0.958, title, fontsize=8.5, va="top", color="#444444")
        self.top = 0.945
        if ending.word:
            colour = "#c62828" if ending.status != "stopped" else "#b26a00"
            text = textwrap.fill(ending.banner, 105)
            n = text.count("\n") + 1
            fig.text(0.06, self.top - 0.004, text, fontsize=8.5, va="top", color="white",
                     weight="bold", family="DejaVu Sans",
                     bbox=dict(boxstyle="square,pad=0.4", fc=colour, ec=colour))
            self.top -= 0.012 + 0.0135 * n
        self.footer = fig.text(0.94, 0.02, "", fontsize=7, ha="right", color="#666666")
        fig.text(0.06, 0.02, f"{run.root.name}   started {run.meta.get('created_utc', '?')} UTC",
                 fontsize=7, color="#666666")

    def axes(self, rect: Sequence[float]) -> Any:
        return self.fig.add_axes(list(rect))


def _text_block(fig: Any, x: float, y: float, rows: Sequence[tuple[str, str]], *,
                label_w: float = 0.16, size: float = 8.0, wrap: int = 92,
                line_h: float = 0.0125, colours: Mapping[int, str] | None = None) -> float:
    """Label/value rows top-down from ``y``; returns the y under the last row."""
    for i, (label, value) in enumerate(rows):
        text = textwrap.fill(value, wrap) if len(value) > wrap else value
        fig.text(x, y, label, fontsize=size, va="top", color="#555555")
        fig.text(x + label_w, y, text, fontsize=size, va="top",
                 color=(colours or {}).get(i, "#111111"))
        y -= line_h * (text.count("\n") + 1)
    return y


def _figure_rows(run: RunData, d: DecisionSpectrum | None, tol: Tolerance,
                 stats: dict[str, SignalStats | None], window_note: str, tol_note: str = "",
                 amplitude: str = "g") -> tuple[list[tuple[str, str]], dict[int, str]]:
    s = run.summary or {}
    rows: list[tuple[str, str]] = []
    colours: dict[int, str] = {}
    fig = _figures(d) if d is not None else None
    red, amber = "#c62828", "#b26a00"
    if fig is None:
        rows.append(("figures", "no control spectrum was recorded"))
    else:
        rows.append(("judged on", d.label if d is not None else ""))
        word = "grms" if amplitude == "g" else "rms"
        rows.append((f"{word} control / target", f"{fig.control_grms_g:.3f} {amplitude} / "
                     f"{fig.target_grms_g:.3f} {amplitude}"))
        over = abs(fig.rms_error_db) > tol.rms_alarm_db
        rows.append(("rms error", f"{fig.rms_error_db:+.2f} dB   (alarm ±{tol.rms_alarm_db:g} dB, "
                     f"abort ±{tol.rms_abort_db:g} dB)"))
        if over:
            colours[len(rows) - 1] = red
        rows.append(("line deviation max / min",
                     f"{fig.max_dev_db:+.2f} dB / {fig.min_dev_db:+.2f} dB   over {fig.lines} "
                     "lines"))
        rows.append(("lines outside", f"alarm {fig.lines_outside_alarm}   abort "
                     f"{fig.lines_outside_abort}   (limits: " + ", ".join(
                         f"±{a:g} / ±{b:g} dB {w}" for w, a, b in _line_limit_sets(tol)) + ")"))
        if fig.lines_outside_alarm:
            colours[len(rows) - 1] = red if fig.lines_outside_abort else amber
    if _finite(s.get("alarm_fraction")):
        lim = s.get("max_alarm_fraction")
        rows.append(("time in alarm", f"{100 * float(s['alarm_fraction']):.0f} % of the "
                     "full-level time" + (f"   (at most {100 * float(lim):.0f} %)"
                                          if _finite(lim) else "")))
        if _finite(lim) and float(s["alarm_fraction"]) > float(lim):
            colours[len(rows) - 1] = red
    full_s = _spec_number(run, "schedule", "full_level_s")
    rows.append(("time at full level", f"{_fmt(s.get('time_at_full_level_s'), '.1f', 's')}"
                 + (f" of {full_s:g} s" if full_s is not None else "")))
    rms_lim = _spec_number(run, "safety", "drive_rms_max_fs")
    peak_lim = _spec_number(run, "safety", "drive_peak_max_fs")
    drive = stats.get("drive")
    if drive is not None:
        rows.append(("signals judged", window_note))
        rows.append(("drive rms / peak",
                     f"{drive.rms:.3f} FS (limit {_fmt(rms_lim, '.3f', 'FS')}) / "
                     f"{drive.peak:.3f} FS (limit {_fmt(peak_lim, '.3f', 'FS')})"))
        if (rms_lim and drive.rms > rms_lim) or (peak_lim and drive.peak > peak_lim):
            colours[len(rows) - 1] = red
    else:
        up = run.updates
        if up.n:
            band = up.f_hz > 0
            df = float(up.f_hz[1] - up.f_hz[0]) if up.f_hz.size > 1 else float("nan")
            rms = _grms(up.drive_psd[-1], band, df)
            rows.append(("drive rms", f"{rms:.3f} FS in the band, last update (limit "
                         f"{_fmt(rms_lim, '.3f', 'FS')}); no drive.wav, so no peak"))
    for key, word in (("drive", "drive"), ("response", "response")):
        st = stats.get(key)
        if st is not None:
            rows.append((f"{word} kurtosis / crest", f"{_fmt(st.kurtosis, '.2f')} / "
                         f"{_fmt(st.crest_factor, '.2f')}   over {st.seconds:.1f} s "
                         "(Gaussian: kurtosis 3)"))
        else:
            rows.append((f"{word} kurtosis / crest", f"not available (no {word}.wav)"))
    if tol_note:
        rows.append(("tolerance", f"the spec's could not be read: {tol_note}"))
        colours[len(rows) - 1] = red
    for t in s.get("tones") or ():
        err = t.get("error_db")
        rows.append((f"tone {t['f_hz']:g} Hz", f"{_fmt(t.get('measured_g'), '.3f')} of "
                     f"{_fmt(t.get('target_g'), '.3f')} g peak ({_fmt(err, '+.2f', 'dB')}, "
                     f"tolerance ±{_fmt(t.get('tolerance_db'), 'g')} dB)"))
        if t.get("in_tolerance") is False:
            colours[len(rows) - 1] = red
    lines = s.get("lines_not_caused_by_drive") or ()
    if lines:
        rows.append(("lines not from the drive", ", ".join(
            f"{ln['f_hz']:.1f} Hz ({_fmt(ln.get('rms_g'), '.3g')} g rms)" for ln in lines)
            + ": subtracted from the control, left out of the verdict"))
        colours[len(rows) - 1] = amber
    k = s.get("control_kurtosis")
    if isinstance(k, dict):
        se = k.get("std_error")
        more = f" ± {se:.2f} (batch means)" if se is not None else " (too short for an error)"
        need = k.get("samples_for_0_1")
        fs = run.fs_hz
        if need and math.isfinite(fs):
            more += f"; ±0.1 needs {need / fs:.0f} s"
        rows.append(("control kurtosis", f"{_fmt(k.get('kurtosis'), '.2f')}{more}; target "
                     f"{_fmt(k.get('target'), 'g')}, drive {_fmt(k.get('drive_kurtosis'), '.2f')}"))
    inputs = s.get("inputs")
    if isinstance(inputs, dict):
        for r in inputs.get("inputs") or ():
            text = f"{_fmt(r.get('grms_g'), '.3f')} grms at full level"
            if r.get("limit_margin_db") is not None:
                text += (f"; limit {_fmt(r['limit_margin_db'], '+.2f', 'dB')} at its closest "
                         f"({_fmt(r.get('limit_f_hz'), '.0f')} Hz)")
            rows.append((f"{r.get('role')} input {r.get('channel')} ({r.get('name')})", text))
            if (r.get("limit_margin_db") or -1.0) > 0:
                colours[len(rows) - 1] = amber
        if inputs.get("notched_lines"):
            lo, hi = inputs.get("notch_f_hz") or (math.nan, math.nan)
            rows.append(("notched by limits", f"{inputs['notched_lines']} lines, "
                         f"{_fmt(lo, '.0f')}-{_fmt(hi, '.0f')} Hz, deepest "
                         f"{_fmt(inputs.get('notch_deepest_db'), '+.1f', 'dB')} (deliberate: "
                         "left out of the tolerance figures; inputs.csv has each line)"))
    rows.append(("updates", f"{run.updates.n}   to tolerance: "
                 f"{_fmt(s.get('updates_to_tolerance'), '.0f')}"))
    return rows, colours


def _first_page(page: _Page, run: RunData, tol: Tolerance, d: DecisionSpectrum | None,
                units: str, stats: dict[str, SignalStats | None], window_note: str,
                tol_note: str, amplitude: str = "g") -> None:
    fig = page.fig
    y = _text_block(fig, 0.06, page.top - 0.005, _identity_rows(run), wrap=95)
    key, words, reasons, rule = _verdict(run)
    y -= 0.008
    fig.text(0.06, y, "verdict", fontsize=8, va="top", color="#555555")
    head, _, rest = words.partition(": ")
    fig.text(0.22, y + 0.003, head, fontsize=13, weight="bold", va="top",
             color=_COLOURS.get(key, "#555555"))
    y -= 0.024
    lines = [textwrap.fill(rest, 100)] if rest else []
    lines += [textwrap.fill(f"• {r}", 100, subsequent_indent="  ") for r in reasons]
    if rule:
        lines.append(textwrap.fill(f"rule: {rule}", 100, subsequent_indent="  "))
    for text in lines:
        fig.text(0.22, y, text, fontsize=7.5, va="top", color="#222222")
        y -= 0.0115 * (text.count("\n") + 1)
    rows, colours = _figure_rows(run, d, tol, stats, window_note, tol_note, amplitude)
    n_rows = sum(1 + len(v) // 92 for _, v in rows)
    table_h = 0.0125 * n_rows + 0.01
    plot_top = y - 0.02
    plot_bottom = 0.075 + table_h + 0.045
    ax = page.axes((0.1, plot_bottom, 0.86, max(plot_top - plot_bottom, 0.15)))
    draw_control(ax, d, units)
    _text_block(fig, 0.06, plot_bottom - 0.045, rows, label_w=0.2, colours=colours)
    fig.text(0.06, 0.045, "reviewed by: " + "_" * 28 + "     date: " + "_" * 16
             + "     signature: " + "_" * 28, fontsize=8, color="#444444")


_EVENT_COLOURS = {"trip": "#c62828", "abort": "#c62828", "crash": "#c62828", "stop": "#b26a00",
                  "alarm": "#b26a00"}


def _event_lines(run: RunData) -> list[tuple[str, str]]:
    """``(text, colour)`` per printed line of the event log (long messages wrapped)."""
    out = []
    for ev in run.events:
        t = f"{ev.t_s:9.2f}" if math.isfinite(ev.t_s) else "        -"
        msg = textwrap.wrap(ev.message, 88) or [""]
        colour = _EVENT_COLOURS.get(ev.kind, "#111111")
        out.append((f"{t}  {ev.kind[:12]:<12}  {msg[0]}", colour))
        out += [(" " * 25 + m, colour) for m in msg[1:]]
    if run.skipped_event_lines:
        out.append((f"({run.skipped_event_lines} unreadable line(s) of events.jsonl skipped)",
                    "#555555"))
    return out or [("(no events recorded)", "#555555")]


def _in_units(d: DecisionSpectrum | None, units: AccelUnit) -> DecisionSpectrum | None:
    """The decision spectrum with its ASDs in ``units`` (the record holds g²/Hz)."""
    if d is None or units.per_g == 1.0:
        return d
    k2 = units.per_g ** 2
    return dataclasses.replace(d, control_psd=d.control_psd * k2, target_psd=d.target_psd * k2)


def _unit_labels(run: RunData, units: AccelUnit) -> tuple[str, str, str]:
    """Labels of an ASD, an amplitude and an FRF in ``units`` (said when uncalibrated)."""
    tag = ", uncalibrated" if run.calibrated is False else ""
    return (units.asd + tag, units.amplitude + tag, f"{units.amplitude}/FS" + tag)


def _build_pages(run: RunData, figure_cls: Any, units_of: AccelUnit = G_UNIT) -> list[_Page]:
    tol, tol_note = _tolerance(run)
    ending = _ending(run)
    key, words, _, _ = _verdict(run)
    units, amp_units, frf_units = _unit_labels(run, units_of)
    cal = run.meta.get("calibration") if isinstance(run.meta.get("calibration"), Mapping) else {}
    g_per_fs = cal.get("g_per_fs") if cal and _finite(cal.get("g_per_fs")) else None
    if g_per_fs is None and cal and all(_finite(cal.get(k)) for k in
                                        ("in_v_per_fs", "accel_mv_per_g")):
        g_per_fs = float(cal["in_v_per_fs"]) * 1000.0 / float(cal["accel_mv_per_g"])
    start, end, window_note = _signal_window(run)
    stats = {
        "drive": signal_stats(run.drive_wav, start, end) if run.drive_wav else None,
        "response": signal_stats(run.response_wav, start, end, column=control_column(run))
        if run.response_wav else None,
    }
    d = _in_units(decision_spectrum(run, tol), units_of)

    def page(title: str) -> _Page:
        return _Page(figure_cls, title, run, ending, key, words)

    pages = []
    p = page("1  identity, verdict, control against target, figures")
    _first_page(p, run, tol, d, units, stats, window_note, tol_note[:90], units_of.amplitude)
    pages.append(p)

    p = page("2  control rms and test level against run time")
    top = p.top - 0.03
    ax1 = p.axes((0.1, 0.52, 0.86, top - 0.52 - 0.02))
    draw_control_rms(ax1, run, tol, ending, g_per_fs, amp_units, units_of.per_g)
    ax2 = p.axes((0.1, 0.08, 0.86, 0.36))
    draw_level(ax2, run, ending)
    pages.append(p)

    p = page("3  drive PSD, FRF estimate H1 and coherence")
    if run.updates.n:
        top = p.top - 0.03
        draw_drive(p.axes((0.1, 0.62, 0.86, top - 0.62 - 0.02)), run)
        axes = [p.axes((0.1, 0.40, 0.86, 0.17)), p.axes((0.1, 0.25, 0.86, 0.12)),
                p.axes((0.1, 0.08, 0.86, 0.14))]
        draw_frf(axes, run, frf_units, units_of.per_g)
        for ax in axes[:2]:
            ax.tick_params(labelbottom=False)
    else:
        _no_data(p.axes((0.1, 0.1, 0.8, 0.7)), "no control update was recorded")
    pages.append(p)

    p = page("4  line deviation and rms error per update against their limits")
    if run.updates.n:
        top = p.top - 0.03
        draw_line_error(p.axes((0.1, 0.50, 0.86, top - 0.50 - 0.02)), run, tol)
        draw_rms_error(p.axes((0.1, 0.08, 0.86, 0.35)), run, tol)
    else:
        _no_data(p.axes((0.1, 0.1, 0.8, 0.7)), "no control update was recorded")
    pages.append(p)

    if run.full_level and _input_names(run.full_level):
        p = page("5  inputs: PSD at full level, limits and notches, transmissibility")
        top = p.top - 0.03
        axes = [p.axes((0.1, 0.50, 0.86, top - 0.50 - 0.02)), p.axes((0.1, 0.27, 0.86, 0.18)),
                p.axes((0.1, 0.08, 0.86, 0.14))]
        draw_inputs(axes, run, units, units_of.per_g)
        for ax in axes[:2]:
            ax.tick_params(labelbottom=False)
        pages.append(p)
    lines = _event_lines(run)
    chunks = [lines[i:i + EVENT_LINES_PER_PAGE]
              for i in range(0, len(lines), EVENT_LINES_PER_PAGE)]
    first_log = len(pages)
    for k, chunk in enumerate(chunks, start=1):
        p = page(f"{first_log + k}  event log ({k} of {len(chunks)}): run time (s), kind, "
                 "message")
        for i, (line, colour) in enumerate(chunk):
            p.fig.text(0.06, p.top - 0.01 - i * 0.0108, line, fontsize=6.8, va="top",
                       family="monospace", color=colour)
        pages.append(p)
    for i, pg in enumerate(pages, start=1):
        pg.footer.set_text(f"page {i} of {len(pages)}")
    return pages


def render_report(
    run_dir: str | os.PathLike[str], *, out_dir: str | os.PathLike[str] | None = None,
    png: bool = False, units: AccelUnit = G_UNIT,
) -> ReportResult:
    """Write the test report (``report.pdf``), ``summary.txt`` and, if asked, PNG plots.

    Parameters
    ----------
    run_dir : path
        A run folder (complete, or from a run killed midway).
    out_dir : path, optional
        Where to write; default ``<run_dir>/report``.
    png : bool
        Also write the plots as PNG files (``control``, ``drive``, ``frf``, ``convergence``,
        ``level``).
    units : AccelUnit
        Display unit of acceleration (g or m/s²; the record holds g).

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
    figure_cls, canvas_cls, pdf_pages = _import_matplotlib()
    out = Path(out_dir) if out_dir is not None else run.root / "report"
    made = [p for p in (out, *out.parents) if not p.exists()]
    try:
        out.mkdir(parents=True, exist_ok=True)
    except (FileExistsError, NotADirectoryError):
        raise ConfigError(f"{out}: report folder is a file, expected a folder") from None
    except OSError as exc:
        raise ConfigError(f"{out}: cannot make report folder ({exc.strerror})") from None
    pages = _build_pages(run, figure_cls, units)
    key, words, _, _ = _verdict(run)
    meta = {
        "Title": f"liveshape test report: {run.meta.get('name', run.root.name)}",
        "Subject": f"{words}; status {run.status}",
        "Keywords": f"verdict={key} status={run.status} pages={len(pages)}",
        "Creator": f"liveshape {run.meta.get('software_version') or ''}".strip(),
    }

    def write_pdf(fh: Any) -> None:
        pdf = pdf_pages(fh, metadata=meta)
        for pg in pages:
            pdf.savefig(pg.fig)
        # closed only when every page was written: after a failed write (a full disk) its
        # close would fail again inside zlib; the temporary file is removed by atomic_write
        pdf.close()

    pdf_path = out / PDF_NAME
    summary_path = out / "summary.txt"
    pngs: dict[str, Path] = {}
    written: list[Path] = []
    try:
        atomic_write(pdf_path, write_pdf)
        written.append(pdf_path)
        if png:
            _write_pngs(run, out, figure_cls, canvas_cls, pngs, units)
        text = summary_text(run, units)
        text += f"report:          {pdf_path.name} ({len(pages)} pages)\n"
        if pngs:
            text += "plots:           " + ", ".join(p.name for p in pngs.values()) + "\n"
        atomic_write_text(summary_path, text)
    except OSError as exc:
        # Nothing half-made stays behind: the files written so far and the folders made here.
        for path in (*written, *pngs.values()):
            path.unlink(missing_ok=True)
        for folder in made:
            try:
                folder.rmdir()
            except OSError:
                pass
        raise ConfigError(f"{out}: cannot write the report ({exc.strerror or exc})") from None
    return ReportResult(run_dir=run.root, out_dir=out, pdf_path=pdf_path,
                        pages=tuple(pg.title for pg in pages), pngs=pngs,
                        summary_path=summary_path, summary=text)


def _write_pngs(run: RunData, out: Path, figure_cls: Any, canvas_cls: Any,
                pngs: dict[str, Path], units_of: AccelUnit = G_UNIT) -> dict[str, Path]:
    """Write the PNG plots into ``out``, adding each to ``pngs`` as soon as it exists."""
    tol, _ = _tolerance(run)
    ending = _ending(run)

    def save(name: str, size: tuple[float, float], draw: Any, n_axes: int = 1) -> None:
        fig = figure_cls(figsize=size)
        fig.subplots_adjust(left=0.1, right=0.97, bottom=0.6 / size[1], top=1 - 0.45 / size[1],
                            hspace=0.15)
        axes = [fig.add_subplot(n_axes, 1, i + 1) for i in range(n_axes)]
        if run.updates.n == 0 and name != "level":
            _no_data(axes[0], "no control update was recorded")
        else:
            draw(axes)
        if ending.word:
            fig.suptitle(ending.banner[:110], fontsize=8, color="#c62828", y=0.995)
        canvas_cls(fig)

        def write(fh: Any) -> None:
            fig.savefig(fh, dpi=110, format="png")

        path = out / f"{name}.png"
        atomic_write(path, write)
        pngs[name] = path

    asd_units, _, frf_units = _unit_labels(run, units_of)
    d = _in_units(decision_spectrum(run, tol), units_of)
    save("control", (8.0, 5.0), lambda a: draw_control(a[0], d, asd_units))
    save("drive", (8.0, 4.0), lambda a: draw_drive(a[0], run))
    save("frf", (8.0, 6.5), lambda a: draw_frf(a, run, frf_units, units_of.per_g), 3)
    save("convergence", (8.0, 7.0), lambda a: (draw_line_error(a[0], run, tol),
                                                draw_rms_error(a[1], run, tol)), 2)
    save("level", (8.0, 3.5), lambda a: draw_level(a[0], run, ending))
    if run.full_level and _input_names(run.full_level):
        save("inputs", (8.0, 7.0), lambda a: draw_inputs(a, run, asd_units, units_of.per_g), 3)
    return pngs
