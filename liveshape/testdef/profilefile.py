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

__all__ = ["ASD_UNITS", "asd_unit_factor", "profile_from_points", "read_profile_csv"]

#: Accepted ASD units and the factor that turns a value in that unit into g²/Hz.
ASD_UNITS: dict[str, float] = {"g2/Hz": 1.0, "(m/s2)2/Hz": 1.0 / G0_M_S2**2}


#: Spellings of the two ASD units once normalized by :func:`_normalize_unit` (lower case, no
#: spaces, ² and ⁴ as digits, no ``^`` or ``**``).
_SI_SPELLINGS = re.compile(
    r"[(\[]m/s2[)\]]2/hz|(?<![a-z])(m2/s4/hz|m2/\(s4hz\)|m2s-4/hz|m2s-4hz-1|m2_?s4_?hz)")
_G_SPELLINGS = re.compile(r"(?<![a-z])(\(?g\)?2/hz|g2_?hz|g2hz-1|gn2/hz)")
_UNITISH = re.compile(r"[/()]|hz|\bg\b|m2|s2|s4")


def _normalize_unit(text: str) -> str:
    t = text.lower()
    for a, b in (("²", "2"), ("⁴", "4"), ("⁻¹", "-1"), ("**", ""), ("^", ""), (" ", ""),
                 ("·", ""), ("⋅", "")):
        t = t.replace(a, b)
    return t


def asd_unit_factor(text: str) -> float | None:
    """Factor from the ASD unit written in ``text`` to g²/Hz; None when ``text`` names no unit.

    Accepted: g²/Hz (``g2/Hz``, ``g^2/Hz``, ``g²/Hz``, ``asd_g2_hz``) and (m/s²)²/Hz
    (``(m/s2)2/Hz``, ``(m/s²)²/Hz``, ``m²/s⁴/Hz``, ``m2/s4/Hz``, ``m^2/s^4/Hz``,
    ``asd_m2s4_hz``), converted with the standard acceleration of gravity g0 = 9.80665 m/s².

    Raises
    ------
    ValueError
        ``text`` looks like a unit (it has ``/``, brackets, ``Hz`` ...) that is neither.
    """
    t = _normalize_unit(text)
    si, g = bool(_SI_SPELLINGS.search(t)), bool(_G_SPELLINGS.search(t))
    if si and not g:
        return ASD_UNITS["(m/s2)2/Hz"]
    if g and not si:
        return 1.0
    if si and g:
        raise ValueError("names both g²/Hz and (m/s²)²/Hz")
    if _UNITISH.search(t):
        raise ValueError("is not a known ASD unit (g2/Hz or (m/s2)2/Hz, e.g. m²/s⁴/Hz)")
    return None


# -- building from breakpoints ---------------------------------------------------------------
def _unit_factor(units: Any, where: Where) -> float:
    factor = None
    if isinstance(units, str):
        try:
            factor = asd_unit_factor(units)
        except ValueError:
            factor = None
    if factor is None:
        raise where.fail(units, f"is not a known ASD unit (valid: {', '.join(ASD_UNITS)}, "
                         "or spellings such as g^2/Hz, m²/s⁴/Hz)")
    return factor


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
    cells are not all numbers); a header naming m/s² units (``asd_m2s4_hz``, ``(m/s2)2/Hz``,
    ``m²/s⁴/Hz``) makes the levels be read in (m/s²)²/Hz and converted by dividing by g0²; a
    header naming g²/Hz or no unit at all leaves them in g²/Hz; a header naming any other unit
    is refused (:func:`asd_unit_factor`).

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
            try:
                found = asd_unit_factor(" | ".join(cells[1:]))
            except ValueError as exc:
                raise ConfigError(f"{src}: line {lineno}: header {body.strip()!r} {exc}") from None
            if found is not None:
                factor = found
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
