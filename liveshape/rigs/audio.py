"""The audio-interface rig: one full-duplex PortAudio stream driven block by block.

This is the only module that imports :mod:`sounddevice`, and only inside functions, so every
command that does not need audio works without PortAudio installed. Listing, matching and
checking devices is in :mod:`liveshape.rigs.devices`, which is handed the module by the thin
wrappers here (:func:`list_devices`, :func:`rescan_devices`, :func:`check_settings`).

Design (see DEVELOPERS.md, "The realtime path"):

* ONE full-duplex :class:`sounddevice.Stream` on one device (one clock), float32, a fixed block
  size, callback mode (the blocking mode crashed with mono streams on JACK).
* The callback (:meth:`StreamCore.process`) only copies: the next drive samples from a
  preallocated ring into ``outdata``, ``indata`` into another ring, and counts status flags.
  It applies precomputed fades: in at the start, out when the drive ring runs dry, out when asked
  to stop, followed by a few zero blocks before :class:`sounddevice.CallbackStop`.
* A worker thread keeps the drive ring ``lead_blocks`` ahead by calling ``source.exchange`` with
  the response blocks read from the input ring (``source`` is a
  :class:`liveshape.control.controller.Controller` or anything with the same methods).

Deadlines: no call on the safety path waits without one. A stream that stops delivering input
(device unplugged, audio server stopped or killed) is a stall after ``stall_timeout_s``: the
worker trips the source's ``audio_stall`` rule (``request_abort``) and ends; opening, starting,
aborting and closing the stream run on a helper thread that is abandoned after
:data:`CALL_DEADLINE_S` (PortAudio can block for ever in them when the server is gone). Once a
call was abandoned, :func:`wedged` is True and the process must not call PortAudio again, not
even at exit (the command line ends with ``os._exit`` after its record is closed).

Timeline: drive block ``j`` returned by the source is always played in the stream slot
``[j*B, (j+1)*B)`` (B = block size) or not at all: samples that were missing when their slot
came (an underflow) are skipped when they arrive late, so the loop delay seen by the source never
changes during a run.
"""

from __future__ import annotations

import sys
import threading
import time
from collections import deque
from collections.abc import Callable, Sequence
from typing import Any

import numpy as np

from liveshape.errors import DeviceError
from liveshape.rigs import devices
from liveshape.rigs.blocks import BlockIO, BufferSource, Recording
from liveshape.rigs.devices import DeviceInfo, device_error, match_device  # re-exported
from liveshape.rigs.ring import StreamCore, StreamStats, summarize

__all__ = [
    "CALL_DEADLINE_S",
    "AudioRig",
    "BlockIO",
    "DeviceInfo",
    "Recording",
    "StreamCore",
    "StreamStats",
    "check_settings",
    "device_error",
    "import_sounddevice",
    "list_devices",
    "match_device",
    "rescan_devices",
    "wedged",
]

#: Longest wait for a PortAudio call that can block when the device or server is gone, s.
CALL_DEADLINE_S = 2.0
#: PortAudio calls abandoned after their deadline in this process (see :func:`wedged`).
_ABANDONED: list[str] = []


def wedged() -> bool:
    """True once a PortAudio call was abandoned in this process (do not call PortAudio again)."""
    return bool(_ABANDONED)


def call_with_deadline(fn: Callable[[], Any], what: str,
                       deadline_s: float = CALL_DEADLINE_S) -> tuple[bool, Any]:
    """Run ``fn()`` on a daemon thread; ``(True, its result)`` or ``(False, None)`` after the
    deadline (the call is abandoned and :func:`wedged` turns True). Waits in short steps so
    the calling (main) thread keeps handling signals; an exception of ``fn`` is re-raised."""
    done = threading.Event()
    box: dict[str, Any] = {}

    def target() -> None:
        try:
            box["value"] = fn()
        except BaseException as exc:  # noqa: BLE001 - handed to the caller
            box["error"] = exc
        finally:
            done.set()

    threading.Thread(target=target, name=f"liveshape-audio-{what}", daemon=True).start()
    end = time.monotonic() + deadline_s
    while not done.wait(0.02):
        if time.monotonic() > end:
            _ABANDONED.append(what)
            return False, None
    if "error" in box:
        raise box["error"]
    return True, box.get("value")

PORTAUDIO_MISSING = (
    "PortAudio library not found: install the system package libportaudio2 "
    "(apt-get install libportaudio2)"
)


def import_sounddevice() -> Any:
    """Import :mod:`sounddevice`, turning a missing PortAudio into one-line :class:`DeviceError`."""
    try:
        import sounddevice
    except OSError as exc:
        if "PortAudio" in str(exc):
            raise DeviceError(PORTAUDIO_MISSING) from None
        raise DeviceError(f"cannot load the audio library: {exc}") from None
    except ImportError:
        raise DeviceError(
            "the Python package sounddevice is not installed (pip install sounddevice)"
        ) from None
    return sounddevice


def list_devices() -> list[DeviceInfo]:
    """All audio devices PortAudio knows (see :func:`liveshape.rigs.devices.list_devices`)."""
    return devices.list_devices(import_sounddevice())


def rescan_devices(between: Callable[[], None] | None = None) -> None:
    """Re-initialize PortAudio (see :func:`liveshape.rigs.devices.rescan_devices`)."""
    devices.rescan_devices(import_sounddevice(), between)


def check_settings(device: int | str | None, fs_hz: float, **options: Any) -> DeviceInfo:
    """Check a full-duplex setting (see :func:`liveshape.rigs.devices.check_settings`)."""
    sd = import_sounddevice() if options.get("devices") is None else None
    return devices.check_settings(sd, device, fs_hz, **options)


class AudioRig:
    """A full-duplex audio interface (or JACK client) as a rig for a block-driven source.

    Parameters
    ----------
    device : int, str or None
        Device index, name or unique part of a name (None is an error listing the devices:
        a real card is driven only when named).
    fs_hz : float
        Sample rate of the stream, Hz.
    block_size : int, optional
        Frames per stream block and per ``exchange`` call (default 1024).
    drive_channel, control_channel : int, optional
        Output channel carrying the drive; input channel carrying the control accelerometer.
    monitor_channel : int or None, optional
        Extra input channel recorded alongside (a second accelerometer, amplifier current...).
    loopback : (int, int) or None, optional
        ``(out_ch, in_ch)``: a cable from a second output to a second input. The drive is copied
        to ``out_ch``; ``in_ch`` returns the true drive reference (and the loop delay).
        ``(None, in_ch)``: ``in_ch`` receives the drive output itself (no copy is played).
    input_channels : sequence of int or None, optional
        Every input to read, as 0-based card input channels in the order the source wants them
        (a test definition's ``rig.inputs`` in list order). The source's ``exchange`` then gets
        a ``(block_size, len(input_channels))`` block, column ``i`` from card input
        ``input_channels[i]`` (one channel: a 1-D block of it), and the
        :class:`~liveshape.rigs.blocks.BlockIO` carries the same block as ``response_fs``.
        Replaces ``control_channel``, ``loopback`` and ``monitor_channel`` (giving ``loopback``
        or ``monitor_channel`` too is an error); None: read those as before.
    lead_blocks : int, optional
        Drive blocks produced ahead of the stream (default 4): the margin against late updates.
    stop_zero_blocks : int, optional
        Zero blocks sent after the closing ramp before the stream stops (default 3).
    host_period : bool, optional
        Open the stream with PortAudio's unspecified block size (the host's own period). On JACK
        this removes PortAudio's extra block of buffering (measured: loop delay period + block
        size with a fixed block, one period with the host's).
    latency : str or float or None, optional
        Passed to :class:`sounddevice.Stream` (None: sounddevice's default).
    stall_timeout_s : float, optional
        No input for this long while running is a :class:`DeviceError` (server or device gone).
    stop_timeout_s : float, optional
        Longest wait for the source to finish its ramp-down after a stop request.
    switch_interval_s : float or None, optional
        :func:`sys.setswitchinterval` during a run so the callback thread gets the interpreter
        promptly (None: leave it).

    Notes
    -----
    The callback's contract (what PortAudio's thread runs for every block, see
    :meth:`liveshape.rigs.ring.StreamCore.process`):

    * it fills every sample of ``outdata`` in place: the drive channel from the drive ring (and
      its copy on the loopback output), every other channel zero, clipped to ±1 FS;
    * it copies ``indata`` into the input ring and counts the status flags;
    * it does no DSP, no allocation of buffers, no logging, no locking, and never raises
      except :class:`sounddevice.CallbackStop` at the end of the stop sequence;
    * fades are per-sample raised cosines over one block: in at the start and after a dry
      spell, out when the drive ring runs dry (the last value is held and faded; the late
      samples are skipped when they arrive, keeping the timeline) and when asked to stop;
    * the stop sequence is: the queued drive plays out (or fades at once on an urgent stop),
      then ``stop_zero_blocks`` zero blocks, then ``CallbackStop``. ``abort()`` is used only
      when the stream no longer calls back.

    The worker thread calls ``source.exchange`` (and ``request_stop``, ``report_underflow``)
    from one thread only, so the source needs no locking.
    """

    def __init__(
        self,
        device: int | str | None,
        fs_hz: float,
        *,
        block_size: int = 1024,
        drive_channel: int = 0,
        control_channel: int = 0,
        monitor_channel: int | None = None,
        loopback: tuple[int, int] | None = None,
        input_channels: Sequence[int] | None = None,
        lead_blocks: int = 4,
        stop_zero_blocks: int = 3,
        host_period: bool = False,
        latency: str | float | None = None,
        stall_timeout_s: float = 2.0,
        stop_timeout_s: float = 5.0,
        switch_interval_s: float | None = 0.001,
        stop_fade_s: float = 0.25,
    ) -> None:
        if block_size < 16:
            raise ValueError(f"block_size = {block_size} must be >= 16")
        if lead_blocks < 1:
            raise ValueError(f"lead_blocks = {lead_blocks} must be >= 1")
        self.device = device
        self.fs_hz = float(fs_hz)
        self.block_size = int(block_size)
        self.drive_channel = int(drive_channel)
        self.control_channel = int(control_channel)
        self.monitor_channel = monitor_channel
        self.loopback = loopback
        self.lead_blocks = int(lead_blocks)
        self.stop_zero_blocks = int(stop_zero_blocks)
        self.host_period = bool(host_period)
        self.latency = latency
        self.stall_timeout_s = float(stall_timeout_s)
        self.stop_timeout_s = float(stop_timeout_s)
        self.switch_interval_s = switch_interval_s
        # A trip or stop fades the drive in the callback, from the sample it plays next, so the
        # drive is quiet at the port within ``stop_fade_s`` of the decision (the lead blocks
        # already queued are not played at full level first). Two blocks of the budget go to
        # the worker's reaction and the callback period.
        self.stop_fade_frames = max(self.block_size,
                                    int(round(stop_fade_s * self.fs_hz)) - 2 * self.block_size)
        # loopback (None, in): the drive reaches ``in`` by a cable from the drive output itself
        outs = [self.drive_channel] + ([loopback[0]] if loopback and loopback[0] is not None
                                       else [])
        ins = [self.control_channel] + ([loopback[1]] if loopback else [])
        if monitor_channel is not None:
            ins.append(int(monitor_channel))
        #: The card inputs the source gets, in its order (None: the control channel alone).
        self.input_columns: tuple[int, ...] | None = None
        if input_channels is not None:
            cols = tuple(int(c) for c in input_channels)
            if not cols:
                raise ValueError("input_channels must name at least one input")
            if len(set(cols)) != len(cols):
                raise ValueError(f"input_channels = {cols} names an input twice")
            if loopback is not None or monitor_channel is not None:
                raise ValueError("input_channels replaces loopback and monitor_channel "
                                 "(the loopback and monitor inputs are columns of it)")
            self.input_columns = cols
            ins = list(cols)
        if min(outs + ins) < 0:
            raise ValueError("channel numbers must be >= 0")
        if loopback and loopback[0] == self.drive_channel:
            raise ValueError("the loopback output must differ from the drive channel")
        self.output_channels = max(outs) + 1
        self.input_channels = max(ins) + 1
        self.info: DeviceInfo | None = None
        self._stream: Any = None
        self._core: StreamCore | None = None
        self._thread: threading.Thread | None = None
        self._done = threading.Event()
        self._stream_done = threading.Event()
        self._stop_reason: str | None = None
        self._error: BaseException | None = None
        self._update_s: list[float] = []
        self._interval_before: float | None = None
        self._source: Any = None
        self._poll_s: float | None = None  # worker poll period override (tests)
        #: The stall's numbers when the stream stopped delivering input, else None.
        self.stall: dict[str, float] | None = None

    # -- public control -------------------------------------------------------------------

    def run(
        self,
        source: Any,
        *,
        on_block: Callable[[BlockIO], None] | None = None,
        should_stop: Callable[[], bool] | None = None,
        on_open: Callable[[], None] | None = None,
    ) -> Any:
        """Run ``source`` through the stream until it finishes; return ``source.result()``.

        Ctrl-C (KeyboardInterrupt) or ``should_stop()`` returning True asks the source to stop
        (``request_stop``), and the run continues until its ramp-down has played out. A second
        Ctrl-C ramps down inside the callback at once; a third aborts the stream.

        Raises
        ------
        DeviceError
            The device cannot be opened, or the stream stalled (device or server gone).
        """
        self.start(source, on_block=on_block, should_stop=should_stop, on_open=on_open)
        interrupts = 0
        while True:
            try:
                while not self._done.wait(0.05):
                    pass
                break
            except KeyboardInterrupt:
                interrupts += 1
                if interrupts == 1:
                    self.request_stop("interrupted by the user (Ctrl-C)")
                elif interrupts == 2 and self._core is not None:
                    self._core.request_stop(now=True)
                else:
                    self._abort_stream()
        return self.wait()

    def start(
        self,
        source: Any,
        *,
        on_block: Callable[[BlockIO], None] | None = None,
        should_stop: Callable[[], bool] | None = None,
        on_open: Callable[[], None] | None = None,
    ) -> None:
        """Open the stream, pre-roll ``lead_blocks`` drive blocks and start the worker.

        ``on_block(BlockIO)`` is called by the worker for every block; ``should_stop()`` is
        polled by it; ``on_open()`` runs once the stream is open and before it starts (e.g. to
        connect a JACK tap to the stream's ports).
        """
        if self._thread is not None:
            raise RuntimeError("this AudioRig is already running")
        sd = import_sounddevice()
        self.info = check_settings(
            self.device,
            self.fs_hz,
            input_channels=self.input_channels,
            output_channels=self.output_channels,
        )
        b = self.block_size
        capacity_in = max(64 * b, int(4 * self.fs_hz))
        self._core = core = StreamCore(
            block_size=b,
            input_channels=self.input_channels,
            output_channels=self.output_channels,
            drive_channel=self.drive_channel,
            loopback_out=self.loopback[0] if self.loopback else None,
            # both rings span the same horizon: a worker late by more than that is fatal
            drive_capacity=capacity_in + self.lead_blocks * b,
            input_capacity=capacity_in,
            stop_zero_blocks=self.stop_zero_blocks,
            fade_now_frames=self.stop_fade_frames,
        )
        self._source = source
        self._done.clear()
        self._stream_done.clear()
        self._stop_reason = None
        self._error = None
        self._update_s = []
        produced: deque[np.ndarray] = deque()
        cols = self.input_columns
        silence = np.zeros(b if cols is None or len(cols) == 1 else (b, len(cols)), np.float32)
        for _ in range(self.lead_blocks):
            drive = self._exchange(source, silence.copy())
            core.write_drive(drive)
            produced.append(drive)
        stop_exc = sd.CallbackStop

        def callback(indata, outdata, frames, time_info, status):  # noqa: ARG001
            """PortAudio callback: copy and count only (see StreamCore.process)."""
            if status:
                core.count_status(status.input_overflow, status.output_underflow)
            if core.process(indata, outdata, frames):
                raise stop_exc

        try:
            kwargs = {} if self.latency is None else {"latency": self.latency}
            ok, self._stream = call_with_deadline(lambda: sd.Stream(
                device=(self.info.index, self.info.index),
                samplerate=self.fs_hz,
                blocksize=0 if self.host_period else b,
                dtype="float32",
                channels=(self.input_channels, self.output_channels),
                callback=callback,
                finished_callback=self._stream_done.set,
                clip_off=False,
                **kwargs,
            ), "open")
        except sd.PortAudioError as exc:
            raise device_error(str(exc), self.info, self.fs_hz) from None
        if not ok:
            raise DeviceError(f"opening the audio stream on {self.info.name!r} did not return "
                              f"within {CALL_DEADLINE_S:g} s (audio server stopped?)")
        if on_open is not None:
            try:
                on_open()
            except BaseException:
                self._stream.close()
                raise
        if self.switch_interval_s is not None:
            self._interval_before = sys.getswitchinterval()
            sys.setswitchinterval(self.switch_interval_s)
        try:
            started, _ = call_with_deadline(self._stream.start, "start")
        except sd.PortAudioError as exc:
            raise device_error(str(exc), self.info, self.fs_hz) from None
        if not started:
            raise DeviceError(f"starting the audio stream on {self.info.name!r} did not return "
                              f"within {CALL_DEADLINE_S:g} s (audio server stopped?)")
        self._thread = threading.Thread(
            target=self._work,
            args=(source, produced, on_block, should_stop),
            name="liveshape-audio-worker",
            daemon=True,
        )
        self._thread.start()

    def play_record(
        self, drive_fs: np.ndarray, *, pad_s: float = 0.1, tail_s: float = 0.25
    ) -> Recording:
        """Play ``drive_fs`` once and record the inputs, slot-aligned.

        ``pad_s`` of silence precede the signal (the stream's start-up fade acts on silence) and
        ``tail_s`` follow it (room for the loop delay). The returned drive includes the padding.
        """
        pad = np.zeros(int(round(pad_s * self.fs_hz)), np.float32)
        signal = np.concatenate([pad, np.asarray(drive_fs, np.float32).ravel()])
        source = BufferSource(signal, self.block_size, tail_frames=int(tail_s * self.fs_hz))
        blocks: list[BlockIO] = []
        self.run(source, on_block=blocks.append)
        return Recording.from_blocks(self.fs_hz, blocks)

    def request_stop(self, reason: str = "stop requested") -> None:
        """Ask the source to ramp down and finish (forwarded by the worker thread)."""
        if self._stop_reason is None:
            self._stop_reason = reason

    def wait(self, timeout_s: float | None = None) -> Any:
        """Wait for the run to end, close the stream and return ``source.result()`` if any."""
        if self._thread is None:
            raise RuntimeError("this AudioRig was not started")
        if not self._done.wait(timeout_s):
            raise TimeoutError("the audio run has not finished")
        self._thread.join(CALL_DEADLINE_S)  # the worker has set _done: it is on its way out
        if self.stall is not None or not self._stream_done.wait(self.stop_timeout_s):
            self._abort_stream()
        try:
            if not wedged():
                call_with_deadline(self._stream.close, "close")
        finally:
            if self._interval_before is not None:
                sys.setswitchinterval(self._interval_before)
                self._interval_before = None
            self._thread = None
        if self._error is not None:
            raise self._error
        result = getattr(self._source, "result", None)
        return result() if callable(result) else None

    @property
    def stats(self) -> StreamStats:
        """Counters and timings of the current or last run."""
        if self._core is None:
            raise RuntimeError("this AudioRig was not started")
        return summarize(self._core, self._update_s)

    # -- worker ---------------------------------------------------------------------------

    def _exchange(self, source: Any, response: np.ndarray) -> np.ndarray:
        t0 = time.perf_counter()
        drive = np.asarray(source.exchange(response), dtype=np.float32)
        self._update_s.append(time.perf_counter() - t0)
        if drive.shape != (self.block_size,):
            raise ValueError(
                f"source returned a drive block of shape {drive.shape}, "
                f"expected ({self.block_size},)"
            )
        if not np.all(np.isfinite(drive)):
            raise ValueError("source returned a drive block with non-finite samples")
        return drive

    def _abort_stream(self) -> None:
        if self._stream is not None and not wedged():
            try:
                call_with_deadline(self._stream.abort, "abort")
            except Exception:  # noqa: BLE001 - best effort on the way out
                pass
        self._stream_done.set()

    def _work(self, source, produced, on_block, should_stop) -> None:
        core = self._core
        b = self.block_size
        poll_s = self._poll_s or max(0.0005, b / self.fs_hz / 8)
        exchanging = True
        forwarded = False
        stop_asked_at: float | None = None
        reported = 0
        index = 0
        last_input = time.monotonic()
        ctrl, mon = self.control_channel, self.monitor_channel
        loop_in = self.loopback[1] if self.loopback else None
        cols = self.input_columns
        if cols is not None:  # one column: a 1-D block of it (the one-input layout)
            ctrl = cols[0] if len(cols) == 1 else list(cols)
        try:
            while not (self._stream_done.is_set() and core.input_available < b):
                now = time.monotonic()
                if exchanging:
                    if self._stop_reason is None and should_stop is not None and should_stop():
                        self._stop_reason = "stop requested"
                    if self._stop_reason is not None and not forwarded:
                        source.request_stop(self._stop_reason)
                        forwarded, stop_asked_at = True, now
                        if getattr(source, "status", "running") in ("aborted", "stopped"):
                            core.fade_now()
                    dry = core.dry_blocks
                    if dry > reported and hasattr(source, "report_underflow"):
                        source.report_underflow(dry - reported)
                        reported = dry
                    if getattr(source, "finished", False):
                        core.request_stop(now=False)
                        exchanging = False
                    elif stop_asked_at is not None and now - stop_asked_at > self.stop_timeout_s:
                        core.request_stop(now=True)
                        exchanging = False
                if core.input_dropped:
                    raise DeviceError(
                        "the audio worker fell behind: input samples were lost "
                        f"({core.input_dropped} frames); use a larger block_size"
                    )
                if core.input_available < b:
                    if now - last_input > self.stall_timeout_s:
                        message = (f"audio stream stalled: no input for {now - last_input:.2f} s "
                                   f"after {index} blocks (device unplugged or audio server "
                                   "stopped?)")
                        self.stall = {"no_input_s": now - last_input, "blocks": float(index),
                                      "stall_timeout_s": self.stall_timeout_s,
                                      "t_stream_s": index * b / self.fs_hz}
                        if not hasattr(source, "request_abort"):
                            raise DeviceError(message)
                        source.request_abort("audio_stall", message, dict(self.stall))
                        core.request_stop(now=True)  # if the stream lives, it fades out
                        break
                    time.sleep(poll_s)
                    continue
                last_input = now
                frames = core.read_input(b)
                response = np.ascontiguousarray(frames[:, ctrl])
                if exchanging:
                    drive = self._exchange(source, response)
                    if getattr(source, "status", "running") in ("aborted", "stopped"):
                        core.fade_now()  # a trip or a stop: quiet at the port at once
                    if core.write_drive(drive) < b:
                        raise DeviceError(
                            "the audio worker fell behind: the drive queue overflowed; "
                            "use a larger block_size"
                        )
                    produced.append(drive)
                slot_drive = produced.popleft() if produced else np.zeros(b, np.float32)
                if on_block is not None:
                    on_block(
                        BlockIO(
                            index=index,
                            drive_fs=slot_drive,
                            response_fs=response,
                            loopback_fs=None if loop_in is None else frames[:, loop_in].copy(),
                            monitor_fs=None if mon is None else frames[:, mon].copy(),
                        )
                    )
                index += 1
        except BaseException as exc:  # noqa: BLE001 - re-raised by wait()
            self._error = exc
            core.request_stop(now=True)
            self._stream_done.wait(self.stop_timeout_s)
        finally:
            self._done.set()
