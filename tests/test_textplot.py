"""Tests of the pure text parts of the views: the spectrum character grid and number text.

Outside references: the decibel definition 10·log10 of a power ratio, the base-10 logarithm that
places a frequency on a log axis, and the power law of a constant-slope ASD segment
(n = log(a2/a1)/log(f2/f1), m dB/oct = 10·log10(a2/a1)/log2(f2/f1); docs/methods.md, "Profile
integrals").
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from liveshape.views.textformat import DASH, fmt_span, fmt_time, fmt_value, label_and_unit
from liveshape.views.textplot import ROLES, nice_ticks, spectrum_grid, tick_label_hz

F_HZ = np.linspace(0, 4000, 8193)


def _band(lo: float, hi: float) -> np.ndarray:
    return (F_HZ >= lo) & (F_HZ <= hi)


def test_ticks_are_one_two_five_per_decade():
    # 1-2-5 steps per decade (common practice for log axes).
    assert nice_ticks(15.0, 2500.0) == [20, 50, 100, 200, 500, 1000, 2000]
    assert nice_ticks(0.001, 0.01) == pytest.approx([0.001, 0.002, 0.005, 0.01])
    assert [tick_label_hz(f) for f in (50.0, 1000.0, 2500.0)] == ["50", "1k", "2.5k"]


def test_grid_shape_and_roles_match_the_characters():
    t = np.where(_band(20, 2000), 0.04, 0.0)
    grid = spectrum_grid(F_HZ, t * 2.0, t, 3.0, 6.0, width=50, height=12)
    assert len(grid.chars) == len(grid.roles) == len(grid.y_labels) == 12
    assert all(len(row) == 50 for row in grid.chars + grid.roles)
    assert set("".join(grid.roles)) <= set(ROLES)
    mark_role = {"─": {"t"}, "·": {"a"}, ":": {"x"}, "●": {"a"}, " ": {" "}}
    for chars, roles in zip(grid.chars, grid.roles, strict=True):
        for ch, role in zip(chars, roles, strict=True):
            assert role in mark_role[ch], (ch, role)
    # Twice the target is 10 log10(2) = +3.01 dB: just outside a 3 dB alarm limit.
    assert "".join(grid.chars).count("●") == 50


def test_frequency_ticks_sit_over_their_log_position():
    t = np.where(_band(20, 2000), 0.04, 0.0)
    width = 60
    grid = spectrum_grid(F_HZ, None, t, width=width, height=10)
    f_lines = F_HZ[_band(20, 2000)]
    x0, x1 = math.log10(f_lines[0]), math.log10(f_lines[-1])
    for f, label in ((100.0, "100"), (1000.0, "1k")):
        start = grid.x_axis.index(label)
        centre = start + len(label) / 2
        # Column of f on a log axis: width * (log10 f - log10 f_lo) / (log10 f_hi - log10 f_lo).
        column = width * (math.log10(f) - x0) / (x1 - x0)
        assert abs(centre - column) <= 1.0  # labels are centred on a whole column


def test_target_slope_spans_the_rows_of_its_decibel_drop():
    # A +6.02 dB/oct rise from 100 to 800 Hz (exponent n = 2): three octaves, 18.06 dB.
    t = np.where(_band(100, 800), 1e-3 * (np.maximum(F_HZ, 1e-9) / 100.0) ** 2, 0.0)
    height = 31
    grid = spectrum_grid(F_HZ, None, t, 3.0, 6.0, width=64, height=height)
    rows = [next(i for i, row in enumerate(grid.chars) if row[j] == "─") for j in (0, 63)]
    # Column centres sit half a column in from the band edges, so the first and last marks are
    # (1 - 1/64) of the whole rise apart; the plot spans them, the 6 dB abort limits and 2 dB.
    rise_db = 10 * math.log10((800 / 100) ** 2) * (1 - 1 / 64)
    rows_per_db = (height - 1) / (rise_db + 2 * (6.0 + 2.0))
    assert abs((rows[0] - rows[1]) - rise_db * rows_per_db) <= 1  # each mark rounds to a row


def test_empty_grids_say_why():
    assert spectrum_grid(np.zeros(0), None, np.zeros(0)).note == "no spectrum yet"
    grid = spectrum_grid(F_HZ, None, np.zeros_like(F_HZ))
    assert grid.note == "no target lines in band" and grid.chars == ()


def test_number_text():
    assert fmt_time(3725.4) == "1:02:05" and fmt_time(59.6) == "1:00" and fmt_time(None) == DASH
    assert label_and_unit("drive_rms_fs") == ("drive rms", "FS")
    assert label_and_unit("velocity_rms_m_s") == ("velocity rms", "m/s")
    assert fmt_value(float("nan"), "s") == DASH and fmt_value(True) == "yes"
    assert fmt_value(48000.0, "Hz") == "48000 Hz" and fmt_value(0.123456, "g") == "0.1235 g"
    assert fmt_span([3.0, 3.0]) == "3" and fmt_span([4.5, 3.0, np.nan]) == "3…4.5"
