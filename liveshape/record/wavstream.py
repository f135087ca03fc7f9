"""Streaming WAV for the run record: float32 blocks in, a file readable at any moment.

:class:`WavStream` writes one file block by block and has libsndfile rewrite its header every
so often, through :func:`sf_command`, the one place that sends a libsndfile command. soundfile
is imported on use, so importing the run record needs no libsndfile.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np

# libsndfile commands (sndfile.h): rewrite the header now; switch the float PEAK chunk off.
SFC_UPDATE_HEADER_NOW = 0x1060
SFC_SET_ADD_PEAK_CHUNK = 0x1050

#: Largest data chunk written to a WAV file (the RIFF size field is 32 bits), less a margin.
WAV_MAX_DATA_BYTES = 2**32 - 2**20


def sf_command(sound_file: Any, command: int, value: int = 0) -> bool:
    """Send one libsndfile ``sf_command`` to an open :class:`soundfile.SoundFile`.

    soundfile has no public call for this, so this function alone reaches into its private
    parts: the module's cffi binding ``soundfile._snd`` and ``soundfile._ffi`` and the
    ``SNDFILE*`` handle ``SoundFile._file`` (as in soundfile 0.14, the version tested here).

    Fallback: when any of them is missing (a soundfile that changed its internals) nothing is
    sent and False is returned; the recording goes on unchanged. For
    ``SFC_UPDATE_HEADER_NOW`` that means the WAV header keeps the sizes of its opening (zero)
    until close: libsndfile still reads a killed run's file to its end, stricter
    readers (``scipy.io.wavfile``) refuse it. For ``SFC_SET_ADD_PEAK_CHUNK`` it means a PEAK
    chunk in the header, which every reader skips.

    Parameters
    ----------
    sound_file : soundfile.SoundFile
        An open file.
    command : int
        ``SFC_*`` number from libsndfile's ``sndfile.h``.
    value : int
        The command's int argument (``SF_TRUE`` 1 / ``SF_FALSE`` 0 for switches).

    Returns
    -------
    bool
        True when the command was sent.
    """
    import soundfile

    snd = getattr(soundfile, "_snd", None)
    ffi = getattr(soundfile, "_ffi", None)
    handle = getattr(sound_file, "_file", None)
    if snd is None or ffi is None or handle is None or not hasattr(snd, "sf_command"):
        return False
    snd.sf_command(handle, command, ffi.NULL, int(value))
    return True


class WavStream:
    """One float32 WAV file written block by block, its header rewritten every so often.

    libsndfile writes the data-chunk size into the header only when asked
    (``SFC_UPDATE_HEADER_NOW``, sent by :func:`sf_command`) or at close, so the header is
    rewritten each ``period`` samples; a killed run leaves a WAV that every reader opens,
    holding the samples up to that point.

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
        if data.size == 0:
            return True  # nothing to write (a closing call), whatever its shape
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
        try:
            self._file.write(data)
        except (RuntimeError, AssertionError) as exc:  # libsndfile: short write, disk full
            raise _write_error(self.path, exc) from None
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
        sf_command(self._file, SFC_SET_ADD_PEAK_CHUNK, 0)

    def sync(self) -> None:
        """Write buffered samples and bring the header up to date."""
        if self._file is None:
            return
        try:
            self._file.flush()
            sf_command(self._file, SFC_UPDATE_HEADER_NOW)
        except (RuntimeError, AssertionError) as exc:
            raise _write_error(self.path, exc) from None
        self._since_header = 0

    def close(self) -> None:
        """Close the file (its header is rewritten); a failed write is an :class:`OSError`."""
        if self._file is not None:
            f, self._file = self._file, None
            try:
                f.close()
            except (RuntimeError, AssertionError) as exc:
                raise _write_error(self.path, exc) from None


def _write_error(path: Path, exc: BaseException) -> OSError:
    """libsndfile's failed or short write as an :class:`OSError` naming the file."""
    text = str(exc).strip() or "short write"
    return OSError(f"{path.name}: cannot write ({text}; is the disk full?)")
