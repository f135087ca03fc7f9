"""The terminal views: the one module that imports :mod:`rich`.

Every view is a pure function from frozen data (a controller snapshot, a profile, a result
mapping) to a rich renderable; nothing here reads the clock or the hardware except
:class:`LiveView`, which only paces redraws. Tests render the views into a ``StringIO`` console.

The spectrum plot is a character grid of our own: log-frequency x axis, ASD in dB re 1 g²/Hz on
the y axis (labelled in g²/Hz), the target as a line, alarm and abort limits as marks above and
below it, and one control mark per column coloured by how far it is from the target.
"""

from __future__ import annotations

import dataclasses
import math
import re
import time
from collections.abc import Callable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from typing import IO, Any

import numpy as np
from rich.console import Console, Group, RenderableType
from rich.live import Live
from rich.panel import Panel
from rich.progress import BarColumn, Progress, TaskProgressColumn, TextColumn, TimeRemainingColumn
from rich.table import Table
from rich.text import Text

__all__ = [
    "LiveView",
    "PALETTE",
    "check_table",
    "dashboard",
    "make_console",
    "print_error",
    "progress_bar",
    "run_summary",
    "safety_notice",
    "spectrum_plot",
    "synth_summary",
]


@dataclass(frozen=True)
class Palette:
    """The few colours the views use (rich style names)."""

    title: str = "bold grey93"
    label: str = "grey62"
    value: str = "grey93"
    dim: str = "grey42"
    target: str = "grey85"
    control: str = "steel_blue1"
    ok: str = "dark_sea_green3"
    alarm: str = "light_goldenrod3"
    abort: str = "indian_red1"
    border: str = "grey35"


PALETTE = Palette()

_STAGE_WORDS = {
    "connect": "connect", "identify": "identify", "equalize": "equalize",
    "full_level": "full level", "ramp_down": "ramp down", "done": "done",
}
_DASH = "—"
_DB10 = 10.0 / math.log(10.0)


# --------------------------------------------------------------------------------------------
# Small helpers


def _get(obj: Any, *names: str, default: Any = None) -> Any:
    """First attribute (or mapping key) of ``names`` that ``obj`` has and is not None."""
    for name in names:
        value = obj.get(name) if isinstance(obj, Mapping) else getattr(obj, name, None)
        if value is not None:
            return value
    return default


def _num(x: Any) -> float | None:
    try:
        v = float(x)
    except (TypeError, ValueError):
        return None
    return v if math.isfinite(v) else None


def _fmt(x: Any, spec: str = ".3g", unit: str = "") -> str:
    v = _num(x)
    if v is None:
        return _DASH
    return f"{v:{spec}}{' ' + unit if unit else ''}"


def _fmt_db(x: Any, spec: str = "+.2f") -> str:
    return _fmt(x, spec, "dB")


def _fmt_time(seconds: Any) -> str:
    v = _num(seconds)
    if v is None:
        return _DASH
    v = max(v, 0.0)
    m, s = divmod(int(round(v)), 60)
    h, m = divmod(m, 60)
    return f"{h}:{m:02d}:{s:02d}" if h else f"{m}:{s:02d}"


def _count(value: Any) -> int | None:
    """A count of lines; negative (the controller's 'none yet') and missing give None."""
    v = _num(value)
    return None if v is None or v < 0 else int(v)


def _limit_style(value: Any, limit: Any) -> str:
    v, lim = _num(value), _num(limit)
    if v is None or lim is None or lim <= 0:
        return PALETTE.value
    if v > lim:
        return PALETTE.abort
    return PALETTE.alarm if v > 0.8 * lim else PALETTE.ok


def _kv_table(title: str | None = None) -> Table:
    table = Table(title=title, title_style=PALETTE.title, title_justify="left", box=None,
                  show_header=False, pad_edge=False, padding=(0, 2, 0, 0))
    table.add_column(style=PALETTE.label, no_wrap=True)
    table.add_column(style=PALETTE.value)
    return table


_UNITS = (
    ("_g2_hz", "g²/Hz"), ("_fs2_hz", "FS²/Hz"), ("_db_oct", "dB/oct"), ("_db_s", "dB/s"),
    ("_m_s", "m/s"), ("_hz", "Hz"), ("_db", "dB"), ("_fs", "FS"), ("_g", "g"), ("_s", "s"),
    ("_m", "m"), ("_v", "V"), ("_a", "A"), ("_w", "W"), ("_ohm", "Ω"), ("_k", "K"),
)


def _label_and_unit(key: str) -> tuple[str, str]:
    for suffix, unit in _UNITS:
        if key.endswith(suffix) and len(key) > len(suffix):
            return key[: -len(suffix)].replace("_", " "), unit
    return key.replace("_", " "), ""


def _fmt_value(value: Any, unit: str = "") -> str:
    if value is None:
        return _DASH
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, (int, np.integer)):
        return f"{int(value)}{' ' + unit if unit else ''}"
    if isinstance(value, (float, np.floating)):
        v = _num(value)
        spec = ".0f" if v is not None and 1e4 <= abs(v) < 1e9 else ".4g"
        return _fmt(value, spec, unit)
    if isinstance(value, (list, tuple)) and all(_num(v) is not None for v in value):
        return ", ".join(_fmt(v, ".4g") for v in value) + (f" {unit}" if unit else "")
    return str(value)


def _add_mapping_rows(table: Table, data: Mapping[str, Any], skip: Sequence[str] = ()) -> None:
    for key, value in data.items():
        if key in skip:
            continue
        if isinstance(value, Mapping):
            _add_mapping_rows(table, {f"{key} {k}": v for k, v in value.items()})
            continue
        label, unit = _label_and_unit(str(key))
        table.add_row(label, _fmt_value(value, unit))


# --------------------------------------------------------------------------------------------
# The spectrum plot


def _nice_ticks(lo: float, hi: float) -> list[float]:
    ticks = []
    for decade in range(math.floor(math.log10(lo)) - 1, math.ceil(math.log10(hi)) + 1):
        for m in (1, 2, 5):
            f = m * 10.0**decade
            if lo <= f <= hi:
                ticks.append(f)
    return ticks


def _f_label(f: float) -> str:
    return f"{f / 1000:g}k" if f >= 1000 else f"{f:g}"


def _as_lines(value: Any, n: int) -> np.ndarray:
    arr = np.asarray(value if value is not None else np.nan, dtype=float)
    return np.broadcast_to(arr, (n,)) if arr.ndim == 0 or arr.size == 1 else arr.reshape(n)


def _span(values: np.ndarray) -> str:
    """``3`` for equal values, ``3…4.5`` for a range (limits that vary by band)."""
    ok = values[np.isfinite(values)]
    if ok.size == 0:
        return _DASH
    lo, hi = float(ok.min()), float(ok.max())
    return f"{lo:g}" if lo == hi else f"{lo:g}…{hi:g}"


def spectrum_plot(
    f_hz: Any,
    control_psd: Any,
    target_psd: Any,
    alarm_db: Any = 3.0,
    abort_db: Any = 6.0,
    *,
    width: int = 72,
    height: int = 15,
) -> Text:
    """Character plot of control against target with the alarm and abort limits.

    Parameters
    ----------
    f_hz : array
        Frequency lines, Hz. Only lines where the target is > 0 are drawn (the test band).
    control_psd, target_psd : array
        Control estimate and target on those lines, g²/Hz (control may be None).
    alarm_db, abort_db : float or array
        Symmetric limits about the target in dB, one value or one per line.
    width, height : int
        Plot area in characters (axis labels come on top of this).

    Returns
    -------
    rich.text.Text
        Rows of the plot: ``─`` target, ``·`` alarm limits, ``:`` abort limits, ``●`` control
        (``▲``/``▼`` when off the plot), x axis in Hz (log), y axis in g²/Hz.
    """
    f = np.asarray(f_hz, dtype=float).ravel()
    t = np.asarray(target_psd, dtype=float).ravel() if target_psd is not None else np.zeros(0)
    if f.size == 0 or t.shape != f.shape:
        return Text("no spectrum yet", style=PALETTE.dim)
    band = np.isfinite(t) & (t > 0) & (f > 0)
    if not band.any():
        return Text("no target lines in band", style=PALETTE.dim)
    width, height = max(int(width), 16), max(int(height), 5)
    c = _as_lines(control_psd, f.size)[band]
    al = _as_lines(alarm_db, f.size)[band]
    ab = _as_lines(abort_db, f.size)[band]
    fb, tb = f[band], t[band]
    lf = np.log10(fb)
    x0, x1 = float(lf.min()), float(lf.max())
    if x1 - x0 < 1e-9:
        x0, x1 = x0 - 0.5, x1 + 0.5
    centres = x0 + (np.arange(width) + 0.5) / width * (x1 - x0)
    t_db = _DB10 * np.log(tb)
    col_t = np.interp(centres, lf, t_db)  # the target is straight on log-log axes
    col_al = np.interp(centres, lf, al)
    col_ab = np.interp(centres, lf, ab)
    cols = np.clip(((lf - x0) / (x1 - x0) * width).astype(int), 0, width - 1)
    col_c = np.full(width, np.nan)
    with np.errstate(divide="ignore", invalid="ignore"):
        for j in np.unique(cols):
            vals = c[(cols == j) & np.isfinite(c)]
            if vals.size:  # mean power of the lines in the column
                m = float(np.mean(vals))
                col_c[j] = _DB10 * math.log(m) if m > 0 else -np.inf
    y_hi = float(np.max(col_t + col_ab)) + 2.0
    y_lo = float(np.min(col_t - col_ab)) - 2.0

    def row(y: float) -> int:
        return int(round((y_hi - y) / (y_hi - y_lo) * (height - 1)))

    grid = [[(" ", PALETTE.dim) for _ in range(width)] for _ in range(height)]

    def put(r: int, j: int, ch: str, style: str) -> None:
        if 0 <= r < height:
            grid[r][j] = (ch, style)

    for j in range(width):
        for sign in (1, -1):
            put(row(col_t[j] + sign * col_ab[j]), j, ":", PALETTE.abort)
            put(row(col_t[j] + sign * col_al[j]), j, "·", PALETTE.alarm)
        put(row(col_t[j]), j, "─", PALETTE.target)
        y = col_c[j]
        if np.isnan(y):
            continue
        dev = y - col_t[j]
        style = (PALETTE.abort if abs(dev) > col_ab[j] else
                 PALETTE.alarm if abs(dev) > col_al[j] else PALETTE.control)
        r = row(y) if np.isfinite(y) else height
        ch = "▲" if r < 0 else "▼" if r >= height else "●"
        put(min(max(r, 0), height - 1), j, ch, style)

    label_w = 8
    labels: dict[int, str] = {}
    for v in sorted(_nice_ticks(10 ** (y_lo / 10), 10 ** (y_hi / 10)), reverse=True):
        r = row(_DB10 * math.log(v))
        if all(abs(r - other) > 1 for other in labels):
            labels[r] = f"{v:g}"
    text = Text()
    for r in range(height):
        text.append(f"{labels.get(r, ''):>{label_w - 1}} ", style=PALETTE.label)
        text.append("│", style=PALETTE.border)
        run_chars, run_style = "", None
        for ch, style in grid[r]:  # one span per run of equal style keeps rendering cheap
            if ch == " ":
                style = run_style if run_style is not None else style
            if style != run_style and run_chars:
                text.append(run_chars, style=run_style)
                run_chars = ""
            run_chars += ch
            run_style = style
        text.append(run_chars + "\n", style=run_style)
    text.append(" " * label_w + "└" + "─" * width + "\n", style=PALETTE.border)
    axis = [" "] * (width + 8)
    for ftick in _nice_ticks(10**x0, 10**x1):
        j = int((math.log10(ftick) - x0) / (x1 - x0) * width)
        lab = _f_label(ftick)
        start = min(max(j - len(lab) // 2, 0), width + 8 - len(lab))
        if all(ch == " " for ch in axis[max(start - 1, 0):start + len(lab) + 1]):
            axis[start:start + len(lab)] = list(lab)
    text.append(" " * (label_w + 1) + "".join(axis).rstrip() + "  Hz\n", style=PALETTE.label)
    legend = Text(" " * (label_w + 1))
    legend.append("─ target  ", style=PALETTE.target)
    legend.append(f"· alarm ±{_span(al)} dB  ", style=PALETTE.alarm)
    legend.append(f": abort ±{_span(ab)} dB  ", style=PALETTE.abort)
    legend.append("● control  ", style=PALETTE.control)
    legend.append("y: g²/Hz", style=PALETTE.label)
    text.append_text(legend)
    return text


# --------------------------------------------------------------------------------------------
# The live dashboard


def _chi2_band(snapshot: Any, dof: float | None) -> tuple[float | None, float | None]:
    band = _get(snapshot, "chi2_band_db", "chi2_db")
    if band is not None and len(band) == 2:
        return _num(band[0]), _num(band[1])
    lo, hi = _num(_get(snapshot, "chi2_lo_db")), _num(_get(snapshot, "chi2_hi_db"))
    if (lo is not None and hi is not None) or dof is None or dof <= 0:
        return lo, hi
    from liveshape.spectra import chi2_interval_db

    lo, hi = chi2_interval_db(dof, 0.90)
    return float(lo), float(hi)


def _header(snapshot: Any) -> Text:
    stage = str(_get(snapshot, "stage", default="?"))
    text = Text()
    text.append("liveshape  ", style=PALETTE.title)
    text.append(_STAGE_WORDS.get(stage, stage), style=f"bold {PALETTE.control}")
    level = _get(snapshot, "level_db")
    if level is not None:
        text.append("   level ", style=PALETTE.label)
        text.append(_fmt(level, "+.1f", "dB"), style=PALETTE.value)
    step, n_steps = _get(snapshot, "step_index", "step"), _get(snapshot, "n_steps", "steps")
    if step is not None:
        text.append("   step ", style=PALETTE.label)
        shown = int(step) + 1 if _get(snapshot, "step_index") is not None else int(step)
        text.append(f"{shown}" + (f" of {int(n_steps)}" if n_steps is not None else ""),
                    style=PALETTE.value)
    for label, names in (("elapsed", ("elapsed_s", "t_s")), ("remaining", ("remaining_s",)),
                         ("at full level", ("time_at_full_level_s",))):
        text.append(f"   {label} ", style=PALETTE.label)
        text.append(_fmt_time(_get(snapshot, *names)), style=PALETTE.value)
    status = _get(snapshot, "status")
    if status:
        text.append(f"   {status}", style=PALETTE.dim)
    return text


def _control_table(snapshot: Any) -> Table:
    table = _kv_table("control")
    c, t = _num(_get(snapshot, "control_grms_g")), _num(_get(snapshot, "target_grms_g"))
    err = _DB10 * math.log(c**2 / t**2) if c and t else None
    table.add_row("grms control / target",
                  f"{_fmt(c, '.3f')} / {_fmt(t, '.3f')} g  ({_fmt_db(err)})")
    table.add_row("rms error", _fmt_db(_get(snapshot, "rms_error_db")))
    table.add_row("line deviation max / min", f"{_fmt_db(_get(snapshot, 'max_dev_db'))} / "
                  f"{_fmt_db(_get(snapshot, 'min_dev_db'))}")
    n_al = _count(_get(snapshot, "lines_outside_alarm"))
    n_ab = _count(_get(snapshot, "lines_outside_abort"))
    out = Text()
    out.append(f"{_fmt_value(n_al)} alarm", style=PALETTE.alarm if n_al else PALETTE.ok)
    out.append("  ")
    out.append(f"{_fmt_value(n_ab)} abort", style=PALETTE.abort if n_ab else PALETTE.ok)
    table.add_row("lines outside", out)
    dof = _num(_get(snapshot, "dof"))
    lo, hi = _chi2_band(snapshot, dof)
    table.add_row("DOF", f"{_fmt(dof, '.0f')}   90 % χ² band {_fmt(lo, '+.2f')} / "
                  f"{_fmt(hi, '+.2f')} dB")
    table.add_row("updates", _fmt_value(_get(snapshot, "updates", "n_updates")))
    return table


def _drive_table(snapshot: Any) -> Table:
    table = _kv_table("drive")
    rows = (("rms", "drive_rms_fs", ("drive_rms_limit_fs", "drive_rms_max_fs")),
            ("peak", "drive_peak_fs", ("drive_peak_limit_fs", "drive_peak_max_fs")))
    for label, key, lim_keys in rows:
        value, limit = _get(snapshot, key), _get(snapshot, *lim_keys)
        v, lim = _num(value), _num(limit)
        frac = f"  ({100 * v / lim:.0f} %)" if v is not None and lim else ""
        table.add_row(label, Text(f"{_fmt(value, '.3f')} of {_fmt(limit, '.3f')} FS{frac}",
                                  style=_limit_style(value, limit)))
    gain = _get(snapshot, "gain_db")
    if gain is not None:
        table.add_row("gain", _fmt(gain, "+.1f", "dB"))
    delay = _get(snapshot, "loop_delay_samples")
    if delay is not None:
        table.add_row("loop delay", f"{int(delay)} samples")
    trip = _get(snapshot, "trip")
    if trip:
        rule, message = _get(trip, "rule"), _get(trip, "message", default=trip)
        table.add_row("trip", Text(f"{rule}: {message}" if rule else str(message),
                                   style=PALETTE.abort))
    return table


def _events_table(events: Sequence[Any], n: int = 6) -> Table:
    table = Table(title="events", title_style=PALETTE.title, title_justify="left", box=None,
                  show_header=False, pad_edge=False, padding=(0, 2, 0, 0))
    table.add_column(style=PALETTE.label, justify="right", no_wrap=True)
    table.add_column(style=PALETTE.dim, no_wrap=True)
    table.add_column(style=PALETTE.value)
    for ev in list(events)[-n:]:
        kind = str(_get(ev, "kind", default=""))
        style = (PALETTE.abort if kind in ("abort", "trip", "crash") else
                 PALETTE.alarm if kind == "alarm" else PALETTE.value)
        table.add_row(_fmt(_get(ev, "t_s"), ".1f", "s"), kind,
                      Text(str(_get(ev, "message", default="")), style=style))
    if not table.rows:
        table.add_row("", "", Text("none yet", style=PALETTE.dim))
    return table


def dashboard(snapshot: Any, *, plot_width: int = 72, plot_height: int = 15) -> RenderableType:
    """The live view of a run, from a frozen controller snapshot.

    Shows the stage, level step, elapsed and remaining time, control against target grms,
    drive rms and peak against their limits, the line deviations and counts outside the alarm
    and abort limits, the DOF with the 90 % χ² band it implies (Bendat & Piersol), the spectrum
    plot (:func:`spectrum_plot`) and the latest events.
    """
    tables = Table.grid(padding=(0, 4))
    tables.add_column()
    tables.add_column()
    tables.add_row(_control_table(snapshot), _drive_table(snapshot))
    plot = spectrum_plot(
        _get(snapshot, "f_hz", default=()), _get(snapshot, "control_psd"),
        _get(snapshot, "target_psd"), _get(snapshot, "alarm_db", default=np.nan),
        _get(snapshot, "abort_db", default=np.nan), width=plot_width, height=plot_height,
    )
    events = _get(snapshot, "events", "recent_events", default=())
    body = Group(_header(snapshot), Text(""), tables, Text(""), plot, Text(""),
                 _events_table(events))
    return Panel(body, border_style=PALETTE.border, padding=(0, 1))


class LiveView:
    """A live terminal view that the shell feeds with snapshots.

    ``update(snapshot)`` rebuilds and redraws the dashboard at most ``refresh_hz`` times a
    second (calls in between are dropped, the last one is kept for :meth:`flush`). Drawing
    happens in the caller's thread, only when a snapshot is taken (no refresh thread): a full
    redraw costs a few tens of milliseconds of pure Python, so keep ``refresh_hz`` at 4-10.
    Use as a context manager.
    """

    def __init__(
        self, console: Console | None = None, *, refresh_hz: float = 4.0,
        clock: Callable[[], float] = time.monotonic, transient: bool = False,
    ) -> None:
        self.refresh_hz = float(refresh_hz)
        self._clock = clock
        self._last_build = -math.inf
        self._pending: Any = None
        self._live = Live(Text(""), console=console, refresh_per_second=self.refresh_hz,
                          transient=transient, auto_refresh=False)
        self.builds = 0

    def update(self, snapshot: Any, *, force: bool = False) -> bool:
        """Offer a snapshot; returns True when the view was rebuilt from it."""
        now = self._clock()
        if not force and now - self._last_build < 1.0 / self.refresh_hz:
            self._pending = snapshot
            return False
        self._pending = None
        self._last_build = now
        width = min(max(self._live.console.width - 14, 40), 110)
        self._live.update(dashboard(snapshot, plot_width=width), refresh=True)
        self.builds += 1
        return True

    def flush(self) -> None:
        """Show the last snapshot that was dropped by the rate limit, if any."""
        if self._pending is not None:
            self.update(self._pending, force=True)

    def __enter__(self) -> LiveView:
        self._live.start()
        return self

    def __exit__(self, *exc: object) -> None:
        try:
            self.flush()
        finally:
            self._live.stop()


# --------------------------------------------------------------------------------------------
# One-shot views for the command line


def make_console(file: IO[str] | None = None, width: int | None = None, *,
                 stderr: bool = False) -> Console:
    """A console writing to ``file`` (default stdout, or stderr), no automatic highlighting."""
    return Console(file=file, width=width, stderr=stderr and file is None, highlight=False)


def print_error(console: Console, message: str) -> None:
    """Print one error line: ``liveshape: <message>`` (message shown as is, no markup)."""
    line = Text("liveshape: ", style=f"bold {PALETTE.abort}")
    line.append(str(message).splitlines()[0] if message else "error")
    console.print(line, soft_wrap=True)


def safety_notice() -> RenderableType:
    """Cautions shown before a run drives real hardware."""
    items = (
        "Loudspeaker rigs can be loud: wear hearing protection near them.",
        "Fasten the payload and the fixture; nothing loose on the moving part.",
        "Turn the amplifier gain to its minimum before the start; raise it only when asked.",
        "Keep hands, cables and tools clear of the moving parts while the drive is on.",
        "To stop: press Ctrl-C once; the drive ramps down. Keep the amplifier within reach.",
        "Follow your lab's safety rules and work under qualified supervision.",
    )
    text = Text()
    for i, item in enumerate(items):
        text.append("• ", style=PALETTE.alarm)
        text.append(item + ("\n" if i < len(items) - 1 else ""), style=PALETTE.value)
    return Panel(text, title="before you start", title_align="left",
                 border_style=PALETTE.alarm, padding=(0, 1))


@contextmanager
def progress_bar(console: Console | str | None = None, description: str = "working", *,
                 transient: bool = True) -> Iterator[Callable[[float], None]]:
    """A progress bar; yields ``progress(fraction)`` taking 0..1 (values are clipped).

    ``progress_bar(console, "writing drive.wav")``; a string as first argument is taken as the
    description (default console).
    """
    if isinstance(console, str):
        console, description = None, console
    columns = (TextColumn("{task.description}", style=PALETTE.label),
               BarColumn(complete_style=PALETTE.control, finished_style=PALETTE.ok),
               TaskProgressColumn(), TimeRemainingColumn())
    with Progress(*columns, console=console, transient=transient) as bar:
        task = bar.add_task(description, total=1.0)

        def progress(fraction: float) -> None:
            v = _num(fraction)
            bar.update(task, completed=min(max(v if v is not None else 0.0, 0.0), 1.0))

        yield progress


_STATUS_STYLE = {"completed": "ok", "aborted": "abort", "stopped": "alarm", "crashed": "abort"}


def _as_mapping(obj: Any) -> dict[str, Any]:
    if isinstance(obj, Mapping):
        return dict(obj)
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        return dataclasses.asdict(obj)
    to_dict = getattr(obj, "to_dict", None)
    if callable(to_dict):
        return dict(to_dict())
    raise TypeError(f"expected a mapping or a dataclass, got {type(obj).__name__}")


def run_summary(result: Mapping[str, Any] | Any) -> RenderableType:
    """The result of a run: status, abort reason, grms, error figures, DOF, time at level.

    ``result`` is a mapping (``summary.json``) or the controller's result dataclass.
    """
    result = _as_mapping(result)
    status = str(result.get("status", "unknown"))
    table = _kv_table()
    style = getattr(PALETTE, _STATUS_STYLE.get(status, "value"))
    table.add_row("status", Text(status, style=style))
    trip = result.get("trip")
    if isinstance(trip, Mapping) and trip.get("rule"):
        table.add_row("abort rule", Text(str(trip["rule"]), style=PALETTE.abort))
    if result.get("abort_reason"):
        table.add_row("abort reason", Text(str(result["abort_reason"]), style=PALETTE.abort))
    table.add_row("grms control / target", f"{_fmt(result.get('control_grms_g'), '.3f')} / "
                  f"{_fmt(result.get('target_grms_g'), '.3f')} g")
    table.add_row("final rms error", _fmt_db(result.get("final_rms_error_db")))
    table.add_row("final max line deviation", _fmt_db(result.get("final_max_dev_db")))
    table.add_row("lines outside alarm / abort",
                  f"{_fmt_value(_count(result.get('final_lines_outside_alarm')))} / "
                  f"{_fmt_value(_count(result.get('final_lines_outside_abort')))}")
    table.add_row("updates to tolerance", _fmt_value(result.get("updates_to_tolerance")))
    table.add_row("DOF", _fmt(result.get("dof"), ".0f"))
    table.add_row("time at full level", _fmt(result.get("time_at_full_level_s"), ".1f", "s"))
    shown = {"status", "abort_reason", "control_grms_g", "target_grms_g", "final_rms_error_db",
             "final_max_dev_db", "final_lines_outside_alarm", "final_lines_outside_abort",
             "updates_to_tolerance", "dof", "time_at_full_level_s", "record", "trip"}
    _add_mapping_rows(table, result, skip=tuple(shown))
    return Panel(table, title="run result", title_align="left", border_style=PALETTE.border)


def synth_summary(result: Mapping[str, Any] | Any) -> RenderableType:
    """The result of ``liveshape synth``: every figure by name, units from the key suffixes."""
    table = _kv_table()
    _add_mapping_rows(table, _as_mapping(result))
    return Panel(table, title="drive file", title_align="left", border_style=PALETTE.border)


_BUDGET_KEY = re.compile(r"^(?P<name>.+)_(?P<what>rms|peak_3sigma|limit)_(?P<unit>[a-z0-9]+)$")
_SHOWN_UNITS = {"fs": ("FS", 1.0), "v": ("V", 1.0), "a": ("A", 1.0), "m": ("mm", 1e3)}


def _feasibility_parts(rows: dict[str, Any]) -> list[RenderableType]:
    """Budgets (``<name>_rms_<unit>``, ``_peak_3sigma_``, ``_limit_``, ``<name>_headroom_db``)
    as one table with a verdict per budget; every other entry as a name/value row."""
    budgets: dict[str, dict[str, Any]] = {}
    for key, value in rows.items():
        m = _BUDGET_KEY.match(key)
        if m and m["unit"] in _SHOWN_UNITS:
            budgets.setdefault(m["name"], {"unit": m["unit"]})[m["what"]] = value
    parts: list[RenderableType] = []
    used: set[str] = set()
    if budgets:
        table = Table(title="rig budgets (3σ peaks)", title_style=PALETTE.title,
                      title_justify="left", box=None, header_style=PALETTE.label,
                      pad_edge=False, padding=(0, 2, 0, 0))
        for name in ("", "rms", "3σ peak", "limit", "headroom", ""):
            table.add_column(name, justify="left" if not name else "right")
        for name, b in budgets.items():
            unit, scale = _SHOWN_UNITS[b["unit"]]
            headroom = _num(rows.get(f"{name}_headroom_db"))
            used |= {f"{name}_{w}_{b['unit']}" for w in ("rms", "peak_3sigma", "limit")}
            used.add(f"{name}_headroom_db")

            def scaled(x: Any, unit: str = unit, scale: float = scale) -> str:
                v = _num(x)
                return _DASH if v is None else f"{v * scale:.3g} {unit}"

            verdict = (Text("no limit", style=PALETTE.dim) if headroom is None else
                       Text("over", style=PALETTE.abort) if headroom < 0 else
                       Text("tight", style=PALETTE.alarm) if headroom < 3.0 else
                       Text("ok", style=PALETTE.ok))
            table.add_row(name.replace("_", " "), scaled(b.get("rms")),
                          scaled(b.get("peak_3sigma")), scaled(b.get("limit")),
                          _fmt(headroom, "+.1f", "dB"), verdict)
        parts.append(table)
    other = _kv_table("rig feasibility")
    feasible = rows.get("feasible")
    if isinstance(feasible, bool):
        other.add_row("feasible", Text("yes" if feasible else "no",
                                       style=PALETTE.ok if feasible else PALETTE.abort))
        used.add("feasible")
    _add_mapping_rows(other, {k: v for k, v in rows.items() if k not in used})
    return [other, Text(""), *parts] if parts else [other]


def check_table(profile: Any, tolerance: Any = None, control: Any = None,
                feasibility: Any = None) -> RenderableType:
    """What ``liveshape check`` shows about a test before it runs.

    Band, grms, velocity and displacement rms, 3σ peak-to-peak displacement, each segment's
    slope and mean-square area, the tolerance limits, the lines in band and the seconds of data
    the target DOF needs (linear Welch average of Hann segments at 50 % overlap, Welch 1967),
    and the rig's feasibility rows when given.

    Parameters
    ----------
    profile : Profile or mapping
        The target profile, or a whole check report mapping (as made by
        :func:`liveshape.checks.check_report`: ``grms_g``, ``segments``, ``tolerance``,
        ``control``, optional ``rig``), in which case the other arguments may be omitted.
    tolerance : Tolerance, optional
    control : ControlSettings, optional
        Needs ``fs_hz``, ``frame_length``, ``target_dof`` (and ``averaging`` to show it); with
        the profile and tolerance it makes the report through
        :func:`liveshape.checks.report_from_parts`.
    feasibility : object with ``to_dict()`` or mapping, optional
        Rig feasibility rows (shown by name, units from the key suffixes).
    """
    if isinstance(profile, Mapping):
        report = dict(profile)
        if feasibility is not None:
            to_dict = getattr(feasibility, "to_dict", None)
            report["rig"] = dict(to_dict() if callable(to_dict) else feasibility)
    else:
        if tolerance is None or control is None:
            raise TypeError("check_table needs tolerance and control with a profile")
        from liveshape.checks import report_from_parts

        report = report_from_parts(profile, tolerance, control, feasibility)
    overall = _kv_table("profile")
    overall.add_row("band", f"{_fmt(report.get('f_min_hz'), 'g')} – "
                    f"{_fmt(report.get('f_max_hz'), 'g')} Hz")
    overall.add_row("grms", _fmt(report.get("grms_g"), ".3f", "g"))
    mm = 1e3
    for label, key, unit in (("velocity rms", "velocity_rms_m_s", "mm/s"),
                             ("displacement rms", "displacement_rms_m", "mm"),
                             ("displacement 3σ peak-to-peak", "displacement_pp_3sigma_m", "mm")):
        v = _num(report.get(key))
        overall.add_row(label, _fmt(None if v is None else v * mm, ".3g", unit))

    segs = Table(title="segments", title_style=PALETTE.title, title_justify="left",
                 box=None, header_style=PALETTE.label, pad_edge=False, padding=(0, 2, 0, 0))
    for name in ("from Hz", "to Hz", "ASD g²/Hz", "slope dB/oct", "area g²", "share"):
        segs.add_column(name, justify="right")
    for seg in report.get("segments", ()):
        share = _num(seg.get("share_of_ms"))
        segs.add_row(_fmt(seg.get("f_lo_hz"), "g"), _fmt(seg.get("f_hi_hz"), "g"),
                     f"{_fmt(seg.get('asd_lo_g2_hz'))} → {_fmt(seg.get('asd_hi_g2_hz'))}",
                     _fmt(seg.get("slope_db_oct"), "+.2f"), _fmt(seg.get("area_g2"), ".4g"),
                     _fmt(None if share is None else 100 * share, ".1f", "%"))

    tol_data = report.get("tolerance") or {}
    tol = _kv_table("tolerance")
    tol.add_row("per line alarm / abort", f"±{_fmt(tol_data.get('alarm_db'), 'g')} / "
                f"±{_fmt(tol_data.get('abort_db'), 'g')} dB")
    tol.add_row("rms alarm / abort", f"±{_fmt(tol_data.get('rms_alarm_db'), 'g')} / "
                f"±{_fmt(tol_data.get('rms_abort_db'), 'g')} dB")
    for b in tol_data.get("bands", ()):
        tol.add_row(f"band {_fmt(b.get('f_lo_hz'), 'g')} – {_fmt(b.get('f_hi_hz'), 'g')} Hz",
                    f"±{_fmt(b.get('alarm_db'), 'g')} / ±{_fmt(b.get('abort_db'), 'g')} dB")

    c = report.get("control") or {}
    ctl = _kv_table("control")
    n = c.get("frame_length")
    ctl.add_row("lines", f"{_fmt_value(int(n) // 2 + 1 if n else None)} of "
                f"{_fmt(c.get('df_hz'), '.4g')} Hz, {_fmt_value(c.get('lines_in_band'))} in band "
                f"(frame {_fmt_value(n)} at {_fmt(c.get('fs_hz'), 'g')} Hz)")
    averaging = f" ({c['averaging']} averaging)" if c.get("averaging") else ""
    ctl.add_row("target DOF", f"{_fmt(c.get('target_dof'), '.0f')}{averaging}")
    if c.get("seconds_for_target_dof") is not None:
        ctl.add_row("data for target DOF",
                    f"{_fmt(c.get('seconds_for_target_dof'), '.2f', 's')} "
                    f"({_fmt_value(c.get('segments_for_target_dof'))} segments, Hann 50 %)")

    parts: list[RenderableType] = [overall, Text(""), segs, Text(""), tol, Text(""), ctl]
    if report.get("rig") is not None:
        parts += [Text(""), *_feasibility_parts(dict(report["rig"]))]
    title = report.get("name") or "test"
    return Panel(Group(*parts), title=f"check: {title}", title_align="left",
                 border_style=PALETTE.border)
