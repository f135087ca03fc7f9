"""The run record writer: one folder per run, written as the run goes so a killed run stays
readable.

The folder's layout (``run.json``, ``spec.yaml``, ``rig.yaml``, ``events.jsonl``,
``drive.wav``, ``response.wav``, ``updates/NNNN.npz``, ``summary.json``) and its file names
are in :mod:`liveshape.record.runfolder`, which also reads a folder back (:func:`load_run`); those
reader names are re-exported here.

Writing goes through :class:`RunRecorder`. Every small file is written to a temporary name in
the same folder and then renamed (:func:`liveshape.atomic.atomic_write`), so a reader never
sees half a file. The two WAV streams (:class:`liveshape.record.wavstream.WavStream`) have their
headers rewritten every so often, so a killed run leaves WAVs holding the samples up to then.
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import json
import math
import os
import threading
from collections.abc import Iterable, Mapping
from pathlib import Path
from types import TracebackType
from typing import IO, Any

import numpy as np

from liveshape.atomic import atomic_write, atomic_write_text
from liveshape.errors import ConfigError
from liveshape.record.runfolder import (  # the layout names and the reader, re-exported here
    DECISIONS_DIR,
    DRIVE_NAME,
    EVENTS_NAME,
    FULL_LEVEL_NAME,
    META_NAME,
    RESPONSE_NAME,
    RIG_NAME,
    RUN_FORMAT,
    RUN_FORMAT_VERSION,
    SPEC_NAME,
    SUMMARY_NAME,
    UPDATE_ARRAYS,
    UPDATES_DIR,
    RecordedEvent,
    RunData,
    UpdateSeries,
    load_run,
    new_run_folder,
    pack_update,
    read_signals,
    update_file_name,
)
from liveshape.record.wavstream import WAV_MAX_DATA_BYTES, WavStream  # the limit, re-exported here
from liveshape.testdef.config import write_yaml_file

__all__ = [
    "RecordedEvent",
    "RunData",
    "RunRecorder",
    "UpdateSeries",
    "WAV_MAX_DATA_BYTES",
    "json_safe",
    "load_run",
    "read_signals",
]


# --------------------------------------------------------------------------------------------
# JSON-safe values


#: Hidden file of zeros each open record keeps, removed on close so that ``summary.json`` can
#: still be written when the disk filled during the run.
SPACE_RESERVE_NAME = ".space-reserve"
SPACE_RESERVE_BYTES = 1024 * 1024


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


def _atomic_write_json(path: Path, data: Any, *, fsync: bool) -> None:
    text = json.dumps(json_safe(data), allow_nan=False, indent=2, ensure_ascii=False) + "\n"
    atomic_write_text(path, text, fsync=fsync)


def _utc_now() -> _dt.datetime:
    return _dt.datetime.now(_dt.timezone.utc)


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
        flush_every_s: float, fsync: bool, signals: bool = True,
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
        self.signals_recorded = bool(signals)
        self._drive: WavStream | None = None
        self._response: WavStream | None = None
        if self.signals_recorded:
            self._drive = WavStream(root / DRIVE_NAME, rate, period)
            self._response = WavStream(root / RESPONSE_NAME, rate, period)
        # kept open for the whole run, line-buffered; closed in close()
        self._events: IO[str] = open(
            root / EVENTS_NAME, "a", encoding="utf-8", buffering=1
        )
        # Room for the summary even when the disk fills during the run: freed by close().
        self._space_reserve = root / SPACE_RESERVE_NAME
        try:
            with open(self._space_reserve, "wb") as fh:
                fh.write(bytes(SPACE_RESERVE_BYTES))
        except OSError:
            self._space_reserve.unlink(missing_ok=True)
            self._events.close()
            raise

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
        signals: bool = True,
        identity: Mapping[str, Any] | None = None,
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
        signals : bool
            Record the drive and response signals as WAV files (False: spectra, events and
            summary only, about 1.3 GB/h less at 48 kHz).
        identity : mapping, optional
            Who and what the run is (``software_version``, ``spec_sha256``, ``operator``,
            ``test_item`` ...), written at the top level of ``run.json``.

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
        stamp = (now or _utc_now()).astimezone(_dt.timezone.utc)
        root = new_run_folder(out_dir, name, stamp)
        meta = {
            "format": RUN_FORMAT,
            "format_version": RUN_FORMAT_VERSION,
            "name": str(name),
            "created_utc": stamp.isoformat(timespec="seconds"),
            **{str(k): v for k, v in (identity or {}).items()},
            "fs_hz": fs,
            "calibration": dict(calibration),
            "extra": dict(extra or {}),
            "signals_recorded": bool(signals),
        }
        _atomic_write_json(root / META_NAME, meta, fsync=fsync)
        write_yaml_file(root / SPEC_NAME, json_safe(spec_mapping))
        write_yaml_file(root / RIG_NAME, json_safe(rig_mapping))
        return cls(
            root, name=str(name), fs_hz=fs, created_utc=stamp,
            flush_every_s=flush_every_s, fsync=fsync, signals=signals,
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
        """Write one control update as ``updates/NNNN.npz`` (atomically) and return its path.

        The arguments and how each is stored are described at
        :func:`liveshape.record.runfolder.pack_update`; ``**numbers`` are the scalar figures.
        """
        arrays = pack_update(index, t_s, f_hz, control_psd, target_psd, drive_psd, h1,
                             coherence, arrays=arrays, numbers=numbers)
        idx = int(arrays["index"])
        path = self.root / UPDATES_DIR / update_file_name(idx)
        with self._lock:
            self._check_open()
            atomic_write(path, lambda fh: np.savez(fh, **arrays), fsync=self._fsync)
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
            elif isinstance(value, dict):  # named per-line arrays (several inputs)
                extra.update({k: np.asarray(v) for k, v in value.items()
                              if np.shape(v) == (n,)})
        figures.update(numbers)
        return self.update(
            base["index"], base["t_s"], base["f_hz"], base["control_psd"], base["target_psd"],
            base["drive_psd"], base["h1"], base["coherence"], arrays=extra, **figures,
        )

    def full_level(self, arrays: Mapping[str, Any]) -> Path:
        """Write the full-level average as ``decisions/full_level.npz`` (atomically).

        ``arrays`` are the keys of
        :meth:`liveshape.control.loopstate.LoopState.full_level_arrays` (units in the names).
        """
        folder = self.root / DECISIONS_DIR
        path = folder / FULL_LEVEL_NAME
        data = {k: np.asarray(v) for k, v in arrays.items()}
        with self._lock:
            self._check_open()
            folder.mkdir(exist_ok=True)
            atomic_write(path, lambda fh: np.savez(fh, **data), fsync=self._fsync)
        return path

    def text_file(self, name: str, text: str) -> Path:
        """Write a small text file (a CSV export) into the run folder, atomically."""
        path = self.root / name
        with self._lock:
            self._check_open()
            atomic_write_text(path, text, fsync=self._fsync)
        return path

    def signals(self, drive_block: Any, response_block: Any) -> None:
        """Append one block of drive and response (full scale) to the two WAV files.

        Blocks are 1-D (one channel) or ``(samples, channels)``; the channel count is fixed by
        the first block. The WAV headers are rewritten every ``flush_every_s`` of signal. When
        a file reaches the WAV size limit (4 GiB) later blocks are dropped and one
        ``record_full`` event says so; the rest of the record goes on.
        """
        if self._drive is None or self._response is None:
            return
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
            for w in (self._drive, self._response):
                if w is not None:
                    w.sync()
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
            self._space_reserve.unlink(missing_ok=True)
            errors: list[str] = []
            for w in (self._drive, self._response):
                if w is not None:
                    try:
                        w.close()
                    except OSError as exc:
                        errors.append(str(exc))
            try:
                self._events.close()
            except OSError as exc:
                errors.append(f"{EVENTS_NAME}: cannot write ({exc.strerror or exc})")
            if errors:
                data["record_errors"] = errors
            data["record"] = {
                "name": self.name,
                "created_utc": self.created_utc.isoformat(timespec="seconds"),
                "closed_utc": _utc_now().isoformat(timespec="seconds"),
                "fs_hz": self.fs_hz,
                "events": self.n_events,
                "updates": self.n_updates,
                "signals_recorded": self.signals_recorded,
                "drive_samples": 0 if self._drive is None else self._drive.frames,
                "response_samples": 0 if self._response is None else self._response.frames,
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
