"""A preallocated single-producer / single-consumer ring of float32 frames.

Pure (numpy only). One thread writes, one thread reads; the ring is lock-free by design: the
write count is written only by the producer and the read count only by the consumer, each after
its data copy is complete, so either side sees a consistent (possibly slightly stale) amount of
data or free space and never blocks. Both counts grow without bound (Python integers do not
overflow); positions in the buffer are the counts modulo the capacity.

In CPython the global interpreter lock makes each attribute store atomic and orders it after the
preceding buffer copy, which is the memory ordering the scheme needs.

The audio callback uses only :meth:`FloatRing.write` (from ``indata``) and
:meth:`FloatRing.read_into` (into a preallocated block); neither allocates a buffer.
"""

from __future__ import annotations

import numpy as np


class FloatRing:
    """Fixed-capacity ring of ``(frames, channels)`` float32 frames: one producer, one consumer.

    Parameters
    ----------
    capacity_frames : int
        Number of frames the ring holds (> 0).
    channels : int, optional
        Samples per frame (default 1).

    Notes
    -----
    Only the producer may call :meth:`write` and :meth:`write_zeros`; only the consumer may call
    :meth:`read_into`, :meth:`read`, :meth:`skip` and :meth:`peek_into`. ``available`` and
    ``free`` may be read from either side: the producer's view of ``free`` can only be too small
    and the consumer's view of ``available`` can only be too small, never too large, so neither
    side ever overwrites unread data or reads stale data.

    Examples
    --------
    >>> ring = FloatRing(8)
    >>> ring.write(np.arange(5, dtype=np.float32))
    5
    >>> out = np.zeros(3, np.float32)
    >>> ring.read_into(out), out.tolist(), ring.available
    (3, [0.0, 1.0, 2.0], 2)
    """

    def __init__(self, capacity_frames: int, channels: int = 1) -> None:
        capacity_frames = int(capacity_frames)
        channels = int(channels)
        if capacity_frames <= 0:
            raise ValueError(f"capacity_frames = {capacity_frames} must be > 0")
        if channels <= 0:
            raise ValueError(f"channels = {channels} must be > 0")
        self._buf = np.zeros((capacity_frames, channels), dtype=np.float32)
        self._capacity = capacity_frames
        self._channels = channels
        self._written = 0  # frames written so far: stored only by the producer
        self._read = 0  # frames read so far: stored only by the consumer

    @property
    def capacity(self) -> int:
        """Frames the ring can hold."""
        return self._capacity

    @property
    def channels(self) -> int:
        """Samples per frame."""
        return self._channels

    @property
    def available(self) -> int:
        """Frames written and not yet read."""
        return self._written - self._read

    @property
    def free(self) -> int:
        """Frames that can be written without overwriting unread data."""
        return self._capacity - (self._written - self._read)

    @property
    def frames_written(self) -> int:
        """Total frames ever written (the producer's count)."""
        return self._written

    @property
    def frames_read(self) -> int:
        """Total frames ever read or skipped (the consumer's count)."""
        return self._read

    def _as_frames(self, data: np.ndarray) -> np.ndarray:
        if data.ndim == 1:
            if self._channels != 1:
                raise ValueError(f"1-D data needs a 1-channel ring, this one has {self._channels}")
            return data.reshape(-1, 1)
        if data.ndim != 2 or data.shape[1] != self._channels:
            raise ValueError(f"data of shape {data.shape} does not match {self._channels} channels")
        return data

    def write(self, data: np.ndarray) -> int:
        """Copy as many leading frames of ``data`` as fit; return how many were written.

        ``data`` is 1-D (for a 1-channel ring) or ``(frames, channels)``. Frames that do not fit
        are dropped, not queued: the caller counts the shortfall (an overflow).
        """
        frames = self._as_frames(data)
        start = self._written
        n = min(frames.shape[0], self._capacity - (start - self._read))
        if n <= 0:
            return 0
        i = start % self._capacity
        first = min(n, self._capacity - i)
        self._buf[i : i + first] = frames[:first]
        if n > first:
            self._buf[: n - first] = frames[first:n]
        self._written = start + n  # publish after the copy
        return n

    def write_zeros(self, n: int) -> int:
        """Write up to ``n`` frames of zeros; return how many were written."""
        start = self._written
        n = min(int(n), self._capacity - (start - self._read))
        if n <= 0:
            return 0
        i = start % self._capacity
        first = min(n, self._capacity - i)
        self._buf[i : i + first] = 0.0
        if n > first:
            self._buf[: n - first] = 0.0
        self._written = start + n
        return n

    def _copy_out(self, out: np.ndarray, n: int) -> None:
        i = self._read % self._capacity
        first = min(n, self._capacity - i)
        out[:first] = self._buf[i : i + first]
        if n > first:
            out[first:n] = self._buf[: n - first]

    def peek_into(self, out: np.ndarray) -> int:
        """Copy up to ``len(out)`` unread frames into ``out`` without consuming them."""
        frames = self._as_frames(out)
        n = min(frames.shape[0], self._written - self._read)
        if n > 0:
            self._copy_out(frames, n)
        return max(n, 0)

    def read_into(self, out: np.ndarray) -> int:
        """Move up to ``len(out)`` frames into ``out`` (no allocation); return how many.

        Frames of ``out`` past the returned count are left untouched.
        """
        frames = self._as_frames(out)
        start = self._read
        n = min(frames.shape[0], self._written - start)
        if n <= 0:
            return 0
        self._copy_out(frames, n)
        self._read = start + n  # release after the copy
        return n

    def read(self, n: int) -> np.ndarray:
        """Return up to ``n`` frames as a new array (consumer side, allocates: not for callbacks).

        The result is 1-D for a 1-channel ring, else ``(frames, channels)``.
        """
        k = max(0, min(int(n), self.available))
        out = np.empty((k, self._channels), dtype=np.float32)
        got = self.read_into(out)
        out = out[:got]
        return out[:, 0].copy() if self._channels == 1 else out

    def skip(self, n: int) -> int:
        """Discard up to ``n`` unread frames; return how many were discarded."""
        start = self._read
        k = min(int(n), self._written - start)
        if k <= 0:
            return 0
        self._read = start + k
        return k
