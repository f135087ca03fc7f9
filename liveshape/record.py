"""The run record: one folder per run, written as the run goes so a killed run stays readable.

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

Writing goes through :class:`RunRecorder`; reading through :func:`load_run`, which accepts a run
that was killed midway (no ``summary.json``, a cut last line in ``events.jsonl``, WAV headers
as of the last periodic header update).

Every small file is written to a temporary name in the same folder and then renamed
(:func:`os.replace` is atomic on POSIX), so a reader never sees half a file.
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import json
import math
import os
import re
import tempfile
import threading
from collections.abc import Callable, Iterable, Mapping
from pathlib import Path
from types import TracebackType
from typing import IO, Any

import numpy as np

from liveshape.config import read_yaml_file, write_yaml_file
from liveshape.errors import ConfigError

__all__ = [
    "RecordedEvent",
    "RunData",
    "RunRecorder",
    "UpdateSeries",
    "json_safe",
    "load_run",
    "read_signals",
]

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

#: Arrays stored in every update file; the scalar figures go next to them by name.
UPDATE_ARRAYS = ("f_hz", "control_psd", "target_psd", "drive_psd", "h1", "coherence")
_UPDATE_RESERVED = frozenset(UPDATE_ARRAYS) | {"index", "t_s", "numbers", "arrays"}

# libsndfile commands (sndfile.h): rewrite the header now; switch the float PEAK chunk off.
_SFC_UPDATE_HEADER_NOW = 0x1060
_SFC_SET_ADD_PEAK_CHUNK = 0x1050

#: Largest data chunk written to a WAV file (the RIFF size field is 32 bits), less a margin.
WAV_MAX_DATA_BYTES = 2**32 - 2**20

_NAME_BAD = re.compile(r"[^A-Za-z0-9_.-]+")


# --------------------------------------------------------------------------------------------
# JSON-safe values


def json_safe(value: Any) -> Any:
    """Turn nested data into values :func:`json.dumps` accepts with ``allow_nan=False``.

    numpy scalars and arrays become Python numbers and lists; NaN and infinities become
    ``None`` (JSON has no NaN); dataclasses become dicts; tuples and sets become lists; paths
    become strings; complex numbers become ``{"re": .., "im": ..}``. Mapping keys become strings.
    """
    if value is None or isinstance(value, (bool, str)):
        return value
    if isinstance(value, (np.bool_,)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        x = float(value)
        return x if math.isfinite(x) else None
    if isinstance(value, (complex, np.complexfloating)):
        return {"re": json_safe(value.real), "im": json_safe(value.imag)}
    if isinstance(value, np.ndarray):
        return [json_safe(v) for v in value.tolist()] if value.ndim else json_safe(value.item())
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        return json_safe({f.name: getattr(value, f.name) for f in dataclasses.fields(value)})
    if isinstance(value, Mapping):
        return {str(k): json_safe(v) for k, v in value.items()}
    if isinstance(value, (list, tuple, set, frozenset)):
        return [json_safe(v) for v in value]
    if isinstance(value, os.PathLike):
        return os.fspath(value)
    to_dict = getattr(value, "to_dict", None)
    if callable(to_dict):
        return json_safe(to_dict())
    return str(value)


def _json_line(obj: Any) -> str:
    return json.dumps(json_safe(obj), allow_nan=False, separators=(",", ":"), ensure_ascii=False)


def _atomic_write(path: Path, write: Callable[[IO[bytes]], None], *, fsync: bool) -> None:
    """Write ``path`` through a temporary file in the same folder, then rename it in place."""
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            write(fh)
            fh.flush()
            if fsync:
                os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise


def _atomic_write_json(path: Path, data: Any, *, fsync: bool) -> None:
    text = json.dumps(json_safe(data), allow_nan=False, indent=2, ensure_ascii=False) + "\n"
    _atomic_write(path, lambda fh: fh.write(text.encode("utf-8")), fsync=fsync)


def _utc_now() -> _dt.datetime:
    return _dt.datetime.now(_dt.timezone.utc)


def _safe_name(name: str) -> str:
    cleaned = _NAME_BAD.sub("-", str(name)).strip("-.")[:64]
    if not cleaned:
        raise ConfigError(f"run name = {name!r} has no letters or digits (used in the folder name)")
    return cleaned


# --------------------------------------------------------------------------------------------
# Streaming WAV


class _WavStream:
    """One float32 WAV file written block by block, its header rewritten every so often.

    libsndfile writes the data-chunk size into the header only when asked
    (``SFC_UPDATE_HEADER_NOW``) or at close, so the header is rewritten each ``period`` samples;
    a killed run leaves a WAV that every reader opens, holding the samples up to that point.

    A RIFF chunk size is a 32-bit number, so a WAV holds at most 4 GiB of samples (about 6 h of
    one float32 channel at 48 kHz); blocks past ``max_bytes`` are dropped and :attr:`full` set.
    """

    def __init__(self, path: Path, samplerate: int, period_samples: int,
                 max_bytes: int | None = None) -> None:
        self.path = path
        self.samplerate = samplerate
        self.period = max(int(period_samples), 1)
        self.max_bytes = int(WAV_MAX_DATA_BYTES if max_bytes is None else max_bytes)
        self.channels: int | None = None
        self.frames = 0
        self.full = False
        self._since_header = 0
        self._file: Any = None

    def write(self, block: Any) -> bool:
        """Append a block; False when it was dropped because the file is full."""
        data = np.asarray(block, dtype=np.float32)
        if data.ndim == 1:
            data = data[:, None]
        if data.ndim != 2:
            raise ValueError(f"{self.path.name}: blocks must be 1-D or (samples, channels)")
        if self._file is None:
            self._open(data.shape[1])
        if data.shape[1] != self.channels:
            raise ValueError(
                f"{self.path.name}: block has {data.shape[1]} channels, file has {self.channels}"
            )
        if data.shape[0] == 0:
            return True
        if (self.frames + data.shape[0]) * data.shape[1] * 4 > self.max_bytes:
            self.full = True
            return False
        self._file.write(data)
        self.frames += data.shape[0]
        self._since_header += data.shape[0]
        if self._since_header >= self.period:
            self.sync()
        return True

    def _open(self, channels: int) -> None:
        import soundfile

        self.channels = channels
        self._file = soundfile.SoundFile(
            str(self.path), "w", samplerate=self.samplerate, channels=channels,
            format="WAV", subtype="FLOAT",
        )
        self._command(_SFC_SET_ADD_PEAK_CHUNK, 0)

    def _command(self, command: int, flag: int | None = None) -> None:
        """Send a libsndfile command through soundfile's binding, if it exposes one."""
        import soundfile

        snd = getattr(soundfile, "_snd", None)
        ffi = getattr(soundfile, "_ffi", None)
        handle = getattr(self._file, "_file", None)
        if snd is None or ffi is None or handle is None or not hasattr(snd, "sf_command"):
            return
        snd.sf_command(handle, command, ffi.NULL, flag if flag is not None else 0)

    def sync(self) -> None:
        """Write buffered samples and bring the header up to date."""
        if self._file is None:
            return
        self._file.flush()
        self._command(_SFC_UPDATE_HEADER_NOW)
        self._since_header = 0

    def close(self) -> None:
        if self._file is not None:
            self._file.close()
            self._file = None


# --------------------------------------------------------------------------------------------
# Writer


class RunRecorder:
    """Writes one run folder as the run goes. Make one with :meth:`create`.

    Used as a context manager, it closes itself on the way out: with the summary given to
    :meth:`close` if that was called, otherwise with status ``"stopped"`` (normal exit or
    Ctrl-C) or ``"crashed"`` (any other exception, whose one-line text goes in the summary).

    Parameters are described at :meth:`create`.
    """

    def __init__(
        self, root: Path, *, name: str, fs_hz: float, created_utc: _dt.datetime,
        flush_every_s: float, fsync: bool,
    ) -> None:
        self.root = root
        self.name = name
        self.fs_hz = float(fs_hz)
        self.created_utc = created_utc
        self._fsync = fsync
        self._lock = threading.Lock()
        self._closed = False
        self.n_events = 0
        self.n_updates = 0
        (root / UPDATES_DIR).mkdir()
        period = int(round(flush_every_s * self.fs_hz))
        rate = int(round(self.fs_hz))
        self._drive = _WavStream(root / DRIVE_NAME, rate, period)
        self._response = _WavStream(root / RESPONSE_NAME, rate, period)
        # kept open for the whole run, line-buffered; closed in close()
        self._events: IO[str] = open(
            root / EVENTS_NAME, "a", encoding="utf-8", buffering=1
        )

    # -- making a folder ------------------------------------------------------------------

    @classmethod
    def create(
        cls,
        out_dir: str | os.PathLike[str],
        *,
        name: str,
        spec_mapping: Mapping[str, Any],
        rig_mapping: Mapping[str, Any],
        calibration: Mapping[str, Any],
        fs_hz: float,
        extra: Mapping[str, Any] | None = None,
        now: _dt.datetime | None = None,
        flush_every_s: float = 1.0,
        fsync: bool = False,
    ) -> RunRecorder:
        """Make a new run folder and open its streams.

        Parameters
        ----------
        out_dir : path
            Folder that collects run folders (made if missing).
        name : str
            Test name; characters other than letters, digits, ``_ . -`` become ``-``.
        spec_mapping, rig_mapping : mapping
            The resolved test definition and rig, written as ``spec.yaml`` and ``rig.yaml``.
        calibration : mapping
            The chain calibration in use (``calibrated`` true or false, factors, source).
        fs_hz : float
            Sample rate of the drive and response signals, Hz (a whole number for WAV).
        extra : mapping, optional
            More facts for ``run.json`` (command line, host, version of the rig ...).
        now : datetime, optional
            Start time (UTC); defaults to the clock. Used in the folder name.
        flush_every_s : float
            Seconds of signal between WAV header rewrites (what a killed run keeps at least).
        fsync : bool
            Also :func:`os.fsync` each event line and each atomic file (survives power loss,
            costs a disk round trip per event).

        Returns
        -------
        RunRecorder
            The folder is ``<out_dir>/<yyyymmdd-hhmmss>-<name>``, with ``-2``, ``-3`` ... added
            when that exists already; an existing folder is never written into.
        """
        fs = float(fs_hz)
        if not math.isfinite(fs) or fs <= 0 or abs(fs - round(fs)) > 1e-9 * fs:
            raise ConfigError(f"run record: fs_hz = {fs_hz!r} must be a positive whole number")
        if not flush_every_s > 0:
            raise ConfigError(f"run record: flush_every_s = {flush_every_s!r} must be > 0")
        safe = _safe_name(name)
        stamp = (now or _utc_now()).astimezone(_dt.timezone.utc)
        base = Path(out_dir)
        try:
            base.mkdir(parents=True, exist_ok=True)
        except (FileExistsError, NotADirectoryError):
            raise ConfigError(f"{base}: output folder is a file, expected a folder") from None
        except OSError as exc:
            raise ConfigError(f"{base}: cannot make output folder ({exc.strerror})") from None
        stem = f"{stamp:%Y%m%d-%H%M%S}-{safe}"
        root = None
        for n in range(1, 10000):
            candidate = base / (stem if n == 1 else f"{stem}-{n}")
            try:
                candidate.mkdir()
            except FileExistsError:
                continue
            root = candidate
            break
        if root is None:
            raise ConfigError(f"{base}: too many run folders named {stem}")
        meta = {
            "format": RUN_FORMAT,
            "format_version": RUN_FORMAT_VERSION,
            "name": str(name),
            "created_utc": stamp.isoformat(timespec="seconds"),
            "fs_hz": fs,
            "calibration": dict(calibration),
            "extra": dict(extra or {}),
        }
        _atomic_write_json(root / META_NAME, meta, fsync=fsync)
        write_yaml_file(root / SPEC_NAME, json_safe(spec_mapping))
        write_yaml_file(root / RIG_NAME, json_safe(rig_mapping))
        return cls(
            root, name=str(name), fs_hz=fs, created_utc=stamp,
            flush_every_s=flush_every_s, fsync=fsync,
        )

    # -- writing as the run goes ----------------------------------------------------------

    @property
    def closed(self) -> bool:
        return self._closed

    def _check_open(self) -> None:
        if self._closed:
            raise ValueError(f"{self.root}: run record is closed")

    def event(
        self, t_s: float, kind: str, message: str, data: Mapping[str, Any] | None = None
    ) -> None:
        """Append one event line and flush it to the operating system.

        Parameters
        ----------
        t_s : float
            Run time of the event, s.
        kind : str
            Short machine word (``stage``, ``level``, ``alarm``, ``abort`` ...).
        message : str
            One line a person reads.
        data : mapping, optional
            Numbers that go with it (units in the key names).
        """
        line = _json_line(
            {"t_s": t_s, "kind": str(kind), "message": str(message), "data": dict(data or {})}
        )
        with self._lock:
            self._check_open()
            self._events.write(line + "\n")
            self._events.flush()
            if self._fsync:
                os.fsync(self._events.fileno())
            self.n_events += 1

    def events(self, events: Iterable[Any]) -> None:
        """Append events given as objects with ``t_s``, ``kind``, ``message``, ``data``."""
        for ev in events:
            self.event(ev.t_s, ev.kind, ev.message, getattr(ev, "data", None))

    def update(
        self,
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
        **numbers: float | int | bool | None,
    ) -> Path:
        """Write one control update as ``updates/NNNN.npz`` (atomically).

        Parameters
        ----------
        index : int
            Update number (1, 2, ...); names the file.
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
        **numbers
            Scalar figures of the update (``rms_error_db``, ``max_dev_db``, ``level_db``,
            ``dof`` ...); ``None`` is stored as NaN, booleans as 1.0/0.0.

        Returns
        -------
        Path
            The file written.
        """
        idx = int(index)
        if idx < 0:
            raise ValueError(f"update index {index!r} must be >= 0")
        extra = dict(arrays or {})
        bad = _UPDATE_RESERVED.intersection(numbers) | _UPDATE_RESERVED.intersection(extra)
        bad |= set(numbers).intersection(extra) | {"arrays"}.intersection(extra)
        if bad:
            raise ValueError(f"update figure names clash with stored arrays: {sorted(bad)}")
        f = np.asarray(f_hz, dtype=float)
        if f.ndim != 1:
            raise ValueError("f_hz must be 1-D")
        arrays: dict[str, np.ndarray] = {"f_hz": f}
        for key, value in (
            ("control_psd", control_psd), ("target_psd", target_psd), ("drive_psd", drive_psd),
        ):
            arrays[key] = self._line_array(key, value, f.size, float)
        arrays["h1"] = self._line_array("h1", h1, f.size, complex)
        arrays["coherence"] = self._line_array("coherence", coherence, f.size, float)
        arrays["index"] = np.asarray(idx, dtype=np.int64)
        arrays["t_s"] = np.asarray(float(t_s))
        for key, value in extra.items():
            arr = np.asarray(value)
            dtype = complex if np.iscomplexobj(arr) else float
            arrays[key] = self._line_array(key, arr, f.size, dtype)
        arrays["numbers"] = np.asarray(sorted(numbers), dtype=str)
        arrays["arrays"] = np.asarray(sorted(extra), dtype=str)
        for key, value in numbers.items():
            arrays[key] = np.asarray(np.nan if value is None else float(value))
        path = self.root / UPDATES_DIR / f"{idx:04d}.npz"
        with self._lock:
            self._check_open()
            _atomic_write(path, lambda fh: np.savez(fh, **arrays), fsync=self._fsync)
            self.n_updates += 1
        return path

    def update_from(self, record: Any, **numbers: float | int | bool | None) -> Path:
        """Write an update given as the controller's update record (plus more figures).

        ``record`` has ``index``, ``t_s``, ``f_hz``, ``control_psd``, ``target_psd``,
        ``drive_psd``, ``h1``, ``coherence``; its other number fields (``level_db``, ``dof``,
        ``rms_error_db``, ``max_dev_db``, ...) and other per-line arrays (``new_drive_psd``) are
        stored too. Strings (``stage``) are left out: the events carry them.
        """
        fields = (
            {f.name: getattr(record, f.name) for f in dataclasses.fields(record)}
            if dataclasses.is_dataclass(record) else dict(vars(record))
        )
        base = {k: fields.pop(k, None) for k in ("index", "t_s", *UPDATE_ARRAYS)}
        n = np.asarray(base["f_hz"]).size
        figures: dict[str, Any] = {}
        extra: dict[str, Any] = {}
        for key, value in fields.items():
            if isinstance(value, (bool, int, float, np.integer, np.floating, np.bool_)):
                figures[key] = value
            elif isinstance(value, np.ndarray) and value.shape == (n,):
                extra[key] = value
        figures.update(numbers)
        return self.update(
            base["index"], base["t_s"], base["f_hz"], base["control_psd"], base["target_psd"],
            base["drive_psd"], base["h1"], base["coherence"], arrays=extra, **figures,
        )

    @staticmethod
    def _line_array(key: str, value: Any, n: int, dtype: type) -> np.ndarray:
        if value is None:
            return np.full(n, np.nan, dtype=dtype)
        arr = np.asarray(value, dtype=dtype)
        if arr.shape != (n,):
            raise ValueError(f"{key} has shape {arr.shape}, expected ({n},) like f_hz")
        return arr

    def signals(self, drive_block: Any, response_block: Any) -> None:
        """Append one block of drive and response (full scale) to the two WAV files.

        Blocks are 1-D (one channel) or ``(samples, channels)``; the channel count is fixed by
        the first block. The WAV headers are rewritten every ``flush_every_s`` of signal. When
        a file reaches the WAV size limit (4 GiB) later blocks are dropped and one
        ``record_full`` event says so; the rest of the record goes on.
        """
        with self._lock:
            self._check_open()
            was_full = self._drive.full or self._response.full
            if drive_block is not None:
                self._drive.write(drive_block)
            if response_block is not None:
                self._response.write(response_block)
            now_full = self._drive.full or self._response.full
        if now_full and not was_full:
            seconds = max(self._drive.frames, self._response.frames) / self.fs_hz
            self.event(float(seconds), "record_full",
                       f"signal files full after {seconds:.0f} s (WAV limit 4 GiB); "
                       "later samples are not recorded", {"recorded_s": seconds})

    def sync(self) -> None:
        """Bring both WAV headers and the event log up to date now."""
        with self._lock:
            self._check_open()
            self._drive.sync()
            self._response.sync()
            self._events.flush()

    # -- closing ----------------------------------------------------------------------------

    def close(self, summary: Mapping[str, Any] | Any) -> Path:
        """Write ``summary.json`` (atomically, JSON-safe) and close the signal and event files.

        Parameters
        ----------
        summary : mapping or dataclass
            The run result (``status``, ``abort_reason``, error figures ...). A ``record`` entry
            with the folder's own counts is added; ``status`` defaults to ``"stopped"``.

        Returns
        -------
        Path
            The summary file.
        """
        data = json_safe(summary)
        if not isinstance(data, dict):
            raise ValueError("summary must be a mapping or a dataclass")
        data.setdefault("status", "stopped")
        with self._lock:
            self._check_open()
            self._closed = True
            try:
                self._drive.close()
                self._response.close()
            finally:
                self._events.close()
            data["record"] = {
                "name": self.name,
                "created_utc": self.created_utc.isoformat(timespec="seconds"),
                "closed_utc": _utc_now().isoformat(timespec="seconds"),
                "fs_hz": self.fs_hz,
                "events": self.n_events,
                "updates": self.n_updates,
                "drive_samples": self._drive.frames,
                "response_samples": self._response.frames,
            }
            path = self.root / SUMMARY_NAME
            _atomic_write_json(path, data, fsync=self._fsync)
        return path

    def __enter__(self) -> RunRecorder:
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        if self._closed:
            return
        if exc_type is None or issubclass(exc_type, KeyboardInterrupt):
            self.close({"status": "stopped"})
            return
        text = f"{exc_type.__name__}: {exc}".splitlines()[0] if exc is not None else "error"
        try:
            self.event(float("nan"), "crash", text)
        finally:
            self.close({"status": "crashed", "error": text})


# --------------------------------------------------------------------------------------------
# Reader


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
