"""The shell around one run: rig, controller, record, pacing, stop signals, live view.

This is the only place where wall-clock time enters a run: the controller counts samples, the
session decides whether to pace the loop in real time (the default on the simulated rig) or run
it as fast as the CPU allows (``fast=True``, identical results for the same seed). It joins the
pure core (:class:`~liveshape.control.controller.Controller`, :class:`~liveshape.rigs.sim.SimRig`)
with the record (:mod:`liveshape.record.writer`) and the view callback, and turns Ctrl-C and
SIGTERM into the controller's controlled ramp-down.
"""

from __future__ import annotations

import dataclasses
import hashlib
import signal
import threading
import time
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from liveshape import __version__
from liveshape.control.controller import Controller
from liveshape.control.runstate import ControlSnapshot, RunResult
from liveshape.errors import ConfigError
from liveshape.record import diskspace
from liveshape.record.exports import INPUTS_CSV, SPECTRA_CSV, inputs_csv_text, spectra_csv_text
from liveshape.record.writer import RunRecorder
from liveshape.testdef.chain import ChainCalibration
from liveshape.testdef.spec import TestSpec, spec_to_mapping

#: Default block size of the simulated rig, samples (about 85 ms at 48 kHz; paced and --fast
#: runs use the same size, so the same seed gives the same drive).
SIM_BLOCK = 4096


@dataclass(frozen=True)
class SessionResult:
    """What a run left: the controller's result, the record folder and rig figures."""

    result: RunResult
    run_dir: Path
    rig: dict[str, Any]
    calibration: dict[str, Any]
    #: One line when the record could not be closed (summary.json missing), else None.
    record_error: str | None = None

    def summary(self) -> dict[str, Any]:
        """The JSON summary of the run (``run --json`` and ``summary.json``)."""
        r = self.result
        trip = r.trip
        out: dict[str, Any] = {
            "status": r.status,
            "abort_reason": r.abort_reason,
            "abort_rule": r.abort_rule,
            "exit_status": r.exit_status,
            "updates_to_tolerance": r.updates_to_tolerance,
            "final_rms_error_db": r.final_rms_error_db,
            "final_max_dev_db": r.final_max_dev_db,
            "final_lines_outside_alarm": r.final_lines_outside_alarm,
            "final_lines_outside_abort": r.final_lines_outside_abort,
            "control_grms_g": r.control_grms_g,
            "target_grms_g": r.target_grms_g,
            "dof": r.dof,
            "time_at_full_level_s": r.time_at_full_level_s,
            "updates": r.updates,
            "control_kurtosis": r.kurtosis,
            "tones": r.tones,
            "lines_not_caused_by_drive": r.lines,
            "inputs": r.inputs,
            "trip": None if trip is None else dataclasses.asdict(trip),
            **verdict_summary(r.verdict),
            "run_dir": str(self.run_dir),
            "rig": self.rig,
            "calibration": self.calibration,
        }
        return out


def verdict_summary(v: Any) -> dict[str, Any]:
    """The verdict's entries of ``summary.json`` (see :mod:`liveshape.control.verdict`)."""
    if v is None:
        return {"verdict": None}
    j = v.judgement
    return {
        "verdict": v.verdict,
        "verdict_reasons": list(v.reasons),
        "verdict_rule": v.rule,
        "full_level_dof": v.dof,
        "full_level_rms_error_db": None if j is None else j.rms_error_db,
        "full_level_max_dev_db": None if j is None else j.max_dev_db,
        "full_level_min_dev_db": None if j is None else j.min_dev_db,
        "full_level_lines_outside_alarm": None if j is None else j.lines_outside_alarm,
        "full_level_lines_outside_abort": None if j is None else j.lines_outside_abort,
        "full_level_control_grms_g": None if j is None else j.control_grms_g,
        "alarm_fraction": v.alarm_fraction,
        "max_alarm_fraction": v.max_alarm_fraction,
    }


def file_sha256(path: str | Path | None) -> str | None:
    """SHA-256 (hex) of a file's bytes, or None when there is no such file."""
    if not path:
        return None
    try:
        with open(path, "rb") as fh:
            return hashlib.sha256(fh.read()).hexdigest()
    except OSError:
        return None


class StopFlag:
    """A stop request set from a signal handler or another thread, read by the loop."""

    def __init__(self) -> None:
        self._event = threading.Event()
        self.reason = ""

    def set(self, reason: str) -> None:
        if not self._event.is_set():
            self.reason = reason
            self._event.set()

    def is_set(self) -> bool:
        return self._event.is_set()


@contextmanager
def sigterm_stops(flag: StopFlag) -> Iterator[None]:
    """While inside, SIGTERM sets ``flag`` (main thread only; elsewhere a no-op)."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return

    def handler(signum: int, frame: Any) -> None:
        flag.set("SIGTERM received")

    previous = signal.signal(signal.SIGTERM, handler)
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, previous)


def build_sim_rig(spec: TestSpec, seed: int | None) -> tuple[Any, ChainCalibration, dict]:
    """The simulated rig named by the spec, its calibration (the simulated truth) and mapping."""
    from liveshape.rigs.plant import load_plant, plant_to_mapping
    from liveshape.rigs.sim import SimRig

    plant = load_plant(spec.rig.plant)
    inputs = None
    if spec.rig.inputs is not None and len(spec.rig.inputs) > 1:
        from liveshape.rigs.sim import sim_inputs

        inputs = sim_inputs(spec.rig.input_roles(), plant)
    rig = SimRig(plant, spec.control.fs_hz, seed=seed, faults=spec.faults, hum=spec.rig.hum,
                 inputs=inputs)
    mapping = {"kind": "sim", "plant": plant_to_mapping(plant)}
    if inputs is not None:
        from liveshape.testdef.inputs import inputs_to_list

        mapping["inputs"] = inputs_to_list(spec.rig.input_roles())
    if spec.rig.hum is not None:
        mapping["hum"] = spec.rig.hum.as_mapping()
    return rig, rig.calibration, mapping


def _warm_start(run_dir: str | Path | None, spec: TestSpec, rig_mapping: dict,
                cal: ChainCalibration) -> Any:
    """The warm start from ``run_dir`` (None: a cold start); ConfigError when it does not fit."""
    if run_dir is None:
        return None
    from liveshape.record.warmstart import load_warm_start

    return load_warm_start(run_dir, spec, rig=rig_mapping, calibration=_calibration_mapping(cal))


def _calibration_mapping(cal: ChainCalibration) -> dict[str, Any]:
    data = dataclasses.asdict(cal)
    data["g_per_fs"] = cal.g_per_fs
    return data


def record_estimate(spec: TestSpec, record_signals: bool = True) -> diskspace.RecordEstimate:
    """Expected size of the record of a run of ``spec`` for its nominal length.

    See :func:`liveshape.control.runplan.nominal_run_s` and
    :func:`liveshape.record.diskspace.estimate_record`.
    """
    from liveshape.control.runplan import nominal_run_s, record_period_s

    c = spec.control
    n_lines = int(np.count_nonzero(spec.profile.lines(c.fs_hz, c.frame_length) > 0))
    return diskspace.estimate_record(nominal_run_s(spec), c.fs_hz, signals=record_signals,
                                     n_lines=n_lines, update_period_s=record_period_s(spec))


def _close_record(recorder: RunRecorder, session: SessionResult) -> SessionResult:
    """Close the record with the session's summary; a failed write is noted, not raised."""
    try:
        recorder.close(session.summary())
    except OSError as exc:
        text = f"{recorder.root}: record not closed ({exc.strerror or exc})"
        return dataclasses.replace(session, record_error=text)
    return session


def _open_record(spec: TestSpec, out_dir: str | Path, rig_mapping: dict[str, Any],
                 cal: ChainCalibration, extra: dict[str, Any],
                 identity: dict[str, Any] | None = None,
                 record_signals: bool = True) -> RunRecorder:
    """A new run folder with the resolved spec, the rig and its calibration.

    ``run.json`` names the software version, the SHA-256 of the test file as read (None for a
    spec made in code) and ``identity`` (``operator``, ``test_item``).
    """
    # Refused before anything is made when the record will not fit (one line, exit 2).
    diskspace.check_free_space(out_dir, record_estimate(spec, record_signals))
    ident = {"software_version": __version__, "spec_file": spec.source or None,
             "spec_sha256": file_sha256(spec.source), "operator": None, "test_item": None,
             **(identity or {})}
    return RunRecorder.create(
        out_dir,
        name=spec.name,
        spec_mapping=spec_to_mapping(spec),
        rig_mapping=rig_mapping,
        calibration=_calibration_mapping(cal),
        fs_hz=spec.control.fs_hz,
        extra=extra,
        identity=ident,
        signals=record_signals,
    )


class RunLoop:
    """Feeds the controller, the rig, the record and the view for one run.

    Parameters
    ----------
    controller : Controller
    recorder : RunRecorder
    on_snapshot : callable, optional
        Called with a :class:`ControlSnapshot` at most ``view_hz`` times per wall-clock second.
    view_hz : float
    """

    def __init__(
        self,
        controller: Controller,
        recorder: RunRecorder,
        *,
        on_snapshot: Callable[[ControlSnapshot], None] | None = None,
        view_hz: float = 4.0,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        self.controller = controller
        self.recorder = recorder
        self.on_snapshot = on_snapshot
        self.view_period_s = 1.0 / view_hz
        self.clock = clock
        self._last_view = -np.inf
        self._last_update: Any = None
        self._closed_out = False
        #: Free-space look-up (bytes free under a path); replaceable in tests.
        self.free_bytes: Callable[[Path], int] = diskspace.free_bytes
        self._disk_every = max(1, int(diskspace.CHECK_EVERY_S * controller.spec.control.fs_hz))
        self._disk_count = 0
        #: One line when writing the record failed (the run was stopped; nothing more written).
        self.record_error: str | None = None

    def after_block(self, drive: np.ndarray, response: np.ndarray) -> None:
        """Record one block pair and whatever the controller has to say since the last one.

        A record that cannot be written (full disk, removed folder) or free space below
        :data:`liveshape.record.diskspace.RESERVE_BYTES` trips ``disk_space``: the drive ramps
        down as for any trip, and after a failed write nothing more is written but the summary.
        """
        ctrl = self.controller
        if self.record_error is None:
            try:
                self._record(drive, response)
                self._watch_disk(int(np.shape(drive)[0]) if np.ndim(drive) else 0)
            except OSError as exc:
                self.record_error = " ".join(str(exc).split()) or exc.__class__.__name__
                ctrl.request_abort("disk_space", f"the record cannot be written: "
                                   f"{self.record_error}", {"error": self.record_error})
        else:
            ctrl.drain_events()
        if self.on_snapshot is not None:
            now = self.clock()
            if now - self._last_view >= self.view_period_s or ctrl.finished:
                self._last_view = now
                self.on_snapshot(ctrl.snapshot())

    def _watch_disk(self, n_samples: int) -> None:
        """Every ``CHECK_EVERY_S`` of run time: trip ``disk_space`` below the reserve."""
        self._disk_count += n_samples
        if self._disk_count < self._disk_every:
            return
        self._disk_count = 0
        free = self.free_bytes(self.recorder.root)
        if free < diskspace.RESERVE_BYTES:
            self.controller.request_abort(
                "disk_space",
                f"free space under {self.recorder.root.parent} is "
                f"{diskspace.human_bytes(free)}, below the reserve of "
                f"{diskspace.human_bytes(diskspace.RESERVE_BYTES)}",
                {"free_bytes": int(free), "reserve_bytes": diskspace.RESERVE_BYTES})

    def _record(self, drive: np.ndarray, response: np.ndarray) -> None:
        ctrl = self.controller
        self.recorder.signals(drive, response)
        for ev in ctrl.drain_events():
            self.recorder.event(ev.t_s, ev.kind, ev.message, ev.data)
        upd = ctrl.last_update
        if upd is not None and upd is not self._last_update:
            self._last_update = upd
            self.recorder.update_from(upd)
        if ctrl.finished and not self._closed_out:
            self._closed_out = True
            self._write_final_spectra()

    def _write_final_spectra(self) -> None:
        """The full-level average (``decisions/full_level.npz``) and ``spectra.csv``."""
        ctrl = self.controller
        full = ctrl.full_level_arrays()
        if full is not None:
            self.recorder.full_level(full)
            table = inputs_csv_text(full)
            if table is not None:
                self.recorder.text_file(INPUTS_CSV, table)
        u = ctrl.last_update
        if u is None:
            return
        if full is not None:
            c, dof, src, tgt = full["control_psd_g2_hz"], full["dof"], "full_level", \
                full["target_psd_g2_hz"]
        elif u.decision_dof > 0:
            c, dof, src, tgt = u.decision_psd, u.decision_dof, "decision", u.target_psd
        else:
            c, dof, src, tgt = u.control_psd, u.dof, "update", u.target_psd
        self.recorder.text_file(SPECTRA_CSV, spectra_csv_text(
            f_hz=u.f_hz, target_g2_hz=tgt, alarm_db=ctrl.alarm_db, abort_db=ctrl.abort_db,
            control_g2_hz=c, control_dof=dof, control_source=src, drive_fs2_hz=u.drive_psd,
            h1_g_per_fs=u.h1, coherence=u.coherence))

    def run_sim(
        self, rig: Any, *, block_size: int, fast: bool, stop: StopFlag,
        sleep: Callable[[float], None] = time.sleep,
    ) -> RunResult:
        """Step controller and simulated rig until the controller is done.

        Paced so that run time never gets ahead of wall time unless ``fast``. A stop request
        (``stop`` set, or Ctrl-C) becomes :meth:`Controller.request_stop`: the loop goes on
        through the controlled ramp-down.
        """
        ctrl = self.controller
        fs = ctrl.spec.control.fs_hz
        n_in = len(getattr(rig, "input_channels", ())) or 1
        response = np.zeros(block_size) if n_in == 1 else np.zeros((block_size, n_in))
        t0 = self.clock()
        asked = False
        while not ctrl.finished:
            try:
                if stop.is_set() and not asked:
                    ctrl.request_stop(stop.reason)
                    asked = True
                drive = ctrl.exchange(response)
                response = rig.process(drive) if n_in == 1 else rig.process_inputs(drive).T
                self.after_block(drive, response)
                if not fast or ctrl.stage == "bring_up":  # the user's hold is real time
                    ahead = (ctrl.t_s - block_size / fs) - (self.clock() - t0)
                    if ahead > 0:
                        sleep(ahead)
            except KeyboardInterrupt:
                stop.set("Ctrl-C")
        self.after_block(np.zeros(0), np.zeros(0))
        return ctrl.result()


def run_session(
    spec: TestSpec,
    *,
    out_dir: str | Path,
    fast: bool = False,
    seed: int | None = None,
    block_size: int = SIM_BLOCK,
    on_snapshot: Callable[[ControlSnapshot], None] | None = None,
    stop: StopFlag | None = None,
    identity: dict[str, Any] | None = None,
    record_signals: bool = True,
    start_events: Sequence[tuple[str, str, dict[str, Any]]] = (),
    bring_up: Any = None,
    view_hz: float = 4.0,
    warm_start: str | Path | None = None,
) -> SessionResult:
    """Run one test on the rig the spec selects and leave a record folder.

    Parameters
    ----------
    spec : TestSpec
        Resolved test definition (``spec.rig.kind`` is ``sim`` here; real cards go through
        :func:`liveshape.rigs.audio` in :func:`run_audio_session`).
    out_dir : path
        Folder under which the run folder is made.
    fast : bool
        Run as fast as the CPU allows instead of in real time (same results for the same seed).
    seed : int, optional
        Seed of the drive synthesis and the simulated noise (default: ``spec.seed``).
    block_size : int
        Samples per exchange with the rig.
    on_snapshot : callable, optional
        Live view callback.
    stop : StopFlag, optional
        Set it (or send SIGTERM, or press Ctrl-C) to ramp down and stop.
    identity : dict, optional
        ``operator`` and ``test_item`` for ``run.json``.
    record_signals : bool
        Record drive and response as WAV files (False: spectra and events only).
    start_events : sequence of (kind, message, data)
        Events recorded at 0 s before the first block (e.g. ``infeasible_accepted``).
    bring_up : threading.Event, optional
        Hold the drive at the connection level after the connection check until this flag is
        set by the user's confirmation (see :mod:`liveshape.control.bringup`); None: no hold.
        The hold is paced in real time even with ``fast``.
    view_hz : float
        Most ``on_snapshot`` calls per second of wall-clock time (a large value: every block).
    warm_start : path, optional
        An earlier completed run on the same rig and calibration: start from its equalized drive
        (:mod:`liveshape.control.warmstart`); refused in one line when they differ.
    """
    if spec.rig.kind != "sim":
        raise ConfigError(
            f"rig.kind = {spec.rig.kind!r}: this session runs the simulated rig; "
            "use run_audio_session for audio devices"
        )
    if block_size < 16:
        raise ConfigError(f"--block-size = {block_size} must be at least 16 samples")
    seed = spec.seed if seed is None else seed
    rig, cal, rig_mapping = build_sim_rig(spec, seed)
    warm = _warm_start(warm_start, spec, rig_mapping, cal)
    controller = Controller(spec, cal, seed=seed, bring_up=bring_up, warm=warm)
    stop = stop or StopFlag()
    recorder = _open_record(spec, out_dir, rig_mapping, cal,
                            {"seed": seed, "fast": fast, "block_size": block_size,
                             "bring_up": bring_up is not None,
                             "warm_start": None if warm is None else
                             {"from_run": warm.source, "update": warm.update}},
                            identity, record_signals)
    for kind, message, data in start_events:
        recorder.event(0.0, kind, message, data)
    with recorder, sigterm_stops(stop):
        loop = RunLoop(controller, recorder, on_snapshot=on_snapshot, view_hz=view_hz)
        result = loop.run_sim(rig, block_size=block_size, fast=fast, stop=stop)
        rig_figures = {"kind": "sim", "plant": spec.rig.plant, **dataclasses.asdict(rig.status)}
        session = SessionResult(
            result=result,
            run_dir=recorder.root,
            rig=rig_figures,
            calibration=_calibration_mapping(cal),
        )
        session = _close_record(recorder, session)
    return session


def audio_inputs(spec: TestSpec) -> list[int] | None:
    """The input channels (from 1) an audio run reads, in ``rig.inputs`` order; None for the
    one-control shorthand (the control input, and the loopback input if any, as before)."""
    if spec.rig.inputs is None:
        return None
    return [r.channel for r in spec.rig.input_roles()]


def check_audio_map(spec: TestSpec) -> Any:
    """The spec's audio device, checked: named, full duplex at the rate, and its channel map.

    A channel beyond what the device has is one line naming the key (``rig.drive_output``,
    ``rig.inputs[2].channel`` ...), before anything is opened or made. Returns the device's
    :class:`~liveshape.rigs.devices.DeviceInfo`.
    """
    from liveshape.rigs.audio import check_settings
    from liveshape.rigs.devices import check_channel_map

    fs = spec.control.fs_hz
    info = check_settings(spec.rig.device, fs)  # first: no device named is the first error
    cmap = spec.rig.channel_map()
    inputs = audio_inputs(spec)
    check_channel_map(info, cmap, inputs=inputs)
    ins = inputs if inputs is not None else [
        c for c in (cmap["control_input"], cmap["loopback_input"]) if c is not None]
    return check_settings(spec.rig.device, fs, input_channels=max(ins),
                          output_channels=int(cmap["drive_output"]))


#: Drive blocks the audio worker keeps ahead of the stream by default: the margin against a
#: slow update (measured: up to 160 ms on a loaded 2-core machine, so 8 x 1024 at 48 kHz).
AUDIO_LEAD_BLOCKS = 8
AUDIO_BLOCK = 1024


def run_audio_session(
    spec: TestSpec,
    *,
    out_dir: str | Path,
    seed: int | None = None,
    block_size: int = AUDIO_BLOCK,
    lead_blocks: int = AUDIO_LEAD_BLOCKS,
    on_snapshot: Callable[[ControlSnapshot], None] | None = None,
    stop: StopFlag | None = None,
    identity: dict[str, Any] | None = None,
    record_signals: bool = True,
    bring_up: Any = None,
    warm_start: str | Path | None = None,
) -> SessionResult:
    """Run one test through a real audio interface (or the JACK virtual rig).

    The same :class:`~liveshape.control.controller.Controller` as on the simulated rig; the stream
    is one full-duplex :class:`liveshape.rigs.audio.AudioRig`. The calibration file is required
    unless the spec says the levels are uncalibrated (the record says so). The device and its
    settings are checked before the record folder is made, so a wrong device leaves nothing.
    With ``rig.inputs`` every listed input is read: the controller's ``exchange`` gets
    ``(samples, inputs)`` blocks, the columns in list order (one input: a 1-D block), and the
    response WAV has the same columns.
    ``bring_up`` (a :class:`threading.Event` the shell sets on the user's Enter) holds the drive
    at the connection level after the connection check until the user confirms (see
    :mod:`liveshape.control.bringup`); None (``run --unattended``): no hold.
    """
    from liveshape.rigs.audio import AudioRig
    from liveshape.rigs.calfile import check_inputs_calibrated
    from liveshape.rigs.calibration import resolve_calibration
    from liveshape.rigs.devices import audio_channels
    from liveshape.testdef.inputs import inputs_to_list

    if spec.rig.kind != "audio":
        raise ConfigError(f"rig.kind = {spec.rig.kind!r}: expected audio for an audio session")
    if block_size < 16:
        raise ConfigError(f"--block-size = {block_size} must be at least 16 samples")
    seed = spec.seed if seed is None else seed
    fs = spec.control.fs_hz
    info = check_audio_map(spec)  # first: no device named is the first error
    cal = resolve_calibration(spec.rig.calibration, spec.rig.uncalibrated)
    check_inputs_calibrated(cal, spec.rig.inputs)  # every sensor's own mV/g, before any drive
    rig = AudioRig(info.index, fs, block_size=block_size, lead_blocks=lead_blocks,
                   stop_fade_s=spec.safety.abort_ramp_s,
                   **audio_channels(spec.rig.channel_map(), audio_inputs(spec)))
    stop = stop or StopFlag()
    rig_mapping = {
        "kind": "audio",
        "device": info.name,
        "device_index": info.index,
        "host_api": info.host_api,
        "fs_hz": fs,
        "block_size": block_size,
        "lead_blocks": lead_blocks,
        **spec.rig.channel_map(),
    }
    if spec.rig.inputs is not None:  # every input is read, in this order
        rig_mapping["inputs"] = inputs_to_list(spec.rig.input_roles())
    warm = _warm_start(warm_start, spec, rig_mapping, cal)
    controller = Controller(spec, cal, seed=seed, bring_up=bring_up, warm=warm)
    recorder = _open_record(spec, out_dir, rig_mapping, cal,
                            {"seed": seed, "block_size": block_size, "calibrated": cal.calibrated,
                             "bring_up": bring_up is not None,
                             "warm_start": None if warm is None else
                             {"from_run": warm.source, "update": warm.update}},
                            identity, record_signals)
    with recorder, sigterm_stops(stop):
        loop = RunLoop(controller, recorder, on_snapshot=on_snapshot)
        result = rig.run(
            controller,
            on_block=lambda b: loop.after_block(b.drive_fs, b.response_fs),
            should_stop=stop.is_set,
        )
        # the closing call writes no samples; its response has the WAV's column count
        cols = rig.input_columns
        loop.after_block(np.zeros(0), np.zeros(0 if cols is None or len(cols) == 1
                                                else (0, len(cols))))
        if rig.stall is not None:
            recorder.event(controller.t_s, "stall",
                           f"no input from the audio stream for {rig.stall['no_input_s']:.2f} s "
                           f"after {int(rig.stall['blocks'])} blocks", dict(rig.stall))
        stats = dataclasses.asdict(rig.stats)
        session = SessionResult(
            result=result,
            run_dir=recorder.root,
            rig={**rig_mapping, "stream": stats, "stall": rig.stall},
            calibration=_calibration_mapping(cal),
        )
        session = _close_record(recorder, session)
    return session


#: Default survey drive, FS rms: a little above the connection level, far below a test.
SURVEY_LEVEL_FS = 0.02
#: Default survey duration, s (about 110 DOF at 32768-point frames and 48 kHz).
SURVEY_DURATION_S = 20.0


def survey_settings(
    spec: TestSpec,
    *,
    level_fs: float = SURVEY_LEVEL_FS,
    duration_s: float = SURVEY_DURATION_S,
    frame_length: int = 32768,
    band_hz: tuple[float, float] | None = None,
    seed: int | None = None,
) -> Any:
    """Checked settings of a survey on ``spec``'s rig (one-line ConfigError when wrong).

    The drive is flat random noise over ``band_hz`` (default: the profile's band) at
    ``level_fs`` rms, never above ``safety.drive_rms_max_fs``.
    """
    from liveshape.control.survey import SurveySettings

    if level_fs > spec.safety.drive_rms_max_fs:
        raise ConfigError(f"--level = {level_fs:g} FS is above safety.drive_rms_max_fs = "
                          f"{spec.safety.drive_rms_max_fs:g} FS")
    band = band_hz or (spec.profile.f_min_hz, spec.profile.f_max_hz)
    return SurveySettings(fs_hz=spec.control.fs_hz, level_fs=level_fs, duration_s=duration_s,
                          band_hz=(float(band[0]), float(band[1])), frame_length=frame_length,
                          seed=spec.seed if seed is None else seed)


def _survey_g_per_fs(cal: ChainCalibration, roles: Sequence[Any] | None) -> float:
    """g per FS of the survey's first control input (one input: the chain's, as before)."""
    if roles is None:
        return cal.g_per_fs
    first = next(r for r in roles if r.role == "control")
    return cal.g_per_fs_at(first.channel)


def faults_after_run(faults: Sequence[Any], run_s: float) -> tuple[Any, ...]:
    """The faults of a run as they stand when it ended, on the clock of a survey after it.

    Fault times count from the start of the run. A survey after the run meets every fault
    still in effect at ``run_s``: one without a duration (or an ``amp_trip``) from its start,
    one with a duration for what is left of it; a ``dac_gain`` drift is held at the gain it
    reached. Faults that ended, or start after ``run_s``, are gone.
    """
    out = []
    for f in faults:
        at = float(f.at_s)
        if at >= run_s:
            continue
        dur = f.duration_s
        if f.kind == "dac_gain" and dur is not None:  # a drift, then held
            frac = min(1.0, (run_s - at) / float(dur))
            out.append(dataclasses.replace(f, at_s=0.0, value=float(f.value) * frac,
                                           duration_s=None))
        elif dur is None or f.kind == "amp_trip":
            out.append(dataclasses.replace(f, at_s=0.0))
        elif at + float(dur) > run_s:
            out.append(dataclasses.replace(f, at_s=0.0, duration_s=at + float(dur) - run_s))
    return tuple(out)


def run_survey(
    spec: TestSpec,
    settings: Any,
    *,
    out_dir: str | Path,
    block_size: int | None = None,
    stop: StopFlag | None = None,
    identity: dict[str, Any] | None = None,
) -> tuple[Any, Path]:
    """Run a low-level resonance survey on the spec's rig and write its record folder.

    ``settings`` come from :func:`survey_settings`. The same
    :class:`~liveshape.control.survey.SurveySource` runs on the simulated rig and through an
    audio device. With more than one input in ``rig.inputs`` every input is read (the
    simulated rig's :meth:`~liveshape.rigs.sim.SimRig.process_inputs`; on a card the inputs in
    list order, as :func:`run_audio_session` reads them) and analysed
    (:class:`~liveshape.control.survey.SurveySource`). Returns ``(SurveyResult, folder)``.
    """
    from liveshape.control.survey import SurveySource
    from liveshape.record.surveyfile import write_survey

    seed = settings.seed
    fs = spec.control.fs_hz
    stop = stop or StopFlag()
    ident = {"software_version": __version__, "spec_file": spec.source or None,
             "spec_sha256": file_sha256(spec.source), "operator": None, "test_item": None,
             **(identity or {})}
    roles = spec.rig.input_roles() if spec.rig.inputs is not None and \
        len(spec.rig.inputs) > 1 else None
    if spec.rig.kind == "sim":
        rig, cal, rig_mapping = build_sim_rig(spec, seed)
        b = block_size or SIM_BLOCK
        src = SurveySource(settings, g_per_fs=_survey_g_per_fs(cal, roles), block_size=b,
                           roles=roles, calibration=cal)
        several = roles is not None
        response = np.zeros((b, len(roles))) if several else np.zeros(b)
        with sigterm_stops(stop):
            while not src.finished:
                try:
                    if stop.is_set():
                        src.request_stop(stop.reason)
                    drive = src.exchange(response)
                    response = rig.process_inputs(drive).T if several else rig.process(drive)
                except KeyboardInterrupt:
                    stop.set("Ctrl-C")
        result = src.result()
    else:
        from liveshape.rigs.audio import AudioRig
        from liveshape.rigs.calfile import check_inputs_calibrated
        from liveshape.rigs.calibration import resolve_calibration
        from liveshape.rigs.devices import audio_channels

        info = check_audio_map(spec)  # first: no device named is the first error
        cal = resolve_calibration(spec.rig.calibration, spec.rig.uncalibrated)
        check_inputs_calibrated(cal, roles)  # every sensor's own mV/g, before any drive
        b = block_size or AUDIO_BLOCK
        # several inputs: every one read, in rig.inputs order, as run_audio_session does
        chans = audio_channels(spec.rig.channel_map(),
                               audio_inputs(spec) if roles is not None else None)
        audio = AudioRig(info.index, fs, block_size=b, **chans)
        src = SurveySource(settings, g_per_fs=_survey_g_per_fs(cal, roles), block_size=b,
                           roles=roles, calibration=cal)
        rig_mapping = {"kind": "audio", "device": info.name, "device_index": info.index,
                       "host_api": info.host_api, "fs_hz": fs, "block_size": b,
                       **spec.rig.channel_map()}
        if roles is not None:
            from liveshape.testdef.inputs import inputs_to_list

            rig_mapping["inputs"] = inputs_to_list(roles)
        with sigterm_stops(stop):
            result = audio.run(src, should_stop=stop.is_set)
    folder = write_survey(out_dir, name=spec.name, result=result, settings=settings,
                          rig=rig_mapping, calibration=_calibration_mapping(cal), identity=ident)
    return result, folder
