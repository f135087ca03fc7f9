"""The channel map of an audio rig: drive output, control input, loopback input, from 1.

Outside references: the convention that audio interfaces number their connectors from 1 (as
printed on the hardware) [common practice], and PortAudio's zero-based channel arrays.
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

from liveshape.errors import ConfigError, DeviceError
from liveshape.rigs.audio import AudioRig
from liveshape.rigs.devices import DeviceInfo, audio_channels, check_channel_map
from liveshape.testdef.spec import load_spec

REPO = Path(__file__).resolve().parents[1]
EXAMPLE = REPO / "examples" / "handlebar-nav-unit.yaml"
CARD = DeviceInfo(index=3, name="Two-by-two card", host_api="ALSA", max_input_channels=2,
                  max_output_channels=4, default_fs_hz=48000.0, full_duplex=True)


def _spec_with(tmp_path: Path, rig: str):
    text = EXAMPLE.read_text().replace("rig:\n  kind: sim\n  plant: loudspeaker\n", rig)
    path = tmp_path / "t.yaml"
    path.write_text(text)
    return load_spec(path)


def test_the_file_chooses_the_channels(tmp_path: Path) -> None:
    spec = _spec_with(tmp_path, "rig:\n  kind: audio\n  device: card\n  drive_output: 3\n"
                      "  control_input: 2\n  loopback_input: 1\n")
    assert spec.rig.channel_map() == {"drive_output": 3, "control_input": 2, "loopback_input": 1}
    # PortAudio counts from 0: output 3 is index 2, inputs 2 and 1 are 1 and 0
    assert audio_channels(spec.rig.channel_map()) == {
        "drive_channel": 2, "control_channel": 1, "loopback": (None, 0)}


def test_defaults_are_output_1_and_input_1(tmp_path: Path) -> None:
    spec = load_spec(EXAMPLE)
    assert spec.rig.channel_map() == {"drive_output": 1, "control_input": 1,
                                      "loopback_input": None}
    assert audio_channels(spec.rig.channel_map())["loopback"] is None


def test_the_command_line_beats_the_file(tmp_path: Path) -> None:
    spec = load_spec(EXAMPLE, {"rig.drive_output": 2, "rig.control_input": 2})
    assert spec.rig.drive_output == 2 and spec.rig.control_input == 2


@pytest.mark.parametrize("rig, words", [
    ("  drive_output: 0\n", "rig.drive_output"),
    ("  control_input: -1\n", "rig.control_input"),
    ("  control_input: 2\n  loopback_input: 2\n", "is the control input"),
])
def test_bad_channel_numbers_are_one_line(tmp_path: Path, rig: str, words: str) -> None:
    with pytest.raises(ConfigError) as err:
        _spec_with(tmp_path, "rig:\n  kind: audio\n  device: card\n" + rig)
    assert words in str(err.value) and "\n" not in str(err.value)


def test_a_map_beyond_the_device_names_the_key() -> None:
    check_channel_map(CARD, {"drive_output": 4, "control_input": 2, "loopback_input": 1})
    with pytest.raises(DeviceError) as err:
        check_channel_map(CARD, {"drive_output": 1, "control_input": 3, "loopback_input": None})
    assert str(err.value) == ("rig.control_input = 3: audio device 'Two-by-two card' has 2 input "
                              "channel(s) (channels count from 1; see liveshape devices)")
    with pytest.raises(DeviceError, match=r"rig.drive_output = 5: .* has 4 output"):
        check_channel_map(CARD, {"drive_output": 5, "control_input": 1, "loopback_input": None})
    with pytest.raises(DeviceError, match=r"rig.loopback_input = 3: .* has 2 input"):
        check_channel_map(CARD, {"drive_output": 1, "control_input": 1, "loopback_input": 3})


def test_audio_rig_opens_the_channels_the_map_needs() -> None:
    rig = AudioRig(3, 48000.0, **audio_channels(
        {"drive_output": 3, "control_input": 1, "loopback_input": 2}))
    # a drive on output 3 needs 3 output channels; a loopback input 2 needs 2 inputs; no copy
    # of the drive is played on another output
    assert rig.output_channels == 3 and rig.input_channels == 2
    assert rig.drive_channel == 2 and rig.control_channel == 0 and rig.loopback == (None, 1)


def test_channel_option_zero_is_one_line(tmp_path: Path) -> None:
    proc = subprocess.run([sys.executable, "-m", "liveshape", "run", str(EXAMPLE),
                           "--control-input", "0", "--out", str(tmp_path)],
                          capture_output=True, text=True, cwd=REPO, timeout=60)
    assert proc.returncode == 2 and proc.stderr.count("\n") == 1
    assert "--control-input" in proc.stderr and "channels count from 1" in proc.stderr


def test_listed_inputs_are_checked_each_under_its_own_key() -> None:
    # with rig.inputs the list's channels are checked (control_input / loopback_input are only
    # its first control and its reference); the first one beyond the device is named
    check_channel_map(CARD, {"drive_output": 1, "control_input": 2, "loopback_input": 1},
                      inputs=[2, 1])
    with pytest.raises(ConfigError) as err:
        check_channel_map(CARD, {"drive_output": 1, "control_input": 1, "loopback_input": None},
                          inputs=[1, 2, 3, 4])
    assert str(err.value) == ("rig.inputs[2].channel = 3: audio device 'Two-by-two card' has 2 "
                              "input channel(s) (channels count from 1; see liveshape devices)")
    with pytest.raises(DeviceError, match=r"rig.drive_output = 5"):  # outputs still checked
        check_channel_map(CARD, {"drive_output": 5, "control_input": 1, "loopback_input": None},
                          inputs=[1])


def test_listed_inputs_become_zero_based_input_channels_in_list_order(tmp_path: Path) -> None:
    spec = _spec_with(tmp_path, "rig:\n  kind: audio\n  device: card\n  drive_output: 2\n"
                      "  inputs:\n    - {channel: 4, role: monitor}\n"
                      "    - {channel: 2, role: control}\n    - {channel: 1, role: reference}\n")
    inputs = [r.channel for r in spec.rig.input_roles()]
    assert inputs == [4, 2, 1]
    args = audio_channels(spec.rig.channel_map(), inputs)
    assert args == {"drive_channel": 1, "input_channels": (3, 1, 0)}
    rig = AudioRig(3, 48000.0, **args)
    # input 4 is the highest: the stream opens four inputs; the drive on output 2 needs two
    assert rig.input_columns == (3, 1, 0) and rig.input_channels == 4
    assert rig.output_channels == 2 and rig.loopback is None
