"""The survey record: one folder per survey, written atomically, and its reader.

``<out>/<yyyymmdd-hhmmss>-<name>-survey/`` holds ``survey.json`` (format, time, software
version, rig, calibration, settings, status, DOF, delay, the resonances found), ``frf.npz``
(``f_hz``, ``h1_g_per_fs``, ``coherence``) and ``frf.csv`` (the same, one row per line, units
in the column names). Every file is written through :func:`liveshape.atomic.atomic_write`.

A survey of several inputs adds, per input ``NAME`` (the names of ``rig.inputs``), the arrays
``input_NAME_h1`` (FRF from the drive, g/FS; the reference: drive FS per FS) and
``input_NAME_coherence``, and for the inputs other than the first control and the reference
``input_NAME_trans`` (transmissibility over the first control input, g/g) and
``input_NAME_trans_coherence`` to ``frf.npz``; the same as ``inputs.csv``; and an ``inputs``
list in ``survey.json`` (name, channel, role, units, rms, resonances, transmissibility peaks;
the reference's median output gain in dB). A one-input survey's files are as before.
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import json
import math
import os
import shutil
from pathlib import Path
from typing import Any

import numpy as np

from liveshape.atomic import atomic_write, atomic_write_text
from liveshape.dsp.resonance import Resonance
from liveshape.errors import ConfigError
from liveshape.record.runfolder import new_run_folder
from liveshape.record.writer import json_safe

__all__ = ["RUN_SURVEYS_NAME", "SURVEY_FORMAT", "SurveyRecord", "note_run_surveys",
           "read_survey", "write_survey"]

SURVEY_FORMAT = "liveshape-survey"
SURVEY_FORMAT_VERSION = 1
META_NAME = "survey.json"
FRF_NAME = "frf.npz"
CSV_NAME = "frf.csv"
INPUTS_CSV_NAME = "inputs.csv"
#: File in a run folder naming the surveys before and after the run (``run --survey``).
RUN_SURVEYS_NAME = "surveys.json"


@dataclasses.dataclass(frozen=True)
class SurveyRecord:
    """A survey read back: its folder, ``meta`` (survey.json), resonances and FRF arrays.

    ``inputs`` (several inputs only; else empty): name -> ``{"channel", "role",
    "resonances", "trans_resonances", "h1", "coherence", "trans", "trans_coherence"}``
    (``trans`` None where there is none), in the survey's input order.
    """

    root: Path
    meta: dict[str, Any]
    resonances: tuple[Resonance, ...]
    f_hz: np.ndarray
    h1: np.ndarray
    coherence: np.ndarray
    inputs: dict[str, dict[str, Any]] = dataclasses.field(default_factory=dict)


def write_survey(out_dir: str | os.PathLike[str], *, name: str, result: Any,
                 settings: Any, rig: dict[str, Any], calibration: dict[str, Any],
                 identity: dict[str, Any], now: _dt.datetime | None = None) -> Path:
    """Make the survey folder for ``result`` (a :class:`~liveshape.control.survey.SurveyResult`).

    Raises
    ------
    ConfigError
        One line when the folder or a file cannot be written.
    """
    stamp = (now or _dt.datetime.now(_dt.timezone.utc)).astimezone(_dt.timezone.utc)
    root = new_run_folder(out_dir, f"{name}-survey", stamp)
    meta = {
        "format": SURVEY_FORMAT, "format_version": SURVEY_FORMAT_VERSION, "name": name,
        "created_utc": stamp.isoformat(timespec="seconds"), **identity,
        "settings": dataclasses.asdict(settings), "rig": rig, "calibration": calibration,
        "status": result.status, "stop_reason": result.stop_reason, "dof": result.dof,
        "delay_samples": result.delay_samples, "drive_rms_fs": result.drive_rms_fs,
        "response_rms_fs": result.response_rms_fs,
        "resonances": [dataclasses.asdict(r) for r in result.resonances],
    }
    h1 = np.asarray(result.h1)
    rows = ["f_hz,h1_mag_g_per_fs,h1_phase_deg,coherence"]
    for f, h, c in zip(result.f_hz, h1, result.coherence, strict=True):
        rows.append(f"{f:.9g},{abs(h):.9g},{math.degrees(np.angle(h)):.6g},{c:.6g}")
    inputs = tuple(getattr(result, "inputs", ()) or ())
    arrays: dict[str, np.ndarray] = {}
    if inputs:
        meta["inputs"] = [_input_meta(r) for r in inputs]
        arrays = _input_arrays(inputs)
    try:
        atomic_write(root / FRF_NAME, lambda fh: np.savez(
            fh, f_hz=np.asarray(result.f_hz), h1_g_per_fs=h1,
            coherence=np.asarray(result.coherence), **arrays))
        atomic_write_text(root / CSV_NAME, "\n".join(rows) + "\n")
        if inputs:
            atomic_write_text(root / INPUTS_CSV_NAME, _inputs_csv(result.f_hz, inputs))
        text = json.dumps(json_safe(meta), indent=2, allow_nan=False) + "\n"
        atomic_write_text(root / META_NAME, text)  # last: a folder with it is complete
    except OSError as exc:
        shutil.rmtree(root, ignore_errors=True)  # no partial record
        why = exc.strerror or exc
        raise ConfigError(f"{root}: cannot write the survey record ({why})") from None
    return root


def note_run_surveys(run_dir: str | os.PathLike[str], data: dict[str, Any]) -> Path | None:
    """Write ``surveys.json`` into a (closed) run folder: the survey folders before and after
    the run and their compare (``run --survey``). Returns its path, None when it could not be
    written (the run's record stands without it; the caller says so)."""
    path = Path(run_dir) / RUN_SURVEYS_NAME
    text = json.dumps(json_safe({"format": "liveshape-run-surveys", **data}), indent=2,
                      allow_nan=False) + "\n"
    try:
        atomic_write_text(path, text)
    except OSError:
        return None
    return path


def _input_meta(r: Any) -> dict[str, Any]:
    """survey.json's entry of one input (:class:`~liveshape.control.survey.InputSurvey`)."""
    d: dict[str, Any] = {
        "name": r.name, "channel": r.channel, "role": r.role, "units": r.units,
        "response_rms_fs": r.response_rms_fs,
        "resonances": [dataclasses.asdict(x) for x in r.resonances],
        "trans_resonances": [dataclasses.asdict(x) for x in r.trans_resonances],
    }
    if r.role == "reference":
        mag = np.abs(np.asarray(r.h1))
        d["output_gain_median_db"] = (float(20.0 * np.log10(np.median(mag)))
                                      if mag.size and np.median(mag) > 0 else None)
    return d


def _input_arrays(inputs: tuple[Any, ...]) -> dict[str, np.ndarray]:
    """frf.npz's arrays of every input (see the module docstring)."""
    out: dict[str, np.ndarray] = {}
    for r in inputs:
        out[f"input_{r.name}_h1"] = np.asarray(r.h1)
        out[f"input_{r.name}_coherence"] = np.asarray(r.coherence)
        if r.trans is not None:
            out[f"input_{r.name}_trans"] = np.asarray(r.trans)
            out[f"input_{r.name}_trans_coherence"] = np.asarray(r.trans_coherence)
    return out


def _inputs_csv(f_hz: Any, inputs: tuple[Any, ...]) -> str:
    """inputs.csv: one row per line, per input its FRF from the drive (magnitude in its units,
    phase, coherence) and, where there is one, its transmissibility over the first control."""
    cols: list[tuple[str, np.ndarray, str]] = []
    for r in inputs:
        unit = "fs_per_fs" if r.role == "reference" else "g_per_fs"
        cols.append((f"{r.name}_h1_mag_{unit},{r.name}_h1_phase_deg,{r.name}_coherence",
                     np.asarray(r.h1), "frf"))
        cols.append(("", np.asarray(r.coherence), "coh"))
        if r.trans is not None:
            cols.append((f"{r.name}_trans_mag,{r.name}_trans_phase_deg,"
                         f"{r.name}_trans_coherence", np.asarray(r.trans), "frf"))
            cols.append(("", np.asarray(r.trans_coherence), "coh"))
    head = ["f_hz"] + [c[0] for c in cols if c[0]]
    lines = [",".join(head)]
    for k, f in enumerate(np.asarray(f_hz)):
        cells = [f"{f:.9g}"]
        for _, arr, kind in cols:
            v = arr[k]
            if kind == "frf":
                cells += [f"{abs(v):.9g}", f"{math.degrees(np.angle(v)):.6g}"]
            else:
                cells.append(f"{v:.6g}")
        lines.append(",".join(cells))
    return "\n".join(lines) + "\n"


def _resonance(d: Any, where: str) -> Resonance:
    try:
        return Resonance(**{f.name: (str(d[f.name]) if f.name == "kind"
                                     else float(d[f.name] if d[f.name] is not None else math.nan))
                            for f in dataclasses.fields(Resonance)})
    except (KeyError, TypeError, ValueError):
        raise ConfigError(f"{where}: a resonance entry is incomplete or not numbers") from None


def read_survey(path: str | os.PathLike[str]) -> SurveyRecord:
    """Read a survey folder (or its ``survey.json``).

    Raises
    ------
    ConfigError
        One line when it is missing, unreadable or not a survey record.
    """
    p = Path(path)
    root = p.parent if p.name == META_NAME else p
    meta_path = root / META_NAME
    if not root.is_dir():
        raise ConfigError(f"{root}: survey folder not found")
    if not meta_path.is_file():
        raise ConfigError(f"{root}: not a survey folder (no {META_NAME})")
    try:
        meta = json.loads(meta_path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise ConfigError(f"{meta_path}: cannot read ({exc.__class__.__name__})") from None
    if not isinstance(meta, dict) or meta.get("format") != SURVEY_FORMAT:
        raise ConfigError(f"{meta_path}: format is not {SURVEY_FORMAT!r}")
    res = tuple(_resonance(d, str(meta_path)) for d in meta.get("resonances") or [])
    entries = meta.get("inputs") or []
    if not isinstance(entries, list) or not all(isinstance(e, dict) and "name" in e
                                                for e in entries):
        raise ConfigError(f"{meta_path}: inputs is not a list of named inputs")
    inputs: dict[str, dict[str, Any]] = {}
    try:
        with np.load(root / FRF_NAME, allow_pickle=False) as z:
            f, h, c = z["f_hz"], z["h1_g_per_fs"], z["coherence"]
            for e in entries:
                name = str(e["name"])
                key = f"input_{name}_"
                inputs[name] = {
                    "channel": e.get("channel"), "role": e.get("role"),
                    "resonances": tuple(_resonance(d, str(meta_path))
                                        for d in e.get("resonances") or []),
                    "trans_resonances": tuple(_resonance(d, str(meta_path))
                                              for d in e.get("trans_resonances") or []),
                    "h1": z[key + "h1"], "coherence": z[key + "coherence"],
                    "trans": z[key + "trans"] if key + "trans" in z.files else None,
                    "trans_coherence": (z[key + "trans_coherence"]
                                        if key + "trans_coherence" in z.files else None),
                }
    except (OSError, KeyError, ValueError) as exc:
        raise ConfigError(f"{root / FRF_NAME}: cannot read ({exc.__class__.__name__})") from None
    return SurveyRecord(root, meta, res, f, h, c, inputs)
