"""A physical model of the drive/response chain, described by a YAML file a user can write.

Pure (numpy and the standard library; files are read through :mod:`liveshape.config`).

The chain is: sound-card output (full scale to volts, AC-coupling high-pass) -> amplifier
(voltage gain, optional subsonic high-pass, voltage clip, current trip) -> electrodynamic shaker
from its Thiele–Small parameters (coil ``Re + s Le`` with back-EMF ``Bl v``; moving mass, suspension
compliance and mechanical resistance) carrying a payload (a rigid mass plus modal masses on
spring/damper pairs) -> accelerometer (sensitivity, noise, high-pass) -> sound-card input (volts
to full scale, AC-coupling high-pass, noise), with the round-trip delay of the card.

Equations (SI units; ``x`` table displacement, ``y_j`` modal-mass displacements)::

    V      = (Re + s Le) I + Bl s X                                   (voice coil)
    Bl I   = (M s² + Rms s + 1/Cms) X + sum_j N_j (X - Y_j),  M = Mms + payload mass
    D_j Y_j = N_j X,  N_j = c_j s + k_j,  D_j = m_j s² + N_j,  k_j = m_j (2 pi f_j)²,
                      c_j = m_j 2 pi f_j / Q_j                         (modal masses)

which give, with ``Pi = prod_j D_j`` and ``P = (M s² + Rms s + 1/Cms) Pi
+ sum_j m_j s² N_j prod_{l != j} D_l``, ``Q = (Re + s Le) P + Bl² s Pi``:
``I/V = P/Q``, ``X/V = Bl Pi/Q``, ``Y_j/V = Bl N_j prod_{l != j} D_l / Q``; accelerations are
``s²`` times displacements. This is the standard lumped electro-mechanical analogue of a moving-coil
driver (R. H. Small, "Direct-radiator loudspeaker system analysis", JAES 20, 1972) with tuned
mass-spring-damper attachments (Den Hartog, "Mechanical Vibrations").

The ``ideal`` shaker model is an acceleration source: the table acceleration is ``g_per_v`` g per
amplifier volt at every frequency, whatever the payload; modal masses still respond to it as
base-excited single-degree-of-freedom systems.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from liveshape.errors import ConfigError
from liveshape.profile import G0_M_S2
from liveshape.schema import (
    Where,
    as_choice,
    as_float,
    as_int,
    as_list,
    as_str,
    check_keys,
)

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
class Payload:
    """Rigid mass added to the moving mass, modal masses, and where the control sensor sits.

    ``control_point`` is ``"table"`` or the ``name`` of one resonance.
    """

    mass_kg: float = 0.0
    resonances: tuple[Resonance, ...] = ()
    control_point: str = "table"

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
    Accelerometer: {"sens_mv_per_g": ("float", _G0), "noise_g_rms": ("float", _GE0),
                    "highpass_hz": ("corner", {})},
}
_REQUIRED: dict[type, tuple[str, ...]] = {
    CoilHeating: ("thermal_resistance_k_per_w", "time_constant_s"),
    ThieleSmallShaker: ("re_ohm", "bl_tm", "mms_kg", "cms_m_per_n", "rms_kg_s"),
    Resonance: ("f_hz", "q", "mass_kg"),
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
    d = check_keys(data, ("mass_kg", "resonances", "control_point"), where)
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
    mass = d.get("mass_kg")
    return Payload(
        mass_kg=0.0 if mass is None else as_float(mass, where.key("mass_kg"), ge=0.0),
        resonances=tuple(res),
        control_point=point,
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
    from liveshape.config import read_yaml_file  # the one yaml importer; imported on use

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
        },
        "accelerometer": dataclasses.asdict(plant.accelerometer),
    }


# -- continuous-time models ---------------------------------------------------------------------
Poly = tuple[np.ndarray, np.ndarray]  # (numerator, denominator) in descending powers of s


def mode_constants(r: Resonance, f_factor: float = 1.0) -> tuple[float, float, float]:
    """``(m, c, k)`` of a modal mass: ``k = m w²``, ``c = m w / Q``, ``w = 2 pi f f_factor``."""
    w = 2.0 * math.pi * r.f_hz * f_factor
    return r.mass_kg, r.mass_kg * w / r.q, r.mass_kg * w * w


def highpass_tf(f_hz: float | None, order: int = 1) -> Poly:
    """Analog high-pass: ``s/(s + w)`` (order 1) or Butterworth ``s²/(s² + √2 w s + w²)``."""
    if f_hz is None:
        return np.array([1.0]), np.array([1.0])
    w = 2.0 * math.pi * f_hz
    if order == 1:
        return np.array([1.0, 0.0]), np.array([1.0, w])
    return np.array([1.0, 0.0, 0.0]), np.array([1.0, math.sqrt(2.0) * w, w * w])


def _mul(*polys: Poly) -> Poly:
    b, a = np.array([1.0]), np.array([1.0])
    for pb, pa in polys:
        b, a = np.polymul(b, pb), np.polymul(a, pa)
    return b, a


def electromechanical_tf(
    plant: Plant, *, re_ohm: float | None = None, f_factor: float = 1.0
) -> dict[str, Poly | None]:
    """Transfer functions per amplifier volt, as polynomials in ``s`` (see the module doc).

    Returns a dict with ``current_a_per_v`` (None for the ideal shaker), ``displacement_m_per_v``
    (table), ``table_accel_m_s2_per_v`` and ``accel_m_s2_per_v`` (at the control point).
    ``re_ohm`` overrides the coil resistance (heating); ``f_factor`` scales every modal frequency.
    """
    modes = [mode_constants(r, f_factor) for r in plant.payload.resonances]
    n_j = [np.array([c, k]) for _, c, k in modes]
    d_j = [np.array([m, c, k]) for m, c, k in modes]
    pi = np.array([1.0])
    for d in d_j:
        pi = np.polymul(pi, d)

    def others(j: int) -> np.ndarray:
        out = np.array([1.0])
        for l, d in enumerate(d_j):
            if l != j:
                out = np.polymul(out, d)
        return out

    s2 = np.array([1.0, 0.0, 0.0])
    ctrl = plant.payload.control_index()
    sh = plant.shaker
    if isinstance(sh, IdealShaker):
        g = sh.g_per_v * G0_M_S2
        table = (np.array([g]), np.array([1.0]))
        accel = table if ctrl is None else (g * n_j[ctrl], d_j[ctrl])
        return {
            "current_a_per_v": None,
            "displacement_m_per_v": (np.array([g]), s2),
            "table_accel_m_s2_per_v": table,
            "accel_m_s2_per_v": accel,
        }
    re = sh.re_ohm if re_ohm is None else re_ohm
    mech = np.array([plant.moving_mass_kg, sh.rms_kg_s, 1.0 / sh.cms_m_per_n])
    p = np.polymul(mech, pi)
    for j, (m, _, _) in enumerate(modes):
        p = np.polyadd(p, np.polymul(m * s2, np.polymul(n_j[j], others(j))))
    q = np.polyadd(np.polymul([sh.le_h, re], p), sh.bl_tm**2 * np.polymul([1.0, 0.0], pi))
    q = np.trim_zeros(q, "f")
    x_num = sh.bl_tm * pi
    if ctrl is None:
        a_num = np.polymul(s2, x_num)
    else:
        a_num = np.polymul(s2, sh.bl_tm * np.polymul(n_j[ctrl], others(ctrl)))
    return {
        "current_a_per_v": (p, q),
        "displacement_m_per_v": (x_num, q),
        "table_accel_m_s2_per_v": (np.polymul(s2, x_num), q),
        "accel_m_s2_per_v": (a_num, q),
    }


def drive_to_volts_tf(plant: Plant) -> Poly:
    """Card output FS -> amplifier output volts: scale, card AC coupling, subsonic filter."""
    k = plant.card.out_v_per_fs * plant.amplifier.gain_v_per_v
    amp = plant.amplifier
    return _mul(
        (np.array([k]), np.array([1.0])),
        highpass_tf(plant.card.out_highpass_hz, 1),
        highpass_tf(amp.highpass_hz, amp.highpass_order),
    )


def sensor_tf(plant: Plant) -> Poly:
    """Acceleration in m/s² at the control point -> card input FS (sensor and card high-passes)."""
    k = plant.accelerometer.sens_mv_per_g * 1e-3 / (G0_M_S2 * plant.card.in_v_per_fs)
    return _mul(
        (np.array([k]), np.array([1.0])),
        highpass_tf(plant.accelerometer.highpass_hz, 1),
        highpass_tf(plant.card.in_highpass_hz, 1),
    )


def chain_tf(plant: Plant) -> Poly:
    """Drive FS -> response FS, the rational part (the loop delay is not included)."""
    return _mul(drive_to_volts_tf(plant), electromechanical_tf(plant)["accel_m_s2_per_v"],
                sensor_tf(plant))


def _evaluate(poly: Poly, s: np.ndarray) -> np.ndarray:
    b, a = poly
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.polyval(b, s) / np.polyval(a, s)


def voltage_frf(plant: Plant, f_hz: Any, output: str) -> np.ndarray:
    """Complex FRF per amplifier volt of ``output`` (a key of :func:`electromechanical_tf`)."""
    poly = electromechanical_tf(plant)[output]
    if poly is None:
        raise ValueError(f"{output} is not modelled for the {plant.shaker.model} shaker")
    return _evaluate(poly, 2j * math.pi * np.asarray(f_hz, dtype=float))


def analytic_frf(plant: Plant, f_hz: Any, *, fs_hz: float = 48000.0) -> np.ndarray:
    """Continuous-time FRF from drive FS to response FS, loop delay included.

    ``H(f) = H_drive->V(s) H_V->accel(s) H_accel->FS(s) exp(-s D/fs)`` at ``s = j 2 pi f``, each
    factor evaluated from its polynomials; ``D`` is ``card.delay_samples`` and ``fs_hz`` the
    sample rate that turns it into seconds.
    """
    f = np.asarray(f_hz, dtype=float)
    s = 2j * math.pi * f
    h = (_evaluate(drive_to_volts_tf(plant), s)
         * _evaluate(electromechanical_tf(plant)["accel_m_s2_per_v"], s)
         * _evaluate(sensor_tf(plant), s))
    return h * np.exp(-s * plant.card.delay_samples / float(fs_hz))


def electromechanical_ss(
    plant: Plant, *, re_ohm: float | None = None, f_factor: float = 1.0
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """State-space ``(A, B, C, D)`` from amplifier volts to ``[current A, table displacement m,
    control-point acceleration m/s²]``.

    Physical states: ``[i, x, v, y_1, w_1, ...]`` (coil current, table displacement and velocity,
    modal displacements and velocities); without inductance the current is algebraic and the
    state has no ``i``. The ideal shaker has states ``[z_j, dz_j/dt]`` (modal displacement
    relative to the table) and zero current/displacement rows; with no states at all the matrices
    have zero size and only ``D`` remains.
    """
    modes = [mode_constants(r, f_factor) for r in plant.payload.resonances]
    nm = len(modes)
    ctrl = plant.payload.control_index()
    sh = plant.shaker
    if isinstance(sh, IdealShaker):
        g = sh.g_per_v * G0_M_S2
        n = 2 * nm
        a, b = np.zeros((n, n)), np.zeros((n, 1))
        for j, (m, c, k) in enumerate(modes):
            a[2 * j, 2 * j + 1] = 1.0
            a[2 * j + 1, 2 * j] = -k / m
            a[2 * j + 1, 2 * j + 1] = -c / m
            b[2 * j + 1, 0] = -g
        cc, dd = np.zeros((3, n)), np.zeros((3, 1))
        if ctrl is None:
            dd[2, 0] = g
        else:  # absolute acceleration of the mode = table + relative = -(c z' + k z)/m
            cc[2] = a[2 * ctrl + 1]
            dd[2, 0] = 0.0
        return a, b, cc, dd
    re = sh.re_ohm if re_ohm is None else re_ohm
    has_i = sh.le_h > 0.0
    o = 1 if has_i else 0  # offset of x
    n = o + 2 + 2 * nm
    a, b = np.zeros((n, n)), np.zeros((n, 1))
    ix, iv = o, o + 1
    mt = plant.moving_mass_kg
    a[ix, iv] = 1.0
    a[iv, ix] = -1.0 / (sh.cms_m_per_n * mt)
    a[iv, iv] = -sh.rms_kg_s / mt
    cc, dd = np.zeros((3, n)), np.zeros((3, 1))
    if has_i:
        a[0, 0] = -re / sh.le_h
        a[0, iv] = -sh.bl_tm / sh.le_h
        b[0, 0] = 1.0 / sh.le_h
        a[iv, 0] = sh.bl_tm / mt
        cc[0, 0] = 1.0
    else:  # i = (V - Bl v)/Re
        a[iv, iv] -= sh.bl_tm**2 / (re * mt)
        b[iv, 0] = sh.bl_tm / (re * mt)
        cc[0, iv] = -sh.bl_tm / re
        dd[0, 0] = 1.0 / re
    for j, (m, c, k) in enumerate(modes):
        iy, iw = o + 2 + 2 * j, o + 3 + 2 * j
        a[iy, iw] = 1.0
        a[iw, iy], a[iw, iw], a[iw, ix], a[iw, iv] = -k / m, -c / m, k / m, c / m
        a[iv, ix] -= k / mt
        a[iv, iv] -= c / mt
        a[iv, iy] += k / mt
        a[iv, iw] += c / mt
    cc[1, ix] = 1.0
    row = iv if ctrl is None else o + 3 + 2 * ctrl
    cc[2] = a[row]
    dd[2, 0] = b[row, 0]
    return a, b, cc, dd
