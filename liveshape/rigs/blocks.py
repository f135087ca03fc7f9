"""What a block-driven run hands back: blocks, recordings, and a source that plays a buffer.

Pure (numpy only). :class:`BlockIO` is one slot-aligned block of a run (what was scheduled to
play and what was recorded in the same slot), :class:`Recording` a finite play-and-record
concatenated from them, and :class:`BufferSource` the simplest source of the controller's block
protocol (``exchange``, ``finished``, ``request_stop``, ``report_underflow``). The audio rig
(:mod:`liveshape.rigs.audio`) produces the blocks; the calibration procedures consume the
recordings.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class BlockIO:
    """One block of a run, slot-aligned: what was scheduled to play and what was recorded.

    ``drive_fs`` is the drive the source produced for this stream slot (silence replaces it only
    if it arrived late); ``response_fs`` the control channel, ``loopback_fs`` and ``monitor_fs``
    the loopback and monitor inputs recorded in the same slot (None when not configured). A rig
    reading several inputs (``AudioRig(input_channels=...)``) gives ``response_fs`` as a
    ``(samples, inputs)`` block, one column per input in the rig's order.
    """

    index: int
    drive_fs: np.ndarray
    response_fs: np.ndarray
    loopback_fs: np.ndarray | None
    monitor_fs: np.ndarray | None


@dataclass(frozen=True)
class Recording:
    """A finite play-and-record through a rig, slot-aligned (sample ``i`` of every array belongs to
    the same stream slot): ``drive_fs`` as scheduled, and the inputs recorded meanwhile.
    """

    fs_hz: float
    drive_fs: np.ndarray
    response_fs: np.ndarray
    loopback_fs: np.ndarray | None = None
    monitor_fs: np.ndarray | None = None

    @classmethod
    def from_blocks(cls, fs_hz: float, blocks: list[BlockIO]) -> Recording:
        """Concatenate the blocks of a run."""

        def cat(name: str) -> np.ndarray | None:
            parts = [getattr(b, name) for b in blocks]
            if not parts or parts[0] is None:
                return None
            return np.concatenate(parts).astype(np.float32)

        empty = np.zeros(0, np.float32)
        return cls(
            fs_hz=float(fs_hz),
            drive_fs=cat("drive_fs") if blocks else empty,
            response_fs=cat("response_fs") if blocks else empty,
            loopback_fs=cat("loopback_fs"),
            monitor_fs=cat("monitor_fs"),
        )


class BufferSource:
    """A source (the controller's block protocol) that plays a fixed signal once, then zeros.

    ``exchange(response)`` returns the next block; ``finished`` becomes True once the signal and
    ``tail_frames`` of silence have been handed out; ``request_stop`` ends it at once (the
    stream core fades whatever is queued).
    """

    def __init__(self, signal_fs: np.ndarray, block_size: int, *, tail_frames: int = 0) -> None:
        x = np.asarray(signal_fs, np.float32).ravel()
        total = x.size + int(tail_frames)
        n_blocks = -(-total // block_size)
        self._data = np.zeros(n_blocks * block_size, np.float32)
        self._data[: x.size] = x
        self._block = int(block_size)
        self._pos = 0
        self.stop_reason: str | None = None
        self.underflows = 0

    def exchange(self, response_fs: np.ndarray) -> np.ndarray:
        b = self._block
        out = self._data[self._pos : self._pos + b]
        self._pos += b
        return out if out.size == b else np.zeros(b, np.float32)

    @property
    def finished(self) -> bool:
        return self.stop_reason is not None or self._pos >= self._data.size

    def request_stop(self, reason: str) -> None:
        self.stop_reason = reason

    def report_underflow(self, count: int) -> None:
        self.underflows += int(count)
