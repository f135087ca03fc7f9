"""The spectrum plot as a grid of characters: pure arithmetic, no :mod:`rich`.

Control against target on a log-frequency x axis and an ASD y axis in dB re 1 g²/Hz (labelled
in g²/Hz): the target as a line, alarm and abort limits as marks above and below it, and one
control mark per column. :func:`spectrum_grid` returns the characters as strings, with a second
grid of the same shape giving each character's role (:data:`ROLES`), so a view can colour them;
:func:`liveshape.views.dashboard.spectrum_plot` does that with rich.

Both axes are logarithmic, so a power-law target segment (constant dB/oct) is a straight line
and the target between lines is interpolated linearly in (log f, dB).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from liveshape.views.textformat import fmt_span

__all__ = ["ROLES", "SpectrumGrid", "nice_ticks", "spectrum_grid", "tick_label_hz"]

#: Decibels per natural-log unit of a power ratio: ``10 log10(x) = DB10 * ln(x)``.
DB10 = 10.0 / math.log(10.0)

#: Role codes of :attr:`SpectrumGrid.roles`: blank, target line, alarm mark (an alarm limit or
#: control outside it), abort mark (an abort limit or control outside it), control within alarm.
ROLES = {" ": "blank", "t": "target", "a": "alarm", "x": "abort", "c": "control"}

#: Extra characters of :attr:`SpectrumGrid.x_axis` past the plot, for the last tick label.
AXIS_OVERHANG = 8


@dataclass(frozen=True)
class SpectrumGrid:
    """The characters of a spectrum plot, row by row from the top.

    Attributes
    ----------
    chars : tuple of str
        ``height`` rows of ``width`` characters: ``─`` target, ``·`` alarm limits, ``:`` abort
        limits, ``●`` control, ``▲``/``▼`` control above or below the plot. Empty when there
        is nothing to draw (see :attr:`note`).
    roles : tuple of str
        Same shape as ``chars``; each character a key of :data:`ROLES`.
    y_labels : tuple of str
        One per row: the ASD tick (g²/Hz, 1-2-5 per decade) the row shows, or ``""``.
    x_axis : str
        Frequency tick labels (Hz, ``1k`` for 1000) placed under their columns; up to
        :data:`AXIS_OVERHANG` characters longer than a row.
    alarm_span, abort_span : str
        The alarm and abort limits in dB for a legend (``3`` or ``3…4.5`` when they vary).
    note : str
        Why nothing is drawn (``no spectrum yet``, ``no target lines in band``), else ``""``.
    """

    chars: tuple[str, ...]
    roles: tuple[str, ...]
    y_labels: tuple[str, ...]
    x_axis: str
    alarm_span: str
    abort_span: str
    note: str = ""


def nice_ticks(lo: float, hi: float) -> list[float]:
    """The values 1, 2 and 5 times a power of ten within ``[lo, hi]`` (both > 0), ascending."""
    ticks = []
    for decade in range(math.floor(math.log10(lo)) - 1, math.ceil(math.log10(hi)) + 1):
        for m in (1, 2, 5):
            f = m * 10.0**decade
            if lo <= f <= hi:
                ticks.append(f)
    return ticks


def tick_label_hz(f_hz: float) -> str:
    """A frequency tick: ``50``, ``200``, ``1k``, ``2.5k``."""
    return f"{f_hz / 1000:g}k" if f_hz >= 1000 else f"{f_hz:g}"


def _as_lines(value: Any, n: int) -> np.ndarray:
    arr = np.asarray(value if value is not None else np.nan, dtype=float)
    return np.broadcast_to(arr, (n,)) if arr.ndim == 0 or arr.size == 1 else arr.reshape(n)


def _empty(note: str) -> SpectrumGrid:
    return SpectrumGrid((), (), (), "", "", "", note)


def spectrum_grid(
    f_hz: Any,
    control_psd: Any,
    target_psd: Any,
    alarm_db: Any = 3.0,
    abort_db: Any = 6.0,
    *,
    width: int = 72,
    height: int = 15,
) -> SpectrumGrid:
    """Lay out control against target with the alarm and abort limits on a character grid.

    Parameters
    ----------
    f_hz : array
        Frequency lines, Hz. Only lines where the target is > 0 are drawn (the test band).
    control_psd, target_psd : array
        Control estimate and target on those lines, g²/Hz (control may be None).
    alarm_db, abort_db : float or array
        Symmetric limits about the target in dB, one value or one per line.
    width, height : int
        Plot area in characters (at least 16 by 5).

    Returns
    -------
    SpectrumGrid
        Columns split the band evenly in log f; a column's control mark is the mean power of
        the lines in it, styled by its distance from the target against the limits. The y span
        is the abort limits and 2 dB more on each side.
    """
    f = np.asarray(f_hz, dtype=float).ravel()
    t = np.asarray(target_psd, dtype=float).ravel() if target_psd is not None else np.zeros(0)
    if f.size == 0 or t.shape != f.shape:
        return _empty("no spectrum yet")
    band = np.isfinite(t) & (t > 0) & (f > 0)
    if not band.any():
        return _empty("no target lines in band")
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
    col_t = np.interp(centres, lf, DB10 * np.log(tb))  # the target is straight on log-log axes
    col_al = np.interp(centres, lf, al)
    col_ab = np.interp(centres, lf, ab)
    cols = np.clip(((lf - x0) / (x1 - x0) * width).astype(int), 0, width - 1)
    col_c = np.full(width, np.nan)
    with np.errstate(divide="ignore", invalid="ignore"):
        for j in np.unique(cols):
            vals = c[(cols == j) & np.isfinite(c)]
            if vals.size:  # mean power of the lines in the column
                m = float(np.mean(vals))
                col_c[j] = DB10 * math.log(m) if m > 0 else -np.inf
    y_hi = float(np.max(col_t + col_ab)) + 2.0
    y_lo = float(np.min(col_t - col_ab)) - 2.0

    def row(y: float) -> int:
        return int(round((y_hi - y) / (y_hi - y_lo) * (height - 1)))

    chars = [[" "] * width for _ in range(height)]
    roles = [[" "] * width for _ in range(height)]

    def put(r: int, j: int, ch: str, role: str) -> None:
        if 0 <= r < height:
            chars[r][j], roles[r][j] = ch, role

    for j in range(width):
        for sign in (1, -1):
            put(row(col_t[j] + sign * col_ab[j]), j, ":", "x")
            put(row(col_t[j] + sign * col_al[j]), j, "·", "a")
        put(row(col_t[j]), j, "─", "t")
        y = col_c[j]
        if np.isnan(y):
            continue
        dev = abs(y - col_t[j])
        role = "x" if dev > col_ab[j] else "a" if dev > col_al[j] else "c"
        r = row(y) if np.isfinite(y) else height
        ch = "▲" if r < 0 else "▼" if r >= height else "●"
        put(min(max(r, 0), height - 1), j, ch, role)

    labels = [""] * height
    for v in sorted(nice_ticks(10 ** (y_lo / 10), 10 ** (y_hi / 10)), reverse=True):
        r = row(DB10 * math.log(v))
        if 0 <= r < height and all(abs(r - k) > 1 for k in range(height) if labels[k]):
            labels[r] = f"{v:g}"
    axis = [" "] * (width + AXIS_OVERHANG)
    for ftick in nice_ticks(10**x0, 10**x1):
        j = int((math.log10(ftick) - x0) / (x1 - x0) * width)
        lab = tick_label_hz(ftick)
        start = min(max(j - len(lab) // 2, 0), width + AXIS_OVERHANG - len(lab))
        if all(ch == " " for ch in axis[max(start - 1, 0):start + len(lab) + 1]):
            axis[start:start + len(lab)] = list(lab)
    return SpectrumGrid(
        chars=tuple("".join(r) for r in chars),
        roles=tuple("".join(r) for r in roles),
        y_labels=tuple(labels),
        x_axis="".join(axis).rstrip(),
        alarm_span=fmt_span(al),
        abort_span=fmt_span(ab),
    )
