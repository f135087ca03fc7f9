"""The command line: the one module that imports :mod:`argparse`.

Every command maps a user mistake (a :class:`~liveshape.errors.LiveshapeError`) to one line on
stderr and exit status 2, never a traceback. Rendering goes through
:mod:`liveshape.views.dashboard`; ``--json`` prints exactly one JSON object to stdout.
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import math
import sys
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from liveshape import __version__
from liveshape.errors import ConfigError, LiveshapeError
from liveshape.record.writer import json_safe
from liveshape.testdef.chain import ACCEL_UNITS

EXIT_USAGE = 2
EXIT_INTERRUPTED = 130


def _print_json(data: dict[str, Any]) -> None:
    sys.stdout.write(json.dumps(json_safe(data), indent=2) + "\n")
    sys.stdout.flush()


def _rig_overrides(rig: str | None, option: str = "--rig") -> dict[str, Any]:
    """Turn ``sim``, ``sim:PLANT`` or ``audio:DEVICE`` into spec overrides."""
    if rig is None:
        return {}
    kind, _, rest = rig.partition(":")
    if kind == "sim":
        return {"rig.kind": "sim", **({"rig.plant": rest} if rest else {})}
    if kind == "audio":
        if not rest:
            raise ConfigError(
                f"{option} = {rig!r} names no device (use audio:DEVICE; see liveshape devices)"
            )
        return {"rig.kind": "audio", "rig.device": rest}
    raise ConfigError(
        f"{option} = {rig!r} is not sim, sim:PLANT.yaml, sim:PRESET or audio:DEVICE"
    )


def _check_writable(path: str | Path, option: str, value: str | Path | None = None) -> None:
    """Refuse an output place that cannot be written, before anything is driven or made.

    ``path`` is a folder to write into (made if missing). The nearest existing folder of it is
    tried with a temporary file that is removed again (root ignores file modes, so asking
    :func:`os.access` is not enough). ``value`` is what the message shows (default ``path``).
    """
    import tempfile

    shown = str(path if value is None else value)
    p = Path(path)
    probe = p
    while not probe.exists() and probe != probe.parent:
        probe = probe.parent
    if not probe.is_dir():
        raise ConfigError(f"{option} = {shown!r}: {str(probe)!r} is a file, expected a folder")
    try:
        with tempfile.TemporaryFile(dir=probe):
            pass
    except OSError as exc:
        raise ConfigError(f"{option} = {shown!r}: cannot write into {str(probe)!r} "
                          f"({exc.strerror or exc})") from None


class _Terminated(BaseException):
    """SIGTERM while a file is being written: unwinds so that temporary files are removed."""


#: Exit status after SIGTERM (128 + 15, shell convention).
EXIT_TERMINATED = 143


def _sigterm_unwinds() -> Any:
    """While inside, SIGTERM raises :class:`_Terminated` (main thread only)."""
    import contextlib
    import signal
    import threading

    @contextlib.contextmanager
    def guard() -> Any:
        if threading.current_thread() is not threading.main_thread():
            yield
            return

        def handler(signum: int, frame: Any) -> None:
            raise _Terminated()

        previous = signal.signal(signal.SIGTERM, handler)
        try:
            yield
        finally:
            signal.signal(signal.SIGTERM, previous)

    return guard()


def _cmd_check(args: argparse.Namespace) -> int:
    from liveshape.control.checks import check_report
    from liveshape.testdef.spec import load_spec
    from liveshape.views import dashboard

    overrides = _rig_overrides(args.rig)
    if args.fs is not None:
        overrides["control.fs_hz"] = args.fs
    spec = load_spec(args.spec, overrides)
    feas = None
    tones_ok = True
    if args.rig is not None:
        feas = _feasibility(spec)
    report = check_report(spec, feas)
    if feas is not None and spec.tones:
        head = _tone_headroom(spec, feas)
        report["rig"].update(head.to_dict())
        tones_ok = head.ok
        if not head.ok:
            report["rig"]["feasible"] = False
    if args.json:
        _print_json(report)
    else:
        console = dashboard.make_console()
        console.print(dashboard.check_table(report))
    if feas is not None and not (feas.feasible and tones_ok):
        from liveshape.control.safety import EXIT_INFEASIBLE

        return EXIT_INFEASIBLE
    return 0


def _tone_headroom(spec: Any, feas: Any) -> Any:
    """Drive peak of the random (clipped) plus the tones on the spec's simulated plant."""
    import numpy as np

    from liveshape.control.tonecheck import tone_drive_headroom
    from liveshape.rigs.plant import load_plant
    from liveshape.rigs.plantmodel import analytic_frf

    plant = load_plant(spec.rig.plant)
    fs = spec.control.fs_hz
    return tone_drive_headroom(
        spec.tones, feas.drive.rms, g_per_fs=1.0 / plant.fs_per_g,
        limit_fs=spec.safety.drive_peak_max_fs, clip_sigma=spec.safety.clip_sigma,
        h_abs=lambda f: np.abs(analytic_frf(plant, f, fs_hz=fs)))


def _feasibility(spec: Any) -> Any:
    """Rig feasibility of the spec's rig (simulated plant model, or a calibrated card)."""
    from liveshape.rigs.feasibility import assess
    from liveshape.rigs.plant import load_plant

    if spec.rig.kind != "sim":
        raise ConfigError(
            f"--rig = audio:{spec.rig.device}: feasibility needs a plant model; "
            "check against the simulated rig that models it (--rig sim:PLANT.yaml)"
        )
    from liveshape.rigs.feasibility import monitor_budgets, with_monitors

    plant = load_plant(spec.rig.plant)
    c = spec.control
    feas = assess(spec.profile, plant, fs_hz=c.fs_hz, frame_length=c.frame_length)
    roles = spec.rig.input_roles() if spec.rig.inputs is not None else None
    return with_monitors(feas, monitor_budgets(roles, plant, spec.profile, fs_hz=c.fs_hz,
                                               frame_length=c.frame_length))


def _feasibility_warnings(feas: Any) -> list[str]:
    """One line per exceeded budget or unreachable band of a rig feasibility."""
    data = feas.to_dict()
    lines = []
    for u in feas.unreachable:
        what = "cannot be held at full level" if "exceeds" in u.reason else "cannot be controlled"
        lines.append(f"{u.f_lo_hz:.6g}-{u.f_hi_hz:.6g} Hz {what}: {u.reason}")
    exceeded = data.get("limits_exceeded")
    if exceeded and exceeded != "none":
        lines.append(f"rig limits exceeded by the profile at full level: {exceeded} "
                     "(liveshape check SPEC --rig ... shows the budgets)")
    if feas.binding:
        lines.append(f"binding limit: {feas.binding}; headroom left: {data['headroom_left']}")
    lines += [f"to make it feasible: {a}" for a in feas.advice]
    return lines or ["the rig model does not pass its feasibility check (see check --rig)"]


def _cmd_synth(args: argparse.Namespace) -> int:
    from liveshape.record.drivefile import make_drive_file
    from liveshape.testdef.spec import load_spec
    from liveshape.views import dashboard

    if args.from_run is not None:
        return _synth_from_run(args)
    if args.spec is None or args.duration is None:
        raise ConfigError("synth: give SPEC and --duration S (or --from-run RUN_DIR)")
    overrides: dict[str, Any] = {}
    if args.fs is not None:
        overrides["control.fs_hz"] = args.fs
    spec = load_spec(args.spec, overrides)
    kwargs = dict(
        duration_s=args.duration,
        fs_hz=args.fs,
        seed=args.seed,
        clip_sigma=args.clip_sigma,
        crest_min=args.crest_min,
        crest_max=args.crest_max,
        max_tries=args.max_tries,
        kurtosis=args.kurtosis,
        tones=_synth_tones(spec, args.tone or [], args.fs),
    )
    if args.json:
        with _sigterm_unwinds():
            result = make_drive_file(spec, args.output, **kwargs)
        _print_json(result.to_dict())
        return 0
    console = dashboard.make_console()
    with _sigterm_unwinds(), dashboard.progress_bar(console, f"writing {args.output}") as progress:
        result = make_drive_file(spec, args.output, progress=progress, **kwargs)
    console.print(dashboard.synth_summary(result.to_dict()))
    return 0


def _synth_tones(spec: Any, options: list[tuple[str, float, float]], fs: float | None) -> list:
    """The spec's tones (g) and the ``--tone F_HZ:AMPLITUDE`` options (fixed, g), each inside
    the profile band and below Nyquist."""
    fs_hz = spec.control.fs_hz if fs is None else fs
    tones = [t.tone() for t in spec.tones]
    p = spec.profile
    for text, f, a in options:
        if not p.f_min_hz <= f <= p.f_max_hz:
            raise ConfigError(f"--tone = {text!r}: {f:g} Hz must lie in the profile band "
                              f"{p.f_min_hz:g}-{p.f_max_hz:g} Hz")
        if not f < fs_hz / 2:
            raise ConfigError(f"--tone = {text!r}: {f:g} Hz must be below Nyquist "
                              f"({fs_hz / 2:g} Hz)")
        from liveshape.dsp.tones import Tone

        tones.append(Tone(a, f))
    return tones


def _tone_option(text: str) -> tuple[str, float, float]:
    """``F_HZ:AMPLITUDE``: a fixed tone, frequency in Hz and peak amplitude in the drive's unit."""
    parts = text.split(":")
    try:
        if len(parts) != 2:
            raise ValueError
        f, a = float(parts[0]), float(parts[1])
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"{text!r} must be F_HZ:AMPLITUDE (two numbers, e.g. 120:0.5)") from None
    if not (math.isfinite(f) and f > 0 and math.isfinite(a) and a > 0):
        raise argparse.ArgumentTypeError(f"{text!r}: frequency and amplitude must be > 0")
    return text, f, a


def _synth_from_run(args: argparse.Namespace) -> int:
    from liveshape.record.drivefile import make_run_drive_file

    if args.spec is not None:
        raise ConfigError(f"synth: SPEC = {args.spec!r} and --from-run are exclusive")
    for name in ("fs", "clip_sigma", "crest_min", "crest_max", "kurtosis", "tone"):
        if getattr(args, name) is not None:
            opt = "--" + name.replace("_", "-")
            raise ConfigError(f"synth: {opt} does not apply with --from-run (the run fixes it)")
    duration = 60.0 if args.duration is None else args.duration
    with _sigterm_unwinds():
        result = make_run_drive_file(
            args.from_run, args.output, duration_s=duration, seed=args.seed, force=args.force
        )
    d = result.to_dict()
    if args.json:
        _print_json(d)
    else:
        print(
            f"wrote {d['path']} ({d['duration_s']:g} s, {d['rms_fs']:.4g} FS rms, open-loop) "
            f"from {d['source_run']} update {d['source_update']}; sidecar {d['sidecar_path']}"
        )
    return 0


def _text_field(text: str) -> str:
    """A short one-line text for the record (operator, test item)."""
    t = text.strip()
    if not t or len(t) > 200 or any(ch in t for ch in "\n\r\t"):
        raise argparse.ArgumentTypeError(
            f"{text!r} must be 1-200 characters on one line")
    return t


def _cmd_run(args: argparse.Namespace) -> int:
    from liveshape.testdef.spec import load_spec, parse_fault
    from liveshape.views import dashboard

    overrides = _rig_overrides(args.rig)
    if args.fault:
        faults = [parse_fault(text) for text in args.fault]
        overrides["faults"] = faults
    if args.duration is not None:
        overrides["schedule.full_level_s"] = args.duration
    if args.calibration is not None:
        overrides["rig.calibration"] = args.calibration
    if args.uncalibrated:
        overrides["rig.uncalibrated"] = True
    if args.seed is not None:
        overrides["seed"] = args.seed
    overrides.update(_channel_overrides(args))
    spec = load_spec(args.spec, overrides)
    from liveshape.control.runplan import check_fault_times, nominal_run_s
    from liveshape.session import record_estimate

    _check_block(args.block_size, spec.control.fs_hz)
    check_fault_times(spec.faults, nominal_run_s(spec))
    estimate = record_estimate(spec, args.record == "full")
    _check_writable(args.out, "--out")
    from liveshape.record.diskspace import check_free_space

    check_free_space(args.out, estimate)
    if spec.rig.kind == "audio":
        from liveshape.session import check_audio_map

        check_audio_map(spec)  # a device must be named, and have the map's channels
    # Guided bring-up: on a real rig unless --unattended, on the simulated rig with --bring-up.
    hold = (spec.rig.kind == "audio" and not args.unattended) or bool(args.bring_up)
    survey = None
    if args.survey:
        if hold:
            raise ConfigError(
                "run --survey: the surveys play at the amplifier gain as it is set, but the "
                "bring-up that sets it would come after the first survey; set the gain first "
                "and add --unattended (simulated rig: leave out --bring-up)")
        from liveshape.session import survey_settings

        survey = survey_settings(spec)  # the defaults of `liveshape survey SPEC`
    if hold and not _stdin_is_terminal():
        raise ConfigError(
            f"run --rig {args.rig or spec.rig.kind}: the bring-up waits for Enter once the "
            "amplifier gain is set, but stdin is not a terminal; nothing was driven "
            "(--unattended skips the bring-up when the gain is already set)")
    # The cautions come first, before anything is driven (on stderr with --json).
    notice_console = dashboard.make_console(stderr=args.json)
    notice_console.print(dashboard.safety_notice(spec.rig.kind, spec.rig.plant,
                                                 bring_up=spec.rig.kind == "sim" or hold))
    notice_console.print(estimate.describe())
    accepted: dict[str, Any] | None = None
    if spec.rig.kind == "sim":
        # Name what the rig cannot honestly do before anything is driven (see check --rig);
        # refuse it unless the user accepts it explicitly (recorded in run.json and events).
        feas = _feasibility(spec)
        if not feas.feasible:
            word = "warning" if args.accept_infeasible else "refused"
            for line in _feasibility_warnings(feas):
                dashboard.print_error(notice_console, f"{word}: {line}")
            if not args.accept_infeasible:
                from liveshape.control.safety import EXIT_INFEASIBLE

                dashboard.print_error(
                    notice_console, "the profile is infeasible on this rig "
                    "(liveshape check SPEC --rig ... shows why); nothing was driven; "
                    "--accept-infeasible runs it anyway")
                return EXIT_INFEASIBLE
            accepted = {k: v for k, v in feas.to_dict().items()
                        if k in ("binding_limit", "reachable_level_db", "headroom_left",
                                 "limits_exceeded", "unreachable", "lowest_controllable_hz")}
    if spec.rig.kind == "audio":
        from liveshape.session import run_audio_session

        runner: Any = run_audio_session
        kwargs: dict[str, Any] = {}
    else:
        from liveshape.session import run_session

        runner = run_session
        kwargs = {"fast": args.fast}
    if args.block_size is not None:
        kwargs["block_size"] = args.block_size
    kwargs["identity"] = {"operator": args.operator, "test_item": args.test_item}
    if accepted is not None:
        kwargs["identity"]["accepted_infeasible"] = accepted
        kwargs["start_events"] = [("infeasible_accepted",
                                   "the profile is infeasible on this rig; run on the user's "
                                   "--accept-infeasible", accepted)]
    kwargs["record_signals"] = args.record == "full"
    if args.warm_start is not None:
        kwargs["warm_start"] = args.warm_start
    if hold:
        kwargs["bring_up"] = _enter_flag()
    before = None
    if survey is not None:
        before = _survey_before_run(spec, survey, args)
        if before[0].status != "completed":
            sys.stderr.write(f"liveshape: the survey before the run was {before[0].status} "
                             f"({before[0].stop_reason}); the test was not run\n")
            return before[0].exit_status
        kwargs.setdefault("start_events", [])
        kwargs["start_events"] = [*kwargs["start_events"], (
            "survey_before", f"survey before the run: {before[1]}",
            {"folder": str(before[1]), "resonances": len(before[0].resonances)})]
    if args.json:
        meter = _MeterLines(spec.safety.connect_level_fs, ACCEL_UNITS[args.units])
        session = runner(spec, out_dir=args.out, on_snapshot=meter if hold else None, **kwargs)
        summary = session.summary()
    else:
        console = dashboard.make_console()
        with dashboard.LiveView(console, units=ACCEL_UNITS[args.units]) as view:
            session = runner(spec, out_dir=args.out, on_snapshot=view.update, **kwargs)
        summary = session.summary()
        console.print(dashboard.run_summary(summary, ACCEL_UNITS[args.units]))
        console.print(f"record: {session.run_dir}  (liveshape report {session.run_dir})")
    if session.record_error is not None:
        sys.stderr.write(f"liveshape: {session.record_error}\n")
    status = session.result.exit_status
    if before is not None and survey is not None:
        flagged, surveys = _survey_after_run(spec, survey, args, session, before[1])
        if args.json:
            summary["surveys"] = surveys
        if status == 0 and surveys.get("after_status") not in (None, "completed"):
            status = 130
        elif status == 0 and flagged:
            status = SURVEY_FLAGGED_EXIT
    if args.json:
        _print_json(summary)
    return status


def _note(write: Any, run_dir: Any, data: dict[str, Any]) -> None:
    """Write the run folder's surveys.json; one line on stderr when it cannot be written."""
    if write(run_dir, data) is None:
        sys.stderr.write(f"liveshape: {run_dir}: surveys.json not written (the survey folders "
                         "are named above)\n")


def _survey_before_run(spec: Any, settings: Any, args: argparse.Namespace) -> tuple[Any, Any]:
    """``run --survey``: the survey before the test (no injected fault: fault times count from
    the start of the run); prints its lines unless ``--json``."""
    import dataclasses as _dc

    from liveshape.session import run_survey
    from liveshape.views.surveytext import survey_lines

    result, folder = run_survey(_dc.replace(spec, faults=()), settings, out_dir=args.out,
                                identity={"operator": args.operator,
                                          "test_item": args.test_item,
                                          "survey_of_run": "before"})
    if not args.json:
        sys.stdout.write("\n".join(["survey before the run:",
                                    *survey_lines(result, folder, settings)]) + "\n")
    return result, folder


def _survey_after_run(spec: Any, settings: Any, args: argparse.Namespace, session: Any,
                      before_folder: Any) -> tuple[int, dict[str, Any]]:
    """``run --survey``: after a completed run, the second survey (meeting the injected faults
    as they stand at the end of the run), the compare, and ``surveys.json`` in the run folder.
    Returns the flag count and what ``--json`` adds to the summary."""
    import dataclasses as _dc

    from liveshape.record.surveyfile import note_run_surveys, read_survey
    from liveshape.session import faults_after_run, run_survey
    from liveshape.views.surveytext import survey_lines

    out: dict[str, Any] = {"before": str(before_folder), "after": None, "after_status": None,
                           "compare": None}
    r = session.result
    if r.status != "completed":
        sys.stderr.write(f"liveshape: no survey after the run: it did not complete "
                         f"({r.status}{', ' + r.abort_reason if r.abort_reason else ''})\n")
        out["note"] = "no survey after a run that did not complete"
        _note(note_run_surveys, session.run_dir, out)
        return 0, out
    faults = faults_after_run(spec.faults, float(session.rig.get("t_s") or 0.0))
    if settings.seed is not None:  # new noise: the simulated rig would repeat the first survey
        settings = _dc.replace(settings, seed=settings.seed + 1)
    result, folder = run_survey(_dc.replace(spec, faults=faults), settings, out_dir=args.out,
                                identity={"operator": args.operator,
                                          "test_item": args.test_item,
                                          "survey_of_run": "after",
                                          "run_dir": str(session.run_dir)})
    out.update(after=str(folder), after_status=result.status)
    if not args.json:
        sys.stdout.write("\n".join(["survey after the run:",
                                    *survey_lines(result, folder, settings)]) + "\n")
    if result.status != "completed":
        sys.stderr.write(f"liveshape: the survey after the run was {result.status}; "
                         "no compare\n")
        _note(note_run_surveys, session.run_dir, out)
        return 0, out
    flagged, data, lines = _survey_compare(read_survey(before_folder), read_survey(folder),
                                           2.0, 0.92)
    out["compare"] = data
    _note(note_run_surveys, session.run_dir, out)
    if not args.json:
        sys.stdout.write("\n".join(["compare of the surveys before and after the run:",
                                    *lines]) + "\n")
    return flagged, out


def _channel_overrides(args: argparse.Namespace) -> dict[str, Any]:
    """``--drive-output``, ``--control-input``, ``--loopback-input`` and ``--input`` as spec
    overrides."""
    keys = ("drive_output", "control_input", "loopback_input")
    out = {f"rig.{k}": getattr(args, k) for k in keys if getattr(args, k, None) is not None}
    items = getattr(args, "input", None)
    if items:
        for k in ("control_input", "loopback_input"):
            if getattr(args, k, None) is not None:
                raise ConfigError(f"--{k.replace('_', '-')} and --input: give every input with "
                                  "--input (role control, reference) instead")
        out["rig.inputs"] = list(items)
    return out


def _input_item(text: str) -> dict[str, Any]:
    """``CH:ROLE[:NAME]`` (``2:monitor:bracket``) as one item of ``rig.inputs``."""
    parts = text.split(":")
    if len(parts) not in (2, 3) or not parts[0].strip().isdigit() or int(parts[0]) < 1:
        raise argparse.ArgumentTypeError(
            f"{text!r} is not CH:ROLE[:NAME] (e.g. 2:monitor:bracket; channels count from 1)")
    item: dict[str, Any] = {"channel": int(parts[0]), "role": parts[1].strip()}
    if len(parts) == 3 and parts[2].strip():
        item["name"] = parts[2].strip()
    return item


def _add_channel_options(parser: argparse.ArgumentParser) -> None:
    """The channel map of an audio rig on the command line (counted from 1)."""
    parser.add_argument("--drive-output", type=_channel, metavar="N",
                        help="audio rigs: output channel of the drive, from 1 (default 1; "
                        "rig.drive_output)")
    parser.add_argument("--control-input", type=_channel, metavar="N",
                        help="audio rigs: input channel of the control accelerometer, from 1 "
                        "(default 1; rig.control_input)")
    parser.add_argument("--loopback-input", type=_channel, metavar="N",
                        help="audio rigs: input receiving a copy of the drive by a cable, from "
                        "1 (default none; rig.loopback_input)")
    parser.add_argument("--input", type=_input_item, action="append", metavar="CH:ROLE[:NAME]",
                        help="an input and its role (control, monitor, reference), from 1; "
                        "repeat for each input, in order (rig.inputs; limits and weights only "
                        "in the test definition)")


def _channel(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        value = 0
    if value < 1 or str(value) != text.strip():
        raise argparse.ArgumentTypeError(
            f"{text!r} is not a channel number (whole number >= 1; channels count from 1)")
    return value


def _stdin_is_terminal() -> bool:
    """True when stdin is an open terminal (someone can press Enter)."""
    import os

    try:
        return sys.stdin is not None and os.isatty(sys.stdin.fileno())
    except (AttributeError, ValueError, OSError):
        return False


def _enter_flag() -> Any:
    """A :class:`threading.Event` that a daemon thread sets on every line read from stdin.

    The controller polls it during the bring-up hold (it never waits on it); the reader thread
    is the only thing that blocks, on stdin, and it is off every safety path.
    """
    import threading

    flag = threading.Event()

    def read() -> None:
        try:
            while sys.stdin.readline():
                flag.set()
        except (OSError, ValueError):
            return

    threading.Thread(target=read, name="liveshape-enter", daemon=True).start()
    return flag


class _MeterLines:
    """``run --json``: the bring-up instruction and meter as plain lines on stderr (1 per s)."""

    def __init__(self, level_fs: float, units: Any) -> None:
        self.level_fs, self.units = level_fs, units
        self._said_instruction = False
        self._last_t = -1.0

    def __call__(self, snapshot: Any) -> None:
        from liveshape.views import bringuptext

        if snapshot.stage != "bring_up":
            return
        lines = bringuptext.bring_up_lines(snapshot.bring_up, self.level_fs, self.units,
                                           bringuptext.last_refusal(snapshot.recent_events))
        if not self._said_instruction:
            self._said_instruction = True
            _say("\n".join(lines[:2]))
        if snapshot.bring_up is not None and snapshot.bring_up.t_s >= self._last_t + 1.0:
            self._last_t = snapshot.bring_up.t_s
            _say("  " + "\n  ".join(lines[2:]))


def _cmd_survey(args: argparse.Namespace) -> int:
    import dataclasses as _dc

    if args.compare:
        from liveshape.record.surveyfile import read_survey

        before, after = (read_survey(p) for p in args.compare)
        flagged, data, lines = _survey_compare(before, after, args.shift_pct, args.drop_db)
        if args.json:
            _print_json(data)
        else:
            sys.stdout.write("\n".join(lines) + "\n")
        return SURVEY_FLAGGED_EXIT if flagged else 0
    if args.spec is None:
        raise ConfigError("survey: give a test definition SPEC, or --compare BEFORE AFTER")
    from liveshape.session import run_survey, survey_settings
    from liveshape.testdef.spec import load_spec, parse_fault
    from liveshape.views import dashboard
    from liveshape.views.surveytext import survey_lines

    overrides = _rig_overrides(args.rig)
    if args.fault:
        overrides["faults"] = [parse_fault(text) for text in args.fault]
    if args.calibration is not None:
        overrides["rig.calibration"] = args.calibration
    if args.uncalibrated:
        overrides["rig.uncalibrated"] = True
    overrides.update(_channel_overrides(args))
    spec = load_spec(args.spec, overrides)
    settings = survey_settings(spec, level_fs=args.level, duration_s=args.duration,
                               seed=args.seed)
    from liveshape.control.runplan import check_fault_times

    check_fault_times(spec.faults, settings.duration_s, "the survey")
    _check_writable(args.out, "--out")
    if spec.rig.kind == "audio":
        from liveshape.session import check_audio_map

        check_audio_map(spec)  # a device must be named, and have the map's channels
    notice = dashboard.make_console(stderr=True)
    notice.print(dashboard.safety_notice(spec.rig.kind, spec.rig.plant, bring_up=None))
    result, folder = run_survey(spec, settings, out_dir=args.out,
                                identity={"operator": args.operator,
                                          "test_item": args.test_item})
    if args.json:
        data = {"status": result.status, "record": str(folder), "dof": result.dof,
                "delay_samples": result.delay_samples,
                "resonances": [_dc.asdict(r) for r in result.resonances]}
        if result.inputs:
            data["inputs"] = [{"name": r.name, "channel": r.channel, "role": r.role,
                               "resonances": [_dc.asdict(x) for x in r.resonances],
                               "trans_resonances": [_dc.asdict(x) for x in r.trans_resonances]}
                              for r in result.inputs]
        _print_json(data)
    else:
        sys.stdout.write("\n".join(survey_lines(result, folder, settings)) + "\n")
    return result.exit_status


#: Exit status of ``survey --compare`` when a change was flagged.
SURVEY_FLAGGED_EXIT = 5


def _survey_compare(before: Any, after: Any, shift_pct: float,
                    drop_db: float) -> tuple[int, dict[str, Any], list[str]]:
    """Flag count, JSON and text lines of the compare of two survey records (input by input
    when both have several inputs)."""
    import dataclasses as _dc

    from liveshape.control.survey import compare_inputs
    from liveshape.views.surveytext import compare_input_lines

    groups = compare_inputs(before, after, shift_pct=shift_pct, peak_drop_db=drop_db)
    flagged = sum(bool(c.flagged) for _, changes in groups for c in changes)
    data: dict[str, Any] = {"before": str(before.root), "after": str(after.root)}
    if len(groups) == 1 and groups[0][0] is None:
        data["changes"] = [_dc.asdict(c) for c in groups[0][1]]
    else:
        data["inputs"] = [{"input": name, "changes": [_dc.asdict(c) for c in changes],
                           "flagged": sum(bool(c.flagged) for c in changes)}
                          for name, changes in groups]
    data["flagged"] = flagged
    return flagged, data, compare_input_lines(groups, before.root, after.root)


def _cmd_report(args: argparse.Namespace) -> int:
    from liveshape.record.report import render_report

    with _sigterm_unwinds():
        result = render_report(args.run_dir, out_dir=args.out, png=args.png,
                               units=ACCEL_UNITS[args.units])
    sys.stdout.write(result.summary.rstrip("\n") + "\n")
    sys.stdout.write(f"report: {result.pdf_path}\n")
    for name, path in result.pngs.items():
        sys.stdout.write(f"{name}: {path}\n")
    sys.stdout.write(f"summary: {result.summary_path}\n")
    return 0


def _cmd_devices(args: argparse.Namespace) -> int:
    from liveshape.rigs.audio import list_devices

    devices = list_devices()
    rows = [dataclasses.asdict(d) for d in devices]
    if args.json:
        _print_json({"devices": rows})
        return 0
    head = (f"{'index':>5}  {'name':<32} {'host API':<12} {'inputs':>6} {'outputs':>7} "
            f"{'rate Hz':>8}  duplex")
    lines = [head]
    for d in rows:
        lines.append(
            f"{d['index']:>5}  {d['name'][:32]:<32} {d['host_api'][:12]:<12} "
            f"{d['max_input_channels']:>6} {d['max_output_channels']:>7} "
            f"{d['default_fs_hz']:>8.0f}  {'yes' if d['full_duplex'] else '-'}"
        )
    if not rows:
        lines.append("(no audio devices)")
    sys.stdout.write("\n".join(lines) + "\n")
    return 0


def _cmd_virtual_rig(args: argparse.Namespace) -> int:
    from liveshape.rigs.jackrig import parse_inputs, serve
    from liveshape.rigs.plant import load_plant
    from liveshape.rigs.sim import SimRig

    plant = load_plant(args.plant)  # a bad plant is one line before JACK is asked for anything
    inputs = None
    if args.inputs is not None:  # and so are inputs the plant cannot give
        inputs = parse_inputs(args.inputs)
        SimRig(plant, 48000.0, inputs=inputs)
    if args.calibration_out is not None:
        _check_writable(Path(args.calibration_out).parent, "--calibration-out",
                        args.calibration_out)

    def ready(rig: Any) -> None:
        cal_note = ""
        if args.calibration_out is not None:
            path = write_virtual_rig_calibration(rig, args.calibration_out)
            cal_note = f" --calibration {path}"
        sys.stderr.write(
            f"liveshape: virtual rig {args.name!r} running plant {args.plant!r}; "
            f"run with --rig audio:{args.name}{cal_note}; Ctrl-C ends it\n"
        )
        sys.stderr.flush()

    serve(args.plant, server_name=args.server, client_name=args.name, seed=args.seed,
          ready=ready, inputs=inputs)
    return 0


def write_virtual_rig_calibration(rig: Any, path: str | Path) -> Path:
    """Write the chain calibration file of the plant a running virtual rig simulates.

    The simulated chain's truth in the format ``calibrate`` writes: the card's output and input
    V/FS, the accelerometer's mV/g and the loop delay of a ``run`` through this server (one
    JACK period, one 1024-frame stream block, the card's own delay; see
    :func:`liveshape.rigs.jackrig.jack_loop_delay_samples`).
    """
    from datetime import datetime, timezone

    from liveshape.rigs.calfile import write_calibration
    from liveshape.rigs.jackrig import jack_loop_delay_samples
    from liveshape.session import AUDIO_BLOCK

    truth = rig.processor.calibration
    delay = jack_loop_delay_samples(rig.period_frames, AUDIO_BLOCK,
                                    plant_delay=int(truth.loop_delay_samples or 0))
    cal = dataclasses.replace(truth, loop_delay_samples=delay, source=str(path))
    write_calibration(path, cal, device=rig.client_name, fs_hz=rig.fs_hz,
                      date=datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
                      notes=f"the truth of the virtual rig's plant {rig.processor.plant.name!r} "
                      f"(JACK period {rig.period_frames}, stream blocks of {AUDIO_BLOCK})")
    return Path(path)


CAL_STEPS = ("output", "input", "delay", "corner", "sensor")


def _say(text: str) -> None:
    """A line for the person at the rig: stderr, so ``--json`` keeps stdout to one object."""
    sys.stderr.write(text + "\n")
    sys.stderr.flush()


def _ask(prompt: str) -> str:
    """One answer typed on stdin after ``prompt`` (on stderr); EOF is a one-line error."""
    sys.stderr.write(prompt)
    sys.stderr.flush()
    line = sys.stdin.readline()
    if not line:
        raise ConfigError("stdin closed before an answer; nothing more plays")
    return line.strip()


def _cmd_calibrate(args: argparse.Namespace) -> int:
    """One calibration step; results are merged into the calibration file.

    Order: every option and the file are checked, then the terminal rule (Enter is needed
    unless ``--unattended``), then the device; the step says what will play, where and at what
    level and what to unplug, waits for Enter, plays, checks the result's plausibility and
    only then writes the file (a refused result writes nothing).
    """
    from liveshape.rigs import calibration as cal
    from liveshape.testdef import config

    path = Path(args.file)
    data: dict[str, Any] = {}
    if path.exists():
        loaded = config.read_yaml_file(path)
        if not isinstance(loaded, dict):
            raise ConfigError(f"{path}: not a calibration file (expected a mapping)")
        data = loaded
    data.setdefault("liveshape_calibration", cal.SCHEMA_VERSION)
    loopback = _loopback_option(args.loopback)
    _check_block(args.block_size, args.fs)
    _check_writable(path.parent, "--file", path)
    step = args.step
    out_v = in_v = None
    if step == "input" and args.known_v is None:
        out_v = _section_value(data, path, "output", "v_per_fs", "calibrate output")
        if loopback is None:
            raise ConfigError("calibrate input: give --loopback OUT:IN (a cable from output OUT "
                              "to input IN, e.g. 1:1) or --known-v V_RMS")
    if step == "corner":
        if loopback is None:
            raise ConfigError("calibrate corner: needs --loopback OUT:IN (a cable from output "
                              "OUT to input IN, e.g. 1:1)")
        delay = data.get("loop_delay", {}) or {}
        if delay.get("samples") is None:
            raise ConfigError(f"{path}: loop_delay.samples is missing; run "
                              "liveshape calibrate delay first")
    sensor_in = getattr(args, "sensor_input", None) or 1
    if getattr(args, "sensor_input", None) is not None and step != "sensor":
        raise ConfigError(f"calibrate {step}: --input is for the sensor step only")
    if step == "sensor":
        in_v = _section_value(data, path, "input", "v_per_fs", "calibrate input")
        if sensor_in != 1 and loopback is not None:
            raise ConfigError("calibrate sensor: --loopback plays nothing here; give --input N")
        if sensor_in != 1:  # the sensor's conditioner on another input: its own V/FS if known
            for item in data.get("inputs") or ():
                if isinstance(item, dict) and item.get("channel") == sensor_in and \
                        item.get("v_per_fs") is not None:
                    in_v = float(item["v_per_fs"])  # that input's own V/FS, if measured
    if step == "output" and args.unattended and args.reading is None:
        raise ConfigError("calibrate output --unattended: give the voltmeter reading with "
                          "--reading V_RMS (nobody is there to type it)")
    if not args.unattended and not sys.stdin.isatty():
        raise ConfigError(f"calibrate {step}: stdin is not a terminal, so nobody can confirm "
                          "the set-up; nothing played (--unattended skips the wait)")
    # the sensor step reads the input its sensor is on (nothing is played)
    rig, device_name, channel, where = _calibration_rig(
        args, (1, sensor_in) if step == "sensor" and sensor_in != 1 else loopback)
    notice = cal.describe_step(
        step, device=device_name, level_fs=args.level, loopback=loopback,
        out_v_per_fs=out_v or (data.get("output") or {}).get("v_per_fs"),
        known_v_rms=args.known_v, repeats=args.repeats,
        datasheet_mv_per_g=args.datasheet_mv_per_g, sensor_input=sensor_in)
    data["device"] = device_name
    data["fs_hz"] = float(args.fs)
    for line in notice.lines():
        _say(line)
    if args.unattended:
        _say("  --unattended: going on without waiting")
    else:
        _ask("Press Enter when that is so (Ctrl-C stops; nothing has played yet): ")
    out: dict[str, Any]
    try:
        if step == "output":
            reading = args.reading

            def read_voltmeter(f_hz: float, level_fs: float) -> float:
                if reading is not None:
                    return float(reading)
                answer = _ask(f"Playing {f_hz:g} Hz at {level_fs:g} FS on output 1. "
                              "Voltmeter reading, V rms: ")
                try:
                    return float(answer)
                except ValueError:
                    raise ConfigError(
                        f"voltmeter reading = {answer!r} is not a number") from None

            res: Any = cal.calibrate_output(rig, read_voltmeter, level_fs=args.level)
            data["output"] = {"v_per_fs": res.v_per_fs, "method": res.method, "channel": 1}
            out = dataclasses.asdict(res)
        elif step == "input":
            if args.known_v is not None:
                res = cal.calibrate_input(rig, known_v_rms=args.known_v, channel="control",
                                          where="input 1")
                in_ch = 1
            else:
                res = cal.calibrate_input(rig, out_v_per_fs=out_v, level_fs=args.level,
                                          channel=channel, where=where)
                in_ch = loopback[1]
            data["input"] = {"v_per_fs": res.v_per_fs, "method": res.method, "channel": in_ch}
            out = dataclasses.asdict(res)
        elif step == "delay":
            res = cal.measure_loop_delay(rig, repeats=args.repeats, channel=channel,
                                         where=where)
            data["loop_delay"] = {"samples": res.samples, "spread_samples": res.spread_samples}
            out = dataclasses.asdict(res)
        elif step == "corner":
            res = cal.measure_lowfreq_corner(
                rig, delay_samples=int(data["loop_delay"]["samples"]), channel=channel)
            data["lowfreq_corner"] = {"order": res.order, "corner_hz": res.corner_hz,
                                      "q": res.q, "f_3db_hz": res.f_3db_hz}
            out = dataclasses.asdict(res)
        else:  # sensor
            res = cal.check_accelerometer(rig, in_v_per_fs=in_v,
                                          datasheet_mv_per_g=args.datasheet_mv_per_g,
                                          where=f"input {sensor_in}",
                                          accept_deviation=args.accept_deviation)
            if sensor_in == 1:
                acc = {"mv_per_g": res.sensitivity_mv_per_g}
                if args.datasheet_mv_per_g is not None:
                    acc["datasheet_mv_per_g"] = args.datasheet_mv_per_g
                data["accelerometer"] = acc
            else:  # one entry per input under inputs (calibration/README.md)
                items = [i for i in (data.get("inputs") or ())
                         if not (isinstance(i, dict) and i.get("channel") == sensor_in)]
                items.append({"channel": sensor_in, "v_per_fs": in_v,
                              "mv_per_g": res.sensitivity_mv_per_g})
                data["inputs"] = sorted(items, key=lambda i: i.get("channel", 0))
            out = {k: v for k, v in dataclasses.asdict(res).items() if k != "fit"}
            out["snr_db"] = res.fit.snr_db
    except ConfigError as exc:
        state = "left as it was" if path.exists() else "not written"
        raise ConfigError(f"calibrate {step}: {exc}; {path} {state}") from None
    config.write_yaml_file(path, json_safe(data))
    out["file"] = str(path)
    if args.json:
        _print_json(out)
    else:
        for key, value in json_safe(out).items():
            sys.stdout.write(f"{key}: {value}\n")
        sys.stdout.write(f"wrote {path}\n")
    return 0


def _calibration_rig(args: argparse.Namespace,
                     loopback: tuple[int, int] | None) -> tuple[Any, str, str, str]:
    """The audio rig of a calibration step, the device's name, the channel to fit and its name
    for messages.

    ``loopback`` is numbered from 1. A cable from output 1 (the drive) to input ``i`` is read
    as the rig's control channel ``i``; a cable from another output ``o`` gets a copy of the
    drive (the rig's loopback pair). Without a cable the control input 1 is read.
    """
    from liveshape.rigs.audio import AudioRig, check_settings

    kwargs: dict[str, Any] = {}
    channel, where = "control", "input 1"
    if loopback is not None:
        o, i = loopback
        where = f"input {i}"
        if o == 1:
            kwargs["control_channel"] = i - 1
        else:
            kwargs["loopback"] = (o - 1, i - 1)
            channel = "loopback"
    n_out = max(1, loopback[0] if loopback else 1)
    n_in = max(1, loopback[1] if loopback else 1)
    info = check_settings(args.device, args.fs, input_channels=n_in, output_channels=n_out)
    rig = AudioRig(info.index, args.fs, block_size=args.block_size, lead_blocks=8, **kwargs)
    return rig, info.name, channel, where


def _section_value(data: dict[str, Any], path: Path, section: str, key: str, step: str) -> float:
    value = (data.get(section) or {}).get(key) if isinstance(data.get(section), dict) else None
    if value is None:
        raise ConfigError(f"{path}: {section}.{key} is missing; run liveshape {step} first")
    return float(value)


def _loopback_option(text: str | None) -> tuple[int, int] | None:
    """``OUT:IN`` channel numbers counted from 1, as printed on the interface."""
    if text is None:
        return None
    a, sep, b = text.partition(":")
    if not sep or not a.strip().isdigit() or not b.strip().isdigit():
        raise ConfigError(f"--loopback = {text!r} must be OUT:IN channel numbers, e.g. 1:1")
    o, i = int(a), int(b)
    if o < 1 or i < 1:
        raise ConfigError(f"--loopback = {text!r}: channels count from 1 (output 1 and input 1 "
                          "are the first on the interface); 0 is not a channel")
    if o > MAX_CHANNEL or i > MAX_CHANNEL:
        raise ConfigError(f"--loopback = {text!r}: channels must be 1-{MAX_CHANNEL}")
    return o, i


#: Highest channel number of --loopback (counted from 1, as printed on the interface).
MAX_CHANNEL = 64


class _OneLineParser(argparse.ArgumentParser):
    """An :class:`argparse.ArgumentParser` whose usage errors are one line and exit status 2.

    argparse prints the usage block and then the message (2-4 lines); every other user error
    of liveshape is one line naming the option, the value and the rule, and so are these.
    """

    def error(self, message: str) -> Any:  # type: ignore[override]
        text = " ".join(message.split())
        sys.stderr.write(f"{self.prog}: {text} (see {self.prog} --help)\n")
        sys.exit(EXIT_USAGE)


def _positive_float(text: str) -> float:
    try:
        x = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
    if not math.isfinite(x) or x <= 0:
        raise argparse.ArgumentTypeError(f"{text!r} must be a positive number")
    return x


def _whole(text: str) -> int:
    try:
        return int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None


def _bounded(kind: str, low: float, high: float, *, low_open: bool = False,
             unit: str = "") -> Any:
    """An argparse type: a number (``float``) or whole number (``int``) within bounds.

    ``low_open`` excludes ``low`` itself (``> low`` instead of ``>= low``).
    """
    u = f" {unit}" if unit else ""

    def parse(text: str) -> float | int:
        x: float | int = _whole(text) if kind == "int" else _positive_or_any_float(text)
        below = x <= low if low_open else x < low
        if below or x > high:
            rel = ">" if low_open else ">="
            raise argparse.ArgumentTypeError(
                f"{text!r} must be {rel} {low:g} and <= {high:g}{u}")
        return x

    parse.__name__ = "whole number" if kind == "int" else "number"
    return parse


def _positive_or_any_float(text: str) -> float:
    try:
        x = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
    if not math.isfinite(x):
        raise argparse.ArgumentTypeError(f"{text!r} is not a finite number")
    return x


#: Bounds of the numeric options (one-line errors name the option, the value and the bound).
BLOCK_MIN, BLOCK_MAX = 16, 16384
#: Longest block, s of audio: the drive must react within the abort ramp (0.25 s default).
BLOCK_MAX_S = 0.25
FS_MIN_HZ, FS_MAX_HZ = 1000.0, 384000.0
RUN_MAX_S = 7 * 86400.0
SYNTH_MAX_S = 86400.0
SEED_MAX = 2**63 - 1

_block = _bounded("int", BLOCK_MIN, BLOCK_MAX, unit="samples")
_fs = _bounded("float", FS_MIN_HZ, FS_MAX_HZ, unit="Hz")
_seed = _bounded("int", 0, SEED_MAX)
_level_fs = _bounded("float", 0.0, 1.0, low_open=True, unit="FS")
# the floor of 2.5 is checked with its source by the drive-file writer
_clip_sigma = _bounded("float", 0.0, 100.0, low_open=True)
_shift_pct = _bounded("float", 0.0, 100.0, low_open=True)
_drop_db = _bounded("float", 0.0, 60.0, low_open=True)
_volts = _bounded("float", 0.0, 1000.0, low_open=True, unit="V")
_mv_per_g = _bounded("float", 0.0, 1e5, low_open=True)
_synth_s = _bounded("float", 0.0, SYNTH_MAX_S, low_open=True, unit="s")
_run_s = _bounded("float", 0.0, RUN_MAX_S, low_open=True, unit="s")


def _check_block(block_size: int | None, fs_hz: float, option: str = "--block-size") -> None:
    """Refuse a block longer than :data:`BLOCK_MAX_S` of audio at ``fs_hz``."""
    if block_size is not None and block_size > BLOCK_MAX_S * fs_hz:
        raise ConfigError(
            f"{option} = {block_size} is {block_size / fs_hz:.3g} s at {fs_hz:g} Hz; a block "
            f"must be at most {BLOCK_MAX_S:g} s of audio ({int(BLOCK_MAX_S * fs_hz)} samples)")


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of every command (exposed for tests and documentation)."""
    p = _OneLineParser(
        prog="liveshape",
        description="Closed-loop random-vibration control of small shakers through an audio "
        "interface. The simulated rig is the default; real hardware is driven only when named.",
    )
    p.add_argument("--version", action="version", version=f"liveshape {__version__}")
    sub = p.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True

    c = sub.add_parser("check", help="profile figures, tolerances, DOF and rig feasibility")
    c.add_argument("spec", metavar="SPEC", help="test definition (.yaml) or profile (.csv)")
    c.add_argument("--rig", help="add rig feasibility: sim, sim:PRESET, sim:PLANT.yaml")
    c.add_argument("--fs", type=_fs, metavar="HZ", help="sample rate override")
    c.add_argument("--json", action="store_true", help="print one JSON object")
    c.set_defaults(func=_cmd_check)
    c.epilog = ("Exit status 3 when --rig is given and the profile is infeasible on that rig "
                "(the output names the binding limit and what would make it feasible).")

    s = sub.add_parser("synth", help="write a drive file (float WAV) offline with a sidecar")
    s.add_argument("spec", metavar="SPEC", nargs="?",
                   help="test definition (.yaml) or profile (.csv)")
    s.add_argument("--duration", type=_synth_s, metavar="S",
                   help="length of the file in seconds (required with SPEC; 60 with --from-run)")
    s.add_argument("--from-run", metavar="RUN_DIR",
                   help="synthesize the run's last equalized drive (FS) for open-loop playback")
    s.add_argument("--force", action="store_true",
                   help="with --from-run: export from a run that did not complete")
    s.add_argument("-o", "--output", required=True, metavar="FILE.wav", help="output WAV")
    s.add_argument("--fs", type=_fs, metavar="HZ", help="sample rate")
    s.add_argument("--seed", type=_seed, metavar="N", help="random seed")
    s.add_argument("--clip-sigma", type=_clip_sigma, metavar="X",
                   help="clip the drive at X times its rms (>= 2.5)")
    s.add_argument("--crest-min", type=_bounded("float", 1.0, 100.0), metavar="X",
                   help="keep only realizations with crest factor >= X")
    s.add_argument("--crest-max", type=_bounded("float", 1.0, 100.0), metavar="Y",
                   help="keep only realizations with crest factor <= Y")
    s.add_argument("--max-tries", type=_bounded("int", 1, 1000), default=10, metavar="N",
                   help="realizations to try for the crest-factor criterion (default 10)")
    s.add_argument("--kurtosis", type=_positive_float, metavar="K",
                   help="kurtosis target >= 3 (3: Gaussian); the PSD is kept")
    s.add_argument("--tone", type=_tone_option, action="append", metavar="F_HZ:AMPLITUDE",
                   help="add a fixed sine tone (Hz : peak g) to the random; repeatable; adds to "
                   "the spec's tones")
    s.add_argument("--json", action="store_true", help="print the sidecar as one JSON object")
    s.set_defaults(func=_cmd_synth)

    r = sub.add_parser("run", help="run a closed-loop test (simulated rig unless told otherwise)",
                       description="Run a closed-loop random test. The simulated rig is the "
                       "default; a real card is driven only with --rig audio:DEVICE. Ctrl-C "
                       "or SIGTERM ramps the drive down and stops.")
    r.add_argument("spec", metavar="SPEC", help="test definition (.yaml) or profile (.csv)")
    r.add_argument("--rig", help="sim (default: the simulated plant the file names, the "
                   "loudspeaker preset when it names none), sim:PRESET, sim:PLANT.yaml or "
                   "audio:DEVICE")
    r.add_argument("--calibration", metavar="FILE", help="chain calibration file (audio rigs)")
    _add_channel_options(r)
    r.add_argument("--uncalibrated", action="store_true",
                   help="run an audio rig without calibration (levels in full scale only; "
                   "the record says so)")
    r.add_argument("--fast", action="store_true",
                   help="simulated rig: run as fast as the CPU allows (same results per seed)")
    r.add_argument("--seed", type=_seed, metavar="N", help="random seed")
    r.add_argument("--fault", action="append", metavar="KIND@SECONDS",
                   help="inject a fault into the simulated rig, e.g. sensor_gain@12=0.5 "
                   "or noise_burst@20=0.1/0.5 (repeatable)")
    r.add_argument("--duration", type=_run_s,
                   metavar="S",
                   help="time at full level, s (overrides schedule.full_level_s)")
    r.add_argument("--block-size", type=_block, metavar="N",
                   help=f"samples per block ({BLOCK_MIN}-{BLOCK_MAX}, at most {BLOCK_MAX_S:g} s)")
    r.add_argument("--out", default="runs", metavar="DIR",
                   help="folder for run records (default: runs)")
    r.add_argument("--json", action="store_true", help="print the run summary as JSON")
    r.add_argument("--units", choices=tuple(ACCEL_UNITS), default="g",
                   help="show acceleration in g (default) or m/s² (the record is in g)")
    r.add_argument("--operator", type=_text_field, metavar="NAME",
                   help="who runs the test (written to run.json and the report)")
    r.add_argument("--test-item", type=_text_field, metavar="TEXT",
                   help="what is under test, e.g. a serial number (run.json and the report)")
    r.add_argument("--accept-infeasible", action="store_true",
                   help="run a profile that check --rig calls infeasible on the simulated rig "
                   "(refused otherwise with exit status 3; run.json and events record it)")
    hold = r.add_mutually_exclusive_group()
    hold.add_argument("--unattended", action="store_true",
                      help="audio rigs: skip the bring-up (no pause to raise the amplifier "
                      "gain; it must be set already). Without it an audio run holds the drive "
                      "at the connection level, shows a meter and waits for Enter, so stdin "
                      "must be a terminal")
    hold.add_argument("--bring-up", action="store_true",
                      help="simulated rig: rehearse the bring-up hold (meter, Enter to go on)")
    r.add_argument("--warm-start", metavar="RUN_DIR",
                   help="start from the equalized drive of an earlier completed run on the same "
                   "rig and calibration (confirmed by a short identification; refused when the "
                   "rig, calibration, sample rate or lines differ)")
    r.add_argument("--survey", action="store_true",
                   help="run a resonance survey (the defaults of liveshape survey SPEC) before "
                   "the test and, when the test completed, another after it, and compare them "
                   "(exit 5 when a shift is flagged and the run itself ended with 0); the run "
                   "folder's surveys.json names both survey folders")
    r.add_argument("--record", choices=("full", "spectra"), default="full",
                   help="full (default): spectra, events and the drive and response WAVs "
                   "(about 1.3 GB per hour at 48 kHz); spectra: everything but the WAVs")
    r.set_defaults(func=_cmd_run)

    sv = sub.add_parser("survey", help="low-level resonance survey: FRF, coherence, resonances; "
                        "--compare two surveys for shifts",
                        description="Play low-level flat random noise over the profile's band, "
                        "estimate the FRF and coherence, find the resonances and write a survey "
                        "folder. With --compare BEFORE AFTER, pair the resonances of two surveys "
                        "and flag frequency shifts and peak drops beyond the limits (exit 5). "
                        "The simulated rig is the default; a real card only with "
                        "--rig audio:DEVICE.")
    sv.add_argument("spec", nargs="?", metavar="SPEC", help="test definition (.yaml) or profile")
    sv.add_argument("--compare", nargs=2, metavar=("BEFORE", "AFTER"),
                    help="compare two survey folders instead of running one")
    sv.add_argument("--rig", help="sim (default), sim:PRESET, sim:PLANT.yaml or audio:DEVICE")
    sv.add_argument("--calibration", metavar="FILE", help="chain calibration file (audio rigs)")
    _add_channel_options(sv)
    sv.add_argument("--uncalibrated", action="store_true",
                    help="audio rig without calibration (FRF in FS per FS)")
    sv.add_argument("--level", type=_level_fs, default=0.02, metavar="FS",
                    help="drive rms in full scale (default 0.02)")
    sv.add_argument("--duration", type=_positive_float, default=20.0, metavar="S",
                    help="seconds of drive (default 20, about 110 DOF)")
    sv.add_argument("--seed", type=_seed, metavar="N", help="random seed")
    sv.add_argument("--fault", action="append", metavar="KIND@SECONDS",
                    help="inject a fault into the simulated rig (e.g. resonance_shift@0=1.03)")
    sv.add_argument("--shift-pct", type=_shift_pct, default=2.0, metavar="PCT",
                    help="--compare: flag frequency shifts beyond this (default 2 %%)")
    sv.add_argument("--drop-db", type=_drop_db, default=0.92, metavar="DB",
                    help="--compare: flag peak drops beyond this (default 0.92 dB = 10 %%)")
    sv.add_argument("--operator", type=_text_field, metavar="NAME", help="who runs the survey")
    sv.add_argument("--test-item", type=_text_field, metavar="TEXT", help="what is surveyed")
    sv.add_argument("--out", default="runs", metavar="DIR",
                    help="folder for survey records (default: runs)")
    sv.add_argument("--json", action="store_true", help="print one JSON object")
    sv.set_defaults(func=_cmd_survey)

    rp = sub.add_parser("report", help="the test report (report.pdf) of a run record")
    rp.add_argument("run_dir", metavar="RUN_DIR", help="a run folder made by liveshape run")
    rp.add_argument("--out", metavar="DIR", help="where to write (default RUN_DIR/report)")
    rp.add_argument("--png", action="store_true", help="also write the plots as PNG files")
    rp.add_argument("--units", choices=tuple(ACCEL_UNITS), default="g",
                    help="acceleration in g (default) or m/s² in the report and summary.txt")
    rp.set_defaults(func=_cmd_report)

    d = sub.add_parser("devices", help="list audio devices (index, host API, channels, rate)")
    d.add_argument("--json", action="store_true", help="print one JSON object")
    d.set_defaults(func=_cmd_devices)

    cb = sub.add_parser("calibrate", help="calibrate the chain to volts and g, one step at a time",
                        description="Calibration steps, merged into one calibration file: "
                        "output (sine + your voltmeter reading), input (through a loopback "
                        "cable or a known voltage), delay (noise bursts), corner (AC coupling "
                        "from a loopback FRF), sensor (159.2 Hz, 10 m/s2 rms reference "
                        "exciter). Each step says what it will play, where and how loud, and "
                        "what to unplug, then waits for Enter. Channels count from 1. A "
                        "result outside the plausibility limits writes nothing (exit 2). "
                        "See calibration/README.md.")
    cb.add_argument("step", choices=CAL_STEPS, help="which step")
    cb.add_argument("--device", required=True, help="audio device index or name")
    cb.add_argument("-o", "--file", required=True, metavar="FILE.yaml",
                    help="calibration file to create or update")
    cb.add_argument("--fs", type=_fs, default=48000.0, metavar="HZ",
                    help="sample rate (default 48000)")
    cb.add_argument("--block-size", type=_block, default=1024, metavar="N",
                    help=f"samples per block ({BLOCK_MIN}-{BLOCK_MAX}, at most {BLOCK_MAX_S:g} s)")
    cb.add_argument("--loopback", metavar="OUT:IN",
                    help="a cable from output OUT to input IN, channels counted from 1 as "
                    "printed on the interface (1:1: the drive output into the control input)")
    cb.add_argument("--level", type=_level_fs, default=0.5, metavar="FS",
                    help="sine level for output/input steps, full scale (default 0.5)")
    cb.add_argument("--reading", type=_volts, metavar="V_RMS",
                    help="output step: the voltmeter reading (else asked for)")
    cb.add_argument("--known-v", type=_volts, metavar="V_RMS",
                    help="input step: a known sine voltage at the control input")
    cb.add_argument("--repeats", type=_bounded("int", 1, 100), default=5, metavar="N",
                    help="delay step: noise bursts (default 5)")
    cb.add_argument("--datasheet-mv-per-g", type=_mv_per_g, metavar="MV_PER_G",
                    help="sensor step: the datasheet sensitivity to compare with")
    cb.add_argument("--accept-deviation", action="store_true",
                    help="sensor step: keep a sensitivity more than 20 %% from the datasheet")
    cb.add_argument("--input", type=_channel, metavar="N", dest="sensor_input",
                    help="sensor step: the input the sensor's conditioner is on, from 1 "
                    "(default 1, the control accelerometer; another input is written under "
                    "inputs, for a rig with several inputs)")
    cb.add_argument("--unattended", action="store_true",
                    help="do not wait for Enter before the step plays (scripts; the set-up "
                    "must already be right). Without it stdin must be a terminal")
    cb.add_argument("--json", action="store_true", help="print the step's result as JSON")
    cb.set_defaults(func=_cmd_calibrate)

    v = sub.add_parser("virtual-rig", help="run the simulated plant as a JACK client",
                       description="The JACK virtual rig: the simulated plant (same presets "
                       "and plant files as --rig sim) inside a running JACK server, so "
                       "'run --rig audio:NAME' goes through a real audio stack.")
    v.add_argument("--plant", default="loudspeaker", help="preset name or plant YAML file")
    v.add_argument("--name", default="liveshape-plant", help="JACK client name")
    v.add_argument("--server", help="JACK server name (default: JACK_DEFAULT_SERVER)")
    v.add_argument("--seed", type=_seed, metavar="N", help="seed of the simulated noise")
    v.add_argument("--inputs", metavar="CH=SOURCE,...",
                   help="one capture port input_CH per input, e.g. "
                   "1=control,2=mode:bracket,3=reference (sources: control, reference, "
                   "mode:RESONANCE, fixture:POINT of the plant); default: response_out only")
    v.add_argument("--calibration-out", metavar="FILE.yaml",
                   help="write the chain calibration file of the simulated plant (its true "
                   "V/FS, mV/g and the loop delay through this server, as calibrate writes it) "
                   "for run --calibration FILE")
    v.set_defaults(func=_cmd_virtual_rig)
    return p


def _one_line(text: str) -> str:
    return " ".join(text.split())


def _os_error_line(exc: OSError) -> str:
    """``FILE: reason`` for an :class:`OSError` (errno text when there is one)."""
    where = exc.filename if exc.filename is not None else None
    reason = exc.strerror or str(exc) or exc.__class__.__name__
    return _one_line(f"{where}: {reason}" if where is not None else reason)


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit status.

    When a PortAudio call had to be abandoned (a stalled or dead audio server), the process
    ends here with ``os._exit``: the audio library's exit handler would block for ever.
    """
    code = _main(argv)
    audio = sys.modules.get("liveshape.rigs.audio")
    if audio is not None and audio.wedged():
        import os

        sys.stderr.write("liveshape: the audio stream could not be closed (server gone); "
                         "leaving without closing the audio library\n")
        sys.stdout.flush()
        sys.stderr.flush()
        os._exit(code)
    return code


def _main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return int(args.func(args))
    except LiveshapeError as exc:
        sys.stderr.write(f"liveshape: {_one_line(str(exc))}\n")
        return EXIT_USAGE
    except OSError as exc:
        # A file system error not met by a command's own checks (unwritable, full, missing):
        # one line naming the file and the error, like every other user-side error.
        sys.stderr.write(f"liveshape: {_os_error_line(exc)}\n")
        return EXIT_USAGE
    except KeyboardInterrupt:
        sys.stderr.write("liveshape: interrupted\n")
        return EXIT_INTERRUPTED
    except _Terminated:
        sys.stderr.write("liveshape: terminated by SIGTERM (no partial file left)\n")
        return EXIT_TERMINATED
    except BrokenPipeError:
        return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
