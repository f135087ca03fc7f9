"""A physical model of the drive/response chain, described by a YAML file a user can write.

Pure (the standard library; files are read through :mod:`liveshape.testdef.config`).

The chain is: sound-card output (full scale to volts, AC-coupling high-pass) -> amplifier
(voltage gain, optional subsonic high-pass, voltage clip, current trip) -> electrodynamic shaker
from its Thiele–Small parameters (coil ``Re + s Le`` with back-EMF ``Bl v``; moving mass, suspension
compliance and mechanical resistance) carrying a payload (a rigid mass plus modal masses on
spring/damper pairs) -> accelerometer (sensitivity, noise, high-pass) -> sound-card input (volts
to full scale, AC-coupling high-pass, noise), with the round-trip delay of the card.

This module holds the description (frozen dataclasses), its strict YAML mapping and the packaged
presets. The continuous-time equations and models (transfer functions, state space, FRFs) are in
:mod:`liveshape.rigs.plantmodel`, which reads this description (this module imports nothing of
it).
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from liveshape.errors import ConfigError
from liveshape.schema import (
    Where,
    as_choice,
    as_float,
    as_int,
    as_list,
    as_str,
    check_keys,
)

__all__ = [
    # the description
    "COPPER_TEMPCO_PER_K", "PRESETS_DIR", "SoundCard", "Amplifier", "CoilHeating",
    "ThieleSmallShaker", "IdealShaker", "Resonance", "FixturePoint", "Payload", "Accelerometer",
    "Plant",
    # reading and writing
    "plant_from_mapping", "preset_names", "load_plant", "plant_to_mapping",
]

#: Copper's temperature coefficient of resistance near room temperature, per kelvin
#: (about 0.39 %/K; from memory, handbook value).
COPPER_TEMPCO_PER_K = 0.0039

PRESETS_DIR = Path(__file__).resolve().parent.parent / "presets"


# -- the description ----------------------------------------------------------------------------
@dataclass(frozen=True)
class SoundCard:
    """The audio interface: converter scales, AC coupling, loop delay, input noise.

    ``out_v_per_fs``/``in_v_per_fs`` are volts (instantaneous) per unit full scale; the corners are
    first-order high-pass corners in Hz (None: DC-coupled); ``delay_samples`` is the round-trip
    delay; ``in_noise_fs_rms`` is the input noise in FS rms, white over 0 .. fs/2. Both converters
    clip at ±1 FS.
    """

    out_v_per_fs: float = 1.0
    in_v_per_fs: float = 1.0
    out_highpass_hz: float | None = None
    in_highpass_hz: float | None = None
    delay_samples: int = 0
    in_noise_fs_rms: float = 0.0


@dataclass(frozen=True)
class Amplifier:
    """Voltage amplifier: gain V/V, output clip (peak V), current trip (peak A), subsonic filter.

    ``highpass_hz`` is a Butterworth high-pass of ``highpass_order`` (1 or 2) at the amplifier's
    input. When the output current exceeds ``i_max_a`` the protection trips: the output goes to
    zero volts and stays there.
    """

    gain_v_per_v: float = 1.0
    v_out_max_v: float | None = None
    i_max_a: float | None = None
    highpass_hz: float | None = None
    highpass_order: int = 2


@dataclass(frozen=True)
class CoilHeating:
    """First-order thermal model of the voice coil: ``tau dT/dt = R_th P - T``, ``P = I² Re``.

    ``Re = Re0 (1 + tempco_per_k T)`` with ``T`` the temperature rise in kelvin.
    """

    thermal_resistance_k_per_w: float
    time_constant_s: float
    tempco_per_k: float = COPPER_TEMPCO_PER_K


@dataclass(frozen=True)
class ThieleSmallShaker:
    """A moving-coil shaker from its Thiele–Small parameters (SI units).

    ``re_ohm`` coil resistance, ``le_h`` coil inductance, ``bl_tm`` force factor, ``mms_kg`` moving
    mass, ``cms_m_per_n`` suspension compliance, ``rms_kg_s`` mechanical resistance, ``xmax_m``
    one-way linear excursion (None: no limit), ``coil_heating`` optional.
    """

    re_ohm: float
    bl_tm: float
    mms_kg: float
    cms_m_per_n: float
    rms_kg_s: float
    le_h: float = 0.0
    xmax_m: float | None = None
    coil_heating: CoilHeating | None = None
    model: str = field(default="thiele_small", init=False)

    @property
    def fs_hz(self) -> float:
        """Free-air resonance ``1/(2 pi sqrt(Mms Cms))`` in Hz (Thiele–Small definition)."""
        return 1.0 / (2.0 * math.pi * math.sqrt(self.mms_kg * self.cms_m_per_n))


@dataclass(frozen=True)
class IdealShaker:
    """An acceleration source: ``g_per_v`` g of table acceleration per amplifier volt, flat."""

    g_per_v: float = 1.0
    model: str = field(default="ideal", init=False)
    xmax_m: None = field(default=None, init=False)
    coil_heating: None = field(default=None, init=False)


@dataclass(frozen=True)
class Resonance:
    """A modal mass ``mass_kg`` on a spring/damper to the table: fixed-base ``f_hz`` and ``q``."""

    f_hz: float
    q: float
    mass_kg: float
    name: str = ""

    def scaled(self, f_factor: float) -> Resonance:
        """The same mode with its frequency multiplied by ``f_factor`` (same Q and mass)."""
        return dataclasses.replace(self, f_hz=self.f_hz * f_factor)


@dataclass(frozen=True)
class FixturePoint:
    """A second measuring point on a fixture that rocks on the table (a massless-reaction model:
    the fixture's rocking does not load the shaker).

    The point's acceleration is the table's times
    ``((1 - coupling) s² + 2ζω s + ω²)/(s² + 2ζω s + ω²)``, ``ω = 2π f_hz``, ``ζ = 1/(2q)``:
    a rocking mode of frequency ``f_hz`` excited by the table through the fixture's off-centre
    mass, read at a lever arm (``coupling = m e L / J``; derivation in docs/methods.md, "Several
    inputs"). ``coupling`` 0 is a rigid point (the table's motion); 1 gives the base-excitation
    transmissibility of a single mode; negative values are points on the other side of the pivot
    from the centre of mass.
    """

    name: str
    f_hz: float
    q: float
    coupling: float

    def scaled(self, f_factor: float) -> FixturePoint:
        """The same point with its rocking frequency multiplied by ``f_factor``."""
        return dataclasses.replace(self, f_hz=self.f_hz * f_factor)


@dataclass(frozen=True)
class Payload:
    """Rigid mass added to the moving mass, modal masses, and where the control sensor sits.

    ``control_point`` is ``"table"`` or the ``name`` of one resonance. ``fixture_points`` are
    further measuring points on a rocking fixture (:class:`FixturePoint`), for a second control
    input of the simulated rig.
    """

    mass_kg: float = 0.0
    resonances: tuple[Resonance, ...] = ()
    control_point: str = "table"
    fixture_points: tuple[FixturePoint, ...] = ()

    def control_index(self) -> int | None:
        """Index of the resonance carrying the sensor, None for the table."""
        if self.control_point == "table":
            return None
        for j, r in enumerate(self.resonances):
            if r.name == self.control_point:
                return j
        raise ConfigError(f"payload.control_point = {self.control_point!r} names no resonance")


@dataclass(frozen=True)
class Accelerometer:
    """Control accelerometer with conditioner: mV/g, noise (g rms, white 0 .. fs/2), high-pass."""

    sens_mv_per_g: float = 100.0
    noise_g_rms: float = 0.0
    highpass_hz: float | None = None


@dataclass(frozen=True)
class Plant:
    """The whole chain. ``source`` (where it was read from) does not take part in comparisons."""

    name: str
    shaker: ThieleSmallShaker | IdealShaker
    card: SoundCard = SoundCard()
    amplifier: Amplifier = Amplifier()
    payload: Payload = Payload()
    accelerometer: Accelerometer = Accelerometer()
    description: str = ""
    source: str = field(default="", compare=False)

    @property
    def fs_per_g(self) -> float:
        """Input full scale per g of acceleration at the sensor (flat, in-band)."""
        return self.accelerometer.sens_mv_per_g * 1e-3 / self.card.in_v_per_fs

    @property
    def moving_mass_kg(self) -> float:
        """Shaker moving mass plus rigid payload (modal masses not included), kg."""
        mms = getattr(self.shaker, "mms_kg", 0.0)
        return mms + self.payload.mass_kg


# -- reading --------------------------------------------------------------------------------------
# Per section: key -> (kind, bounds). Defaults are the dataclass defaults; ``null`` gives them too.
_G0, _GE0 = {"gt": 0.0}, {"ge": 0.0}
_RULES: dict[type, dict[str, tuple[str, dict]]] = {
    SoundCard: {"out_v_per_fs": ("float", _G0), "in_v_per_fs": ("float", _G0),
                "out_highpass_hz": ("corner", {}), "in_highpass_hz": ("corner", {}),
                "delay_samples": ("int", {"ge": 0}), "in_noise_fs_rms": ("float", _GE0)},
    Amplifier: {"gain_v_per_v": ("float", _G0), "v_out_max_v": ("float", _G0),
                "i_max_a": ("float", _G0), "highpass_hz": ("corner", {}),
                "highpass_order": ("int", {"ge": 1, "le": 2})},
    CoilHeating: {"thermal_resistance_k_per_w": ("float", _G0), "time_constant_s": ("float", _G0),
                  "tempco_per_k": ("float", {"gt": 0.0, "lt": 0.1})},
    ThieleSmallShaker: {"model": ("model", {}), "re_ohm": ("float", _G0), "le_h": ("float", _GE0),
                        "bl_tm": ("float", _G0), "mms_kg": ("float", _G0),
                        "cms_m_per_n": ("float", _G0), "rms_kg_s": ("float", _GE0),
                        "xmax_m": ("float", _G0), "coil_heating": ("heating", {})},
    IdealShaker: {"model": ("model", {}), "g_per_v": ("float", _G0)},
    Resonance: {"name": ("str", {}), "f_hz": ("float", _G0), "q": ("float", _G0),
                "mass_kg": ("float", _G0)},
    FixturePoint: {"name": ("str", {}), "f_hz": ("float", _G0), "q": ("float", _G0),
                   "coupling": ("float", {"gt": -10.0, "lt": 10.0})},
    Accelerometer: {"sens_mv_per_g": ("float", _G0), "noise_g_rms": ("float", _GE0),
                    "highpass_hz": ("corner", {})},
}
_REQUIRED: dict[type, tuple[str, ...]] = {
    CoilHeating: ("thermal_resistance_k_per_w", "time_constant_s"),
    ThieleSmallShaker: ("re_ohm", "bl_tm", "mms_kg", "cms_m_per_n", "rms_kg_s"),
    Resonance: ("f_hz", "q", "mass_kg"),
    FixturePoint: ("name", "f_hz", "q", "coupling"),
}


def _section(cls: type, data: Any, where: Where) -> Any:
    """Read one section into ``cls`` by :data:`_RULES`, strictly; one-line errors."""
    rules, required = _RULES[cls], _REQUIRED.get(cls, ())
    d = check_keys(data, rules, where, required=required)
    kwargs: dict[str, Any] = {}
    for key, (kind, bounds) in rules.items():
        value, w = d.get(key), where.key(key)
        if value is None:
            if key in required:
                raise w.fail(value, "is required")
            continue
        if kind == "float":
            kwargs[key] = as_float(value, w, **bounds)
        elif kind == "corner":  # a high-pass corner in Hz; 0 means none (DC-coupled)
            kwargs[key] = as_float(value, w, ge=0.0) or None
        elif kind == "int":
            kwargs[key] = as_int(value, w, **bounds)
        elif kind == "str":
            kwargs[key] = as_str(value, w)
        elif kind == "heating":
            kwargs[key] = _section(CoilHeating, value, w)
    return cls(**kwargs)


def _shaker(data: Any, where: Where) -> ThieleSmallShaker | IdealShaker:
    model = "thiele_small"
    if isinstance(data, dict) and data.get("model") is not None:
        model = as_choice(data["model"], where.key("model"), ("thiele_small", "ideal"))
    return _section(IdealShaker if model == "ideal" else ThieleSmallShaker, data, where)


def _payload(data: Any, where: Where) -> Payload:
    d = check_keys(data, ("mass_kg", "resonances", "control_point", "fixture_points"), where)
    res: list[Resonance] = []
    items = d.get("resonances") or []
    for j, item in enumerate(as_list(items, where.key("resonances"))):
        w = where.key("resonances").index(j)
        r = _section(Resonance, item, w)
        r = r if r.name else dataclasses.replace(r, name=f"mode{j + 1}")
        if r.name == "table" or any(x.name == r.name for x in res):
            raise w.key("name").fail(r.name, "must be unique and not 'table'")
        res.append(r)
    point = as_choice(as_str(d.get("control_point", "table"), where.key("control_point")),
                      where.key("control_point"), ["table"] + [r.name for r in res])
    points: list[FixturePoint] = []
    for j, item in enumerate(as_list(d.get("fixture_points") or [], where.key("fixture_points"))):
        w = where.key("fixture_points").index(j)
        fp = _section(FixturePoint, item, w)
        if fp.name == "table" or any(x.name == fp.name for x in [*res, *points]):
            raise w.key("name").fail(fp.name, "must be unique among resonances and fixture "
                                     "points and not 'table'")
        points.append(fp)
    mass = d.get("mass_kg")
    return Payload(
        mass_kg=0.0 if mass is None else as_float(mass, where.key("mass_kg"), ge=0.0),
        resonances=tuple(res),
        control_point=point,
        fixture_points=tuple(points),
    )


_TOP_KEYS = ("name", "description", "card", "amplifier", "shaker", "payload", "accelerometer")


def plant_from_mapping(data: Any, where: Where, *, default_name: str = "plant") -> Plant:
    """Build a :class:`Plant` from plain data (a parsed YAML document), with strict keys.

    Parameters
    ----------
    data : mapping
        Top-level keys ``name, description, card, amplifier, shaker, payload, accelerometer``;
        only ``shaker`` is required (see ``examples/rigs/README.md`` for every key, unit and
        default).
    where : Where
        The document's place for error messages.
    default_name : str
        Name used when the document has no ``name``.

    Raises
    ------
    ConfigError
        One line naming the file, key, value and rule; an unknown key suggests the nearest one.
    """
    d = check_keys(data, _TOP_KEYS, where, required=("shaker",))
    name = as_str(d["name"], where.key("name")) if "name" in d else default_name
    desc = d.get("description") or ""
    if not isinstance(desc, str):
        raise where.key("description").fail(desc, "must be a string")
    shaker = _shaker(d["shaker"], where.key("shaker"))
    payload = _payload(d.get("payload"), where.key("payload"))
    return Plant(
        name=name,
        shaker=shaker,
        card=_section(SoundCard, d.get("card"), where.key("card")),
        amplifier=_section(Amplifier, d.get("amplifier"), where.key("amplifier")),
        payload=payload,
        accelerometer=_section(Accelerometer, d.get("accelerometer"), where.key("accelerometer")),
        description=desc.strip(),
        source=where.source,
    )


def preset_names() -> tuple[str, ...]:
    """Names of the packaged plant presets."""
    return tuple(sorted(p.stem for p in PRESETS_DIR.glob("*.yaml")))


def load_plant(name_or_path: str | Path) -> Plant:
    """Load a packaged preset by name (``loudspeaker``, ``bench``, ``ideal``) or a plant YAML file.

    A string without a path separator and without a ``.yaml``/``.yml`` suffix is a preset name.

    Raises
    ------
    ConfigError
        Unknown preset (with the valid names), missing or malformed file, or a bad key or value.
    """
    from liveshape.testdef.config import read_yaml_file  # the one yaml importer; imported on use

    text = str(name_or_path)
    is_path = (isinstance(name_or_path, Path) or "/" in text or "\\" in text
               or text.endswith((".yaml", ".yml")))
    if is_path:
        path = Path(text)
        return plant_from_mapping(read_yaml_file(path), Where(str(path)), default_name=path.stem)
    names = preset_names()
    if text not in names:
        import difflib

        near = difflib.get_close_matches(text, names, n=1, cutoff=0.6)
        hint = f"; did you mean '{near[0]}'?" if near else ""
        raise ConfigError(
            f"rig.plant = {text!r} is not a preset (valid: {', '.join(names)}) "
            f"nor a .yaml path{hint}"
        )
    path = PRESETS_DIR / f"{text}.yaml"
    plant = plant_from_mapping(read_yaml_file(path), Where(f"preset {text}"), default_name=text)
    return dataclasses.replace(plant, source=f"preset:{text}")


def plant_to_mapping(plant: Plant) -> dict[str, Any]:
    """Plain data (YAML-ready) that :func:`plant_from_mapping` reads back to an equal plant."""
    sh = plant.shaker
    if isinstance(sh, IdealShaker):
        shaker: dict[str, Any] = {"model": "ideal", "g_per_v": sh.g_per_v}
    else:
        shaker = {"model": "thiele_small"}
        shaker.update({k: getattr(sh, k) for k in _RULES[ThieleSmallShaker] if k not in
                       ("model", "coil_heating")})
        ch = sh.coil_heating
        shaker["coil_heating"] = None if ch is None else dataclasses.asdict(ch)
    pl = plant.payload
    return {
        "name": plant.name,
        "description": plant.description,
        "card": dataclasses.asdict(plant.card),
        "amplifier": dataclasses.asdict(plant.amplifier),
        "shaker": shaker,
        "payload": {
            "mass_kg": pl.mass_kg,
            "resonances": [dataclasses.asdict(r) for r in pl.resonances],
            "control_point": pl.control_point,
            "fixture_points": [dataclasses.asdict(p) for p in pl.fixture_points],
        },
        "accelerometer": dataclasses.asdict(plant.accelerometer),
    }
