"""Free space for a run record: the size estimate, the check before a run and the reserve.

A record is mostly its two signal files (float32 mono WAV, 4 bytes per sample each, at the
control rate) plus one small update file per control update. Before a run the estimate for the
nominal run length (:func:`liveshape.control.runplan.nominal_run_s`) is printed and the run is
refused when the free space is below ``SIZE_MARGIN`` times the estimate plus the reserve; during
the run the free space is looked at every ``CHECK_EVERY_S`` of run time and the run is stopped
safely (rule ``disk_space``) when it falls below :data:`RESERVE_BYTES`, which leaves room for
the ramp-down and the summary. See docs/methods.md, "Run length and record size".
"""

from __future__ import annotations

import os
import shutil
from dataclasses import dataclass
from pathlib import Path

from liveshape.errors import ConfigError

__all__ = ["CHECK_EVERY_S", "FILE_SPARE_BYTES", "RESERVE_BYTES", "SIZE_MARGIN", "RecordEstimate",
           "check_file_space", "check_free_space", "estimate_record", "free_bytes", "human_bytes"]

#: Free space a running record keeps in hand: below it the run ramps down and stops, bytes.
RESERVE_BYTES = 64 * 1024 * 1024
#: Factor on the estimate a run needs free at the start (runs settle longer than planned).
SIZE_MARGIN = 2.0
#: Spare room a file of known size (a drive file) needs beyond its own size, bytes.
FILE_SPARE_BYTES = 1024 * 1024
#: Run time between two looks at the free space, s.
CHECK_EVERY_S = 0.5
#: Bytes of one signal sample in each WAV file (float32 mono).
SAMPLE_BYTES = 4
#: Bytes per frequency line of one update file (about a dozen float64/complex arrays; measured
#: on the examples: 100-120 bytes per line) and the fixed part of each file.
UPDATE_LINE_BYTES = 160
UPDATE_FIXED_BYTES = 8192
#: The small files of every record (run.json, spec.yaml, rig.yaml, events, summary, spectra).
FIXED_BYTES = 256 * 1024


@dataclass(frozen=True)
class RecordEstimate:
    """Expected size of a run record: ``total_bytes`` for ``duration_s`` of run time."""

    duration_s: float
    signal_bytes: int
    update_bytes: int
    total_bytes: int

    def describe(self) -> str:
        """One line for the start of a run."""
        what = "drive and response WAVs, updates" if self.signal_bytes else "updates (no WAVs)"
        return (f"record estimate: about {human_bytes(self.total_bytes)} for a run of about "
                f"{self.duration_s:.0f} s ({what})")


def human_bytes(n: float) -> str:
    """``n`` bytes as a short text in powers of 1024 (``12.3 MB``)."""
    x = float(n)
    for unit in ("B", "kB", "MB", "GB", "TB"):
        if abs(x) < 1024.0 or unit == "TB":
            return f"{x:.0f} {unit}" if unit == "B" else f"{x:.1f} {unit}"
        x /= 1024.0
    return f"{x:.1f} TB"  # pragma: no cover


def estimate_record(duration_s: float, fs_hz: float, *, signals: bool, n_lines: int,
                    update_period_s: float) -> RecordEstimate:
    """Size of the record of a run lasting ``duration_s``.

    Parameters
    ----------
    duration_s : float
        Run time, s.
    fs_hz : float
        Sample rate of the signal files, Hz.
    signals : bool
        Drive and response WAVs are recorded (``run --record full``).
    n_lines : int
        Frequency lines stored per update.
    update_period_s : float
        Run time between two control updates, s.
    """
    n_samples = int(duration_s * fs_hz) + 1
    sig = 2 * SAMPLE_BYTES * n_samples if signals else 0
    n_updates = int(duration_s / max(update_period_s, 1e-3)) + 2
    upd = n_updates * (UPDATE_FIXED_BYTES + UPDATE_LINE_BYTES * int(n_lines))
    return RecordEstimate(float(duration_s), sig, upd, sig + upd + FIXED_BYTES)


def _existing_parent(path: Path) -> Path:
    p = path.absolute()
    while not p.exists() and p != p.parent:
        p = p.parent
    return p


def free_bytes(path: str | os.PathLike[str]) -> int:
    """Free bytes (for this user) on the file system holding ``path`` or its nearest parent."""
    return int(shutil.disk_usage(_existing_parent(Path(path))).free)


def check_free_space(out_dir: str | os.PathLike[str], estimate: RecordEstimate, *,
                     option: str = "--out") -> int:
    """Refuse a run whose record will not fit in ``out_dir`` with the margin; return free bytes.

    Raises
    ------
    ConfigError
        One line naming the folder, the free space, the estimate and what is needed.
    """
    try:
        free = free_bytes(out_dir)
    except OSError as exc:
        raise ConfigError(f"{option} = {str(out_dir)!r}: cannot read the free space "
                          f"({exc.strerror or exc})") from None
    need = int(SIZE_MARGIN * estimate.total_bytes) + RESERVE_BYTES
    if free < need:
        raise ConfigError(
            f"{option} = {str(out_dir)!r}: {human_bytes(free)} free, the record needs about "
            f"{human_bytes(estimate.total_bytes)} (at least {human_bytes(need)} free with the "
            f"margin and reserve); free some space or use --record spectra or a shorter run")
    return free


def check_file_space(path: str | os.PathLike[str], size_bytes: int, *,
                     option: str = "--output") -> None:
    """Refuse to write a file of ``size_bytes`` where it will not fit (with a small spare).

    Raises
    ------
    ConfigError
        One line naming the file, the free space and the size.
    """
    p = Path(path)
    try:
        free = free_bytes(p.parent)
    except OSError as exc:
        raise ConfigError(f"{option} = {str(p)!r}: cannot read the free space "
                          f"({exc.strerror or exc})") from None
    if free < size_bytes + FILE_SPARE_BYTES:
        raise ConfigError(
            f"{option} = {str(p)!r}: {human_bytes(free)} free, the file needs about "
            f"{human_bytes(size_bytes)}; free some space or write a shorter file")
