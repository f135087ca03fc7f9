"""Atomic file writes: a temporary file in the same folder, then one rename over the target.

Pure standard library. :func:`os.replace` within one file system is atomic (POSIX ``rename``),
so a reader sees the old file or the whole new one, never half a file; when writing fails the
temporary file is removed and the old file stays as it was. Used for every small file the
package writes (YAML through :mod:`liveshape.testdef.config`, the run record's JSON and update
files).

:func:`tempfile.mkstemp` makes its file with mode 0600; before the rename the file gets the
mode a plain ``open`` would have given it (0666 less the process umask), so a record is as
readable to other users as the WAV files written next to it.
"""

from __future__ import annotations

import os
import tempfile
from collections.abc import Callable
from pathlib import Path
from typing import IO


def _umask() -> int:
    """The process umask, read without changing it where Linux shows it (else set and reset)."""
    try:
        with open("/proc/self/status", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("Umask:"):
                    return int(line.split()[1], 8)
    except (OSError, ValueError, IndexError):
        pass
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def atomic_write(path: str | os.PathLike[str], write: Callable[[IO[bytes]], object], *,
                 fsync: bool = False) -> None:
    """Write ``path`` through ``write(fh)`` on a temporary binary file, then rename it in place.

    Parameters
    ----------
    path : path
        The file to make or replace; its folder must exist.
    write : callable
        Called once with the open temporary file (binary mode); its return value is ignored.
    fsync : bool
        Also :func:`os.fsync` the data before the rename (survives power loss, costs a disk
        round trip).

    Raises
    ------
    OSError
        The temporary file cannot be made, written or renamed (it is removed again); whatever
        ``write`` raises passes through the same way.
    """
    p = Path(path)
    fd, tmp = tempfile.mkstemp(prefix=f".{p.name}.", suffix=".tmp", dir=p.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            write(fh)
            fh.flush()
            if fsync:
                os.fsync(fh.fileno())
        os.chmod(tmp, 0o666 & ~_umask())
        os.replace(tmp, p)
    except BaseException:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise


def atomic_write_text(path: str | os.PathLike[str], text: str, *, fsync: bool = False) -> None:
    """Write ``text`` as UTF-8 to ``path`` atomically (see :func:`atomic_write`)."""
    data = text.encode("utf-8")
    atomic_write(path, lambda fh: fh.write(data), fsync=fsync)
