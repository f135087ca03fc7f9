"""Target profiles from a test definition: breakpoint mappings (levels or slopes) and CSV files.

Turns what a user wrote (a list of breakpoints in YAML, a two-column CSV profile) into a
:class:`liveshape.dsp.profile.Profile`, with one-line :class:`~liveshape.errors.ConfigError`
messages that name the file, the row or key, the value and the rule.
"""

from __future__ import annotations

import math
import re
from pathlib import Path
from typing import Any

from liveshape.dsp.profile import DB_OCT_PER_EXPONENT, G0_M_S2, Profile
from liveshape.errors import ConfigError
from liveshape.schema import Where, as_float, as_list, check_keys

__all__ = ["ASD_UNITS", "profile_from_points", "read_profile_csv"]

#: Accepted ASD units and the factor that turns a value in that unit into g²/Hz.
ASD_UNITS: dict[str, float] = {"g2/Hz": 1.0, "(m/s2)2/Hz": 1.0 / G0_M_S2**2}


# -- building from breakpoints ---------------------------------------------------------------
def _unit_factor(units: Any, where: Where) -> float:
    if not isinstance(units, str) or units not in ASD_UNITS:
        raise where.fail(units, f"is not a known ASD unit (valid: {', '.join(ASD_UNITS)})")
    return ASD_UNITS[units]


def profile_from_points(
    points: Any,
    where: Where,
    *,
    units: str = "g2/Hz",
    name: str = "",
    units_where: Where | None = None,
) -> Profile:
    """Build a :class:`Profile` from breakpoint mappings.

    Parameters
    ----------
    points : list of mapping
        Each item is ``{f_hz, asd}`` (level in ``units``) or ``{f_hz, slope_db_oct}``, where the
        slope belongs to the segment that ends at this point; its level is then
        ``a2 = a1 (f2/f1)^(m/3.0103)`` from the previous point. The first point needs a level.
    where : Where
        Place of the list in its document, for error messages.
    units : str
        ``"g2/Hz"`` or ``"(m/s2)2/Hz"`` (converted by dividing by g0²).
    name : str
        Label of the profile.
    units_where : Where, optional
        Place of the units in the document (default: ``units`` beside the list).

    Raises
    ------
    ConfigError
        One line naming the breakpoint, key, value and rule.
    """
    factor = _unit_factor(units, units_where or (where.key("units") if where.path else where))
    items = as_list(points, where, min_len=2)
    label = (where.path.rsplit(".", 1)[-1] or "points") if where.path else "points"
    f_list: list[float] = []
    asd_list: list[float] = []
    for i, item in enumerate(items):
        w = where.index(i)
        d = check_keys(item, ("f_hz", "asd", "slope_db_oct"), w, required=("f_hz",))
        f = as_float(d["f_hz"], w.key("f_hz"), gt=0)
        if f_list and not f > f_list[-1]:
            raise w.key("f_hz").fail(
                d["f_hz"],
                f"is not above {label}[{i - 1}].f_hz = {f_list[-1]:g} (frequencies must increase)",
            )
        has_asd, has_slope = "asd" in d, "slope_db_oct" in d
        if has_asd == has_slope:
            raise ConfigError(f"{w}: give exactly one of asd or slope_db_oct")
        if has_asd:
            asd = as_float(d["asd"], w.key("asd"), gt=0) * factor
        else:
            slope = as_float(d["slope_db_oct"], w.key("slope_db_oct"))
            if not f_list:
                raise w.key("slope_db_oct").fail(
                    slope,
                    "needs a level on an earlier point (the slope is that of the segment "
                    "ending here; the first point must give asd)",
                )
            asd = asd_list[-1] * (f / f_list[-1]) ** (slope / DB_OCT_PER_EXPONENT)
            if not (math.isfinite(asd) and asd > 0):
                raise w.key("slope_db_oct").fail(
                    slope, "gives a level that is not a finite number > 0"
                )
        f_list.append(f)
        asd_list.append(asd)
    return Profile(tuple(f_list), tuple(asd_list), name)


# -- two-column text profiles ----------------------------------------------------------------
_SI_HEADER = re.compile(r"m\s*/\s*s\s*(\^?\s*2|²)|m2\s*/?\s*s4|m2s4|m\^2\s*/\s*s\^4", re.IGNORECASE)


def _split_cells(text: str) -> list[str]:
    if ";" in text:  # semicolon files may use a decimal comma
        return [c.replace(",", ".") for c in re.split(r"[;\s]+", text.strip()) if c]
    return [c for c in re.split(r"[,\s]+", text.strip()) if c]


def _is_number(cell: str) -> bool:
    try:
        float(cell)
    except ValueError:
        return False
    return True


def read_profile_csv(path: str | Path, *, name: str | None = None) -> Profile:
    """Read a two-column text profile: frequency in Hz and ASD in g²/Hz.

    Cells are separated by commas, whitespace or semicolons (a semicolon file may use decimal
    commas). ``#`` starts a comment. The first non-comment line may be a header (a line whose
    cells are not all numbers); a header naming m/s² units (``asd_m2s4_hz``, ``(m/s2)2/Hz``)
    makes the levels be read in (m/s²)²/Hz and converted by dividing by g0².

    Raises
    ------
    ConfigError
        One line naming the file and line, e.g.
        ``bench.csv: line 4: f_hz = 1800 is not above 2000 on line 3 (frequencies must increase)``.
    """
    p = Path(path)
    src = str(path)
    try:
        text = p.read_text(encoding="utf-8-sig")
    except FileNotFoundError:
        raise ConfigError(f"{src}: file not found") from None
    except IsADirectoryError:
        raise ConfigError(f"{src}: is a directory, expected a profile file") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(f"{src}: cannot read ({exc.__class__.__name__}: {exc})") from None
    factor = 1.0
    seen_data = False
    f_list: list[float] = []
    asd_list: list[float] = []
    last_line = 0
    for lineno, raw in enumerate(text.splitlines(), start=1):
        body = raw.split("#", 1)[0]
        cells = _split_cells(body)
        if not cells:
            continue
        if not seen_data and not all(_is_number(c) for c in cells):
            seen_data = True
            if _SI_HEADER.search(body):
                factor = ASD_UNITS["(m/s2)2/Hz"]
            continue
        seen_data = True
        at = f"{src}: line {lineno}"
        if len(cells) != 2:
            raise ConfigError(
                f"{at}: {body.strip()!r} has {len(cells)} cells, expected 2 (f_hz and asd)"
            )
        values = []
        for key, cell in zip(("f_hz", "asd"), cells, strict=True):
            try:
                v = float(cell)
            except ValueError:
                raise ConfigError(f"{at}: {key} = {cell!r} is not a number") from None
            if not (math.isfinite(v) and v > 0):
                raise ConfigError(f"{at}: {key} = {cell} must be a finite number > 0")
            values.append(v)
        f, asd = values
        if f_list and not f > f_list[-1]:
            raise ConfigError(
                f"{at}: f_hz = {cells[0]} is not above {f_list[-1]:g} on line {last_line} "
                "(frequencies must increase)"
            )
        f_list.append(f)
        asd_list.append(asd * factor)
        last_line = lineno
    if len(f_list) < 2:
        raise ConfigError(f"{src}: needs at least 2 data lines (f_hz, asd), found {len(f_list)}")
    return Profile(tuple(f_list), tuple(asd_list), p.stem if name is None else name)
