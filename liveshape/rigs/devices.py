"""Audio devices as PortAudio lists them: listing, matching a name, checking the settings.

This module does not import :mod:`sounddevice` itself: the one importer is
:mod:`liveshape.rigs.audio` (:func:`~liveshape.rigs.audio.import_sounddevice`, which turns a
missing PortAudio into a one-line :class:`DeviceError`), called on use. Everything here that
needs no PortAudio (:func:`match_device`, :func:`device_error`, :func:`check_settings` with a
given device list) is testable offline.
"""

from __future__ import annotations

import difflib
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

from liveshape.errors import ConfigError, DeviceError


@dataclass(frozen=True)
class DeviceInfo:
    """One audio device as PortAudio lists it.

    ``default_fs_hz`` is the device's default sample rate; ``full_duplex`` is True when it has
    both inputs and outputs (needed: one device, one clock).
    """

    index: int
    name: str
    host_api: str
    max_input_channels: int
    max_output_channels: int
    default_fs_hz: float
    full_duplex: bool


def list_devices(sd: Any) -> list[DeviceInfo]:
    """All audio devices PortAudio knows (JACK clients appear only if JACK ran at start-up).

    ``sd`` is the :mod:`sounddevice` module, as :func:`liveshape.rigs.audio.import_sounddevice`
    returns it (this module never imports it).
    """
    apis = sd.query_hostapis()
    out = []
    for d in sd.query_devices():
        n_in, n_out = int(d["max_input_channels"]), int(d["max_output_channels"])
        out.append(
            DeviceInfo(
                index=int(d["index"]),
                name=str(d["name"]),
                host_api=str(apis[d["hostapi"]]["name"]),
                max_input_channels=n_in,
                max_output_channels=n_out,
                default_fs_hz=float(d["default_samplerate"]),
                full_duplex=n_in > 0 and n_out > 0,
            )
        )
    return out


def rescan_devices(sd: Any, between: Callable[[], None] | None = None) -> None:
    """Re-initialize PortAudio so that devices (e.g. a JACK server) started since are listed.

    ``between`` runs while PortAudio is shut down: stop a JACK server there, because PortAudio's
    JACK host aborts the process (an assertion in its terminate) when the server vanished first.
    Must not be called while a stream is open (PortAudio closes every stream on terminate).
    """
    sd._terminate()
    try:
        if between is not None:
            between()
    finally:
        sd._initialize()


def match_device(devices: list[DeviceInfo], device: int | str | None) -> DeviceInfo:
    """Pick one device by index, exact name, or a unique case-insensitive part of the name.

    There is no default: ``device=None`` is an error that lists the devices, so a real card is
    driven only when the user names it.

    Raises
    ------
    DeviceError
        No device named (listing the devices), unknown index or name (listing close matches),
        or an ambiguous part of a name.
    """
    if device is None or (isinstance(device, str) and not device.strip()):
        # Real hardware is driven only when the user names it: never a default device.
        listed = ", ".join(f"{d.index}: {d.name}" for d in devices) or "none found"
        raise DeviceError(
            "an audio rig needs a device: set rig.device in the test definition or give "
            f"--rig audio:DEVICE (available: {listed})"
        )
    if not devices:
        raise DeviceError("no audio devices found (is the interface connected and powered?)")
    names = [d.name for d in devices]
    if isinstance(device, int) or (isinstance(device, str) and device.strip().isdigit()):
        idx = int(device)
        for d in devices:
            if d.index == idx:
                return d
        raise DeviceError(f"audio device index {idx} does not exist (valid: 0..{len(devices) - 1})")
    exact = [d for d in devices if d.name == device]
    if len(exact) == 1:
        return exact[0]
    part = [d for d in devices if device.lower() in d.name.lower()]
    if len(part) == 1:
        return part[0]
    if len(part) > 1:
        raise DeviceError(
            f"audio device {device!r} is ambiguous: matches {', '.join(d.name for d in part)}"
        )
    near = difflib.get_close_matches(device, names, n=3, cutoff=0.4)
    hint = f"; close matches: {', '.join(near)}" if near else f"; available: {', '.join(names)}"
    raise DeviceError(f"audio device {device!r} not found{hint}")


def device_error(message: str, info: DeviceInfo, fs_hz: float) -> DeviceError:
    """Turn a PortAudio error text into a one-line :class:`DeviceError` naming the device."""
    low = message.lower()
    if "sample rate" in low:
        return DeviceError(
            f"audio device {info.name!r} does not support fs_hz = {fs_hz:g} "
            f"(its default rate is {info.default_fs_hz:g} Hz)"
        )
    if "unavailable" in low or "busy" in low:
        return DeviceError(f"audio device {info.name!r} is busy (another program is using it)")
    if "channel" in low:
        return DeviceError(f"audio device {info.name!r} refuses the channel count ({message})")
    return DeviceError(f"audio device {info.name!r}: {message}")


def check_settings(
    sd: Any,
    device: int | str | None,
    fs_hz: float,
    *,
    input_channels: int = 1,
    output_channels: int = 1,
    devices: list[DeviceInfo] | None = None,
) -> DeviceInfo:
    """Check that ``device`` can run full duplex at ``fs_hz`` with the given channel counts.

    Returns the resolved :class:`DeviceInfo`; raises a one-line :class:`DeviceError` naming what
    is wrong (unknown device with close matches, too few channels, unsupported rate, busy).
    """
    infos = list_devices(sd) if devices is None else devices
    info = match_device(infos, device)
    if info.max_output_channels < output_channels:
        raise DeviceError(
            f"audio device {info.name!r} has {info.max_output_channels} output channel(s), "
            f"needs {output_channels}"
        )
    if info.max_input_channels < input_channels:
        raise DeviceError(
            f"audio device {info.name!r} has {info.max_input_channels} input channel(s), "
            f"needs {input_channels}"
        )
    if devices is None:
        try:
            sd.check_output_settings(
                device=info.index, channels=output_channels, dtype="float32", samplerate=fs_hz
            )
            sd.check_input_settings(
                device=info.index, channels=input_channels, dtype="float32", samplerate=fs_hz
            )
        except sd.PortAudioError as exc:
            raise device_error(str(exc), info, fs_hz) from None
    return info


def check_channel_map(info: DeviceInfo, channel_map: dict[str, int | None],
                      where: str = "rig", inputs: Sequence[int] | None = None) -> None:
    """Refuse a channel map the device cannot satisfy, in one line naming the key.

    ``channel_map`` holds ``drive_output``, ``control_input`` and ``loopback_input`` (None: no
    loopback), counted from 1 as printed on the interface. ``inputs`` are the channels of
    ``rig.inputs`` in list order (None: the one-control shorthand); when given, every one of
    them is checked under its own key (``rig.inputs[i].channel``) instead of
    ``control_input`` and ``loopback_input``, which are taken from that list.

    Raises
    ------
    DeviceError
        A drive output, control or loopback input beyond the device's outputs or inputs.
    ConfigError
        An item of ``rig.inputs`` beyond the device's inputs.
    """
    limits = {"drive_output": ("output", info.max_output_channels)}
    if inputs is None:
        limits.update({"control_input": ("input", info.max_input_channels),
                       "loopback_input": ("input", info.max_input_channels)})
    for key, (kind, have) in limits.items():
        ch = channel_map.get(key)
        if ch is not None and ch > have:
            raise DeviceError(
                f"{where}.{key} = {ch}: audio device {info.name!r} has {have} {kind} "
                f"channel(s) (channels count from 1; see liveshape devices)")
    for i, ch in enumerate(inputs or ()):
        if ch > info.max_input_channels:
            raise ConfigError(
                f"{where}.inputs[{i}].channel = {ch}: audio device {info.name!r} has "
                f"{info.max_input_channels} input channel(s) (channels count from 1; see "
                "liveshape devices)")


def audio_channels(channel_map: dict[str, int | None],
                   inputs: Sequence[int] | None = None) -> dict[str, Any]:
    """:class:`liveshape.rigs.audio.AudioRig` channel arguments (from 0) for a map (from 1).

    The loopback input receives a copy of the drive through a cable from the drive output, so
    no second output carries it (``loopback=(None, input)``). With ``inputs`` (the channels of
    ``rig.inputs`` in list order, from 1) the rig reads every one of them, in that order
    (``input_channels``), and the control and loopback arguments are left out: the reference
    among the inputs is a column of the response like the others.
    """
    if inputs is not None:
        return {"drive_channel": int(channel_map["drive_output"]) - 1,
                "input_channels": tuple(int(c) - 1 for c in inputs)}
    loop = channel_map.get("loopback_input")
    return {"drive_channel": int(channel_map["drive_output"]) - 1,
            "control_channel": int(channel_map["control_input"]) - 1,
            "loopback": None if loop is None else (None, int(loop) - 1)}
