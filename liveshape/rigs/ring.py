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

:class:`StreamCore` is the callback's whole job around two such rings (drive out, response in),
kept here, free of the audio library, so that its fades, underflow handling and stop sequence
are tested offline; :mod:`liveshape.rigs.audio` calls it from the PortAudio callback. The
block records of a run (:class:`BlockIO`, :class:`Recording`, :class:`BufferSource`) are in
:mod:`liveshape.rigs.blocks`, re-exported here.
"""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np

from liveshape.rigs.blocks import BlockIO, BufferSource, Recording  # noqa: F401 - re-exported


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


class StreamCore:
    """Everything the audio callback does, without the audio library (so it is testable offline).

    The core owns two rings: the drive ring (producer: the worker via :meth:`write_drive`;
    consumer: the callback) and the input ring (producer: the callback; consumer: the worker via
    :meth:`read_input`). All buffers, fade tables and counters are allocated here, once.

    Parameters
    ----------
    block_size : int
        Nominal frames per callback; also the length of every fade.
    input_channels, output_channels : int
        Channels of the stream.
    drive_channel : int
        Output channel that carries the drive.
    loopback_out : int or None
        Output channel that carries a copy of the drive (loopback cable), or None.
    drive_capacity, input_capacity : int
        Frames the drive and input rings hold.
    stop_zero_blocks : int
        Zero blocks sent after the closing fade before :meth:`process` asks the stream to stop.
    max_frames : int, optional
        Largest callback the core accepts (larger ones output silence and are counted).

    Notes
    -----
    Fades are raised-cosine gains ``g(p) = (1 - cos(pi p / R)) / 2``, ``p = 0..R`` with
    ``R = block_size``, precomputed for every offset. The largest sample-to-sample change a fade
    adds to a signal of peak ``A`` is ``A * pi / (2 R)`` (the slope bound of the raised cosine).
    """

    def __init__(
        self,
        *,
        block_size: int,
        input_channels: int,
        output_channels: int,
        drive_channel: int,
        loopback_out: int | None,
        drive_capacity: int,
        input_capacity: int,
        stop_zero_blocks: int = 3,
        max_frames: int = 16384,
        fade_now_frames: int | None = None,
    ) -> None:
        self.block_size = r = int(block_size)
        self.max_frames = int(max(max_frames, block_size))
        self.drive_channel = int(drive_channel)
        self.loopback_out = loopback_out
        self.stop_zero_blocks = int(stop_zero_blocks)
        self._drive = FloatRing(drive_capacity, 1)
        self._input = FloatRing(input_capacity, input_channels)
        self._buf = np.zeros((self.max_frames, 1), np.float32)
        g = 0.5 - 0.5 * np.cos(np.pi * np.arange(r + 1) / r)
        tail = self.max_frames + 2
        # rise[j] = g(min(j, R)); fall[j] = g(max(R - j, 0)); a block starting at gain position p
        # uses rise[p+1 : p+1+frames] or fall[R-p+1 : R-p+1+frames].
        self._rise = np.concatenate([g, np.ones(tail)]).astype(np.float32).reshape(-1, 1)
        self._fall = np.concatenate([g[::-1], np.zeros(tail)]).astype(np.float32).reshape(-1, 1)
        # The emergency fade (:meth:`fade_now`): a raised cosine over ``fade_now_frames`` from
        # the sample the callback plays next, then zeros; the ring keeps being read so the slots
        # stay aligned for the source's own ramp-down and closing.
        k = max(int(fade_now_frames or r), 1)
        gk = 0.5 + 0.5 * np.cos(np.pi * np.arange(k + 1) / k)
        self._kill_gain = np.concatenate([gk, np.zeros(tail)]).astype(np.float32).reshape(-1, 1)
        self.fade_now_frames = k
        self._kill = 0  # 0 off, 1 fading now; written by the worker
        self._kill_pos = 0  # position in the emergency fade; only the callback writes it
        #: Frames the callback has written so far (the stream's output position).
        self.frames_out = 0
        #: ``frames_out`` when :meth:`fade_now` was asked (-1: never), and when its fade ended.
        self.fade_asked_frame = -1
        self.fade_done_frame = -1
        self._pos = 0  # gain position 0..R (0 = silent); only the callback writes it
        self._holding = False  # the drive ran dry: fading the held last value to zero
        self._hold = np.float32(0.0)
        self._last = np.float32(0.0)
        self._debt = 0  # slots played without drive data: skip that many late samples
        self._stop = 0  # 0 run, 1 drain then stop, 2 fade out now; written by the worker
        self._zeros_sent = 0
        self.durations_s = np.zeros(1 << 16, np.float64)
        self.flagged_at = np.full(16, -1, np.int64)
        self._n_flagged = 0
        # counters (written only by the callback)
        self.callbacks = 0
        self.dry_blocks = 0
        self.dry_spells = 0  # times the drive went from playing to dry
        self.dry_frames = 0
        self.input_overflows = 0
        self.output_underflows = 0
        self.input_dropped = 0
        self.oversize_blocks = 0
        self.errors = 0
        self.last_error: BaseException | None = None
        self.finished = False

    # -- worker side ----------------------------------------------------------------------

    def write_drive(self, drive: np.ndarray) -> int:
        """Queue drive samples (1-D, full scale); returns frames queued."""
        return self._drive.write(np.asarray(drive, np.float32).reshape(-1, 1))

    @property
    def drive_queued(self) -> int:
        """Drive frames queued and not yet played."""
        return self._drive.available

    @property
    def input_available(self) -> int:
        """Input frames recorded and not yet read."""
        return self._input.available

    def read_input(self, n: int) -> np.ndarray:
        """Return up to ``n`` recorded frames as a new ``(n, input_channels)`` array."""
        k = min(int(n), self._input.available)
        out = np.empty((k, self._input.channels), np.float32)
        self._input.read_into(out)
        return out

    def request_stop(self, *, now: bool) -> None:
        """Stop after the queued drive has played (``now=False``) or fade out at once."""
        self._stop = max(self._stop, 2 if now else 1)

    def fade_now(self) -> None:
        """Fade the drive to zero over ``fade_now_frames`` from the next sample played.

        For a trip or a stop: the drive already queued (the lead blocks) is not played at full
        level first. The stream keeps running (zeros) until the source finishes."""
        if not self._kill:
            self.fade_asked_frame = self.frames_out
            self._kill = 1

    # -- callback side --------------------------------------------------------------------

    def count_status(self, input_overflow: bool, output_underflow: bool) -> None:
        """Count the stream's status flags (called from the callback); the callback numbers of
        the first 16 flagged callbacks are kept in ``flagged_at``."""
        if input_overflow:
            self.input_overflows += 1
        if output_underflow:
            self.output_underflows += 1
        if (input_overflow or output_underflow) and self._n_flagged < self.flagged_at.size:
            self.flagged_at[self._n_flagged] = self.callbacks
            self._n_flagged += 1

    def process(self, indata: np.ndarray, outdata: np.ndarray, frames: int) -> bool:
        """Fill ``outdata`` in place from the drive ring and store ``indata``; True means stop.

        Contract (the audio callback's): called from the audio thread for every block; copies
        and counts only. It writes every sample of ``outdata`` each time, never blocks, never
        allocates a buffer and never raises: an internal error silences the output, is counted
        in ``errors`` and ends the stream after the zero blocks. It returns True once the stream
        should stop (the caller raises ``CallbackStop``); the output of that call is zeros.
        """
        t0 = time.perf_counter()
        try:
            stop = self._step(indata, outdata, frames)
        except Exception as exc:  # noqa: BLE001 - the callback must never raise
            outdata.fill(0.0)
            self.errors += 1
            self.last_error = exc
            self._pos = 0
            self._stop = 2
            stop = False
        self.durations_s[self.callbacks % self.durations_s.size] = time.perf_counter() - t0
        self.callbacks += 1
        self.frames_out += frames
        if stop:
            self.finished = True
        return stop

    def _step(self, indata: np.ndarray, outdata: np.ndarray, frames: int) -> bool:
        got = self._input.write(indata)
        if got < frames:
            self.input_dropped += frames - got
        if frames > self.max_frames:
            outdata.fill(0.0)
            self.oversize_blocks += 1
            self._pos = 0
            return False
        r = self.block_size
        buf = self._buf[:frames]
        stop = self._stop
        if self._pos == 0 and (stop == 2 or (stop == 1 and self._drive.available == 0)):
            buf.fill(0.0)
            self._zeros_sent += 1
            self._write_out(outdata, buf)
            return self._zeros_sent > self.stop_zero_blocks
        n = 0
        if not self._holding:
            if self._debt:
                self._debt -= self._drive.skip(self._debt)
            if self._debt == 0:
                n = self._drive.read_into(buf)
            if n < frames:
                self._hold = buf[n - 1, 0] if n else self._last
                self._holding = True
                if stop == 0:
                    self.dry_blocks += 1
                    if self._pos > 0:
                        self.dry_spells += 1
        if self._holding:
            buf[n:] = self._hold
            if stop == 0:
                self.dry_frames += frames - n
                self._debt += frames - n
        self._last = buf[frames - 1, 0]
        p = self._pos
        if self._holding or stop == 2:
            np.multiply(buf, self._fall[r - p + 1 : r - p + 1 + frames], out=buf)
            p = max(p - frames, 0)
            if p == 0 and self._holding:
                self._holding = False
                self._hold = self._last = np.float32(0.0)
        elif p < r:
            np.multiply(buf, self._rise[p + 1 : p + 1 + frames], out=buf)
            p = min(p + frames, r)
        self._pos = p
        if self._kill:
            q = self._kill_pos
            np.multiply(buf, self._kill_gain[q : q + frames], out=buf)
            self._kill_pos = q = min(q + frames, self.fade_now_frames + 1)
            if q > self.fade_now_frames and self.fade_done_frame < 0:
                self.fade_done_frame = self.frames_out + frames
        np.clip(buf, -1.0, 1.0, out=buf)
        self._write_out(outdata, buf)
        return False

    def _write_out(self, outdata: np.ndarray, buf: np.ndarray) -> None:
        outdata.fill(0.0)
        outdata[:, self.drive_channel] = buf[:, 0]
        if self.loopback_out is not None:
            outdata[:, self.loopback_out] = buf[:, 0]


@dataclass(frozen=True)
class StreamStats:
    """Counters and timings of a run (durations in seconds).

    ``dry_blocks``: callbacks that found the drive ring short (each faded to zero, reported to
    the source); ``dry_spells``: how often the drive went from playing to dry.
    ``output_underflows`` / ``input_overflows``: PortAudio's own status flags;
    ``flagged_callbacks``: numbers of the first 16 callbacks that carried one.
    ``callback_*``: time spent inside the callback; ``update_*``: time of ``source.exchange``.
    """

    callbacks: int
    dry_blocks: int
    dry_spells: int
    dry_frames: int
    output_underflows: int
    input_overflows: int
    input_dropped_frames: int
    flagged_callbacks: tuple[int, ...]
    callback_errors: int
    callback_median_s: float
    callback_max_s: float
    update_median_s: float
    update_max_s: float
    updates: int


def summarize(core: StreamCore, update_s: list[float]) -> StreamStats:
    """Build :class:`StreamStats` from a core's counters and the worker's update durations."""
    n = min(core.callbacks, core.durations_s.size)
    cb = core.durations_s[:n] if n else np.zeros(1)
    up = np.asarray(update_s, float) if update_s else np.zeros(1)
    return StreamStats(
        callbacks=core.callbacks,
        dry_blocks=core.dry_blocks,
        dry_spells=core.dry_spells,
        dry_frames=core.dry_frames,
        output_underflows=core.output_underflows,
        input_overflows=core.input_overflows,
        input_dropped_frames=core.input_dropped,
        flagged_callbacks=tuple(int(i) for i in core.flagged_at if i >= 0),
        callback_errors=core.errors,
        callback_median_s=float(np.median(cb)),
        callback_max_s=float(np.max(cb)),
        update_median_s=float(np.median(up)),
        update_max_s=float(np.max(up)),
        updates=len(update_s),
    )
