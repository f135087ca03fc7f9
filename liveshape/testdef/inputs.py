"""The roles of a rig's inputs: which input channels control, which only watch, which carry the
drive's copy.

Pure. A test definition gives its inputs either as the one-control shorthand
(``rig.control_input`` with an optional ``rig.loopback_input``) or as a list ``rig.inputs``::

    rig:
      inputs:
        - {channel: 1, role: control, name: table}
        - {channel: 2, role: control, name: fixture_tip, weight: 0.5}
        - channel: 3
          role: monitor
          name: bracket
          limit: [{f_hz: 20, asd: 0.5}, {f_hz: 2000, asd: 0.5}]   # g²/Hz, like the profile's
        - {channel: 4, role: reference}

Roles (:data:`INPUT_ROLES`):

``control``
    An accelerometer whose spectrum takes part in the control spectrum (combined by
    ``control.strategy``, :func:`liveshape.dsp.multichannel.combine_control`); ``weight`` is its
    weight in an ``average`` (default 1).
``monitor``
    An accelerometer that is measured and recorded but not controlled; ``limit`` (optional) is a
    spectrum in g²/Hz it must stay under, read exactly as the profile's breakpoints.
``reference``
    A copy of the drive as the card's input sees it (a loopback cable from the drive output):
    the measured drive, for the FRF from the drive actually sent.

Rules: at least one control, at most one reference, channels and names unique, a limit only on
a monitor, a weight only on a control; the list excludes the shorthand keys. Every mistake is
one :class:`~liveshape.errors.ConfigError` line naming the place, the value and the rule.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from liveshape.dsp.profile import Profile
from liveshape.schema import Where, as_choice, as_float, as_int, as_list, as_str, check_keys
from liveshape.testdef.profilefile import profile_from_points

__all__ = ["INPUT_ROLES", "InputRole", "inputs_from_list", "inputs_to_list", "shorthand_roles"]

#: The roles an input channel can have (see the module docstring).
INPUT_ROLES = ("control", "monitor", "reference")

_KEYS = ("channel", "role", "name", "limit", "weight")


@dataclass(frozen=True)
class InputRole:
    """One input channel of the rig and what it is for.

    Attributes
    ----------
    channel : int
        The input channel, counted from 1 as printed on the interface.
    role : str
        One of :data:`INPUT_ROLES`.
    name : str
        A label for screens and records (default ``<role><channel>``, e.g. ``control1``).
    limit : Profile or None
        Monitors only: the spectrum (g²/Hz) the monitor must stay under; None: no limit.
    weight : float
        Controls only: the weight in an averaged control spectrum (> 0; 1 by default).
    """

    channel: int
    role: str
    name: str = ""
    limit: Profile | None = None
    weight: float = 1.0


def _limit(value: Any, w: Where, name: str) -> Profile:
    """A limit: a breakpoint list in g²/Hz, or ``{units, breakpoints}`` like the profile's."""
    if isinstance(value, dict):
        d = check_keys(value, ("units", "breakpoints"), w, required=("breakpoints",))
        units = as_str(d.get("units", "g2/Hz"), w.key("units"))
        return profile_from_points(d["breakpoints"], w.key("breakpoints"), units=units,
                                   name=name, units_where=w.key("units"))
    return profile_from_points(value, w, units="g2/Hz", name=name, units_where=w)


def _short(value: Any) -> str:
    """A short stand-in for a limit in a message (its breakpoints are not repeated)."""
    points = value.get("breakpoints") if isinstance(value, dict) else value
    n = len(points) if isinstance(points, list) else 0
    return f"<{n} breakpoints>" if n else "<limit>"


def inputs_from_list(data: Any, w: Where) -> tuple[InputRole, ...]:
    """Read ``rig.inputs`` strictly (see the module docstring for the rules).

    Parameters
    ----------
    data : list of mapping
        Items ``{channel, role, name?, limit?, weight?}``.
    w : Where
        Place of the list, for error messages.

    Raises
    ------
    ConfigError
        One line naming the item's key, the value and the rule broken.
    """
    items = as_list(data, w, min_len=1)
    out: list[InputRole] = []
    for i, item in enumerate(items):
        wi = w.index(i)
        d = check_keys(item, _KEYS, wi, required=("channel", "role"))
        channel = as_int(d["channel"], wi.key("channel"), ge=1)  # counted from 1
        role = as_choice(d["role"], wi.key("role"), INPUT_ROLES)
        for other in out:
            if other.channel == channel:
                raise wi.key("channel").fail(
                    channel, f"is already the {other.role} input {other.name!r} "
                    "(each input channel has one role)")
        name = as_str(d["name"], wi.key("name")) if d.get("name") is not None else \
            f"{role}{channel}"
        if any(o.name == name for o in out):
            raise wi.key("name").fail(name, "is already the name of another input (names are "
                                      "unique)")
        limit = None
        if d.get("limit") is not None:
            if role != "monitor":
                raise wi.key("limit").fail(_short(d["limit"]), f"is given on a {role} input; a "
                                           "limit is only for a monitor (a control follows the "
                                           "profile)")
            limit = _limit(d["limit"], wi.key("limit"), name)
        weight = 1.0
        if d.get("weight") is not None:
            if role != "control":
                raise wi.key("weight").fail(d["weight"], f"is given on a {role} input; a weight "
                                            "is only for a control input")
            weight = as_float(d["weight"], wi.key("weight"), gt=0.0)
        out.append(InputRole(channel, role, name, limit, weight))
    roles = [r.role for r in out]
    if "control" not in roles:
        raise w.fail(f"{len(out)} input(s) with roles {', '.join(roles)}",
                     "has no control input (at least one input needs role: control)")
    refs = [i for i, r in enumerate(roles) if r == "reference"]
    if len(refs) > 1:
        raise w.index(refs[1]).key("role").fail(
            "reference", f"is a second reference (inputs[{refs[0]}] is one already; at most one)")
    return tuple(out)


def shorthand_roles(control_input: int, loopback_input: int | None) -> tuple[InputRole, ...]:
    """The roles of the one-control shorthand: the control input and the optional loopback."""
    roles = [InputRole(control_input, "control", f"control{control_input}")]
    if loopback_input is not None:
        roles.append(InputRole(loopback_input, "reference", f"reference{loopback_input}"))
    return tuple(roles)


def inputs_to_list(roles: Sequence[InputRole]) -> list[dict[str, Any]]:
    """Plain data of the roles; :func:`inputs_from_list` reads it back to equal roles."""
    out = []
    for r in roles:
        d: dict[str, Any] = {"channel": r.channel, "role": r.role, "name": r.name}
        if r.limit is not None:
            d["limit"] = {"units": "g2/Hz", "breakpoints": [
                {"f_hz": float(f), "asd": float(a)}
                for f, a in zip(r.limit.f_hz, r.limit.asd_g2_hz, strict=True)]}
        if r.role == "control":
            d["weight"] = r.weight
        out.append(d)
    return out
