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


def _cmd_check(args: argparse.Namespace) -> int:
    from liveshape.control.checks import check_report
    from liveshape.testdef.spec import load_spec
    from liveshape.views import dashboard

    overrides = _rig_overrides(args.rig)
    if args.fs is not None:
        overrides["control.fs_hz"] = args.fs
    spec = load_spec(args.spec, overrides)
    feas = None
    if args.rig is not None:
        feas = _feasibility(spec)
    report = check_report(spec, feas)
    if args.json:
        _print_json(report)
    else:
        console = dashboard.make_console()
        console.print(dashboard.check_table(report))
    return 0


def _feasibility(spec: Any) -> Any:
    """Rig feasibility of the spec's rig (simulated plant model, or a calibrated card)."""
    from liveshape.rigs.feasibility import assess
    from liveshape.rigs.plant import load_plant

    if spec.rig.kind != "sim":
        raise ConfigError(
            f"--rig = audio:{spec.rig.device}: feasibility needs a plant model; "
            "check against the simulated rig that models it (--rig sim:PLANT.yaml)"
        )
    plant = load_plant(spec.rig.plant)
    return assess(
        spec.profile, plant, fs_hz=spec.control.fs_hz, frame_length=spec.control.frame_length
    )


def _feasibility_warnings(feas: Any) -> list[str]:
    """One line per exceeded budget or unreachable band of a rig feasibility."""
    data = feas.to_dict()
    lines = [f"{u.f_lo_hz:.6g}-{u.f_hi_hz:.6g} Hz cannot be controlled: {u.reason}"
             for u in feas.unreachable]
    exceeded = data.get("limits_exceeded")
    if exceeded and exceeded != "none":
        lines.append(f"rig limits exceeded by the profile at full level: {exceeded} "
                     "(liveshape check SPEC --rig ... shows the budgets)")
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
    )
    if args.json:
        result = make_drive_file(spec, args.output, **kwargs)
        _print_json(result.to_dict())
        return 0
    console = dashboard.make_console()
    with dashboard.progress_bar(console, f"writing {args.output}") as progress:
        result = make_drive_file(spec, args.output, progress=progress, **kwargs)
    console.print(dashboard.synth_summary(result.to_dict()))
    return 0


def _synth_from_run(args: argparse.Namespace) -> int:
    from liveshape.record.drivefile import make_run_drive_file

    if args.spec is not None:
        raise ConfigError(f"synth: SPEC = {args.spec!r} and --from-run are exclusive")
    for name in ("fs", "clip_sigma", "crest_min", "crest_max", "kurtosis"):
        if getattr(args, name) is not None:
            opt = "--" + name.replace("_", "-")
            raise ConfigError(f"synth: {opt} does not apply with --from-run (the run fixes it)")
    duration = 60.0 if args.duration is None else args.duration
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
    spec = load_spec(args.spec, overrides)
    # The cautions come first, before anything is driven (on stderr with --json).
    notice_console = dashboard.make_console(stderr=args.json)
    notice_console.print(dashboard.safety_notice())
    if spec.rig.kind == "sim":
        # Name what the rig cannot honestly do before anything is driven (see check --rig).
        feas = _feasibility(spec)
        if not feas.feasible:
            for line in _feasibility_warnings(feas):
                dashboard.print_error(notice_console, f"warning: {line}")
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
    kwargs["record_signals"] = args.record == "full"
    if args.json:
        session = runner(spec, out_dir=args.out, **kwargs)
        _print_json(session.summary())
        return session.result.exit_status
    console = dashboard.make_console()
    with dashboard.LiveView(console) as view:
        session = runner(spec, out_dir=args.out, on_snapshot=view.update, **kwargs)
    console.print(dashboard.run_summary(session.summary()))
    console.print(f"record: {session.run_dir}  (liveshape report {session.run_dir})")
    return session.result.exit_status


def _cmd_survey(args: argparse.Namespace) -> int:
    import dataclasses as _dc

    if args.compare:
        from liveshape.dsp.resonance import compare_resonances
        from liveshape.record.surveyfile import read_survey
        from liveshape.views.surveytext import compare_lines

        before, after = (read_survey(p) for p in args.compare)
        changes = compare_resonances(before.resonances, after.resonances,
                                     shift_pct=args.shift_pct, peak_drop_db=args.drop_db)
        flagged = sum(bool(c.flagged) for c in changes)
        if args.json:
            _print_json({"before": str(before.root), "after": str(after.root),
                         "changes": [_dc.asdict(c) for c in changes], "flagged": flagged})
        else:
            sys.stdout.write("\n".join(compare_lines(changes, before.root, after.root)) + "\n")
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
    spec = load_spec(args.spec, overrides)
    settings = survey_settings(spec, level_fs=args.level, duration_s=args.duration,
                               seed=args.seed)
    notice = dashboard.make_console(stderr=True)
    notice.print(dashboard.safety_notice())
    result, folder = run_survey(spec, settings, out_dir=args.out,
                                identity={"operator": args.operator,
                                          "test_item": args.test_item})
    if args.json:
        _print_json({"status": result.status, "record": str(folder), "dof": result.dof,
                     "delay_samples": result.delay_samples,
                     "resonances": [_dc.asdict(r) for r in result.resonances]})
    else:
        sys.stdout.write("\n".join(survey_lines(result, folder, settings)) + "\n")
    return result.exit_status


#: Exit status of ``survey --compare`` when a change was flagged.
SURVEY_FLAGGED_EXIT = 5


def _cmd_report(args: argparse.Namespace) -> int:
    from liveshape.record.report import render_report

    result = render_report(args.run_dir, out_dir=args.out)
    sys.stdout.write(result.summary.rstrip("\n") + "\n")
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
    head = (f"{'index':>5}  {'name':<32} {'host API':<12} {'in':>3} {'out':>3} "
            f"{'rate Hz':>8}  duplex")
    lines = [head]
    for d in rows:
        lines.append(
            f"{d['index']:>5}  {d['name'][:32]:<32} {d['host_api'][:12]:<12} "
            f"{d['max_input_channels']:>3} {d['max_output_channels']:>3} "
            f"{d['default_fs_hz']:>8.0f}  {'yes' if d['full_duplex'] else '-'}"
        )
    if not rows:
        lines.append("(no audio devices)")
    sys.stdout.write("\n".join(lines) + "\n")
    return 0


def _cmd_virtual_rig(args: argparse.Namespace) -> int:
    from liveshape.rigs.jackrig import serve

    def ready(rig: Any) -> None:
        sys.stderr.write(
            f"liveshape: virtual rig {args.name!r} running plant {args.plant!r}; "
            f"run with --rig audio:{args.name}; Ctrl-C ends it\n"
        )
        sys.stderr.flush()

    serve(args.plant, server_name=args.server, client_name=args.name, seed=args.seed,
          ready=ready)
    return 0


CAL_STEPS = ("output", "input", "delay", "corner", "sensor")


def _cmd_calibrate(args: argparse.Namespace) -> int:
    """One calibration step; results are merged into the calibration file."""
    from liveshape.rigs import calibration as cal
    from liveshape.rigs.audio import AudioRig, check_settings
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
    info = check_settings(args.device, args.fs, input_channels=1 + (loopback is not None),
                          output_channels=1 + (loopback is not None))
    data["device"] = info.name
    data["fs_hz"] = float(args.fs)
    rig = AudioRig(info.index, args.fs, block_size=args.block_size, loopback=loopback,
                   lead_blocks=8)
    out: dict[str, Any]
    if args.step == "output":
        reading = args.reading

        def read_voltmeter(f_hz: float, level_fs: float) -> float:
            if reading is not None:
                return float(reading)
            answer = input(f"{f_hz:g} Hz sine at {level_fs:g} FS on the drive output. "
                           "Voltmeter reading, V rms: ")
            try:
                return float(answer)
            except ValueError:
                raise ConfigError(f"voltmeter reading = {answer!r} is not a number") from None

        res = cal.calibrate_output(rig, read_voltmeter, level_fs=args.level)
        data["output"] = {"v_per_fs": res.v_per_fs, "method": res.method}
        out = dataclasses.asdict(res)
    elif args.step == "input":
        if args.known_v is not None:
            res = cal.calibrate_input(rig, known_v_rms=args.known_v, channel="control")
        else:
            out_v = _section_value(data, path, "output", "v_per_fs", "calibrate output")
            if loopback is None:
                raise ConfigError("calibrate input: give --loopback OUT:IN (a cable from a "
                                  "second output to a second input) or --known-v V_RMS")
            res = cal.calibrate_input(rig, out_v_per_fs=out_v, level_fs=args.level)
        data["input"] = {"v_per_fs": res.v_per_fs, "method": res.method}
        out = dataclasses.asdict(res)
    elif args.step == "delay":
        res = cal.measure_loop_delay(rig, repeats=args.repeats,
                                     channel="loopback" if loopback else "control")
        data["loop_delay"] = {"samples": res.samples, "spread_samples": res.spread_samples}
        out = dataclasses.asdict(res)
    elif args.step == "corner":
        if loopback is None:
            raise ConfigError("calibrate corner: needs --loopback OUT:IN (a cable from a "
                              "second output to a second input)")
        delay = data.get("loop_delay", {}) or {}
        if delay.get("samples") is None:
            raise ConfigError(f"{path}: loop_delay.samples is missing; run "
                              "liveshape calibrate delay first")
        res = cal.measure_lowfreq_corner(rig, delay_samples=int(delay["samples"]))
        data["lowfreq_corner"] = {"order": res.order, "corner_hz": res.corner_hz,
                                  "q": res.q, "f_3db_hz": res.f_3db_hz}
        out = dataclasses.asdict(res)
    else:  # sensor
        in_v = _section_value(data, path, "input", "v_per_fs", "calibrate input")
        res = cal.check_accelerometer(rig, in_v_per_fs=in_v,
                                      datasheet_mv_per_g=args.datasheet_mv_per_g)
        acc = {"mv_per_g": res.sensitivity_mv_per_g}
        if args.datasheet_mv_per_g is not None:
            acc["datasheet_mv_per_g"] = args.datasheet_mv_per_g
        data["accelerometer"] = acc
        out = {k: v for k, v in dataclasses.asdict(res).items() if k != "fit"}
    config.write_yaml_file(path, json_safe(data))
    out["file"] = str(path)
    if args.json:
        _print_json(out)
    else:
        for key, value in json_safe(out).items():
            sys.stdout.write(f"{key}: {value}\n")
    return 0


def _section_value(data: dict[str, Any], path: Path, section: str, key: str, step: str) -> float:
    value = (data.get(section) or {}).get(key) if isinstance(data.get(section), dict) else None
    if value is None:
        raise ConfigError(f"{path}: {section}.{key} is missing; run liveshape {step} first")
    return float(value)


def _loopback_option(text: str | None) -> tuple[int, int] | None:
    if text is None:
        return None
    a, sep, b = text.partition(":")
    if not sep or not a.strip().isdigit() or not b.strip().isdigit():
        raise ConfigError(f"--loopback = {text!r} must be OUT:IN channel numbers, e.g. 1:1")
    return int(a), int(b)


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


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of every command (exposed for tests and documentation)."""
    p = argparse.ArgumentParser(
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
    c.add_argument("--fs", type=_positive_float, metavar="HZ", help="sample rate override")
    c.add_argument("--json", action="store_true", help="print one JSON object")
    c.set_defaults(func=_cmd_check)

    s = sub.add_parser("synth", help="write a drive file (float WAV) offline with a sidecar")
    s.add_argument("spec", metavar="SPEC", nargs="?",
                   help="test definition (.yaml) or profile (.csv)")
    s.add_argument("--duration", type=_positive_float, metavar="S",
                   help="length of the file in seconds (required with SPEC; 60 with --from-run)")
    s.add_argument("--from-run", metavar="RUN_DIR",
                   help="synthesize the run's last equalized drive (FS) for open-loop playback")
    s.add_argument("--force", action="store_true",
                   help="with --from-run: export from a run that did not complete")
    s.add_argument("-o", "--output", required=True, metavar="FILE.wav", help="output WAV")
    s.add_argument("--fs", type=_positive_float, metavar="HZ", help="sample rate")
    s.add_argument("--seed", type=_whole, metavar="N", help="random seed")
    s.add_argument("--clip-sigma", type=_positive_float, metavar="X",
                   help="clip the drive at X times its rms (>= 2.5)")
    s.add_argument("--crest-min", type=_positive_float, metavar="X",
                   help="keep only realizations with crest factor >= X")
    s.add_argument("--crest-max", type=_positive_float, metavar="Y",
                   help="keep only realizations with crest factor <= Y")
    s.add_argument("--max-tries", type=_whole, default=10, metavar="N",
                   help="realizations to try for the crest-factor criterion (default 10)")
    s.add_argument("--kurtosis", type=_positive_float, metavar="K",
                   help="kurtosis target >= 3 (3: Gaussian); the PSD is kept")
    s.add_argument("--json", action="store_true", help="print the sidecar as one JSON object")
    s.set_defaults(func=_cmd_synth)

    r = sub.add_parser("run", help="run a closed-loop test (simulated rig unless told otherwise)",
                       description="Run a closed-loop random test. The simulated rig is the "
                       "default; a real card is driven only with --rig audio:DEVICE. Ctrl-C "
                       "or SIGTERM ramps the drive down and stops.")
    r.add_argument("spec", metavar="SPEC", help="test definition (.yaml) or profile (.csv)")
    r.add_argument("--rig", help="sim (default), sim:PRESET, sim:PLANT.yaml or audio:DEVICE")
    r.add_argument("--calibration", metavar="FILE", help="chain calibration file (audio rigs)")
    r.add_argument("--uncalibrated", action="store_true",
                   help="run an audio rig without calibration (levels in full scale only; "
                   "the record says so)")
    r.add_argument("--fast", action="store_true",
                   help="simulated rig: run as fast as the CPU allows (same results per seed)")
    r.add_argument("--seed", type=_whole, metavar="N", help="random seed")
    r.add_argument("--fault", action="append", metavar="KIND@SECONDS",
                   help="inject a fault into the simulated rig, e.g. sensor_gain@12=0.5 "
                   "or noise_burst@20=0.1/0.5 (repeatable)")
    r.add_argument("--duration", type=_positive_float, metavar="S",
                   help="time at full level, s (overrides schedule.full_level_s)")
    r.add_argument("--block-size", type=_whole, metavar="N", help="samples per block")
    r.add_argument("--out", default="runs", metavar="DIR",
                   help="folder for run records (default: runs)")
    r.add_argument("--json", action="store_true", help="print the run summary as JSON")
    r.add_argument("--operator", type=_text_field, metavar="NAME",
                   help="who runs the test (written to run.json and the report)")
    r.add_argument("--test-item", type=_text_field, metavar="TEXT",
                   help="what is under test, e.g. a serial number (run.json and the report)")
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
    sv.add_argument("--uncalibrated", action="store_true",
                    help="audio rig without calibration (FRF in FS per FS)")
    sv.add_argument("--level", type=_positive_float, default=0.02, metavar="FS",
                    help="drive rms in full scale (default 0.02)")
    sv.add_argument("--duration", type=_positive_float, default=20.0, metavar="S",
                    help="seconds of drive (default 20, about 110 DOF)")
    sv.add_argument("--seed", type=_whole, metavar="N", help="random seed")
    sv.add_argument("--fault", action="append", metavar="KIND@SECONDS",
                    help="inject a fault into the simulated rig (e.g. resonance_shift@0=1.03)")
    sv.add_argument("--shift-pct", type=_positive_float, default=2.0, metavar="PCT",
                    help="--compare: flag frequency shifts beyond this (default 2 %%)")
    sv.add_argument("--drop-db", type=_positive_float, default=0.92, metavar="DB",
                    help="--compare: flag peak drops beyond this (default 0.92 dB = 10 %%)")
    sv.add_argument("--operator", type=_text_field, metavar="NAME", help="who runs the survey")
    sv.add_argument("--test-item", type=_text_field, metavar="TEXT", help="what is surveyed")
    sv.add_argument("--out", default="runs", metavar="DIR",
                    help="folder for survey records (default: runs)")
    sv.add_argument("--json", action="store_true", help="print one JSON object")
    sv.set_defaults(func=_cmd_survey)

    rp = sub.add_parser("report", help="plots and a text summary from a run record")
    rp.add_argument("run_dir", metavar="RUN_DIR", help="a run folder made by liveshape run")
    rp.add_argument("--out", metavar="DIR", help="where to write (default RUN_DIR/report)")
    rp.set_defaults(func=_cmd_report)

    d = sub.add_parser("devices", help="list audio devices (index, host API, channels, rate)")
    d.add_argument("--json", action="store_true", help="print one JSON object")
    d.set_defaults(func=_cmd_devices)

    cb = sub.add_parser("calibrate", help="calibrate the chain to volts and g, one step at a time",
                        description="Calibration steps, merged into one calibration file: "
                        "output (sine + your voltmeter reading), input (through a loopback "
                        "cable or a known voltage), delay (noise bursts), corner (AC coupling "
                        "from a loopback FRF), sensor (159.2 Hz, 10 m/s2 rms reference "
                        "exciter). See calibration/README.md.")
    cb.add_argument("step", choices=CAL_STEPS, help="which step")
    cb.add_argument("--device", required=True, help="audio device index or name")
    cb.add_argument("-o", "--file", required=True, metavar="FILE.yaml",
                    help="calibration file to create or update")
    cb.add_argument("--fs", type=_positive_float, default=48000.0, metavar="HZ",
                    help="sample rate (default 48000)")
    cb.add_argument("--block-size", type=_whole, default=1024, metavar="N")
    cb.add_argument("--loopback", metavar="OUT:IN",
                    help="channels of a cable from a second output to a second input")
    cb.add_argument("--level", type=_positive_float, default=0.5, metavar="FS",
                    help="sine level for output/input steps, full scale (default 0.5)")
    cb.add_argument("--reading", type=_positive_float, metavar="V_RMS",
                    help="output step: the voltmeter reading (else asked for)")
    cb.add_argument("--known-v", type=_positive_float, metavar="V_RMS",
                    help="input step: a known sine voltage at the control input")
    cb.add_argument("--repeats", type=_whole, default=5, metavar="N",
                    help="delay step: noise bursts (default 5)")
    cb.add_argument("--datasheet-mv-per-g", type=_positive_float, metavar="MV_PER_G",
                    help="sensor step: the datasheet sensitivity to compare with")
    cb.add_argument("--json", action="store_true", help="print the step's result as JSON")
    cb.set_defaults(func=_cmd_calibrate)

    v = sub.add_parser("virtual-rig", help="run the simulated plant as a JACK client",
                       description="The JACK virtual rig: the simulated plant (same presets "
                       "and plant files as --rig sim) inside a running JACK server, so "
                       "'run --rig audio:NAME' goes through a real audio stack.")
    v.add_argument("--plant", default="loudspeaker", help="preset name or plant YAML file")
    v.add_argument("--name", default="liveshape-plant", help="JACK client name")
    v.add_argument("--server", help="JACK server name (default: JACK_DEFAULT_SERVER)")
    v.add_argument("--seed", type=_whole, metavar="N", help="seed of the simulated noise")
    v.set_defaults(func=_cmd_virtual_rig)
    return p


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit status."""
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return int(args.func(args))
    except LiveshapeError as exc:
        sys.stderr.write(f"liveshape: {exc}\n")
        return EXIT_USAGE
    except KeyboardInterrupt:
        sys.stderr.write("liveshape: interrupted\n")
        return EXIT_INTERRUPTED
    except BrokenPipeError:
        return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
