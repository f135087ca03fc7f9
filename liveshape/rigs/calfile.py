"""The calibration file: its schema, writing it, reading it strictly, and the run's rule.

The file (schema in ``calibration/README.md``) is written with :func:`write_calibration` and
read with :func:`load_calibration` into a :class:`liveshape.testdef.chain.ChainCalibration`;
:func:`resolve_calibration` applies the rule that a run refuses a missing or malformed file
unless the user declared the run uncalibrated (:data:`UNCALIBRATED`). YAML goes through
:mod:`liveshape.testdef.config`, the one yaml importer.
"""

from __future__ import annotations

from typing import Any

from liveshape.errors import ConfigError
from liveshape.rigs.calmath import HighpassFit, LoopDelay
from liveshape.schema import Where, as_float, as_int, as_list, as_str, check_keys
from liveshape.testdef.chain import ChainCalibration, InputChannelCal

#: The calibration file format version (the value of its `liveshape_calibration` key).
SCHEMA_VERSION = 1

_TOP = ("liveshape_calibration", "device", "fs_hz", "date", "output", "input",
        "accelerometer", "loop_delay", "lowfreq_corner", "notes", "inputs")


def calibration_mapping(
    cal: ChainCalibration,
    *,
    device: str | None = None,
    fs_hz: float | None = None,
    date: str | None = None,
    datasheet_mv_per_g: float | None = None,
    loop_delay: LoopDelay | None = None,
    corner: HighpassFit | None = None,
    notes: str | None = None,
) -> dict[str, Any]:
    """Plain data for the calibration file (see ``calibration/README.md``)."""
    d: dict[str, Any] = {"liveshape_calibration": SCHEMA_VERSION}
    if device:
        d["device"] = device
    if fs_hz:
        d["fs_hz"] = float(fs_hz)
    if date:
        d["date"] = date
    d["output"] = {"v_per_fs": float(cal.out_v_per_fs)}
    d["input"] = {"v_per_fs": float(cal.in_v_per_fs)}
    acc: dict[str, Any] = {"mv_per_g": float(cal.accel_mv_per_g)}
    if datasheet_mv_per_g is not None:
        acc["datasheet_mv_per_g"] = float(datasheet_mv_per_g)
    d["accelerometer"] = acc
    if cal.inputs:  # per-input factors of a rig with several inputs (optional key)
        d["inputs"] = [{"channel": c.channel, "v_per_fs": float(c.v_per_fs),
                        "mv_per_g": None if c.mv_per_g is None else float(c.mv_per_g)}
                       for c in cal.inputs]
    ld: dict[str, Any] = {"samples": cal.loop_delay_samples}
    if loop_delay is not None:
        ld["spread_samples"] = loop_delay.spread_samples
    d["loop_delay"] = ld
    if corner is not None:
        d["lowfreq_corner"] = {"order": corner.order, "corner_hz": round(corner.corner_hz, 4),
                               "q": None if corner.q is None else round(corner.q, 4),
                               "f_3db_hz": round(corner.f_3db_hz, 4)}
    if notes:
        d["notes"] = notes
    return d


def write_calibration(path: Any, cal: ChainCalibration, **info: Any) -> None:
    """Write ``cal`` (plus the optional facts of :func:`calibration_mapping`) as YAML."""
    from liveshape.testdef.config import write_yaml_file

    write_yaml_file(path, calibration_mapping(cal, **info))


def calibration_from_mapping(data: Any, where: Where) -> ChainCalibration:
    """Strictly read the calibration mapping (unknown keys and bad values are one-line errors)."""
    d = check_keys(data, _TOP, where, required=("liveshape_calibration", "output", "input",
                                                 "accelerometer"))
    as_int(d["liveshape_calibration"], where.key("liveshape_calibration"), ge=SCHEMA_VERSION,
           le=SCHEMA_VERSION)
    for key in ("device", "date", "notes"):
        if d.get(key) is not None:
            as_str(d[key], where.key(key))
    if d.get("fs_hz") is not None:
        as_float(d["fs_hz"], where.key("fs_hz"), gt=0.0)
    wo, wi, wa = where.key("output"), where.key("input"), where.key("accelerometer")
    out = check_keys(d["output"], ("v_per_fs", "method", "channel"), wo, required=("v_per_fs",))
    inp = check_keys(d["input"], ("v_per_fs", "method", "channel"), wi, required=("v_per_fs",))
    for sec, w in ((out, wo), (inp, wi)):
        # channels are numbered from 1, as printed on the interface
        if sec.get("channel") is not None and as_int(sec["channel"], w.key("channel")) < 1:
            raise w.key("channel").fail(sec["channel"], "must be >= 1 (channels count from 1)")
    acc = check_keys(d["accelerometer"], ("mv_per_g", "datasheet_mv_per_g"), wa,
                     required=("mv_per_g",))
    if acc.get("datasheet_mv_per_g") is not None:
        as_float(acc["datasheet_mv_per_g"], wa.key("datasheet_mv_per_g"), gt=0.0)
    delay = None
    if d.get("loop_delay") is not None:
        wl = where.key("loop_delay")
        ld = check_keys(d["loop_delay"], ("samples", "spread_samples"), wl)
        if ld.get("samples") is not None:
            delay = as_int(ld["samples"], wl.key("samples"), ge=0)
        if ld.get("spread_samples") is not None:
            as_int(ld["spread_samples"], wl.key("spread_samples"), ge=0)
    if d.get("lowfreq_corner") is not None:
        wc = where.key("lowfreq_corner")
        lc = check_keys(d["lowfreq_corner"], ("order", "corner_hz", "q", "f_3db_hz"), wc)
        for key in ("corner_hz", "q", "f_3db_hz"):
            if lc.get(key) is not None:
                as_float(lc[key], wc.key(key), gt=0.0)
    inputs = () if d.get("inputs") is None else _inputs(d["inputs"], where.key("inputs"))
    return ChainCalibration(
        inputs=inputs,
        out_v_per_fs=as_float(out["v_per_fs"], wo.key("v_per_fs"), gt=0.0),
        in_v_per_fs=as_float(inp["v_per_fs"], wi.key("v_per_fs"), gt=0.0),
        accel_mv_per_g=as_float(acc["mv_per_g"], wa.key("mv_per_g"), gt=0.0),
        loop_delay_samples=delay,
        calibrated=True,
        source=where.source,
    )


def _inputs(data: Any, w: Where) -> tuple[InputChannelCal, ...]:
    """The optional per-input list ``[{channel, v_per_fs, mv_per_g}, ...]``; channels unique."""
    out: list[InputChannelCal] = []
    for i, item in enumerate(as_list(data, w, min_len=1)):
        wi = w.index(i)
        c = check_keys(item, ("channel", "v_per_fs", "mv_per_g"), wi,
                       required=("channel", "v_per_fs"))
        ch = as_int(c["channel"], wi.key("channel"), ge=1)  # counted from 1
        if any(x.channel == ch for x in out):
            raise wi.key("channel").fail(ch, "is listed twice (one entry per input channel)")
        mv = c.get("mv_per_g")
        out.append(InputChannelCal(
            ch, as_float(c["v_per_fs"], wi.key("v_per_fs"), gt=0.0),
            None if mv is None else as_float(mv, wi.key("mv_per_g"), gt=0.0)))
    return tuple(out)


def load_calibration(path: Any) -> ChainCalibration:
    """Read a calibration file; every problem is a one-line :class:`ConfigError`."""
    from liveshape.testdef.config import read_yaml_file

    return calibration_from_mapping(read_yaml_file(path), Where(str(path)))


#: What an uncalibrated run uses: 1 V per FS both ways and 1000 mV/g, so 1 g reads as 1 FS.
UNCALIBRATED = ChainCalibration(out_v_per_fs=1.0, in_v_per_fs=1.0, accel_mv_per_g=1000.0,
                                loop_delay_samples=None, calibrated=False, source="uncalibrated")


def check_inputs_calibrated(cal: ChainCalibration, roles: Any) -> None:
    """Every accelerometer input beyond the first control has its own sensitivity in ``cal``.

    A rig with several inputs (``rig.inputs``) reads each accelerometer in g through its own mV/g.
    The first control input may use the chain's (``accelerometer.mv_per_g``); every other
    control or monitor input needs an ``inputs`` entry with ``mv_per_g``, or its g, and any limit
    on it, would silently use another sensor's sensitivity. A reference input without an entry
    uses ``input.v_per_fs``. An uncalibrated run is not checked (its levels are full scale).

    Raises
    ------
    ConfigError
        One line naming the calibration file, the input and what to add.
    """
    if not cal.calibrated or roles is None or len(roles) < 2:
        return
    own = {c.channel for c in cal.inputs if c.mv_per_g is not None}
    first = next(r.channel for r in roles if r.role == "control")
    for r in roles:
        if r.role in ("control", "monitor") and r.channel != first and r.channel not in own:
            guard = " and its limit would not protect the item" if r.limit is not None else ""
            raise ConfigError(
                f"{cal.source}: inputs has no entry with mv_per_g for {r.role} input "
                f"{r.channel} ({r.name}): its g would use another sensor's sensitivity{guard}; "
                f"add {{channel: {r.channel}, v_per_fs: ..., mv_per_g: ...}} under inputs "
                f"(liveshape calibrate sensor --input {r.channel}; calibration/README.md)")


def resolve_calibration(path: Any, uncalibrated: bool) -> ChainCalibration:
    """The calibration an audio run uses.

    ``uncalibrated=True`` (the user's explicit declaration) gives :data:`UNCALIBRATED` whatever
    ``path`` is; otherwise ``path`` must name a readable, well-formed calibration file.

    Raises
    ------
    ConfigError
        No path, or a missing or malformed file, without the uncalibrated declaration.
    """
    if uncalibrated:
        return UNCALIBRATED
    if path is None or (isinstance(path, str) and not path.strip()):
        raise ConfigError(
            "rig.calibration: missing; an audio run needs a calibration file "
            "(see calibration/README.md) or rig.uncalibrated: true to run with levels in full "
            "scale (1 g reads as 1 FS)"
        )
    try:
        return load_calibration(path)
    except ConfigError as exc:
        raise ConfigError(f"{exc} (rig.calibration; or set rig.uncalibrated: true)") from None
