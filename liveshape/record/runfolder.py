"""The run folder: its layout (file names, format tag) and the reader of a folder.

A run folder ``<out_dir>/<UTC yyyymmdd-hhmmss>-<name>[-n]`` holds::

    run.json        what was run: name, start time (UTC), sample rate, calibration, extras
    spec.yaml       the resolved test definition (every value, defaults filled in)
    rig.yaml        the resolved rig (plant or device, chain)
    events.jsonl    one JSON object per line {"t_s", "kind", "message", "data"}, appended and
                    flushed as events happen
    drive.wav       the drive sent to the output, float32 full scale, streamed block by block
    response.wav    the control response read at the input, float32 full scale
    updates/NNNN.npz  spectra and FRF of each control update, each file written atomically
    summary.json    the result, written atomically when the run closes (absent if it was killed)

The names below are the one place that layout is spelled; the writer
(:class:`liveshape.record.writer.RunRecorder`) and the reader here both use them. :func:`load_run`
accepts a run that was killed midway: no ``summary.json``, a cut last line in
``events.jsonl``, WAV headers as of the last periodic header update.
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import json
import os
import re
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np

from liveshape.errors import ConfigError
from liveshape.testdef.config import read_yaml_file

__all__ = [
    "DRIVE_NAME",
    "EVENTS_NAME",
    "META_NAME",
    "RESPONSE_NAME",
    "RIG_NAME",
    "RUN_FORMAT",
    "RUN_FORMAT_VERSION",
    "SPEC_NAME",
    "SUMMARY_NAME",
    "UPDATES_DIR",
    "UPDATE_ARRAYS",
    "RecordedEvent",
    "RunData",
    "UpdateSeries",
    "load_run",
    "new_run_folder",
    "pack_update",
    "read_signals",
    "update_file_name",
]

#: Value of ``format`` in ``run.json``; a folder without it is not a run folder.
RUN_FORMAT = "liveshape-run"
RUN_FORMAT_VERSION = 1

META_NAME = "run.json"
SPEC_NAME = "spec.yaml"
RIG_NAME = "rig.yaml"
EVENTS_NAME = "events.jsonl"
SUMMARY_NAME = "summary.json"
DRIVE_NAME = "drive.wav"
RESPONSE_NAME = "response.wav"
UPDATES_DIR = "updates"
DECISIONS_DIR = "decisions"
#: The full-level average (time-averaged control over the whole time at full level).
FULL_LEVEL_NAME = "full_level.npz"

#: Units of the arrays and figures of the update files (stored in each as ``units``,
#: ``"name: unit"`` strings); FS is digital full scale.
UPDATE_UNITS = {
    "f_hz": "Hz", "t_s": "s", "control_psd": "g^2/Hz", "target_psd": "g^2/Hz",
    "drive_psd": "FS^2/Hz", "new_drive_psd": "FS^2/Hz", "h1": "g/FS", "coherence": "1",
    "decision_psd": "g^2/Hz", "decision_dof": "DOF", "dof": "DOF", "level_db": "dB",
    "rms_error_db": "dB", "max_dev_db": "dB", "min_dev_db": "dB", "ceiling_scale": "1",
}

#: Arrays stored in every update file; the scalar figures go next to them by name.
UPDATE_ARRAYS = ("f_hz", "control_psd", "target_psd", "drive_psd", "h1", "coherence")
#: Names no figure or extra array may take: the arrays every update file has, and its two
#: index arrays ``numbers`` and ``arrays`` (the names of the figures and of the extra arrays).
_UPDATE_RESERVED = frozenset(UPDATE_ARRAYS) | {"index", "t_s", "numbers", "arrays", "units"}

#: Characters a folder name does not keep: anything but Unicode letters, digits and ``_ . -``
#: (``\w`` of a str pattern is Unicode-aware, so a name such as ``名前`` stays as it is).
_NAME_BAD = re.compile(r"[^\w.-]+")
#: Folder name used when nothing of the test's name can be kept (e.g. a name of symbols only).
_NAME_FALLBACK = "run"


def new_run_folder(out_dir: str | os.PathLike[str], name: str, stamp: _dt.datetime) -> Path:
    """Make the empty folder of a new run: ``<out_dir>/<yyyymmdd-hhmmss>-<name>[-n]``.

    Characters of ``name`` other than (Unicode) letters, digits and ``_ . -`` become ``-`` (at
    most 64 kept; ``run`` when nothing is left): the name is sanitized for the folder only, any
    name the test definition accepts is accepted here. ``stamp`` is the start time, in UTC.
    ``-2``, ``-3`` ... are added when the folder exists already: an existing folder is never
    written into. ``out_dir`` is made if missing.

    Raises
    ------
    ConfigError
        One line when ``out_dir`` cannot be made (or is a file).
    """
    safe = _NAME_BAD.sub("-", str(name)).strip("-.")[:64].strip("-.") or _NAME_FALLBACK
    base = Path(out_dir)
    try:
        base.mkdir(parents=True, exist_ok=True)
    except (FileExistsError, NotADirectoryError):
        raise ConfigError(f"{base}: output folder is a file, expected a folder") from None
    except OSError as exc:
        raise ConfigError(f"{base}: cannot make output folder ({exc.strerror})") from None
    stem = f"{stamp.astimezone(_dt.timezone.utc):%Y%m%d-%H%M%S}-{safe}"
    for n in range(1, 10000):
        candidate = base / (stem if n == 1 else f"{stem}-{n}")
        try:
            candidate.mkdir()
        except FileExistsError:
            continue
        return candidate
    raise ConfigError(f"{base}: too many run folders named {stem}")


def update_file_name(index: int) -> str:
    """Name of update ``index`` inside :data:`UPDATES_DIR`: ``NNNN.npz`` (zero-padded)."""
    return f"{int(index):04d}.npz"


def _line_array(key: str, value: Any, n: int, dtype: type) -> np.ndarray:
    if value is None:
        return np.full(n, np.nan, dtype=dtype)
    arr = np.asarray(value, dtype=dtype)
    if arr.shape != (n,):
        raise ValueError(f"{key} has shape {arr.shape}, expected ({n},) like f_hz")
    return arr


def pack_update(
    index: int,
    t_s: float,
    f_hz: Any,
    control_psd: Any,
    target_psd: Any,
    drive_psd: Any,
    h1: Any = None,
    coherence: Any = None,
    *,
    arrays: Mapping[str, Any] | None = None,
    numbers: Mapping[str, float | int | bool | None] | None = None,
) -> dict[str, np.ndarray]:
    """The arrays of one update file (``np.savez`` keywords), as the reader expects them.

    Parameters
    ----------
    index : int
        Update number (1, 2, ...); names the file (:func:`update_file_name`).
    t_s : float
        Run time of the update, s.
    f_hz : array
        Frequency lines, Hz.
    control_psd, target_psd : array
        Control estimate and target on the lines, g²/Hz.
    drive_psd : array
        Drive PSD on the lines, FS²/Hz.
    h1, coherence : array, optional
        FRF estimate H1 (complex, g/FS or FS/FS) and coherence (0..1); NaN when not given.
    arrays : mapping of str to array, optional
        More per-line arrays (e.g. ``new_drive_psd``), each shaped like ``f_hz``.
    numbers : mapping of str to number, optional
        Scalar figures of the update (``rms_error_db``, ``max_dev_db``, ``level_db``,
        ``dof`` ...); ``None`` is stored as NaN, booleans as 1.0/0.0.

    Returns
    -------
    dict of str to ndarray
        :data:`UPDATE_ARRAYS`, ``index``, ``t_s``, each extra array and each figure by name,
        and the index arrays ``numbers`` and ``arrays`` naming the figures and extra arrays.

    Raises
    ------
    ValueError
        A negative index, an array not shaped like ``f_hz``, or a name that clashes.
    """
    idx = int(index)
    if idx < 0:
        raise ValueError(f"update index {index!r} must be >= 0")
    extra = dict(arrays or {})
    figures = dict(numbers or {})
    bad = _UPDATE_RESERVED.intersection(figures) | _UPDATE_RESERVED.intersection(extra)
    bad |= set(figures).intersection(extra)
    if bad:
        raise ValueError(f"update figure names clash with stored arrays: {sorted(bad)}")
    f = np.asarray(f_hz, dtype=float)
    if f.ndim != 1:
        raise ValueError("f_hz must be 1-D")
    out: dict[str, np.ndarray] = {"f_hz": f}
    for key, value in (
        ("control_psd", control_psd), ("target_psd", target_psd), ("drive_psd", drive_psd),
    ):
        out[key] = _line_array(key, value, f.size, float)
    out["h1"] = _line_array("h1", h1, f.size, complex)
    out["coherence"] = _line_array("coherence", coherence, f.size, float)
    out["index"] = np.asarray(idx, dtype=np.int64)
    out["t_s"] = np.asarray(float(t_s))
    for key, value in extra.items():
        arr = np.asarray(value)
        dtype = complex if np.iscomplexobj(arr) else float
        out[key] = _line_array(key, arr, f.size, dtype)
    out["numbers"] = np.asarray(sorted(figures), dtype=str)
    out["arrays"] = np.asarray(sorted(extra), dtype=str)
    for key, value in figures.items():
        out[key] = np.asarray(np.nan if value is None else float(value))
    out["units"] = np.asarray([f"{k}: {UPDATE_UNITS[k]}" for k in sorted(out)
                               if k in UPDATE_UNITS], dtype=str)
    return out



@dataclasses.dataclass(frozen=True)
class RecordedEvent:
    """One line of ``events.jsonl``: run time (s), kind, message and data."""

    t_s: float
    kind: str
    message: str
    data: dict[str, Any]


@dataclasses.dataclass(frozen=True)
class UpdateSeries:
    """The update files of a run stacked in index order (arrays are read-only).

    Attributes
    ----------
    index : ndarray, shape (n,)
        Update numbers.
    t_s : ndarray, shape (n,)
        Run time of each update, s.
    f_hz : ndarray, shape (m,)
        Frequency lines, Hz.
    control_psd, target_psd : ndarray, shape (n, m)
        g²/Hz.
    drive_psd : ndarray, shape (n, m)
        FS²/Hz.
    h1 : ndarray, shape (n, m), complex
        FRF estimate.
    coherence : ndarray, shape (n, m)
    numbers : dict of str to ndarray, shape (n,)
        Scalar figures by name; NaN where an update did not give one.
    arrays : dict of str to ndarray, shape (n, m)
        More per-line arrays by name (``new_drive_psd`` ...); NaN rows where missing.
    """

    index: np.ndarray
    t_s: np.ndarray
    f_hz: np.ndarray
    control_psd: np.ndarray
    target_psd: np.ndarray
    drive_psd: np.ndarray
    h1: np.ndarray
    coherence: np.ndarray
    numbers: dict[str, np.ndarray]
    arrays: dict[str, np.ndarray] = dataclasses.field(default_factory=dict)

    @property
    def n(self) -> int:
        """Number of updates."""
        return int(self.index.size)


@dataclasses.dataclass(frozen=True)
class RunData:
    """Everything :func:`load_run` read from a run folder.

    ``full_level`` holds ``decisions/full_level.npz`` (the full-level average, see
    :meth:`liveshape.control.loopstate.LoopState.full_level_arrays`) or ``None``.
    ``summary`` is ``None`` when the run was killed before it closed; ``skipped_event_lines``
    counts lines of ``events.jsonl`` that could not be read (a killed run cuts the last one).
    """

    root: Path
    meta: dict[str, Any]
    spec: dict[str, Any]
    rig: dict[str, Any]
    summary: dict[str, Any] | None
    events: tuple[RecordedEvent, ...]
    updates: UpdateSeries
    skipped_event_lines: int
    drive_wav: Path | None
    response_wav: Path | None
    full_level: dict[str, Any] | None = None

    @property
    def complete(self) -> bool:
        """True when the run closed and wrote its summary."""
        return self.summary is not None

    @property
    def status(self) -> str:
        """The summary's status, or ``"incomplete"`` for a run killed before it closed."""
        if self.summary is None:
            return "incomplete"
        return str(self.summary.get("status", "unknown"))

    @property
    def fs_hz(self) -> float:
        return float(self.meta.get("fs_hz", float("nan")))

    @property
    def calibrated(self) -> bool | None:
        """Whether the levels were calibrated (None when the record does not say)."""
        cal = self.meta.get("calibration") or {}
        value = cal.get("calibrated") if isinstance(cal, Mapping) else None
        return None if value is None else bool(value)


def _read_json(path: Path) -> Any:
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise ConfigError(f"{path}: cannot read run file ({exc.__class__.__name__})") from None


def _read_events(path: Path) -> tuple[tuple[RecordedEvent, ...], int]:
    if not path.exists():
        return (), 0
    events: list[RecordedEvent] = []
    skipped = 0
    with open(path, "rb") as fh:
        for raw in fh:
            if not raw.strip():
                continue
            try:
                obj = json.loads(raw.decode("utf-8"))
                t = obj.get("t_s")
                ev = RecordedEvent(
                    t_s=float("nan") if t is None else float(t),
                    kind=str(obj["kind"]),
                    message=str(obj.get("message", "")),
                    data=dict(obj.get("data") or {}),
                )
            except (UnicodeDecodeError, json.JSONDecodeError, KeyError, TypeError, ValueError,
                    AttributeError):
                skipped += 1
                continue
            events.append(ev)
    return tuple(events), skipped


def _frozen(a: np.ndarray) -> np.ndarray:
    a.setflags(write=False)
    return a


def _empty_updates() -> UpdateSeries:
    e1 = _frozen(np.zeros(0))
    e2 = _frozen(np.zeros((0, 0)))
    return UpdateSeries(
        index=_frozen(np.zeros(0, dtype=np.int64)), t_s=e1, f_hz=e1, control_psd=e2,
        target_psd=e2, drive_psd=e2, h1=_frozen(np.zeros((0, 0), dtype=complex)),
        coherence=e2, numbers={},
    )


def _read_updates(folder: Path) -> UpdateSeries:
    if not folder.is_dir():
        return _empty_updates()
    files = []
    for p in folder.glob("*.npz"):
        if p.name.startswith(".") or not p.stem.isdigit():
            continue
        files.append((int(p.stem), p))
    if not files:
        return _empty_updates()
    files.sort()
    rows: list[dict[str, Any]] = []
    names: list[str] = []
    extra_names: list[str] = []
    for _, p in files:
        try:
            with np.load(p, allow_pickle=False) as z:
                row = {k: z[k] for k in z.files}
        except (OSError, ValueError, EOFError) as exc:
            raise ConfigError(f"{p}: cannot read update file ({exc.__class__.__name__})") from None
        for key in (*UPDATE_ARRAYS, "index", "t_s"):
            if key not in row:
                raise ConfigError(f"{p}: update file has no '{key}' array")
        if rows and row["f_hz"].shape != rows[0]["f_hz"].shape:
            raise ConfigError(
                f"{p}: f_hz has {row['f_hz'].size} lines, earlier updates have "
                f"{rows[0]['f_hz'].size}"
            )
        for name in row.get("numbers", np.zeros(0, dtype=str)).tolist():
            if name not in names:
                names.append(name)
        for name in row.get("arrays", np.zeros(0, dtype=str)).tolist():
            if name not in extra_names:
                extra_names.append(name)
        rows.append(row)
    stack = {
        key: _frozen(np.stack([r[key] for r in rows]))
        for key in ("control_psd", "target_psd", "drive_psd", "h1", "coherence")
    }
    numbers = {
        name: _frozen(np.array([float(r[name]) if name in r else np.nan for r in rows]))
        for name in names
    }
    extra = {}
    for name in extra_names:
        like = next(r[name] for r in rows if name in r)
        fill = np.full(like.shape, np.nan, dtype=like.dtype)
        extra[name] = _frozen(np.stack([r.get(name, fill) for r in rows]))
    return UpdateSeries(
        index=_frozen(np.array([int(r["index"]) for r in rows], dtype=np.int64)),
        t_s=_frozen(np.array([float(r["t_s"]) for r in rows])),
        f_hz=_frozen(np.array(rows[-1]["f_hz"], dtype=float)),
        numbers=numbers,
        arrays=extra,
        **stack,
    )


def load_run(run_dir: str | os.PathLike[str]) -> RunData:
    """Read a run folder, complete or killed midway.

    Parameters
    ----------
    run_dir : path
        A folder made by :meth:`RunRecorder.create`.

    Returns
    -------
    RunData

    Raises
    ------
    ConfigError
        One line when the folder is missing or is not a run folder.
    """
    root = Path(run_dir)
    if root.exists() and not root.is_dir():
        raise ConfigError(f"{root}: is a file, expected a run folder")
    if not root.is_dir():
        raise ConfigError(f"{root}: run folder not found")
    meta_path = root / META_NAME
    if not meta_path.is_file():
        raise ConfigError(f"{root}: not a run folder (no {META_NAME})")
    meta = _read_json(meta_path)
    fmt = meta.get("format") if isinstance(meta, dict) else None
    if fmt != RUN_FORMAT:
        raise ConfigError(f"{meta_path}: format = {fmt!r} is not {RUN_FORMAT!r}")
    spec = read_yaml_file(root / SPEC_NAME) if (root / SPEC_NAME).is_file() else {}
    rig = read_yaml_file(root / RIG_NAME) if (root / RIG_NAME).is_file() else {}
    summary_path = root / SUMMARY_NAME
    summary = _read_json(summary_path) if summary_path.is_file() else None
    events, skipped = _read_events(root / EVENTS_NAME)
    drive = root / DRIVE_NAME
    response = root / RESPONSE_NAME
    full_path = root / DECISIONS_DIR / FULL_LEVEL_NAME
    full = None
    if full_path.is_file():
        try:
            with np.load(full_path, allow_pickle=False) as z:
                full = {k: _frozen(z[k]) if z[k].ndim else z[k].item() for k in z.files}
        except (OSError, ValueError) as exc:
            raise ConfigError(f"{full_path}: cannot read ({exc})") from None
    return RunData(
        root=root,
        meta=meta,
        spec=spec if isinstance(spec, dict) else {},
        rig=rig if isinstance(rig, dict) else {},
        summary=summary if isinstance(summary, dict) else None,
        events=events,
        updates=_read_updates(root / UPDATES_DIR),
        skipped_event_lines=skipped,
        drive_wav=drive if drive.is_file() else None,
        response_wav=response if response.is_file() else None,
        full_level=full,
    )


def read_signals(run: RunData) -> tuple[np.ndarray | None, np.ndarray | None, float]:
    """Read the drive and response WAV files of a run (float64, full scale).

    Returns ``(drive, response, fs_hz)``; a signal is ``None`` when its file is missing (no
    block was ever written). Arrays are 1-D for one channel, ``(samples, channels)`` otherwise.
    """
    import soundfile

    out: list[np.ndarray | None] = []
    fs = run.fs_hz
    for path in (run.drive_wav, run.response_wav):
        if path is None:
            out.append(None)
            continue
        try:
            data, rate = soundfile.read(str(path), dtype="float64", always_2d=False)
        except RuntimeError as exc:
            raise ConfigError(f"{path}: cannot read WAV ({exc})") from None
        fs = float(rate)
        out.append(data)
    return out[0], out[1], fs
