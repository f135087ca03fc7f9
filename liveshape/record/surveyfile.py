"""The survey record: one folder per survey, written atomically, and its reader.

``<out>/<yyyymmdd-hhmmss>-<name>-survey/`` holds ``survey.json`` (format, time, software
version, rig, calibration, settings, status, DOF, delay, the resonances found), ``frf.npz``
(``f_hz``, ``h1_g_per_fs``, ``coherence``) and ``frf.csv`` (the same, one row per line, units
in the column names). Every file is written through :func:`liveshape.atomic.atomic_write`.
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

__all__ = ["SURVEY_FORMAT", "SurveyRecord", "read_survey", "write_survey"]

SURVEY_FORMAT = "liveshape-survey"
SURVEY_FORMAT_VERSION = 1
META_NAME = "survey.json"
FRF_NAME = "frf.npz"
CSV_NAME = "frf.csv"


@dataclasses.dataclass(frozen=True)
class SurveyRecord:
    """A survey read back: its folder, ``meta`` (survey.json), resonances and FRF arrays."""

    root: Path
    meta: dict[str, Any]
    resonances: tuple[Resonance, ...]
    f_hz: np.ndarray
    h1: np.ndarray
    coherence: np.ndarray


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
    try:
        atomic_write(root / FRF_NAME, lambda fh: np.savez(
            fh, f_hz=np.asarray(result.f_hz), h1_g_per_fs=h1,
            coherence=np.asarray(result.coherence)))
        atomic_write_text(root / CSV_NAME, "\n".join(rows) + "\n")
        text = json.dumps(json_safe(meta), indent=2, allow_nan=False) + "\n"
        atomic_write_text(root / META_NAME, text)  # last: a folder with it is complete
    except OSError as exc:
        shutil.rmtree(root, ignore_errors=True)  # no partial record
        why = exc.strerror or exc
        raise ConfigError(f"{root}: cannot write the survey record ({why})") from None
    return root


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
    try:
        with np.load(root / FRF_NAME, allow_pickle=False) as z:
            f, h, c = z["f_hz"], z["h1_g_per_fs"], z["coherence"]
    except (OSError, KeyError, ValueError) as exc:
        raise ConfigError(f"{root / FRF_NAME}: cannot read ({exc.__class__.__name__})") from None
    return SurveyRecord(root, meta, res, f, h, c)
