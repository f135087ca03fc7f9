"""The terminal views: the one module that imports :mod:`rich`.

Every view is a pure function from frozen data (a controller snapshot, a profile, a result
mapping) to a rich renderable; nothing here reads the clock or the hardware except
:class:`LiveView`, which only paces redraws. Tests render the views into a ``StringIO`` console.

What the views show is worked out in pure modules, and this one only lays it out and colours it:
:mod:`liveshape.views.textplot` (the spectrum plot as a character grid),
:mod:`liveshape.views.runtext` (the live view and the run result as text rows),
:mod:`liveshape.views.checktext` (the check report as text rows) and
:mod:`liveshape.views.textformat` (numbers with units, a dash for a missing figure). Their roles
(``alarm``, ``abort``, ``ok`` ...) are the fields of :class:`Palette`.
"""

from __future__ import annotations

import math
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

from liveshape.testdef.chain import G_UNIT, AccelUnit
from liveshape.views import bringuptext, checktext, runtext
from liveshape.views.textformat import as_finite, mapping_rows
from liveshape.views.textplot import ROLES, spectrum_grid

__all__ = [
    "LiveView",
    "PALETTE",
    "check_table",
    "dashboard",
    "make_console",
    "print_error",
    "progress_bar",
    "run_summary",
    "bring_up_panel",
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

# --------------------------------------------------------------------------------------------
# Small helpers


def _kv_table(title: str | None = None) -> Table:
    table = Table(title=title, title_style=PALETTE.title, title_justify="left", box=None,
                  show_header=False, pad_edge=False, padding=(0, 2, 0, 0))
    table.add_column(style=PALETTE.label, no_wrap=True)
    table.add_column(style=PALETTE.value)
    return table


def _add_rows(table: Table, rows: Sequence[tuple[Any, ...]]) -> None:
    for row in rows:
        table.add_row(*row)


def _add_mapping_rows(table: Table, data: Mapping[str, Any], skip: Sequence[str] = ()) -> None:
    _add_rows(table, mapping_rows(data, skip))


# --------------------------------------------------------------------------------------------
# The spectrum plot


def spectrum_plot(
    f_hz: Any,
    control_psd: Any,
    target_psd: Any,
    alarm_db: Any = 3.0,
    abort_db: Any = 6.0,
    *,
    width: int = 72,
    height: int = 15,
    max_width: int | None = None,
    asd_unit: str = "g²/Hz",
) -> Text:
    """Character plot of control against target with the alarm and abort limits.

    The arguments are those of :func:`liveshape.views.textplot.spectrum_grid` (lines in Hz, PSDs in
    g²/Hz, limits in dB, plot area in characters); the axis labels come on top of the area.

    Returns
    -------
    rich.text.Text
        Rows of the plot: ``─`` target, ``·`` alarm limits, ``:`` abort limits, ``●`` control
        (``▲``/``▼`` when off the plot), x axis in Hz (log), y axis in ``asd_unit`` (the unit
        of the PSDs given, g²/Hz unless converted for display), then a legend.
    """
    grid = spectrum_grid(f_hz, control_psd, target_psd, alarm_db, abort_db,
                         width=width, height=height)
    if grid.note:
        return Text(grid.note, style=PALETTE.dim)
    styles = {code: getattr(PALETTE, "dim" if role == "blank" else role)
              for code, role in ROLES.items()}
    label_w = 8
    text = Text()
    for label, chars, roles in zip(grid.y_labels, grid.chars, grid.roles, strict=True):
        text.append(f"{label:>{label_w - 1}} ", style=PALETTE.label)
        text.append("│", style=PALETTE.border)
        run_chars, run_style = "", None
        for ch, code in zip(chars, roles, strict=True):  # one span per run of equal style
            style = styles[code]
            if ch == " ":
                style = run_style if run_style is not None else style
            if style != run_style and run_chars:
                text.append(run_chars, style=run_style)
                run_chars = ""
            run_chars += ch
            run_style = style
        text.append(run_chars + "\n", style=run_style)
    text.append(" " * label_w + "└" + "─" * len(grid.chars[0]) + "\n", style=PALETTE.border)
    axis = grid.x_axis
    if max_width is not None and label_w + 1 + len(axis) + 4 > max_width:
        # Drop tick labels that would run past the edge (whole labels only).
        keep = max(max_width - label_w - 1 - 4, 0)
        cut = axis[:keep]
        if len(axis) > keep and axis[keep:keep + 1] not in ("", " "):
            cut = cut[: len(cut.rstrip().rsplit(" ", 1)[0])] if " " in cut.strip() else ""
        axis = cut.rstrip()
    text.append(" " * (label_w + 1) + axis + "  Hz\n", style=PALETTE.label)
    pieces = (("─ target  ", PALETTE.target), (f"· alarm ±{grid.alarm_span} dB  ", PALETTE.alarm),
              (f": abort ±{grid.abort_span} dB  ", PALETTE.abort),
              ("● control  ", PALETTE.control), (f"y: {asd_unit}", PALETTE.label))
    indent = " " * (label_w + 1)
    if max_width is not None and len(indent) + sum(len(t) for t, _ in pieces) > max_width:
        indent = ""
        pieces = (("─ target ", PALETTE.target), (f"· alarm ±{grid.alarm_span} ", PALETTE.alarm),
                  (f": abort ±{grid.abort_span} dB ", PALETTE.abort),
                  ("● control ", PALETTE.control), (f"({asd_unit})", PALETTE.label))
    legend = Text(indent)
    for part, style in pieces:
        legend.append(part, style=style)
    text.append_text(legend)
    return text


# --------------------------------------------------------------------------------------------
# The live dashboard


def _cell(pieces: Sequence[tuple[str, str]]) -> str | Text:
    """Text pieces ``(text, role)`` of :mod:`liveshape.views.runtext` as a rich cell."""
    def style(role: str) -> str:
        return f"bold {PALETTE.control}" if role == "stage" else getattr(PALETTE, role)

    if len(pieces) == 1:
        part, role = pieces[0]
        return part if role == "value" else Text(part, style=style(role))
    text = Text()
    for part, role in pieces:
        text.append(part, style=style(role))
    return text


def _row_table(title: str | None, rows: Sequence[tuple[str, Sequence[tuple[str, str]]]],
               *, no_wrap: bool = True) -> Table:
    table = _kv_table(title)
    table.columns[1].no_wrap = no_wrap
    if not no_wrap:
        table.columns[1].overflow = "fold"  # a long path folds rather than loses its end
    for label, pieces in rows:
        table.add_row(label, _cell(pieces))
    return table


def _events_table(events: Sequence[Any], n: int = 6, *, title: bool = True) -> Table:
    table = Table(title="events" if title else None, title_style=PALETTE.title,
                  title_justify="left", box=None, show_header=False, pad_edge=False,
                  padding=(0, 2, 0, 0), expand=True)
    table.add_column(style=PALETTE.label, justify="right", no_wrap=True)
    table.add_column(style=PALETTE.dim, no_wrap=True)
    table.add_column(style=PALETTE.value, no_wrap=True, overflow="ellipsis", ratio=1)
    for t, kind, (message, role) in runtext.event_rows(events, n):
        table.add_row(t, kind, Text(message, style=getattr(PALETTE, role)))
    if not table.rows:
        table.add_row("", "", Text("none yet", style=PALETTE.dim))
    return table


#: Below this many columns or rows the live view takes its compact layout.
COMPACT_BELOW_COLUMNS = 110
COMPACT_BELOW_ROWS = 40


def _plot_of(snapshot: Any, width: int, height: int, max_width: int | None) -> Text:
    get = runtext.field
    return spectrum_plot(
        get(snapshot, "f_hz", default=()), get(snapshot, "control_psd"),
        get(snapshot, "target_psd"), get(snapshot, "alarm_db", default=np.nan),
        get(snapshot, "abort_db", default=np.nan), width=width, height=height,
        max_width=max_width, asd_unit=runtext.asd_label(snapshot),
    )


def dashboard(snapshot: Any, *, plot_width: int = 72, plot_height: int = 15,
              width: int | None = None, height: int | None = None) -> RenderableType:
    """The live view of a run, from a frozen controller snapshot.

    Shows the tolerance state in words and colour (in tolerance, alarm, abort pending), the
    stage, level step, elapsed time, the steps still to go to full level and the time left at
    full level, control against target grms, drive rms and peak against their limits, the line
    deviations and counts outside the alarm and abort limits, the DOF with the 90 % χ² band it
    implies (Bendat & Piersol), the spectrum plot (:func:`spectrum_plot`) and the latest events.

    Given the terminal's ``width`` and ``height`` (characters), the layout fits them: below
    :data:`COMPACT_BELOW_COLUMNS` columns or :data:`COMPACT_BELOW_ROWS` rows a compact layout
    (one number per row in two columns, a smaller plot, the last two events) that fits 80×24;
    the full layout otherwise. Without them, the full layout with ``plot_width`` ×
    ``plot_height``.
    """
    inner = None if width is None else max(int(width) - 4, 40)  # panel border and padding
    if width is not None and (width < COMPACT_BELOW_COLUMNS
                              or (height is not None and height < COMPACT_BELOW_ROWS)):
        return _compact(snapshot, inner, 24 if height is None else int(height))
    if inner is not None:
        plot_width = min(inner - 22, 110)
        rows = 45 if height is None else int(height)
        plot_height = max(min(15, rows - 30), 6)
    tables = Table.grid(padding=(0, 4))
    tables.add_column(no_wrap=True)
    tables.add_column(no_wrap=True)
    tables.add_row(_row_table("control", runtext.control_rows(snapshot)),
                   _row_table("drive", runtext.drive_rows(snapshot)))
    plot = _plot_of(snapshot, plot_width, plot_height, inner)
    events = runtext.field(snapshot, "events", "recent_events", default=())
    body = Group(_cell(runtext.header_pieces(snapshot)), _cell(runtext.time_pieces(snapshot)),
                 Text(""), tables, Text(""), plot, Text(""), _events_table(events))
    return Panel(body, border_style=PALETTE.border, padding=(0, 1))


def bring_up_panel(snapshot: Any, units: AccelUnit = G_UNIT,
                   level_fs: float | None = None) -> RenderableType:
    """The bring-up hold: instruction, live meter and whether Enter is taken now.

    ``level_fs`` is the held drive (default: the snapshot's drive rms); the meter is the
    snapshot's ``bring_up`` reading (:mod:`liveshape.views.bringuptext`).
    """
    reading = getattr(snapshot, "bring_up", None)
    level = snapshot.drive_rms_fs if level_fs is None else level_fs
    lines = bringuptext.bring_up_lines(reading, level, units, bringuptext.last_refusal(
        getattr(snapshot, "recent_events", ())))
    text = Text()
    for i, line in enumerate(lines):
        if i == len(lines) - 1:
            style = PALETTE.ok if reading is not None and reading.usable else PALETTE.alarm
        else:
            style = PALETTE.title if i < 2 else PALETTE.value
        text.append(line + "\n", style=style)
    return Panel(text, title="bring-up", border_style=PALETTE.border, padding=(0, 1))


def _compact(snapshot: Any, inner: int | None, rows: int) -> RenderableType:
    """The compact live view: fits ``inner`` columns (80 - 4) and ``rows`` rows (24)."""
    inner = 76 if inner is None else inner
    # border 2, header 1, numbers 6, blank 1, plot axis + ticks + legend 3, events 2, spare 1
    plot_height = max(min(8, rows - 16), 3)
    numbers = Table.grid(padding=(0, 2))
    numbers.add_column(no_wrap=True)
    numbers.add_column(no_wrap=True)
    numbers.add_row(_row_table(None, runtext.compact_control_rows(snapshot)),
                    _row_table(None, runtext.compact_drive_rows(snapshot)))
    plot = _plot_of(snapshot, inner - 22, plot_height, inner)
    events = runtext.field(snapshot, "events", "recent_events", default=())
    body = Group(_cell(runtext.header_pieces(snapshot, compact=True)), numbers, Text(""), plot,
                 _events_table(events, 2, title=False))
    return Panel(body, border_style=PALETTE.border, padding=(0, 1))


class LiveView:
    """A live terminal view that the shell feeds with snapshots.

    ``update(snapshot)`` rebuilds and redraws the dashboard at most ``refresh_hz`` times a
    second (calls in between are dropped, the last one is kept for :meth:`flush`). Drawing
    happens in the caller's thread, only when a snapshot is taken (no refresh thread): a full
    redraw costs a few tens of milliseconds of pure Python, so keep ``refresh_hz`` at 4-10.
    Use as a context manager. ``units`` is the display unit of acceleration (the snapshots are
    in g; :func:`liveshape.views.runtext.in_units` converts them).
    """

    def __init__(
        self, console: Console | None = None, *, refresh_hz: float = 4.0,
        clock: Callable[[], float] = time.monotonic, transient: bool = False,
        units: AccelUnit = G_UNIT,
    ) -> None:
        self.units = units
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
        console = self._live.console
        if getattr(snapshot, "stage", None) == "bring_up":
            self._live.update(bring_up_panel(snapshot, self.units), refresh=True)
            self.builds += 1
            return True
        shown = runtext.in_units(snapshot, self.units)
        self._live.update(dashboard(shown, width=console.width, height=console.height),
                          refresh=True)
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


def safety_notice(rig_kind: str = "audio", plant: str | None = None, *,
                  bring_up: bool | None = True) -> RenderableType:
    """Cautions shown before a run, in words that fit the rig in use (each fits 80 columns).

    ``bring_up`` says whether the run holds a very low drive after the connection check and
    waits for the user to raise the gain (the default on real rigs); False (``--unattended``)
    says the gain must already be set, as no one is asked; None (``survey``, which has no
    hold) says to set it before the start.

    ``rig_kind`` is ``sim`` for the simulated rig (nothing is driven: a first line says so and
    names the plant model; the cautions are for the real rig it rehearses) or anything else (a
    real card driving an amplifier and a shaker). The hearing caution names a loudspeaker only
    when the plant is one.
    """
    name = str(plant).replace("\\", "/").rsplit("/", 1)[-1].removesuffix(".yaml") if plant \
        else ""
    if "loudspeaker" in name.lower():
        hearing = "Loudspeaker shakers are loud at test levels: wear hearing protection."
    else:
        hearing = "Shakers can be loud, most of all at resonances: wear hearing protection."
    items = (
        hearing,
        "Fasten the payload and the fixture; nothing loose on the moving part.",
        ("Turn the amplifier gain to minimum; raise it when the meter asks you."
         if bring_up else
         "--unattended: no pause to set the amplifier gain; it must be set already."
         if bring_up is False else
         "Set the amplifier gain before the start: the survey does not pause for it."),
        "Keep hands, cables and tools clear of the moving parts while driving.",
        "To stop: press Ctrl-C once; the drive ramps down. Keep the amp in reach.",
        "Follow your lab's safety rules and work under qualified supervision.",
    )
    text = Text()
    if rig_kind == "sim":
        text.append(f"Simulated rig{f' ({name})' if name else ''}: nothing is driven. "
                    "On the real rig:\n", style=PALETTE.ok)
    for i, item in enumerate(items):
        text.append("• ", style=PALETTE.alarm)
        text.append(item + ("\n" if i < len(items) - 1 else ""), style=PALETTE.value)
    title = "before you start" if rig_kind != "sim" else "before you start (simulated run)"
    return Panel(text, title=title, title_align="left",
                 border_style=PALETTE.alarm if rig_kind != "sim" else PALETTE.border,
                 padding=(0, 1))


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
            v = as_finite(fraction)
            bar.update(task, completed=min(max(v if v is not None else 0.0, 0.0), 1.0))

        yield progress


def run_summary(result: Mapping[str, Any] | Any, units: AccelUnit = G_UNIT) -> RenderableType:
    """The result of a run: status, abort reason, grms, error figures, DOF, time at level.

    ``result`` is a mapping (``summary.json``) or the controller's result dataclass, in g;
    ``units`` is the display unit of its acceleration figures.
    """
    shown = runtext.in_units(runtext.as_mapping(result), units)
    table = _row_table(None, runtext.result_rows(shown), no_wrap=False)
    return Panel(table, title="run result", title_align="left", border_style=PALETTE.border)


def synth_summary(result: Mapping[str, Any] | Any) -> RenderableType:
    """The result of ``liveshape synth``: every figure by name, units from the key suffixes."""
    table = _kv_table()
    _add_mapping_rows(table, runtext.as_mapping(result))
    return Panel(table, title="drive file", title_align="left", border_style=PALETTE.border)


_VERDICT_STYLE = {"no limit": "dim", "over": "abort", "tight": "alarm", "ok": "ok"}


def _column_table(title: str, columns: Sequence[str]) -> Table:
    table = Table(title=title, title_style=PALETTE.title, title_justify="left", box=None,
                  header_style=PALETTE.label, pad_edge=False, padding=(0, 2, 0, 0))
    for name in columns:
        table.add_column(name, justify="right" if name else "left")
    return table


def _feasibility_parts(rows: dict[str, Any]) -> list[RenderableType]:
    """Budgets as one table with a verdict per budget
    (:func:`liveshape.views.checktext.budget_rows`); every other entry as a name/value row."""
    budgets, used = checktext.budget_rows(rows)
    parts: list[RenderableType] = []
    if budgets:
        table = _column_table("rig budgets (3σ peaks)", checktext.BUDGET_COLUMNS)
        for *cells, verdict in budgets:
            table.add_row(*cells, Text(verdict, style=getattr(PALETTE, _VERDICT_STYLE[verdict])))
        parts.append(table)
    other = _kv_table("rig feasibility")
    feasible = rows.get("feasible")
    if isinstance(feasible, bool):
        other.add_row("feasible", Text("yes" if feasible else "no",
                                       style=PALETTE.ok if feasible else PALETTE.abort))
        used = used | {"feasible"}
    verdict, shown = checktext.feasibility_rows(rows)
    _add_rows(other, verdict)
    used = used | shown
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
        :func:`liveshape.control.checks.check_report`: ``grms_g``, ``segments``, ``tolerance``,
        ``control``, optional ``rig``), in which case the other arguments may be omitted.
    tolerance : Tolerance, optional
    control : ControlSettings, optional
        Needs ``fs_hz``, ``frame_length``, ``target_dof`` (and ``averaging`` to show it); with
        the profile and tolerance it makes the report through
        :func:`liveshape.control.checks.report_from_parts`.
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
        from liveshape.control.checks import report_from_parts

        report = report_from_parts(profile, tolerance, control, feasibility)
    overall, tol, ctl = _kv_table("profile"), _kv_table("tolerance"), _kv_table("control")
    _add_rows(overall, checktext.profile_rows(report))
    _add_rows(tol, checktext.tolerance_rows(report))
    _add_rows(ctl, checktext.control_rows(report))
    segs = _column_table("segments", checktext.SEGMENT_COLUMNS)
    _add_rows(segs, checktext.segment_rows(report))
    parts: list[RenderableType] = [overall, Text(""), segs, Text(""), tol, Text(""), ctl]
    if report.get("rig") is not None:
        parts += [Text(""), *_feasibility_parts(dict(report["rig"]))]
    title = report.get("name") or "test"
    return Panel(Group(*parts), title=f"check: {title}", title_align="left",
                 border_style=PALETTE.border)
