"""Bad inputs through the real command line: every one is ONE line on stderr, no traceback.

Each case runs :func:`liveshape.cli.main` (the function behind ``python -m liveshape``) with a
user mistake and asserts the project's rule for user-caused errors: exit status 2, exactly one
line on stderr that names the option, key or file (the ``words`` of the case), no "Traceback",
and no file left behind (the whole working folder is compared before and after). A few cases
also go through a real ``python -m liveshape`` process.

Set ``LIVESHAPE_BAD_INPUTS_SUBPROCESS=1`` to run every case as a subprocess instead (slower;
used to count the cases an older version fails without risking this process).

Read-only and full file systems are real: small tmpfs mounts when the tests run as root (root
ignores file modes). Elsewhere a read-only folder is made with chmod; the full-disk cases need
root and are skipped when not root, except under CI, where they fail instead.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import pytest

from liveshape.cli import main

REPO = Path(__file__).resolve().parents[1]
EXAMPLE = REPO / "examples" / "handlebar-nav-unit.yaml"
EXAMPLE_CSV = REPO / "examples" / "battery-bms-board.csv"
SUBPROCESS = os.environ.get("LIVESHAPE_BAD_INPUTS_SUBPROCESS") == "1"
IN_CI = os.environ.get("CI", "").lower() == "true"


@dataclass(frozen=True)
class Case:
    """A bad input: ``argv`` (with ``{placeholders}`` of the world), words the line must hold."""

    id: str
    argv: tuple[str, ...]
    words: tuple[str, ...] = ()
    status: int = 2


def C(id: str, *argv: str, words: tuple[str, ...] | str = ()) -> Case:  # noqa: N802
    return Case(id, tuple(argv), (words,) if isinstance(words, str) else tuple(words))


RUN = ("run", "{spec}", "--fast", "--out", "{tmp}/runs")
SYN = ("synth", "{spec}", "--duration", "2", "-o", "{tmp}/d.wav")
SUR = ("survey", "{spec}", "--out", "{tmp}/runs")
CAL = ("calibrate", "output", "--device", "0", "-o", "{tmp}/cal.yaml", "--reading", "1")

CASES: list[Case] = [
    # -- the parser itself: unknown commands and options, missing arguments ---------------
    C("no-command", words="COMMAND"),
    C("unknown-command", "frobnicate", words="frobnicate"),
    C("unknown-global-option", "--bogus", "check", "{spec}", words="--bogus"),
    C("check-no-spec", "check", words="SPEC"),
    C("check-unknown-option", "check", "{spec}", "--bogus", words="--bogus"),
    C("run-no-spec", "run", words="SPEC"),
    C("synth-no-duration", "synth", "{spec}", "-o", "{tmp}/d.wav", words="--duration"),
    C("synth-no-output", "synth", "{spec}", "--duration", "1", words="--output"),
    C("calibrate-nothing", "calibrate", words="required"),
    C("calibrate-bad-step", "calibrate", "levitate", "--device", "0", "-o", "{tmp}/c.yaml",
      words="levitate"),
    C("calibrate-no-device", "calibrate", "output", "-o", "{tmp}/c.yaml", words="--device"),
    C("survey-compare-one", "survey", "--compare", "{tmp}", words="--compare"),
    C("report-no-folder", "report", words="RUN_DIR"),
    C("devices-unknown-option", "devices", "--bogus", words="--bogus"),
    C("virtual-rig-seed-text", "virtual-rig", "--seed", "x", words="--seed"),
    C("run-record-choice", *RUN, "--record", "wavs", words="--record"),
    C("run-seed-text", *RUN, "--seed", "x", words="--seed"),
    C("run-operator-empty", *RUN, "--operator", " ", words="--operator"),
    C("run-operator-newline", *RUN, "--operator", "a\nb", words="--operator"),
    C("run-test-item-long", *RUN, "--test-item", "x" * 300, words="--test-item"),
    # -- check: spec files ----------------------------------------------------------------
    C("check-missing", "check", "{tmp}/nope.yaml", words=("nope.yaml", "not found")),
    C("check-dir-csv", "check", "{tmp}/dir.csv", words=("dir.csv", "directory")),
    C("check-dir-yaml", "check", "{tmp}/dir.yaml", words=("dir.yaml", "directory")),
    C("check-bad-suffix", "check", "{tmp}/spec.json", words="spec.json"),
    C("check-empty-yaml", "check", "{tmp}/empty.yaml", words="empty.yaml"),
    C("check-list-yaml", "check", "{tmp}/list.yaml", words="list.yaml"),
    C("check-malformed-yaml", "check", "{tmp}/malformed.yaml", words=("malformed.yaml", "line")),
    C("check-python-tag", "check", "{tmp}/tag.yaml", words="tag.yaml"),
    C("check-not-utf8", "check", "{tmp}/binary.yaml", words="binary.yaml"),
    C("check-dup-top", "check", "{tmp}/dup.yaml", words=("dup.yaml", "schedule", "28", "54")),
    C("check-dup-nested", "check", "{tmp}/dup_nested.yaml",
      words=("dup_nested.yaml", "alarm_db", "twice")),
    C("check-dup-flow", "check", "{tmp}/dup_flow.yaml", words=("dup_flow.yaml", "f_hz")),
    C("check-unknown-key", "check", "{tmp}/unknown_key.yaml", words="schedul"),
    C("check-profile-file-dir", "check", "{tmp}/profile_dir.yaml", words=("dir.csv", "directory")),
    C("check-profile-file-missing", "check", "{tmp}/profile_missing.yaml",
      words="missing.csv"),
    C("check-csv-text", "check", "{tmp}/text.csv", words="text.csv"),
    C("check-csv-one-row", "check", "{tmp}/one.csv", words="one.csv"),
    C("check-csv-decreasing", "check", "{tmp}/down.csv", words="down.csv"),
    C("check-csv-negative", "check", "{tmp}/negative.csv", words="negative.csv"),
    C("check-fs-zero", "check", "{spec}", "--fs", "0", words="--fs"),
    C("check-fs-negative", "check", "{spec}", "--fs", "-1", words="--fs"),
    C("check-fs-text", "check", "{spec}", "--fs", "abc", words="--fs"),
    C("check-fs-nan", "check", "{spec}", "--fs", "nan", words="--fs"),
    C("check-fs-inf", "check", "{spec}", "--fs", "inf", words="--fs"),
    C("check-fs-huge", "check", "{spec}", "--fs", "1e9", words="--fs"),
    C("check-fs-low", "check", "{spec}", "--fs", "500", words="--fs"),
    C("check-fs-nyquist", "check", "{spec}", "--fs", "1500", words="fs_hz"),
    C("check-rig-bogus", "check", "{spec}", "--rig", "bogus", words="--rig"),
    C("check-rig-audio-bare", "check", "{spec}", "--rig", "audio", words="--rig"),
    C("check-rig-audio", "check", "{spec}", "--rig", "audio:x", words="--rig"),
    C("check-rig-preset", "check", "{spec}", "--rig", "sim:nopreset", words="nopreset"),
    C("check-rig-plant-missing", "check", "{spec}", "--rig", "sim:{tmp}/noplant.yaml",
      words="noplant.yaml"),
    C("check-rig-plant-dup", "check", "{spec}", "--rig", "sim:{tmp}/dup_plant.yaml",
      words=("dup_plant.yaml", "twice")),
    C("check-name-list", "check", "{tmp}/name_list.yaml", words="name"),
    # -- synth ----------------------------------------------------------------------------
    C("synth-duration-zero", "synth", "{spec}", "--duration", "0", "-o", "{tmp}/d.wav",
      words="--duration"),
    C("synth-duration-negative", "synth", "{spec}", "--duration", "-5", "-o", "{tmp}/d.wav",
      words="--duration"),
    C("synth-duration-nan", "synth", "{spec}", "--duration", "nan", "-o", "{tmp}/d.wav",
      words="--duration"),
    C("synth-duration-huge", "synth", "{spec}", "--duration", "1e9", "-o", "{tmp}/d.wav",
      words="--duration"),
    C("synth-duration-short", "synth", "{spec}", "--duration", "0.01", "-o", "{tmp}/d.wav",
      words="duration_s"),
    C("synth-output-txt", "synth", "{spec}", "--duration", "2", "-o", "{tmp}/d.txt",
      words="--output"),
    C("synth-output-nofolder", "synth", "{spec}", "--duration", "2", "-o", "{tmp}/no/d.wav",
      words="--output"),
    C("synth-output-folder", "synth", "{spec}", "--duration", "2", "-o", "{tmp}/dir.wav",
      words=("--output", "folder")),
    C("synth-fs-low", *SYN, "--fs", "100", words="--fs"),
    C("synth-fs-fraction", *SYN, "--fs", "44100.5", words="fs_hz"),
    C("synth-fs-nyquist", *SYN, "--fs", "1000", words="fs_hz"),
    C("synth-seed-negative", *SYN, "--seed", "-1", words="--seed"),
    C("synth-seed-fraction", *SYN, "--seed", "1.5", words="--seed"),
    C("synth-seed-huge", *SYN, "--seed", str(2**64), words="--seed"),
    C("synth-clip-iec", *SYN, "--clip-sigma", "2", words=("clip_sigma", "2.5")),
    C("synth-clip-zero", *SYN, "--clip-sigma", "0", words="--clip-sigma"),
    C("synth-clip-huge", *SYN, "--clip-sigma", "1000", words="--clip-sigma"),
    C("synth-crest-min-low", *SYN, "--crest-min", "0.5", words="--crest-min"),
    C("synth-crest-max-huge", *SYN, "--crest-max", "200", words="--crest-max"),
    C("synth-crest-order", *SYN, "--crest-min", "5", "--crest-max", "4", words="crest_min"),
    C("synth-tries-zero", *SYN, "--max-tries", "0", words="--max-tries"),
    C("synth-tries-huge", *SYN, "--max-tries", "100000", words="--max-tries"),
    C("synth-dup", "synth", "{tmp}/dup.yaml", "--duration", "2", "-o", "{tmp}/d.wav",
      words="schedule"),
    C("synth-missing-spec", "synth", "{tmp}/nope.yaml", "--duration", "2", "-o", "{tmp}/d.wav",
      words="nope.yaml"),
    C("synth-dir-csv", "synth", "{tmp}/dir.csv", "--duration", "2", "-o", "{tmp}/d.wav",
      words="dir.csv"),
    # -- run ------------------------------------------------------------------------------
    C("run-block-zero", *RUN, "--block-size", "0", words="--block-size"),
    C("run-block-small", *RUN, "--block-size", "8", words="--block-size"),
    C("run-block-negative", *RUN, "--block-size", "-4", words="--block-size"),
    C("run-block-text", *RUN, "--block-size", "abc", words="--block-size"),
    C("run-block-1e5", *RUN, "--block-size", "100000", words="--block-size"),
    C("run-block-1e8", *RUN, "--block-size", "100000000", words="--block-size"),
    C("run-block-too-long", *RUN, "--block-size", "16384", words=("--block-size", "0.25")),
    C("run-duration-zero", *RUN, "--duration", "0", words="--duration"),
    C("run-duration-negative", *RUN, "--duration", "-1", words="--duration"),
    C("run-duration-huge", *RUN, "--duration", "1e12", words="--duration"),
    C("run-duration-nan", *RUN, "--duration", "nan", words="--duration"),
    C("run-seed-negative", *RUN, "--seed", "-3", words="--seed"),
    C("run-fault-1e9", *RUN, "--fault", "amp_trip@1e9", words=("amp_trip", "end of the run")),
    C("run-fault-after-end", *RUN, "--fault", "amp_trip@500", words=("amp_trip@500", "end")),
    C("run-fault-negative", *RUN, "--fault", "amp_trip@-1", words="amp_trip@-1"),
    C("run-fault-unknown", *RUN, "--fault", "gremlins@5", words="gremlins"),
    C("run-fault-no-value", *RUN, "--fault", "sensor_gain@12", words="sensor_gain"),
    C("run-fault-zero-length", *RUN, "--fault", "noise_burst@5=0.1/0", words="noise_burst"),
    C("run-fault-inf", *RUN, "--fault", "amp_trip@inf", words="amp_trip@inf"),
    C("run-fault-nan", *RUN, "--fault", "amp_trip@nan", words="amp_trip@nan"),
    C("run-fault-garbage", *RUN, "--fault", "@@", words="@@"),
    C("run-fault-file-late", "run", "{tmp}/late_fault.yaml", "--fast", "--out", "{tmp}/runs",
      words=("sensor_detached", "end of the run")),
    C("run-rig-audio-bare", *RUN, "--rig", "audio", words="--rig"),
    C("run-rig-bogus", *RUN, "--rig", "bogus:1", words="--rig"),
    C("run-rig-audio-unknown", *RUN, "--rig", "audio:nosuchdevice", "--uncalibrated",
      words="audio device"),
    C("run-audio-no-device", "run", "{tmp}/audio_nodevice.yaml", "--out", "{tmp}/runs",
      words=("needs a device", "--rig audio:DEVICE")),
    C("run-rig-preset", *RUN, "--rig", "sim:nopreset", words="nopreset"),
    C("run-calibration-contradiction", *RUN, "--uncalibrated", "--calibration",
      "{tmp}/cal_ok.yaml", words="uncalibrated"),
    C("run-out-file", *RUN[:-1], "{tmp}/afile.txt", words=("afile.txt", "file")),
    C("run-dup", "run", "{tmp}/dup.yaml", "--fast", "--out", "{tmp}/runs",
      words=("schedule", "28", "54")),
    C("run-dir-csv", "run", "{tmp}/dir.csv", "--fast", "--out", "{tmp}/runs", words="dir.csv"),
    C("run-missing", "run", "{tmp}/nope.yaml", "--fast", "--out", "{tmp}/runs",
      words="nope.yaml"),
    C("run-fs-fraction", "run", "{tmp}/fs_fraction.yaml", "--fast", "--out", "{tmp}/runs",
      words="fs_hz"),
    C("run-dup-plant", *RUN, "--rig", "sim:{tmp}/dup_plant.yaml", words="dup_plant.yaml"),
    # -- survey ---------------------------------------------------------------------------
    C("survey-nothing", "survey", words="SPEC"),
    C("survey-level-zero", *SUR, "--level", "0", words="--level"),
    C("survey-level-above-fs", *SUR, "--level", "2", words="--level"),
    C("survey-level-above-limit", *SUR, "--level", "0.9", words=("--level", "drive_rms_max")),
    C("survey-duration-zero", *SUR, "--duration", "0", words="--duration"),
    C("survey-duration-huge", *SUR, "--duration", "1e6", words="duration"),
    C("survey-shift-zero", "survey", "--compare", "{tmp}", "{tmp}", "--shift-pct", "0",
      words="--shift-pct"),
    C("survey-drop-negative", "survey", "--compare", "{tmp}", "{tmp}", "--drop-db", "-1",
      words="--drop-db"),
    C("survey-compare-missing", "survey", "--compare", "{tmp}/a", "{tmp}/b", words="a"),
    C("survey-compare-file", "survey", "--compare", "{spec}", "{spec}", words="survey"),
    C("survey-fault-late", *SUR, "--fault", "amp_trip@100", words=("amp_trip", "survey")),
    C("survey-seed-negative", *SUR, "--seed", "-1", words="--seed"),
    C("survey-dup", "survey", "{tmp}/dup.yaml", "--out", "{tmp}/runs", words="schedule"),
    C("survey-rig-audio-bare", *SUR, "--rig", "audio", words="--rig"),
    # -- report ---------------------------------------------------------------------------
    C("report-missing", "report", "{tmp}/norun", words=("norun", "not found")),
    C("report-file", "report", "{spec}", words=("spec.yaml", "file")),
    C("report-not-a-run", "report", "{tmp}", words="not a run folder"),
    C("report-broken-meta", "report", "{tmp}/broken_run", words="broken_run"),
    C("report-out-file", "report", "{run}", "--out", "{tmp}/afile.txt", words="afile.txt"),
    # -- calibrate (every option is checked before any device is opened) ------------------
    C("calibrate-block-zero", *CAL, "--block-size", "0", words="--block-size"),
    C("calibrate-block-1e5", *CAL, "--block-size", "100000", words="--block-size"),
    C("calibrate-block-1e8", *CAL, "--block-size", "100000000", words="--block-size"),
    C("calibrate-block-too-long", *CAL, "--block-size", "16384", words=("--block-size", "0.25")),
    C("calibrate-repeats-zero", *CAL, "--repeats", "0", words="--repeats"),
    C("calibrate-repeats-negative", *CAL, "--repeats", "-1", words="--repeats"),
    C("calibrate-repeats-huge", *CAL, "--repeats", "1000000", words="--repeats"),
    C("calibrate-loopback-00", *CAL, "--loopback", "0:0", words="--loopback"),
    C("calibrate-loopback-drive", *CAL, "--loopback", "0:1", words="--loopback"),
    C("calibrate-loopback-one", *CAL, "--loopback", "1", words="--loopback"),
    C("calibrate-loopback-text", *CAL, "--loopback", "a:b", words="--loopback"),
    C("calibrate-loopback-high", *CAL, "--loopback", "1:99", words="--loopback"),
    C("calibrate-level-zero", *CAL, "--level", "0", words="--level"),
    C("calibrate-level-high", *CAL, "--level", "1.5", words="--level"),
    C("calibrate-fs-zero", *CAL, "--fs", "0", words="--fs"),
    C("calibrate-fs-huge", *CAL, "--fs", "1e7", words="--fs"),
    C("calibrate-reading-negative", "calibrate", "output", "--device", "0", "-o",
      "{tmp}/cal.yaml", "--reading", "-1", words="--reading"),
    C("calibrate-known-v-zero", *CAL, "--known-v", "0", words="--known-v"),
    C("calibrate-datasheet-zero", *CAL, "--datasheet-mv-per-g", "0",
      words="--datasheet-mv-per-g"),
    C("calibrate-file-dir", "calibrate", "output", "--device", "0", "-o", "{tmp}/dir.yaml",
      words=("dir.yaml", "directory")),
    C("calibrate-file-dup", "calibrate", "output", "--device", "0", "-o", "{tmp}/dup_cal.yaml",
      words=("dup_cal.yaml", "output", "twice")),
    C("calibrate-file-list", "calibrate", "output", "--device", "0", "-o", "{tmp}/list.yaml",
      words="list.yaml"),
    C("calibrate-file-malformed", "calibrate", "output", "--device", "0", "-o",
      "{tmp}/malformed.yaml", words="malformed.yaml"),
    # -- virtual rig ----------------------------------------------------------------------
    C("virtual-rig-plant", "virtual-rig", "--plant", "nosuch", words="nosuch"),
    C("virtual-rig-plant-dup", "virtual-rig", "--plant", "{tmp}/dup_plant.yaml",
      words="dup_plant.yaml"),
    C("virtual-rig-seed-negative", "virtual-rig", "--seed", "-1", words="--seed"),
]

#: Cases on a read-only folder ({ro}) and a full file system ({full}).
RO_CASES: list[Case] = [
    C("run-out-readonly", *RUN[:-1], "{ro}/runs", words="runs"),
    C("synth-out-readonly", "synth", "{spec}", "--duration", "2", "-o", "{ro}/d.wav",
      words="d.wav"),
    C("report-out-readonly", "report", "{run}", "--out", "{ro}/rep", words="rep"),
    C("calibrate-file-readonly", "calibrate", "output", "--device", "0", "-o", "{ro}/c.yaml",
      "--reading", "1", words="c.yaml"),
    C("survey-out-readonly", *SUR[:-1], "{ro}/runs", words="runs"),
]
FULL_CASES: list[Case] = [
    C("run-out-full", *RUN[:-1], "{full}/runs", words=("free", "record")),
    C("run-out-full-spectra", *RUN[:-1], "{full}/runs", "--record", "spectra",
      words=("free", "record")),
    C("synth-out-full", "synth", "{spec}", "--duration", "60", "-o", "{full}/d.wav",
      words=("d.wav", "free")),
    C("report-out-full", "report", "{run}", "--out", "{full}/rep", words="rep"),
]

DUP_YAML_TAIL = "schedule: {steps_db: [0]}\n"
PLANT_DUP = "name: dup\nname: again\n"


def _make_world(root: Path) -> None:
    """The files and folders the cases name."""
    example = EXAMPLE.read_text(encoding="utf-8")
    (root / "spec.yaml").write_text(example, encoding="utf-8")
    (root / "dup.yaml").write_text(example + DUP_YAML_TAIL, encoding="utf-8")
    (root / "dup_nested.yaml").write_text(
        example.replace("  alarm_db: 3.0\n", "  alarm_db: 3.0\n  alarm_db: 30.0\n"),
        encoding="utf-8")
    (root / "dup_flow.yaml").write_text(
        example.replace("{f_hz: 20, asd: 0.0005}", "{f_hz: 20, f_hz: 25, asd: 0.0005}"),
        encoding="utf-8")
    (root / "unknown_key.yaml").write_text(example.replace("schedule:", "schedul:"),
                                           encoding="utf-8")
    (root / "late_fault.yaml").write_text(
        example + "faults:\n  - {kind: sensor_detached, at_s: 100000}\n", encoding="utf-8")
    (root / "audio_nodevice.yaml").write_text(
        example.replace("rig:\n  kind: sim\n  plant: loudspeaker\n",
                        "rig:\n  kind: audio\n  uncalibrated: true\n"), encoding="utf-8")
    (root / "fs_fraction.yaml").write_text(example.replace("fs_hz: 48000", "fs_hz: 48000.5"),
                                           encoding="utf-8")
    (root / "name_list.yaml").write_text(example.replace("name: handlebar-nav-unit",
                                                         "name: [a, b]"), encoding="utf-8")
    profile = "profile:\n  file: {}\n"
    (root / "profile_dir.yaml").write_text(profile.format("dir.csv"), encoding="utf-8")
    (root / "profile_missing.yaml").write_text(profile.format("missing.csv"), encoding="utf-8")
    (root / "dir.csv").mkdir()
    (root / "dir.yaml").mkdir()
    (root / "dir.wav").mkdir()
    (root / "spec.json").write_text("{}", encoding="utf-8")
    (root / "empty.yaml").write_text("", encoding="utf-8")
    (root / "list.yaml").write_text("- a\n- b\n", encoding="utf-8")
    (root / "malformed.yaml").write_text("a: [1, 2\nb: 3\n", encoding="utf-8")
    (root / "tag.yaml").write_text("a: !!python/object/apply:os.system ['true']\n",
                                   encoding="utf-8")
    (root / "binary.yaml").write_bytes(b"\xff\xfe\x00name: x\n")
    (root / "text.csv").write_text("20, a\n2000, b\n", encoding="utf-8")
    (root / "one.csv").write_text("20, 0.01\n", encoding="utf-8")
    (root / "down.csv").write_text("2000, 0.01\n20, 0.01\n", encoding="utf-8")
    (root / "negative.csv").write_text("20, 0.01\n2000, -0.01\n", encoding="utf-8")
    (root / "dup_plant.yaml").write_text(PLANT_DUP, encoding="utf-8")
    (root / "dup_cal.yaml").write_text(
        "liveshape_calibration: 1\noutput: {v_per_fs: 1.0}\noutput: {v_per_fs: 2.0}\n",
        encoding="utf-8")
    (root / "cal_ok.yaml").write_text("liveshape_calibration: 1\n", encoding="utf-8")
    (root / "afile.txt").write_text("not a folder\n", encoding="utf-8")
    broken = root / "broken_run"
    broken.mkdir()
    (broken / "run.json").write_text("{not json", encoding="utf-8")


def _snapshot(root: Path) -> dict[str, int]:
    """Every path under ``root`` with its size (folders as -1)."""
    out: dict[str, int] = {}
    for dirpath, dirnames, filenames in os.walk(root):
        for d in dirnames:
            out[os.path.join(dirpath, d)] = -1
        for f in filenames:
            p = os.path.join(dirpath, f)
            try:
                out[p] = os.stat(p).st_size
            except OSError:
                out[p] = -2
    return out


def _mount_tmpfs(where: Path, size: str, *, read_only: bool) -> bool:
    where.mkdir()
    opts = f"size={size}" + (",ro" if read_only else "")
    proc = subprocess.run(["mount", "-t", "tmpfs", "-o", opts, "tmpfs", str(where)],
                          capture_output=True, text=True)
    return proc.returncode == 0


@pytest.fixture(scope="module")
def world(tmp_path_factory: pytest.TempPathFactory) -> Iterator[dict[str, str]]:
    root = tmp_path_factory.mktemp("bad-inputs")
    _make_world(root)
    # One real run record for the report cases (a short --record spectra run).
    runs = tmp_path_factory.mktemp("record")
    proc = subprocess.run(
        [sys.executable, "-m", "liveshape", "run", str(EXAMPLE), "--fast", "--json",
         "--duration", "1", "--record", "spectra", "--out", str(runs)],
        capture_output=True, text=True, cwd=REPO, timeout=600)
    assert proc.returncode in (0, 4), proc.stderr
    (run_dir,) = [p for p in runs.iterdir() if p.is_dir()]
    yield {"tmp": str(root), "spec": str(root / "spec.yaml"), "run": str(run_dir)}


@pytest.fixture(scope="module")
def read_only_dir(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Path]:
    """A folder nobody may write into: a read-only tmpfs as root, else chmod 0555."""
    base = tmp_path_factory.mktemp("ro")
    where = base / "ro"
    if os.geteuid() == 0:
        if not _mount_tmpfs(where, "1m", read_only=True):
            pytest.fail("running as root but cannot mount a read-only tmpfs")
        try:
            yield where
        finally:
            subprocess.run(["umount", str(where)], check=False)
        return
    where.mkdir()
    where.chmod(0o555)
    try:
        yield where
    finally:
        where.chmod(0o755)


@pytest.fixture(scope="module")
def full_dir(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Path]:
    """A small tmpfs filled up to its last few kB (needs root to mount)."""
    base = tmp_path_factory.mktemp("full")
    where = base / "full"
    if os.geteuid() != 0 or not _mount_tmpfs(where, "2m", read_only=False):
        if IN_CI:
            pytest.fail("the full-disk cases need root (a tmpfs mount) and must run in CI")
        pytest.skip("full-disk cases need root to mount a small tmpfs")
    try:
        fill_up(where, leave_bytes=16 * 1024)
        yield where
    finally:
        subprocess.run(["umount", str(where)], check=False)


def fill_up(where: Path, leave_bytes: int) -> None:
    """Write a ballast file into ``where`` until only about ``leave_bytes`` are free."""
    free = shutil.disk_usage(where).free
    n = max(0, free - leave_bytes)
    with open(where / ".ballast", "wb") as fh:
        try:
            fh.write(bytes(n))
        except OSError:
            pass


def _expand(argv: tuple[str, ...], names: dict[str, str]) -> list[str]:
    return [a.format(**names) if "{" in a else a for a in argv]


def invoke(argv: list[str], capsys: pytest.CaptureFixture[str]) -> tuple[int, str, str]:
    """Run the command line in this process (or a subprocess); return (status, out, err)."""
    if SUBPROCESS:
        try:
            proc = subprocess.run([sys.executable, "-m", "liveshape", *argv],
                                  capture_output=True, text=True, cwd=REPO, timeout=120)
        except subprocess.TimeoutExpired:
            return -1, "", "timed out after 120 s (the bad input was accepted)\n"
        return proc.returncode, proc.stdout, proc.stderr
    capsys.readouterr()
    try:
        status = main(argv)
    except SystemExit as exc:
        status = exc.code if isinstance(exc.code, int) else 2
    except BaseException as exc:  # noqa: BLE001 - a traceback is the failure being tested
        import traceback

        cap = capsys.readouterr()
        return -1, cap.out, cap.err + "Traceback (in process)\n" + "".join(
            traceback.format_exception(exc))
    cap = capsys.readouterr()
    return int(status), cap.out, cap.err


def check_case(case: Case, names: dict[str, str], watch: list[Path],
               capsys: pytest.CaptureFixture[str]) -> None:
    before = {w: _snapshot(w) for w in watch}
    status, _out, err = invoke(_expand(case.argv, names), capsys)
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert "Traceback" not in err, err
    assert status == case.status, f"exit {status}: {err}"
    assert len(lines) == 1, f"{len(lines)} lines on stderr:\n{err}"
    for w in case.words:
        assert w.format(**names) in lines[0], lines[0]
    for w in watch:
        after = _snapshot(w)
        assert after == before[w], (
            f"files changed under {w}: "
            f"{sorted(set(after) ^ set(before[w]))} "
            f"{sorted(k for k in after if k in before[w] and after[k] != before[w][k])}")


def test_there_are_enough_cases() -> None:
    ids = [c.id for c in CASES + RO_CASES + FULL_CASES]
    assert len(ids) == len(set(ids)), "case ids must be unique"
    assert len(ids) >= 130


@pytest.mark.parametrize("case", CASES, ids=[c.id for c in CASES])
def test_bad_input_is_one_line(case: Case, world: dict[str, str],
                               capsys: pytest.CaptureFixture[str]) -> None:
    check_case(case, world, [Path(world["tmp"]), Path(world["run"])], capsys)


@pytest.mark.parametrize("case", RO_CASES, ids=[c.id for c in RO_CASES])
def test_read_only_folder_is_one_line(case: Case, world: dict[str, str], read_only_dir: Path,
                                      capsys: pytest.CaptureFixture[str]) -> None:
    names = {**world, "ro": str(read_only_dir)}
    check_case(case, names, [Path(world["tmp"]), Path(world["run"]), read_only_dir], capsys)


@pytest.mark.parametrize("case", FULL_CASES, ids=[c.id for c in FULL_CASES])
def test_full_file_system_is_one_line(case: Case, world: dict[str, str], full_dir: Path,
                                      capsys: pytest.CaptureFixture[str]) -> None:
    names = {**world, "full": str(full_dir)}
    check_case(case, names, [Path(world["tmp"]), Path(world["run"]), full_dir], capsys)


@pytest.mark.parametrize("argv", [
    ["frobnicate"],
    ["run"],
    ["check", "x.yaml", "--fs", "abc"],
    ["calibrate", "output", "--device", "0", "-o", "c.yaml", "--loopback", "0:0"],
])
def test_real_process_prints_one_line(argv: list[str], tmp_path: Path) -> None:
    # The same rule through ``python -m liveshape`` (argparse errors included).
    proc = subprocess.run([sys.executable, "-m", "liveshape", *argv], capture_output=True,
                          text=True, cwd=tmp_path, timeout=120)
    lines = [ln for ln in proc.stderr.splitlines() if ln.strip()]
    assert proc.returncode == 2, proc.stderr
    assert len(lines) == 1 and "Traceback" not in proc.stderr, proc.stderr
    assert list(tmp_path.iterdir()) == []


def test_unicode_test_name_is_accepted_by_check_and_run(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # The same names for every command: the name is sanitized for the folder name only.
    spec = tmp_path / "named.yaml"
    spec.write_text(EXAMPLE.read_text(encoding="utf-8").replace(
        "name: handlebar-nav-unit", "name: 名前"), encoding="utf-8")
    assert main(["check", str(spec), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["name"] == "名前"
    status = main(["run", str(spec), "--fast", "--json", "--duration", "1", "--record",
                   "spectra", "--out", str(tmp_path / "runs")])
    cap = capsys.readouterr()
    assert status in (0, 4), cap.err
    (folder,) = (tmp_path / "runs").iterdir()
    assert folder.name.endswith("-名前")
