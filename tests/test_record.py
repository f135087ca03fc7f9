"""Tests of the run record: folder layout, crash-safe event log and WAV streams, JSON safety.

Outside references: the JSON grammar (RFC 8259 has no NaN or Infinity; Python's json parser
is made strict about them below), the WAV/RIFF format as read by two independent readers
(libsndfile through soundfile, and scipy.io.wavfile), and POSIX process death (SIGKILL gives the
process no chance to flush its own buffers).
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import json
import os
import signal
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest
import scipy.io.wavfile
import soundfile

from liveshape.errors import ConfigError
from liveshape.record.runfolder import load_run, read_signals
from liveshape.record.writer import RunRecorder, json_safe
from liveshape.testdef.config import read_yaml_file

REPO = Path(__file__).resolve().parents[1]
NOW = dt.datetime(2024, 5, 6, 7, 8, 9, tzinfo=dt.timezone.utc)
FS_HZ = 8000


def _strict_json(text: str):
    """json.loads that refuses NaN/Infinity, which RFC 8259 does not allow."""

    def refuse(name):
        raise ValueError(f"non-JSON constant {name}")

    return json.loads(text, parse_constant=refuse)


def _recorder(tmp_path: Path, **kw) -> RunRecorder:
    args = dict(
        name="demo run", spec_mapping={"name": "demo", "control": {"fs_hz": FS_HZ}},
        rig_mapping={"kind": "sim", "plant": "loudspeaker"},
        calibration={"calibrated": False, "source": "uncalibrated"}, fs_hz=FS_HZ, now=NOW,
    )
    args.update(kw)
    return RunRecorder.create(tmp_path / "runs", **args)


def test_folder_layout_and_unique_names(tmp_path):
    rec = _recorder(tmp_path)
    root = rec.root
    assert root.name == "20240506-070809-demo-run"
    assert read_yaml_file(root / "spec.yaml") == {"name": "demo", "control": {"fs_hz": FS_HZ}}
    assert read_yaml_file(root / "rig.yaml") == {"kind": "sim", "plant": "loudspeaker"}
    meta = _strict_json((root / "run.json").read_text())
    assert meta["created_utc"] == "2024-05-06T07:08:09+00:00"
    assert meta["calibration"]["calibrated"] is False
    assert (root / "events.jsonl").exists() and (root / "updates").is_dir()
    # A second run in the same second gets its own folder; the first is untouched.
    rec2 = _recorder(tmp_path)
    rec3 = _recorder(tmp_path)
    assert rec2.root.name == "20240506-070809-demo-run-2"
    assert rec3.root.name == "20240506-070809-demo-run-3"
    for r in (rec, rec2, rec3):
        r.close({"status": "stopped"})
    assert sorted(p.name for p in (tmp_path / "runs").iterdir()) == [
        "20240506-070809-demo-run", "20240506-070809-demo-run-2", "20240506-070809-demo-run-3",
    ]


@pytest.mark.parametrize(
    ("kw", "word"),
    [({"fs_hz": 44100.5}, "fs_hz"), ({"fs_hz": 0}, "fs_hz")],
)
def test_bad_arguments_are_one_line_errors(tmp_path, kw, word):
    with pytest.raises(ConfigError) as info:
        _recorder(tmp_path, **kw)
    assert word in str(info.value) and "\n" not in str(info.value)


@pytest.mark.parametrize(("name", "folder"), [
    ("名前", "20240506-070809-名前"),            # Unicode letters are kept
    ("Prüfling 3/4", "20240506-070809-Prüfling-3-4"),
    ("///", "20240506-070809-run"),             # nothing usable: a fixed word, never refused
])
def test_any_test_name_gives_a_folder_name(tmp_path, name, folder):
    # The name is sanitized for the folder only (any name the spec accepts is accepted).
    rec = _recorder(tmp_path, name=name)
    try:
        assert rec.root.name == folder
        assert _strict_json((rec.root / "run.json").read_text())["name"] == name
    finally:
        rec.close({"status": "stopped"})


def test_output_folder_that_is_a_file(tmp_path):
    (tmp_path / "runs").write_text("not a folder")
    with pytest.raises(ConfigError, match="is a file"):
        _recorder(tmp_path)


# libsndfile writes the 'fact' chunk the WAV format requires for float data, and a 'PAD ' chunk;
# scipy skips both with a warning.
_SCIPY_CHUNK_WARNING = "ignore:Chunk .non-data. not understood:scipy.io.wavfile.WavFileWarning"


@pytest.mark.filterwarnings(_SCIPY_CHUNK_WARNING)
def test_wav_round_trip_two_readers(tmp_path):
    rng = np.random.default_rng(1)
    drive = rng.normal(0, 0.2, 3000)
    response = rng.normal(0, 0.1, (3000, 2))
    with _recorder(tmp_path, flush_every_s=0.05) as rec:
        for k in range(0, 3000, 256):
            rec.signals(drive[k:k + 256], response[k:k + 256])
        rec.close({"status": "completed"})
    run = load_run(rec.root)
    d, r, fs = read_signals(run)
    assert fs == FS_HZ
    # float32 storage: exactly the float32 rounding of what was written (IEEE 754 single).
    np.testing.assert_array_equal(d, drive.astype(np.float32).astype(float))
    np.testing.assert_array_equal(r, response.astype(np.float32).astype(float))
    info = soundfile.info(str(run.drive_wav))
    assert (info.format, info.subtype, info.channels) == ("WAV", "FLOAT", 1)
    # An independent reader of RIFF/WAVE agrees.
    rate, data = scipy.io.wavfile.read(run.response_wav)
    assert rate == FS_HZ and data.dtype == np.float32
    np.testing.assert_array_equal(data, response.astype(np.float32))
    assert run.summary["record"]["drive_samples"] == 3000


def test_summary_is_json_safe(tmp_path):
    @dataclasses.dataclass(frozen=True)
    class Result:
        status: str
        final_rms_error_db: float
        lines: np.ndarray

    rec = _recorder(tmp_path)
    path = rec.close(
        {
            "status": "completed", "control_grms_g": np.float32(5.5), "dof": np.int64(120),
            "abort_reason": None, "final_max_dev_db": float("nan"), "ratio": np.inf,
            "spectrum": np.array([1.0, np.nan]), "nested": Result("x", np.float64(0.25),
                                                               np.arange(3)),
            "where": tmp_path, "h": np.complex128(1 - 2j), "flag": np.bool_(True),
        }
    )
    data = _strict_json(path.read_text())
    assert data["control_grms_g"] == pytest.approx(5.5)
    assert data["dof"] == 120 and isinstance(data["dof"], int)
    assert data["final_max_dev_db"] is None and data["ratio"] is None
    assert data["spectrum"] == [1.0, None]
    assert data["nested"] == {"status": "x", "final_rms_error_db": 0.25, "lines": [0, 1, 2]}
    assert data["h"] == {"re": 1.0, "im": -2.0} and data["flag"] is True
    assert data["where"] == str(tmp_path)
    assert data["record"]["events"] == 0
    assert json_safe((1, {2: np.float16(0.5)})) == [1, {"2": 0.5}]


def test_updates_stacked_in_index_order(tmp_path):
    rng = np.random.default_rng(2)
    f = np.linspace(0, FS_HZ / 2, 65)
    rows = []
    with _recorder(tmp_path) as rec:
        for i in (3, 1, 2, 10):  # written out of order; the reader sorts by number
            row = dict(
                control_psd=rng.random(65), target_psd=np.full(65, 0.01),
                drive_psd=rng.random(65) * 1e-6, h1=rng.normal(size=65) + 1j * rng.normal(size=65),
                coherence=rng.random(65),
            )
            extra = {"rms_error_db": 0.1 * i, "max_dev_db": None if i == 2 else float(i)}
            if i == 10:
                extra["level_db"] = 0.0
            rec.update(i, 0.5 * i, f, **row, **extra)
            rows.append((i, row))
        rec.close({"status": "completed"})
    up = load_run(rec.root).updates
    assert up.n == 4
    np.testing.assert_array_equal(up.index, [1, 2, 3, 10])
    np.testing.assert_array_equal(up.t_s, [0.5, 1.0, 1.5, 5.0])
    np.testing.assert_array_equal(up.f_hz, f)
    by_index = dict(rows)
    for k, i in enumerate(up.index):
        for key, arr in by_index[int(i)].items():
            np.testing.assert_array_equal(getattr(up, key)[k], arr)
    np.testing.assert_allclose(up.numbers["rms_error_db"], [0.1, 0.2, 0.3, 1.0])
    np.testing.assert_array_equal(up.numbers["max_dev_db"], [1.0, np.nan, 3.0, 10.0])
    np.testing.assert_array_equal(up.numbers["level_db"], [np.nan, np.nan, np.nan, 0.0])
    assert not up.control_psd.flags.writeable
    assert not [p for p in (rec.root / "updates").iterdir() if p.name.startswith(".")]


def test_update_shape_is_checked(tmp_path):
    rec = _recorder(tmp_path)
    f = np.arange(5.0)
    with pytest.raises(ValueError, match="control_psd"):
        rec.update(1, 0.0, f, np.ones(4), np.ones(5), np.ones(5))
    with pytest.raises(ValueError, match="clash"):
        rec.update(1, 0.0, f, np.ones(5), np.ones(5), np.ones(5), **{"numbers": 1.0})


def test_context_manager_status_on_exception(tmp_path):
    with pytest.raises(RuntimeError), _recorder(tmp_path) as rec:
        rec.event(0.0, "stage", "connect")
        raise RuntimeError("amplifier went away\nsecond line")
    run = load_run(rec.root)
    assert run.status == "crashed"
    assert run.summary["error"] == "RuntimeError: amplifier went away"
    assert [e.kind for e in run.events] == ["stage", "crash"]

    with pytest.raises(KeyboardInterrupt), _recorder(tmp_path, name="b") as rec:
        raise KeyboardInterrupt
    assert load_run(rec.root).status == "stopped"

    with _recorder(tmp_path, name="c") as rec:
        pass
    assert load_run(rec.root).status == "stopped"
    with pytest.raises(ValueError, match="closed"):
        rec.event(1.0, "late", "after close")


def test_open_run_readable_and_cut_last_line_tolerated(tmp_path):
    rec = _recorder(tmp_path)
    for k in range(5):
        rec.event(0.1 * k, "level", f"step {k}", {"level_db": -12.0 + 3 * k})
    # Not closed: what a reader sees while the run goes on.
    run = load_run(rec.root)
    assert run.summary is None and run.status == "incomplete" and not run.complete
    assert [e.data["level_db"] for e in run.events] == [-12.0, -9.0, -6.0, -3.0, 0.0]
    # A write cut in the middle of a line (what a kill during write leaves).
    with open(rec.root / "events.jsonl", "a", encoding="utf-8") as fh:
        fh.write('{"t_s": 0.6, "kind": "lev')
    run = load_run(rec.root)
    assert len(run.events) == 5 and run.skipped_event_lines == 1


_CHILD = textwrap.dedent(
    """
    import datetime as dt, os, signal, sys
    import numpy as np
    from liveshape.record.writer import RunRecorder
    rec = RunRecorder.create(
        sys.argv[1], name="killed", spec_mapping={"name": "killed"}, rig_mapping={},
        calibration={"calibrated": True}, fs_hz=8000, flush_every_s=1.0,
        now=dt.datetime(2024, 1, 2, 3, 4, 5, tzinfo=dt.timezone.utc),
    )
    rng = np.random.default_rng(7)
    x = rng.normal(0, 0.1, 20000)          # 2.5 s at 8 kHz
    for k in range(0, 20000, 500):
        rec.signals(x[k:k + 500], 0.5 * x[k:k + 500])
    for k in range(40):
        rec.event(0.05 * k, "tick", f"tick {k}", {"k": k})
    f = np.arange(9.0)
    rec.update(1, 2.0, f, np.ones(9), np.ones(9), np.ones(9), rms_error_db=0.5)
    os.kill(os.getpid(), signal.SIGKILL)
    """
)


@pytest.mark.filterwarnings(_SCIPY_CHUNK_WARNING)
def test_record_survives_sigkill(tmp_path):
    env = dict(os.environ, PYTHONPATH=str(REPO))
    proc = subprocess.run(
        [sys.executable, "-c", _CHILD, str(tmp_path)], env=env, capture_output=True, timeout=60
    )
    assert proc.returncode == -signal.SIGKILL, proc.stderr.decode()
    (root,) = tmp_path.iterdir()
    run = load_run(root)
    assert run.summary is None and run.status == "incomplete"
    # Every event line was flushed before the kill (SIGKILL drops Python's own buffers).
    assert [e.data["k"] for e in run.events] == list(range(40))
    assert run.updates.n == 1 and run.updates.numbers["rms_error_db"][0] == 0.5
    # The WAV header was last rewritten after 2.0 s (each 1.0 s of signal): at least that many
    # samples are readable, by libsndfile and by scipy's independent RIFF reader.
    x = np.random.default_rng(7).normal(0, 0.1, 20000).astype(np.float32)
    d, r, fs = read_signals(run)
    assert fs == 8000 and 16000 <= d.size <= 20000
    np.testing.assert_array_equal(d, x[: d.size])
    np.testing.assert_array_equal(r, (0.5 * x.astype(float)).astype(np.float32)[: r.size])
    rate, data = scipy.io.wavfile.read(run.drive_wav)
    assert rate == 8000 and data.size >= 16000
    np.testing.assert_array_equal(data, x[: data.size])


def test_load_run_errors_are_one_line(tmp_path):
    with pytest.raises(ConfigError, match="run folder not found"):
        load_run(tmp_path / "nope")
    (tmp_path / "empty").mkdir()
    with pytest.raises(ConfigError, match="not a run folder") as info:
        load_run(tmp_path / "empty")
    assert "\n" not in str(info.value)
    (tmp_path / "other").mkdir()
    (tmp_path / "other" / "run.json").write_text('{"format": "something-else"}')
    with pytest.raises(ConfigError, match="format"):
        load_run(tmp_path / "other")


def test_update_from_record_keeps_figures_and_extra_arrays(tmp_path):
    from liveshape.control.runstate import UpdateRecord  # the controller's own record (demo values)

    f = np.arange(9.0)
    rec = _recorder(tmp_path)
    for i in (1, 2):
        rec.update_from(
            UpdateRecord(
                index=i, t_s=1.5 * i, stage="equalize", level_db=-6.0, dof=60.0, f_hz=f,
                control_psd=f + i, target_psd=f * 0 + 1, drive_psd=f * 2,
                new_drive_psd=f * 3 + i, h1=(1 + 1j) * f, coherence=f / 9,
                rms_error_db=-0.5 / i, max_dev_db=1.0, min_dev_db=-1.0, applied=i == 2,
                lines_step_limited=0, lines_held=3, ceiling_scale=1.0,
                decision_psd=f * 4 + i, decision_dof=120.0 * i,
            ),
            lines_outside_alarm=7,
        )
    up = load_run(rec.root).updates
    np.testing.assert_array_equal(up.arrays["new_drive_psd"], [f * 3 + 1, f * 3 + 2])
    np.testing.assert_array_equal(up.h1[1], (1 + 1j) * f)
    np.testing.assert_array_equal(up.numbers["applied"], [0.0, 1.0])
    np.testing.assert_array_equal(up.numbers["rms_error_db"], [-0.5, -0.25])
    np.testing.assert_array_equal(up.numbers["lines_outside_alarm"], [7.0, 7.0])
    assert "stage" not in up.numbers and set(up.numbers) >= {"level_db", "dof", "lines_held"}
    # the estimate behind each tolerance decision is kept with its DOF
    np.testing.assert_array_equal(up.arrays["decision_psd"], [f * 4 + 1, f * 4 + 2])
    np.testing.assert_array_equal(up.numbers["decision_dof"], [120.0, 240.0])
    # each update file names the units of what it holds
    with np.load(rec.root / "updates" / "0001.npz") as z:
        units = dict(u.split(": ") for u in z["units"].tolist())
    assert units["control_psd"] == units["decision_psd"] == "g^2/Hz"
    assert units["drive_psd"] == "FS^2/Hz" and units["f_hz"] == "Hz"


def test_wav_size_limit_drops_later_blocks_once(tmp_path, monkeypatch):
    import liveshape.record.wavstream as wavstream

    # The RIFF size field is 32 bits (4 GiB); shrink the limit to 4000 bytes = 1000 float32.
    monkeypatch.setattr(wavstream, "WAV_MAX_DATA_BYTES", 4000)
    x = np.arange(300, dtype=np.float32) / 300
    with _recorder(tmp_path) as rec:
        for _ in range(5):  # 1500 samples offered, 900 fit in whole blocks
            rec.signals(x, x)
        rec.close({"status": "completed"})
    run = load_run(rec.root)
    d, r, _ = read_signals(run)
    assert d.size == r.size == 900
    full = [e for e in run.events if e.kind == "record_full"]
    assert len(full) == 1 and full[0].data["recorded_s"] == pytest.approx(900 / FS_HZ)


def _record_real_run(out_dir: Path):
    """A short real run (controller + simulated rig) recorded the way the shell records one."""
    from liveshape.control.controller import Controller
    from liveshape.rigs.plant import load_plant
    from liveshape.rigs.sim import SimRig
    from liveshape.testdef.spec import load_spec, spec_to_mapping

    spec = load_spec(REPO / "examples" / "handlebar-nav-unit.yaml", {
        "control.fs_hz": 8000, "control.lines": 512, "control.target_dof": 60,
        "schedule.full_level_s": 2, "schedule.hold_s": 0.5,
    })
    rig = SimRig(load_plant("loudspeaker"), spec.control.fs_hz, seed=1)
    ctl = Controller(spec, rig.calibration, seed=2)
    drives, responses, events = [], [], []
    response = np.zeros(1024)
    last = None
    with RunRecorder.create(
        out_dir, name=spec.name, spec_mapping=spec_to_mapping(spec),
        rig_mapping={"kind": "sim", "plant": "loudspeaker"},
        calibration=dataclasses.asdict(rig.calibration), fs_hz=spec.control.fs_hz, now=NOW,
    ) as rec:
        while not ctl.finished:
            drive = ctl.exchange(response)
            rec.signals(drive, response)
            drives.append(drive)
            responses.append(response)
            response = rig.process(drive)
            new = ctl.drain_events()
            rec.events(new)
            events += new
            if ctl.last_update is not None and ctl.last_update is not last:
                last = ctl.last_update
                rec.update_from(last)
        tail = ctl.drain_events()
        rec.events(tail)
        events += tail
        result = ctl.result()
        rec.close(result)
    return rec.root, result, np.concatenate(drives), np.concatenate(responses), events


@pytest.mark.filterwarnings(_SCIPY_CHUNK_WARNING)
def test_wav_header_fallback_without_soundfile_internals(tmp_path, monkeypatch):
    import liveshape.record.wavstream as wavstream

    # A soundfile whose internals changed: an open file without the private SNDFILE handle
    # gets no command; the recorder goes on and the header written at close holds every
    # sample (float32 storage: IEEE 754 single rounding).
    assert wavstream.sf_command(object(), wavstream.SFC_UPDATE_HEADER_NOW) is False
    sent = []
    monkeypatch.setattr(wavstream, "sf_command", lambda *args: sent.append(args[1:]) or False)
    x = np.random.default_rng(3).normal(0, 0.2, 2000)
    with _recorder(tmp_path, flush_every_s=0.01) as rec:
        for k in range(0, 2000, 500):
            rec.signals(x[k:k + 500], x[k:k + 500])
        rec.close({"status": "completed"})
    assert (wavstream.SFC_UPDATE_HEADER_NOW,) in sent  # asked for and not done
    _, data = scipy.io.wavfile.read(load_run(rec.root).drive_wav)
    np.testing.assert_array_equal(data, x.astype(np.float32))


def test_record_of_a_real_run(tmp_path):
    root, result, drive, response, events = _record_real_run(tmp_path)
    run = load_run(root)
    assert run.status == result.status == "completed"
    assert run.summary["final_rms_error_db"] == pytest.approx(result.final_rms_error_db,
                                                              rel=1e-12)
    assert [(e.kind, e.message) for e in run.events] == [(e.kind, e.message) for e in events]
    n_update_events = sum(e.kind == "update" for e in events)
    assert run.updates.n == n_update_events == result.updates
    d, r, fs = read_signals(run)
    assert fs == 8000
    np.testing.assert_array_equal(d, drive.astype(np.float32))
    np.testing.assert_array_equal(r, response.astype(np.float32))
    assert "new_drive_psd" in run.updates.arrays and run.calibrated is True


def test_moved_names_are_reexported():
    # the WAV size limit lived in record; it is defined in wavstream now
    import liveshape.record.wavstream as wavstream
    import liveshape.record.writer as record

    assert record.WAV_MAX_DATA_BYTES is wavstream.WAV_MAX_DATA_BYTES
    assert record.WavStream is wavstream.WavStream
