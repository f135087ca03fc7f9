"""Test definitions: frozen dataclasses read strictly from a mapping, a YAML file or a CSV profile.

Pure apart from reading the files it is pointed at (YAML through :mod:`liveshape.testdef.config`,
CSV through :func:`liveshape.dsp.profile.read_profile_csv`). Every value has a built-in default; a
file overrides the defaults, and dotted command-line overrides (``{"control.fs_hz": 8000}``)
override the file. Every mistake is one :class:`~liveshape.errors.ConfigError` line naming the file
(or ``command line``), the dotted key, the value and the rule. Faults (kinds, :class:`FaultSpec`,
:func:`parse_fault`) are in :mod:`liveshape.testdef.fault_spec` and the places that name the
command line in :mod:`liveshape.testdef.overrides`; their public names are re-exported here.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Any

from liveshape.dsp.multichannel import STRATEGIES
from liveshape.dsp.profile import Profile
from liveshape.errors import ConfigError
from liveshape.schema import (
    Where,
    as_bool,
    as_choice,
    as_float,
    as_int,
    as_list,
    as_str,
    check_keys,
)
from liveshape.testdef import config
from liveshape.testdef.fault_spec import (  # re-exported: FAULT_KINDS, FaultSpec, parse_fault
    FAULT_KINDS,
    FaultSpec,
    fault_from_mapping,
    parse_fault,
)
from liveshape.testdef.hum_spec import HumSpec, hum_from_mapping
from liveshape.testdef.inputs import InputRole, inputs_from_list, inputs_to_list, shorthand_roles
from liveshape.testdef.overrides import COMMAND_LINE, OverrideWhere, did_you_mean
from liveshape.testdef.profilefile import profile_from_points, read_profile_csv
from liveshape.testdef.tolerance import Tolerance, tolerance_from_mapping
from liveshape.testdef.tone_spec import ToneSpec, check_tones, tones_from_list

__all__ = [
    "CLIP_SIGMA_FLOOR", "COMMAND_LINE", "FAULT_KINDS", "MAX_FRAME_LENGTH", "MIN_BAND_LINES",
    "MIN_FRAME_LENGTH", "SPEC_SUFFIXES", "ControlSettings", "FaultSpec", "InputRole",
    "RigSelection", "SafetyLimits", "Schedule", "TestSpec", "ToneSpec", "check_spec",
    "load_spec", "parse_fault",
    "spec_from_mapping", "spec_to_mapping",
]

#: Lowest clipping level of the drive, in multiples of its rms: IEC 60068-2-64 (Test Fh, random
#: vibration) requires a drive crest factor of at least 2.5 (from a secondary summary of the
#: standard; docs/methods.md, "Gaussian drive: crest factor, kurtosis and clipping").
CLIP_SIGMA_FLOOR = 2.5
MIN_FRAME_LENGTH = 256
MAX_FRAME_LENGTH = 1 << 20
MIN_BAND_LINES = 8
SPEC_SUFFIXES = (".yaml", ".yml", ".csv", ".txt")


@dataclass(frozen=True)
class Schedule:
    """Level schedule: reduced-level steps in dB (last is 0), hold and full-level times in s."""

    steps_db: tuple[float, ...] = (-12.0, -9.0, -6.0, -3.0, 0.0)
    hold_s: float = 3.0
    full_level_s: float = 60.0
    rate_db_s: float = 6.0
    max_step_s: float | None = None  # None: automatic (liveshape.control.runplan)


@dataclass(frozen=True)
class ControlSettings:
    """Estimation and equalization settings of the control loop."""

    fs_hz: float = 48000.0
    frame_length: int = 8192
    target_dof: float = 120.0
    averaging: str = "exponential"
    update_gain: float = 0.5
    max_step_db: float = 3.0
    max_boost_db: float = 20.0
    coherence_min: float = 0.5
    law: str = "direct"
    #: ``fast``: a drive update every ``update_interval_s`` on running averages that follow the
    #: drive (docs/methods.md, "Fast update loop"); ``block``: one update per fresh estimate.
    loop: str = "fast"
    update_interval_s: float = 0.35
    #: Kurtosis target of the control response (3: Gaussian; None: a Gaussian drive, no
    #: kurtosis control). docs/methods.md, "Non-Gaussian drive" and "Kurtosis in the loop".
    kurtosis: float | None = None
    #: How several control inputs make one control spectrum: ``average`` (weighted by each
    #: input's ``weight``), ``maximum`` or ``minimum`` line by line
    #: (:func:`liveshape.dsp.multichannel.combine_control`); one control input ignores it.
    strategy: str = "average"
    #: Lines a monitor's limit notches: ``allowed`` (left out of the tolerance figures, listed)
    #: or ``fail`` (a test with a notch does not pass).
    notches: str = "allowed"

    @property
    def df_hz(self) -> float:
        """Line spacing in Hz, ``fs_hz / frame_length``."""
        return self.fs_hz / self.frame_length


@dataclass(frozen=True)
class SafetyLimits:
    """Drive limits, abort rules and the checks made before and during a run (FS = full scale)."""

    drive_rms_max_fs: float = 0.5
    drive_peak_max_fs: float = 1.0
    clip_sigma: float | None = 4.0
    max_rate_db_s: float = 12.0
    abort_ramp_s: float = 0.25
    input_overload_fs: float = 0.98
    abort_persist_updates: int = 2
    abort_min_lines: int = 3
    loop_open_db: float = 10.0
    connect_coherence_min: float = 0.5
    connect_level_fs: float = 0.01
    silent_floor_fs: float = 1e-6


@dataclass(frozen=True)
class RigSelection:
    """Which rig runs the test: the simulated plant or a real audio device."""

    kind: str = "sim"
    plant: str = "loudspeaker"
    device: str | None = None
    calibration: str | None = None
    uncalibrated: bool = False
    #: The channel map of an audio rig, channels counted from 1 as printed on the interface:
    #: the output carrying the drive, the input of the control accelerometer and an optional
    #: input that receives a copy of the drive (a loopback cable; None: none).
    drive_output: int = 1
    control_input: int = 1
    loopback_input: int | None = None
    #: Mains hum the simulated rig adds to the control input (None: none); sim only.
    hum: HumSpec | None = None
    #: The roles of several inputs (``rig.inputs``; :mod:`liveshape.testdef.inputs`); None: the
    #: shorthand above. With a list, ``control_input`` is its first control and
    #: ``loopback_input`` its reference, so one-control code reads the list's first control.
    inputs: tuple[InputRole, ...] | None = None

    def channel_map(self) -> dict[str, int | None]:
        """The channel map (counted from 1) under its spec keys."""
        return {"drive_output": self.drive_output, "control_input": self.control_input,
                "loopback_input": self.loopback_input}

    def input_roles(self) -> tuple[InputRole, ...]:
        """Every input with its role, for either form (the list, or the shorthand's control
        and optional loopback as the reference)."""
        if self.inputs is not None:
            return self.inputs
        return shorthand_roles(self.control_input, self.loopback_input)


@dataclass(frozen=True)
class TestSpec:
    """A whole test definition, resolved (defaults, file and overrides merged)."""

    __test__ = False  # not a pytest test class

    name: str
    profile: Profile
    tolerance: Tolerance = field(default_factory=Tolerance)
    schedule: Schedule = field(default_factory=Schedule)
    control: ControlSettings = field(default_factory=ControlSettings)
    safety: SafetyLimits = field(default_factory=SafetyLimits)
    rig: RigSelection = field(default_factory=RigSelection)
    faults: tuple[FaultSpec, ...] = ()
    seed: int | None = None
    #: Sine tones on top of the random (sine-on-random); empty: random only.
    tones: tuple[ToneSpec, ...] = ()
    source: str = ""


# -- sections --------------------------------------------------------------------------------
_TOP_KEYS = tuple(f.name for f in fields(TestSpec) if f.name != "source")
_RESOLUTION_KEYS = ("frame_length", "lines", "df_hz")

# Rules of the plain fields of each section: a float with bounds, an int ("int") with a lower
# bound, or a choice ("choice") among words.
_RULES: dict[str, dict[str, tuple[str, Any]]] = {
    "schedule": {
        "hold_s": ("float", {"ge": 0}),
        "full_level_s": ("float", {"gt": 0}),
        "rate_db_s": ("float", {"gt": 0}),
    },
    "control": {
        "target_dof": ("float", {"ge": 2}),
        "averaging": ("choice", ("linear", "exponential")),
        "update_gain": ("float", {"gt": 0, "le": 1}),
        "max_step_db": ("float", {"gt": 0}),
        "max_boost_db": ("float", {"ge": 0}),
        "coherence_min": ("float", {"ge": 0, "le": 1}),
        "law": ("choice", ("direct", "blend")),
        "loop": ("choice", ("fast", "block")),
        "update_interval_s": ("float", {"gt": 0, "le": 10}),
        "strategy": ("choice", STRATEGIES),
        "notches": ("choice", ("allowed", "fail")),
    },
    "safety": {
        "drive_rms_max_fs": ("float", {"gt": 0, "le": 1}),
        "drive_peak_max_fs": ("float", {"gt": 0, "le": 1}),
        "max_rate_db_s": ("float", {"gt": 0}),
        "abort_ramp_s": ("float", {"gt": 0}),
        "input_overload_fs": ("float", {"gt": 0, "le": 1}),
        "abort_persist_updates": ("int", {"ge": 1}),
        "abort_min_lines": ("int", {"ge": 1}),
        "loop_open_db": ("float", {"gt": 0}),
        "connect_coherence_min": ("float", {"ge": 0, "le": 1}),
        "connect_level_fs": ("float", {"gt": 0, "le": 1}),
        "silent_floor_fs": ("float", {"gt": 0, "lt": 1}),
    },
}
_SECTIONS: dict[str, tuple[str, ...]] = {
    "tolerance": ("alarm_db", "abort_db", "rms_alarm_db", "rms_abort_db", "bands",
                  "max_alarm_fraction"),
    "schedule": tuple(f.name for f in fields(Schedule)),
    "control": ("fs_hz", *_RESOLUTION_KEYS, *_RULES["control"], "kurtosis"),
    "safety": tuple(f.name for f in fields(SafetyLimits)),
    "rig": tuple(f.name for f in fields(RigSelection)),
}


def _plain_fields(section: str, d: dict[str, Any], w: OverrideWhere, base: Any) -> dict[str, Any]:
    out = {}
    for key, (kind, arg) in _RULES[section].items():
        value = d.get(key, getattr(base, key))
        if kind == "float":
            out[key] = as_float(value, w.key(key), **arg)
        elif kind == "int":
            out[key] = as_int(value, w.key(key), **arg)
        else:
            out[key] = as_choice(value, w.key(key), arg)
    return out


def _schedule(data: Any, w: OverrideWhere) -> Schedule:
    d = check_keys(data, _SECTIONS["schedule"], w)
    steps = Schedule().steps_db
    if "steps_db" in d:
        ws = w.key("steps_db")
        raw = as_list(d["steps_db"], ws, min_len=1)
        steps = tuple(as_float(x, ws.index(i)) for i, x in enumerate(raw))
        for i in range(1, len(steps)):
            if not steps[i] > steps[i - 1]:
                raise ws.index(i).fail(raw[i], f"is not above steps_db[{i - 1}] (steps increase)")
        if steps[-1] != 0.0:
            raise ws.index(len(steps) - 1).fail(raw[-1], "must be 0 (the last step is full level)")
    plain = _plain_fields("schedule", d, w, Schedule())
    if d.get("max_step_s") is not None:  # checked against the step's least time by the loop
        plain["max_step_s"] = as_float(d["max_step_s"], w.key("max_step_s"), gt=0)
    return Schedule(steps_db=steps, **plain)


def _control(data: Any, w: OverrideWhere) -> ControlSettings:
    d = check_keys(data, _SECTIONS["control"], w)
    base = ControlSettings()
    fs = as_float(d.get("fs_hz", base.fs_hz), w.key("fs_hz"), gt=0)
    given = [k for k in _RESOLUTION_KEYS if k in d]
    if len(given) > 1:
        raise ConfigError(
            f"{w.key(given[1])}: give only one of {', '.join(_RESOLUTION_KEYS)} "
            f"(also given: {given[0]})"
        )
    wr = w.key(given[0] if given else "frame_length")
    if not given:
        n = base.frame_length
    elif given[0] == "frame_length":
        n = as_int(d["frame_length"], wr)
    elif given[0] == "lines":
        n = 2 * as_int(d["lines"], wr, ge=1)
    else:
        df = as_float(d["df_hz"], wr, gt=0, lt=fs / 2)
        n = 2 ** round(math.log2(fs / df))
    if not MIN_FRAME_LENGTH <= n <= MAX_FRAME_LENGTH or n % 2:
        raise wr.fail(
            d.get(given[0], n) if given else n,
            f"gives frame_length = {n}, which must be even and within "
            f"{MIN_FRAME_LENGTH}..{MAX_FRAME_LENGTH}",
        )
    plain = _plain_fields("control", d, w, base)
    if d.get("kurtosis") is not None:
        from liveshape.dsp.nongauss import KURTOSIS_MAX

        plain["kurtosis"] = as_float(d["kurtosis"], w.key("kurtosis"), ge=3, le=KURTOSIS_MAX)
    return ControlSettings(fs_hz=fs, frame_length=n, **plain)


def _safety(data: Any, w: OverrideWhere) -> SafetyLimits:
    d = check_keys(data, _SECTIONS["safety"], w)
    clip = d.get("clip_sigma", SafetyLimits().clip_sigma)
    if clip is not None:
        clip = as_float(clip, w.key("clip_sigma"))
        if clip < CLIP_SIGMA_FLOOR:
            raise w.key("clip_sigma").fail(
                d["clip_sigma"],
                f"is below the drive crest-factor floor of {CLIP_SIGMA_FLOOR:g} "
                "(IEC 60068-2-64); give >= 2.5 or null for no clipping",
            )
    s = SafetyLimits(clip_sigma=clip, **_plain_fields("safety", d, w, SafetyLimits()))
    if s.drive_rms_max_fs > s.drive_peak_max_fs:
        raise w.key("drive_rms_max_fs").fail(
            d.get("drive_rms_max_fs", s.drive_rms_max_fs),
            f"must be <= drive_peak_max_fs = {s.drive_peak_max_fs:g} (rms cannot exceed peak)",
        )
    return s


def _path_value(value: Any, w: OverrideWhere, base_dir: Path | None) -> str:
    """An absolute path: a file's relative path is read against its folder, an override's
    against the current folder."""
    p = Path(as_str(value, w)).expanduser()
    if not p.is_absolute() and base_dir is not None and not w.from_command_line:
        p = base_dir / p
    return str(p.resolve())


def _rig(data: Any, w: OverrideWhere, base_dir: Path | None) -> RigSelection:
    d = check_keys(data, _SECTIONS["rig"], w)
    b = RigSelection()
    plant = as_str(d.get("plant", b.plant), w.key("plant"))
    if "plant" in d and (plant.endswith((".yaml", ".yml")) or "/" in plant):
        plant = _path_value(plant, w.key("plant"), base_dir)
    device = d.get("device")
    if device is not None:
        if isinstance(device, int) and not isinstance(device, bool) and device >= 0:
            device = str(device)
        device = as_str(device, w.key("device"))
    calibration = d.get("calibration")
    if calibration is not None:
        calibration = _path_value(calibration, w.key("calibration"), base_dir)
    uncal = as_bool(d.get("uncalibrated", b.uncalibrated), w.key("uncalibrated"))
    if uncal and calibration is not None:
        raise w.key("uncalibrated").fail(uncal, "contradicts rig.calibration (give one of them)")
    # channels count from 1, as printed on the interface
    drive_out = as_int(d.get("drive_output", b.drive_output), w.key("drive_output"), ge=1)
    control_in = as_int(d.get("control_input", b.control_input), w.key("control_input"), ge=1)
    loop_in = d.get("loopback_input")
    if loop_in is not None:
        loop_in = as_int(loop_in, w.key("loopback_input"), ge=1)
        if loop_in == control_in:
            raise w.key("loopback_input").fail(
                loop_in, f"is the control input (rig.control_input = {control_in}); the drive's "
                "loopback needs an input of its own")
    inputs = None
    if d.get("inputs") is not None:
        short = [k for k in ("control_input", "loopback_input") if k in d]
        if short:
            raise w.key(short[0]).fail(d[short[0]], "is the one-control shorthand; with "
                                       "rig.inputs give every input in the list instead")
        inputs = inputs_from_list(d["inputs"], w.key("inputs"))
        control_in = next(r.channel for r in inputs if r.role == "control")
        loop_in = next((r.channel for r in inputs if r.role == "reference"), None)
    kind = as_choice(d.get("kind", b.kind), w.key("kind"), ("sim", "audio"))
    hum = d.get("hum")
    if hum is not None:
        hum = hum_from_mapping(hum, w.key("hum"))
        if kind != "sim":
            raise w.key("hum").fail(hum.as_mapping(), f"simulates mains hum on the simulated "
                                    f"rig only (rig.kind = {kind})")
    return RigSelection(
        kind=kind,
        plant=plant,
        device=device,
        calibration=calibration,
        uncalibrated=uncal,
        drive_output=drive_out,
        control_input=control_in,
        loopback_input=loop_in,
        hum=hum,
        inputs=inputs,
    )


def _profile(data: Any, w: OverrideWhere, base_dir: Path | None, name: str) -> Profile:
    if isinstance(data, str):  # a bare path: profile: bench.csv
        data = {"file": data}
    d = check_keys(data, ("name", "units", "breakpoints", "file"), w)
    pname = as_str(d["name"], w.key("name")) if "name" in d else name
    if "file" in d:
        extra = [k for k in ("units", "breakpoints") if k in d]
        if extra:
            raise ConfigError(
                f"{w.key(extra[0])}: not allowed with profile.file (the file "
                "gives the levels; its header names the units)"
            )
        fname = as_str(d["file"], w.key("file"))
        path = Path(fname).expanduser()
        if not path.is_absolute() and base_dir is not None and not w.key("file").from_command_line:
            path = base_dir / path
        if path.suffix.lower() not in (".csv", ".txt"):
            raise w.key("file").fail(fname, "must be a two-column .csv or .txt profile")
        if path.is_dir():
            raise w.key("file").fail(fname, f"is a directory, expected a profile file ({path})")
        if not path.is_file():
            raise w.key("file").fail(fname, f"does not exist (looked for {path})")
        return read_profile_csv(path, name=pname)
    if "breakpoints" not in d:
        raise ConfigError(f"{w}: give breakpoints (with units) or file")
    units = as_str(d.get("units", "g2/Hz"), w.key("units"))
    return profile_from_points(
        d["breakpoints"], w.key("breakpoints"), units=units, name=pname, units_where=w.key("units")
    )


# -- whole spec ------------------------------------------------------------------------------
_VERBATIM_OVERRIDES = (
    "name",
    "faults",
    "profile.file",
    "rig.device",
    "rig.plant",
    "rig.calibration",
)


def _apply_overrides(data: dict[str, Any], overrides: Mapping[str, Any]) -> frozenset[str]:
    valid = ["name", "seed", "faults", "tones", "profile.file"]
    for sec, keys in _SECTIONS.items():
        valid += [f"{sec}.{k}" for k in keys if k != "bands"]
    done = set()
    for key, raw in overrides.items():
        if key not in valid:
            hint = did_you_mean(key, valid)
            raise ConfigError(f"{COMMAND_LINE}: {key}: unknown option{hint}")
        value = raw
        if isinstance(raw, str) and key not in _VERBATIM_OVERRIDES:
            value = config.read_yaml_text(raw, f"{COMMAND_LINE}: {key}")
        if key in ("faults", "tones") and not isinstance(value, list):
            value = [value]
        if key == "profile.file":  # a new profile replaces the file's whole profile section
            data["profile"] = {"file": value}
        elif "." not in key:
            data[key] = value
        else:
            sec, sub = key.split(".", 1)
            section = data.get(sec)
            section = dict(section) if isinstance(section, Mapping) else {}
            if sub in _RESOLUTION_KEYS:  # the override replaces the file's resolution choice
                for k in _RESOLUTION_KEYS:
                    section.pop(k, None)
            if key == "rig.inputs":  # the command line's list of inputs (cli --input)
                if section.get("inputs") is not None:
                    raise ConfigError(f"{COMMAND_LINE}: --input: the test definition has a list "
                                      "rig.inputs already (its limits and weights stay there); "
                                      "change the list in the file instead")
                for k in ("control_input", "loopback_input"):
                    section.pop(k, None)
            section[sub] = value
            data[sec] = section
        done.add(key)
    return frozenset(done)


def check_spec(spec: TestSpec, where: Where | None = None) -> None:
    """Cross-field rules: profile below Nyquist, enough lines in the band, ramp-rate limit,
    tones inside the profile band and below Nyquist."""
    w = where if where is not None else Where(spec.source or "spec")
    c, p = spec.control, spec.profile
    if not p.f_max_hz < c.fs_hz / 2:
        at = w.key("control").key("fs_hz")
        rule = f"puts the Nyquist frequency at {c.fs_hz / 2:g} Hz, not above the profile's "
        raise at.fail(c.fs_hz, rule + f"f_max_hz = {p.f_max_hz:g} (fs_hz must exceed 2 f_max_hz)")
    df = c.df_hz
    n_lines = math.floor(p.f_max_hz / df) - math.ceil(p.f_min_hz / df) + 1
    if n_lines < MIN_BAND_LINES:
        at = w.key("control").key("frame_length")
        rule = f"gives df_hz = {df:g}, only {n_lines} lines in the profile band "
        rule += f"{p.f_min_hz:g}-{p.f_max_hz:g} Hz (needs >= {MIN_BAND_LINES})"
        raise at.fail(c.frame_length, rule)
    if spec.schedule.rate_db_s > spec.safety.max_rate_db_s:
        at = w.key("schedule").key("rate_db_s")
        rule = f"must be <= safety.max_rate_db_s = {spec.safety.max_rate_db_s:g}"
        raise at.fail(spec.schedule.rate_db_s, rule)
    clip = spec.safety.clip_sigma
    if clip is not None and clip < CLIP_SIGMA_FLOOR:
        at = w.key("safety").key("clip_sigma")
        raise at.fail(clip, "is below the drive crest-factor floor of 2.5 (IEC 60068-2-64)")
    check_tones(spec.tones, p.f_min_hz, p.f_max_hz, c.fs_hz, w.key("tones"))
    if c.kurtosis is not None and c.kurtosis > 3.0 and clip is not None:
        # clipping caps the bursts: the kurtosis target must survive the clip level
        from liveshape.dsp.nongauss import clip_sigma_needed, clipped_kurtosis

        need = clip_sigma_needed(c.kurtosis)
        if clip < need:
            at = w.key("safety").key("clip_sigma")
            raise at.fail(clip, f"clips the bursts of control.kurtosis = {c.kurtosis:g} (only "
                          f"{clipped_kurtosis(c.kurtosis, clip):.2f} is left); give at least "
                          f"{math.ceil(need * 100) / 100:.2f} (the drive rms ceiling becomes "
                          "drive_peak_max_fs / "
                          "clip_sigma)")


def spec_from_mapping(
    data: Any,
    *,
    source: str,
    base_dir: str | Path | None = None,
    overrides: Mapping[str, Any] | None = None,
) -> TestSpec:
    """Build a :class:`TestSpec` from plain data (a parsed YAML document).

    Parameters
    ----------
    data : mapping
        Top-level keys: name, profile, tolerance, schedule, control, safety, rig, faults, seed,
        tones.
    source : str
        Name of the document for error messages (usually its path); kept in ``TestSpec.source``.
    base_dir : str or Path, optional
        Folder against which relative paths in the document (profile file, plant, calibration)
        are resolved.
    overrides : mapping, optional
        Dotted keys (``"control.fs_hz"``, ``"rig.plant"``, ``"seed"``, ...) that replace the
        document's values. A string value is read as a YAML scalar (``"8000"`` -> 8000).
    """
    d = dict(check_keys(data, _TOP_KEYS, Where(source)))
    done = _apply_overrides(d, overrides or {})
    root = OverrideWhere(source, "", done)
    if "profile" not in d:
        raise ConfigError(f"{root.key('profile')}: required key is missing")
    bdir = Path(base_dir) if base_dir is not None else None
    stem = Path(source).stem if source else "test"
    name = as_str(d["name"], root.key("name")) if "name" in d else stem
    faults_raw = d.get("faults") or []
    faults = tuple(
        fault_from_mapping(x, root.key("faults").index(i))
        for i, x in enumerate(as_list(faults_raw, root.key("faults")))
    )
    seed = d.get("seed")
    if seed is not None:
        seed = as_int(seed, root.key("seed"), ge=0)
    spec = TestSpec(
        name=name,
        profile=_profile(d["profile"], root.key("profile"), bdir, name),
        tolerance=tolerance_from_mapping(d.get("tolerance"), root.key("tolerance")),
        schedule=_schedule(d.get("schedule"), root.key("schedule")),
        control=_control(d.get("control"), root.key("control")),
        safety=_safety(d.get("safety"), root.key("safety")),
        rig=_rig(d.get("rig"), root.key("rig"), bdir),
        faults=faults,
        seed=seed,
        tones=tones_from_list(d.get("tones"), root.key("tones")),
        source=source,
    )
    check_spec(spec, root)
    return spec


def load_spec(path: str | Path, overrides: Mapping[str, Any] | None = None) -> TestSpec:
    """Read a test definition from ``.yaml``/``.yml``, or a ``.csv``/``.txt`` profile.

    A two-column profile file is a whole test with every other setting at its default.
    """
    p = Path(path)
    suffix = p.suffix.lower()
    if suffix not in SPEC_SUFFIXES:
        raise ConfigError(f"{p}: unknown kind of test file (valid: {', '.join(SPEC_SUFFIXES)})")
    if suffix in (".csv", ".txt"):
        if p.is_dir():
            raise ConfigError(f"{p}: is a directory, expected a profile file")
        if not p.is_file():
            raise ConfigError(f"{p}: file not found")
        data: Any = {"name": p.stem, "profile": {"file": p.name}}
    else:
        data = config.read_yaml_file(p)
    return spec_from_mapping(data, source=str(p), base_dir=p.parent, overrides=overrides)


def _plain(obj: Any) -> dict[str, Any]:
    return {f.name: getattr(obj, f.name) for f in fields(obj)}


def _rig_mapping(rig: RigSelection) -> dict[str, Any]:
    d = {**_plain(rig), "hum": None if rig.hum is None else rig.hum.as_mapping()}
    if rig.inputs is None:
        d.pop("inputs")
    else:  # the list replaces the shorthand (the two are exclusive)
        d.pop("control_input")
        d.pop("loopback_input")
        d["inputs"] = inputs_to_list(rig.inputs)
    return d


def spec_to_mapping(spec: TestSpec) -> dict[str, Any]:
    """Plain data of a resolved spec; ``spec_from_mapping`` of it gives the same spec back."""
    p = spec.profile
    points = [{"f_hz": f, "asd": a} for f, a in zip(p.f_hz, p.asd_g2_hz, strict=True)]
    return {
        "name": spec.name,
        "profile": {"name": p.name, "units": "g2/Hz", "breakpoints": points},
        "tolerance": {
            **_plain(spec.tolerance),
            "bands": [_plain(b) for b in spec.tolerance.bands],
        },
        "schedule": {**_plain(spec.schedule), "steps_db": list(spec.schedule.steps_db)},
        "control": _plain(spec.control),
        "safety": _plain(spec.safety),
        "rig": _rig_mapping(spec.rig),
        "faults": [_plain(x) for x in spec.faults],
        "seed": spec.seed,
        "tones": [t.as_mapping() for t in spec.tones],
    }
