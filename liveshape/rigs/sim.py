"""The simulated rig: a :class:`~liveshape.rigs.plant.Plant` as a seeded, stateful block processor.

Pure (numpy/scipy). ``SimRig.process(drive_fs)`` returns the response (FS) to a drive block (FS) of
any length; the state (filters, delay line, coil temperature, faults) carries over exactly from
block to block, so the output does not depend on how the drive is split into blocks: it is
bit-identical for the same seed.

Signal path, per sample::

    drive -> clip ±1 FS -> loop delay -> card out high-pass -> x out_v_per_fs x gain
      -> subsonic high-pass -> [plant_gain] -> clip ±v_out_max -> [trip: 0 V from then on]
      -> shaker + payload (currents, excursion, acceleration at the control point)
      -> Xmax compression -> /g0 [sensor_detached: 0] -> [sensor_gain]
      -> accelerometer high-pass -> x mV/g / in_v_per_fs -> card in high-pass
      -> + sensor noise [x sensor_gain] + card noise [+ noise_burst] [+ hum] -> clip ±1 FS
      -> [dropout: 0]

Hum (optional, :class:`liveshape.rigs.hum.HumSource`): mains hum is electrical pickup at the card
input, so it is added there, after the sensor chain, in g converted to FS with the rig's
calibration (``fs_per_g``); it stays on when the sensor is detached, goes with a dropout, and
has random start phases from its own seeded stream.

Noise: the sensor's and the card's white noise are added together at the card input as one
seeded white Gaussian source (the couplings' effect on sensor noise below their few-hertz corners
is neglected); noise is drawn in float32, which is ample for a floor 60 dB or more below the
signal.

Discretization: every linear stage uses the trapezoidal rule (bilinear transform, no prewarp) at
the rig's sample rate. The shaker with its payload is a physical state-space model, diagonalized
(:class:`liveshape.rigs.modal.ModalSystem`); each of its outputs (current, excursion,
acceleration) runs as a cascade of second-order sections with a carried state
(:class:`liveshape.rigs.cascade.MotorCascades`), the acceleration's cascade followed by the sensor
chain's sections in the same pass. When the coil resistance (heating) or the modal frequencies
(fault) change, the physical state (current, displacements, velocities) is read from the cascades'
states, carried over unchanged into the new model, and written into its cascades, so those
continue without a jump.

Nonlinear and protective behaviour (simple models, documented):

* Converters clip at ±1 FS; the amplifier clips at ``±v_out_max_v``.
* Current trip: the first sample whose current magnitude exceeds ``i_max_a`` trips the amplifier;
  from the next sample on its output is 0 V (a shorted coil) and stays so.
* Xmax: the excursion is computed by the linear model. Where ``|x| > xmax`` the acceleration
  reaching the sensor is scaled by ``xmax/|x|`` (the motor force falls as the coil leaves the gap);
  such samples are counted. The compression does not feed back into the excursion.
* Coil heating (when the plant has ``coil_heating``): every thermal step (a twentieth of the
  thermal time constant, at most :data:`THERMAL_STEP_MAX_S`) of rig time the mean electrical
  power ``mean(i²) Re`` drives the first-order thermal model; the shaker model follows ``Re``
  whenever it has moved by more than :data:`RE_STEP` (relative) since the last rebuild.

Monitor points (``monitors``, names of payload resonances, with the control accelerometer on the
table): each reads the acceleration of that modal mass, which is the table's acceleration (after
the Xmax compression) through the base-excitation transmissibility ``(c s + k)/(m s² + c s + k)``
of the mode (bilinear, like every other stage), then an accelerometer and card input like the
control channel's with noise of its own. A ``resonance_shift`` moves the monitor's mode too (its
filter keeps its state across the change); ``sensor_gain``, ``sensor_detached``, ``noise_burst``
and ``dropout`` act on the control channel only. :attr:`SimRig.last_monitor_fs` holds the monitor
signals of the last ``process`` call.

Faults (objects with ``kind, at_s, value, duration_s``, as
:class:`liveshape.testdef.spec.FaultSpec`) act from sample ``round(at_s fs)`` for ``duration_s``
(None: to the end); see :data:`FAULT_RULES` (defined, with their validation, in
:mod:`liveshape.rigs.faults`).
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import signal

from liveshape.dsp.profile import G0_M_S2
from liveshape.errors import ConfigError
from liveshape.rigs.cascade import MotorCascades, output_roots
from liveshape.rigs.faults import (
    FAULT_KINDS,
    FAULT_RULES,
    FaultState,
    ScheduledFault,
    active_faults,
    fault_bounds,
    fault_state,
    schedule_faults,
)
from liveshape.rigs.hum import HumSource, HumSpec
from liveshape.rigs.modal import ModalSystem, highpass_sos, sos_freqz, sosfilt_inplace
from liveshape.rigs.plant import IdealShaker, Plant
from liveshape.rigs.plantmodel import (
    electromechanical_ss,
    electromechanical_tf,
    fixture_point_tf,
    mode_transmissibility_tf,
)
from liveshape.testdef.chain import ChainCalibration, InputChannelCal

__all__ = ["FAULT_KINDS", "FAULT_RULES", "RE_STEP", "THERMAL_STEP_MAX_S", "SimRig", "SimStatus",
           "sim_inputs"]

#: Longest period of the coil-temperature update, seconds of rig time (the step is a twentieth of
#: the thermal time constant, at most this).
THERMAL_STEP_MAX_S = 0.5
#: The shaker model is rebuilt when Re has moved by this fraction since the last build (a gain
#: step of at most 0.001 dB).
RE_STEP = 1e-4


@dataclass(frozen=True)
class SimStatus:
    """What the simulated rig did so far (counts and peaks since the start).

    ``excursion_peak_m``, ``excursion_last_peak_m`` (peak of the last ``process`` call),
    ``current_peak_a`` and ``re_ohm_now`` are None for the ideal shaker (no coil, no stroke);
    ``coil_rise_k`` is None without a coil-heating model. ``active_faults`` are the fault kinds
    in effect at ``t_s``.
    """

    t_s: float
    samples: int
    excursion_peak_m: float | None
    excursion_last_peak_m: float | None
    xmax_exceeded_samples: int
    current_peak_a: float | None
    amp_tripped: bool
    amp_trip_t_s: float | None
    drive_clipped_samples: int
    amp_clipped_samples: int
    input_clipped_samples: int
    re_ohm_now: float | None
    coil_rise_k: float | None
    active_faults: tuple[str, ...]


def _check_rate(plant: Plant, fs: float) -> None:
    top = 0.45 * fs
    named = [
        ("card.out_highpass_hz", plant.card.out_highpass_hz),
        ("card.in_highpass_hz", plant.card.in_highpass_hz),
        ("amplifier.highpass_hz", plant.amplifier.highpass_hz),
        ("accelerometer.highpass_hz", plant.accelerometer.highpass_hz),
    ] + [(f"payload.resonances[{j}].f_hz", r.f_hz) for j, r in enumerate(plant.payload.resonances)
         ] + [(f"payload.fixture_points[{j}].f_hz", p.f_hz)
              for j, p in enumerate(plant.payload.fixture_points)]
    for key, v in named:
        if v is not None and v >= top:
            raise ConfigError(
                f"{plant.source or plant.name}: {key} = {v:g} must be below 0.45 x {fs:g} Hz"
            )


class SimRig:
    """A simulated rig: drive blocks in, response blocks out (both in FS), seeded and stateful.

    Parameters
    ----------
    plant : Plant
        The chain to simulate (see :mod:`liveshape.rigs.plant`).
    fs_hz : float
        Sample rate in Hz; every corner and resonance must lie below ``0.45 fs_hz``.
    seed : int or None
        Seed of the noise generators (the sensor/card noise and the burst noise each get their
        own stream from :class:`numpy.random.SeedSequence`; each stream is drawn in rig-time
        order, so the output does not depend on block sizes).
    faults : iterable
        Objects with ``kind``, ``at_s``, ``value``, ``duration_s``
        (:class:`liveshape.testdef.spec.FaultSpec`).
    monitors : iterable of str
        Names of payload resonances to read with a monitor accelerometer (see the module
        docstring); needs ``payload.control_point: table``.
    hum : HumSpec or None
        Mains hum added to the control response (see the module docstring); None: no hum.
    inputs : sequence of (int, str), optional
        The rig's inputs for :meth:`process_inputs`: ``(channel, source)`` pairs, channels
        counted from 1 and unique, sources ``"control"`` (exactly one: the signal of
        :meth:`process`), ``"mode:NAME"`` (a monitor on payload resonance NAME),
        ``"fixture:NAME"`` (fixture point NAME, e.g. a second control point) and
        ``"reference"`` (at most one: the drive through the card, a loopback cable).
        :func:`sim_inputs` makes them from a test definition's input roles. None: one input,
        channel 1, the control.

    Raises
    ------
    ConfigError
        A bad fault (unknown kind, missing value) or a plant that does not fit the sample rate.
    """

    def __init__(self, plant: Plant, fs_hz: float, *, seed: int | None = None,
                 faults: Iterable[Any] = (), monitors: Iterable[str] = (),
                 hum: HumSpec | None = None,
                 inputs: Sequence[tuple[int, str]] | None = None) -> None:
        fs = float(fs_hz)
        if not (math.isfinite(fs) and fs > 0):
            raise ConfigError(f"sim: fs_hz = {fs_hz!r} must be a finite number > 0")
        _check_rate(plant, fs)
        self._plant, self._fs = plant, fs
        self._faults = schedule_faults(faults, plant, fs)
        self._bounds = fault_bounds(self._faults)
        streams = np.random.SeedSequence(seed).spawn(2)
        self._rng_noise, self._rng_burst = (np.random.default_rng(s) for s in streams)
        card, amp, acc = plant.card, plant.amplifier, plant.accelerometer
        self._up_gain = card.out_v_per_fs * amp.gain_v_per_v
        self._up = highpass_sos(
            [(card.out_highpass_hz, 1), (amp.highpass_hz, amp.highpass_order)], self._up_gain, fs)
        self._up_zi = None if self._up is None else np.zeros((1, self._up.shape[0], 2))
        self._down_gain = acc.sens_mv_per_g * 1e-3 / card.in_v_per_fs
        self._sensor_noise_fs = acc.noise_g_rms * self._down_gain
        self._card_noise_fs = card.in_noise_fs_rms
        self._down = highpass_sos(
            [(acc.highpass_hz, 1), (card.in_highpass_hz, 1)], self._down_gain, fs)
        # The sensor chain as sections that follow the shaker's acceleration cascade: m/s² in,
        # FS out, the sensor_gain fault in the first section's numerator.
        self._tail = (np.array([[self._down_gain, 0.0, 0.0, 1.0, 0.0, 0.0]]) if self._down is None
                      else self._down.copy())
        self._tail_b0 = self._tail[0, :3] / G0_M_S2
        self._tail[0, :3] = self._tail_b0
        self._tail_sensor_gain = 1.0
        self._delay = np.zeros(card.delay_samples)
        sh = plant.shaker
        self._motor = not isinstance(sh, IdealShaker)
        self._re0 = getattr(sh, "re_ohm", None)
        self._re_now = self._re_model = self._re0
        self._heat = sh.coil_heating
        self._rise_k = 0.0
        tau = self._heat.time_constant_s if self._heat is not None else 1.0
        self._n_th = max(1, int(round(min(THERMAL_STEP_MAX_S, tau / 20.0) * fs)))
        self._th_buf = np.zeros(self._n_th)
        self._outs, self._noise = np.empty((4, 0)), np.empty(0, np.float32)
        self._f_factor = 1.0
        self._roots: dict[float, list] = {}
        self._build_model(None, 1.0)
        self._states = self._cascades.zero_state()
        self._states[2] = np.zeros((1, self._acc_sos.shape[0], 2))
        self._n = 0
        self._tripped_at: int | None = None
        self._counts = {"xmax": 0, "drive": 0, "amp": 0, "input": 0}
        self._x_peak = 0.0
        self._x_last = 0.0
        self._i_peak = 0.0
        self._setup_monitors(tuple(monitors), inputs, seed)
        self._setup_reference(seed)
        # Hum has a stream of its own: a hum-free rig draws exactly what it drew before.
        self._hum = None if hum is None else HumSource(
            hum, fs, np.random.SeedSequence(seed, spawn_key=(8,)))

    def _setup_monitors(self, names: tuple[str, ...], inputs: Sequence[tuple[int, str]] | None,
                        seed: int | None) -> None:
        """The taps on the table's acceleration: the ``monitors`` first, then the mode and
        fixture inputs of ``inputs``; and the layout of :meth:`process_inputs`."""
        pl = self._plant.payload
        by_name = {r.name: j for j, r in enumerate(pl.resonances)}
        points = {p.name: j for j, p in enumerate(pl.fixture_points)}
        for name in names:
            if name not in by_name:
                known = ", ".join(sorted(by_name)) or "none"
                raise ConfigError(f"monitors: {name!r} names no payload resonance of plant "
                                  f"{self._plant.name!r} (resonances: {known})")
        # taps: (kind, index into resonances or fixture points, input channel or None)
        self._taps: list[tuple[str, int, int | None]] = [("mode", by_name[n], None)
                                                         for n in names]
        self._layout: list[tuple[int, str, int]] = []  # (channel, source, tap row or -1)
        layout = [(1, "control")] if inputs is None else list(inputs)
        for channel, source in layout:
            where = f"inputs: channel {channel!r} ({source!r})"
            if isinstance(channel, bool) or not isinstance(channel, int) or channel < 1:
                raise ConfigError(f"{where}: the channel must be an integer >= 1")
            if any(c == channel for c, _, _ in self._layout):
                raise ConfigError(f"{where}: channel {channel} is given twice")
            kind, _, name = str(source).partition(":")
            row = -1
            if source in ("control", "reference"):
                if any(src == source for _, src, _ in self._layout):
                    raise ConfigError(f"{where}: a second {source} input (one only)")
            elif kind == "mode" and name in by_name:
                row = len(self._taps)
                self._taps.append(("mode", by_name[name], channel))
            elif kind == "fixture" and name in points:
                row = len(self._taps)
                self._taps.append(("fixture", points[name], channel))
            else:
                known = ", ".join([f"mode:{n}" for n in by_name] + [f"fixture:{n}" for n in points])
                raise ConfigError(f"{where}: names no source of plant {self._plant.name!r} "
                                  f"(control, reference, {known or 'no payload points'})")
            self._layout.append((channel, source, row))
        if not any(src == "control" for _, src, _ in self._layout):
            raise ConfigError("inputs: no 'control' input (exactly one reads the control point)")
        self._ctrl_channel = next(c for c, src, _ in self._layout if src == "control")
        self._ref_channel = next((c for c, src, _ in self._layout if src == "reference"), None)
        if self._taps and pl.control_point != "table":
            what = ", ".join(names) if names else "the monitor and fixture inputs"
            raise ConfigError(f"monitors: {what} need payload.control_point: table "
                              f"(it is {pl.control_point!r})")
        channels = [c for c, _, _ in self._layout]
        for i, f in enumerate(self._faults):
            if f.input is not None and f.input not in channels:
                raise ConfigError(f"faults[{i}] {f.kind}: input = {f.input} is not an input of "
                                  f"the simulated rig (inputs: {', '.join(map(str, channels))})")
        self._mon_idx = self._taps  # truthy when the table acceleration is tapped
        self.monitor_names = names
        self._n_monitors = len(names)
        self._mon_sos = [self._monitor_sos(t, 1.0) for t in self._taps]
        self._mon_zi = [np.zeros((1, sos.shape[0], 2)) for sos in self._mon_sos]
        self._mon_f_factor = 1.0
        streams = np.random.SeedSequence(seed, spawn_key=(7,)).spawn(max(len(self._taps), 1))
        self._mon_rng = [np.random.default_rng(st) for st in streams[:len(self._taps)]]
        bursts = np.random.SeedSequence(seed, spawn_key=(9,)).spawn(len(self._layout))
        self._row_burst_rng = {c: np.random.default_rng(st)
                               for (c, _, _), st in zip(self._layout, bursts, strict=True)}
        self._tap_fs = np.empty((len(self._taps), 0))
        #: Monitor signals (FS), one row per name of ``monitors``, of the last ``process`` call.
        self.last_monitor_fs = np.empty((len(names), 0))

    def _setup_reference(self, seed: int | None) -> None:
        """The loopback of the drive to the reference input: card out -> cable -> card in."""
        card = self._plant.card
        self._ref_gain = card.out_v_per_fs / card.in_v_per_fs
        self._ref_sos = highpass_sos([(card.out_highpass_hz, 1), (card.in_highpass_hz, 1)],
                                     1.0, self._fs)
        self._ref_zi = None if self._ref_sos is None else np.zeros((1, self._ref_sos.shape[0], 2))
        self._ref_rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(10,)))
        self._ref_fs = np.empty(0)

    def _monitor_sos(self, tap: tuple[str, int, int | None], f_factor: float) -> np.ndarray:
        """Table m/s² -> tap FS: the mode's transmissibility (or the fixture point's factor),
        then the sensor chain."""
        kind, j, _ = tap
        tf = mode_transmissibility_tf if kind == "mode" else fixture_point_tf
        b, a = tf(self._plant, j, f_factor=f_factor)
        bz, az = signal.bilinear(b, a, self._fs)
        sections = [signal.tf2sos(bz, az)]
        gain = self._down_gain / G0_M_S2
        sections.append(self._down if self._down is not None
                        else np.array([[self._down_gain, 0.0, 0.0, 1.0, 0.0, 0.0]]))
        sos = np.vstack(sections)
        sos[0, :3] = sos[0, :3] * (gain / self._down_gain)  # m/s² in: the chain expects g
        return np.ascontiguousarray(sos)

    def _input_state(self, channel: int | None, a: int) -> FaultState:
        """The faults on one input other than the control (None: a plain monitor, none)."""
        return _NEUTRAL if channel is None else fault_state(self._faults, a, (channel,))

    def _monitor_piece(self, acc: np.ndarray, f_factor: float, a: int) -> None:
        """Tap signals (before noise) for table acceleration ``acc`` (m/s²) from sample ``a``;
        a tap's own ``sensor_detached`` feeds it zeros, its ``sensor_gain`` scales it."""
        if f_factor != self._mon_f_factor:  # resonance_shift: the modes move, states stay
            self._mon_sos = [self._monitor_sos(t, f_factor) for t in self._taps]
            self._mon_f_factor = f_factor
        piece = np.empty((len(self._taps), acc.size))
        for k, (sos, zi) in enumerate(zip(self._mon_sos, self._mon_zi, strict=True)):
            st = self._input_state(self._taps[k][2], a)
            piece[k] = 0.0 if st.detached else acc
            sosfilt_inplace(sos, piece[k:k + 1], zi)
            if st.sensor_gain != 1.0:
                piece[k] *= st.sensor_gain
        self._mon_pieces.append(piece)

    def _row_faults(self, row: np.ndarray, channel: int | None, a0: int) -> None:
        """Noise bursts and dropouts of one input other than the control, in place."""
        if channel is None or not self._faults:
            return
        pos, end = a0, a0 + row.size
        while pos < end:
            stop = min(end, self._next_boundary(pos))
            st = fault_state(self._faults, pos, (channel,))
            seg = row[pos - a0:stop - a0]
            if st.burst_var > 0:
                seg += math.sqrt(st.burst_var) * self._row_burst_rng[channel].standard_normal(
                    seg.size)
            if st.dropout:
                seg[:] = 0.0
            pos = stop

    def _dac_gain_db(self, a0: int, n: int) -> np.ndarray | None:
        """The ``dac_gain`` faults' gain of the card output, dB per sample (None: none)."""
        faults = [f for f in self._faults if f.kind == "dac_gain"]
        if not faults:
            return None
        t = np.arange(a0, a0 + n, dtype=float)
        db = np.zeros(n)
        for f in faults:
            if f.end == math.inf:
                db += f.value * (t >= f.start)
            else:  # a drift: linear in dB from 0 at the start to value at the end, then held
                db += f.value * np.clip((t - f.start) / (f.end - f.start), 0.0, 1.0)
        return db

    def _reference_block(self, d: np.ndarray, a0: int) -> np.ndarray:
        """The reference input (FS) for the drive ``d`` (FS, clipped and delayed like the
        control path): ``d out_v_per_fs / in_v_per_fs`` through the card's output and input
        high-passes, the card's input noise, clipped at ±1 FS."""
        x = np.empty((1, d.size))
        x[0] = d * self._ref_gain  # d carries the dac_gain faults already
        if self._ref_sos is not None:
            sosfilt_inplace(self._ref_sos, x, self._ref_zi)
        r = x[0]
        ch = self._ref_channel
        pos, end = a0, a0 + d.size
        while self._faults and pos < end:  # the reference's own detached/gain faults
            stop = min(end, self._next_boundary(pos))
            st = fault_state(self._faults, pos, (ch,))
            if st.detached or st.sensor_gain != 1.0:
                r[pos - a0:stop - a0] *= 0.0 if st.detached else st.sensor_gain
            pos = stop
        if self._card_noise_fs > 0:
            r += self._card_noise_fs * self._ref_rng.standard_normal(d.size)
        self._row_faults(r, ch, a0)
        return self._clip(r, 1.0, "input")

    # -- properties ---------------------------------------------------------------------------
    @property
    def plant(self) -> Plant:
        """The simulated plant."""
        return self._plant

    @property
    def fs_hz(self) -> float:
        """Sample rate in Hz."""
        return self._fs

    @property
    def calibration(self) -> ChainCalibration:
        """The simulation's truth of the chain units and loop delay."""
        p = self._plant
        return ChainCalibration(
            out_v_per_fs=p.card.out_v_per_fs,
            in_v_per_fs=p.card.in_v_per_fs,
            accel_mv_per_g=p.accelerometer.sens_mv_per_g,
            loop_delay_samples=p.card.delay_samples,
            calibrated=True,
            source=f"sim:{p.name}",
            inputs=tuple(InputChannelCal(c, p.card.in_v_per_fs, None if src == "reference"
                                         else p.accelerometer.sens_mv_per_g)
                         for c, src, _ in self._layout) if len(self._layout) > 1 else (),
        )

    @property
    def status(self) -> SimStatus:
        """Counts, peaks and the state of protections and faults so far."""
        c = self._counts
        return SimStatus(
            t_s=self._n / self._fs,
            samples=self._n,
            excursion_peak_m=self._x_peak if self._motor else None,
            excursion_last_peak_m=self._x_last if self._motor else None,
            xmax_exceeded_samples=c["xmax"],
            current_peak_a=self._i_peak if self._motor else None,
            amp_tripped=self._tripped_at is not None,
            amp_trip_t_s=None if self._tripped_at is None else self._tripped_at / self._fs,
            drive_clipped_samples=c["drive"],
            amp_clipped_samples=c["amp"],
            input_clipped_samples=c["input"],
            re_ohm_now=self._re_now,
            coil_rise_k=self._rise_k if self._heat is not None else None,
            active_faults=tuple(sorted({f.kind for f in self._active(self._n)})),
        )

    # -- transfer function --------------------------------------------------------------------
    def frf(self, f_hz: Any) -> np.ndarray:
        """FRF drive FS -> response FS of the discrete system as simulated, delay included.

        It reflects the present coil resistance and the ``resonance_shift``, ``plant_gain`` and
        ``sensor_gain`` faults in effect now; clipping, protections and on/off faults (trip,
        ``sensor_detached``, ``dropout``) are not in it.
        """
        f = np.asarray(f_hz, dtype=float)
        w = 2.0 * math.pi * f / self._fs
        z = np.exp(1j * w.ravel())
        h = self._model.response(z)[2] / G0_M_S2
        for sos, gain in ((self._up, self._up_gain), (self._down, self._down_gain)):
            h = h * (gain if sos is None else sos_freqz(sos, w.ravel()))
        st = self._state(self._n)
        h = h * st.plant_gain * st.sensor_gain * z ** (-self._plant.card.delay_samples)
        return h.reshape(f.shape)

    # -- processing -----------------------------------------------------------------------------
    def process(self, drive_fs: Any) -> np.ndarray:
        """Response (FS) to one drive block (FS), same length; the state carries over.

        Raises
        ------
        ValueError
            If ``drive_fs`` is not one-dimensional.
        """
        d = np.asarray(drive_fs, dtype=float)
        if d.ndim != 1:
            raise ValueError(f"drive_fs must be one-dimensional, got shape {d.shape}")
        n = d.size
        if n == 0:
            return np.empty(0)
        d = self._clip(d, 1.0, "drive")
        if self._delay.size:
            joined = np.concatenate((self._delay, d))
            d, self._delay = joined[:n], joined[n:]
        db = self._dac_gain_db(self._n, n)
        if db is not None:  # the card's output drifts: the amplifier and the loopback see it
            d = d * 10.0 ** (db / 20.0)
        self._x_last = 0.0
        self._mon_pieces: list[np.ndarray] = []
        stop = self._next_boundary(self._n)
        if stop >= self._n + n:  # one fault state for the whole block (the usual case)
            out = self._segment(d, self._n)
        else:
            out = np.empty(n)
            pos = 0
            while pos < n:
                start = self._n + pos
                stop = min(self._n + n, self._next_boundary(start))
                out[pos:stop - self._n] = self._segment(d[pos:stop - self._n], start)
                pos = stop - self._n
        self._n += n
        if self._taps:
            mon = np.concatenate(self._mon_pieces, axis=1)
            for k, rng in enumerate(self._mon_rng):  # each monitor's sensor and card noise
                noise_rms = math.hypot(self._sensor_noise_fs, self._card_noise_fs)
                if noise_rms > 0:
                    mon[k] += noise_rms * rng.standard_normal(n)
                self._row_faults(mon[k], self._taps[k][2], self._n - n)
            self._tap_fs = np.clip(mon, -1.0, 1.0)
            self.last_monitor_fs = self._tap_fs[:self._n_monitors]
        if self._ref_channel is not None:
            self._ref_fs = self._reference_block(d, self._n - n)
        return out

    def process_inputs(self, drive_fs: Any) -> np.ndarray:
        """Every input (FS) for one drive block (FS): ``(n_inputs, n)``, rows in the order of
        :attr:`input_channels` (see ``inputs`` of the constructor); the control row is what
        :meth:`process` returns."""
        out = self.process(drive_fs)
        rows = np.empty((len(self._layout), out.size))
        for k, (_, source, row) in enumerate(self._layout):
            if out.size == 0:
                break
            if source == "control":
                rows[k] = out
            elif source == "reference":
                rows[k] = self._ref_fs
            else:
                rows[k] = self._tap_fs[row]
        return rows

    @property
    def input_channels(self) -> tuple[int, ...]:
        """The input channels (counted from 1) of the rows of :meth:`process_inputs`."""
        return tuple(c for c, _, _ in self._layout)

    @property
    def input_sources(self) -> tuple[str, ...]:
        """What each row of :meth:`process_inputs` reads (``control``, ``mode:NAME``, ...)."""
        return tuple(src for _, src, _ in self._layout)

    def _clip(self, x: np.ndarray, limit: float, counter: str) -> np.ndarray:
        """``x`` clipped to ±limit, counting the samples beyond."""
        if x.size == 0 or max(float(x.max()), -float(x.min())) <= limit:
            return x
        self._counts[counter] += int(np.count_nonzero(np.abs(x) > limit))
        return np.clip(x, -limit, limit)

    def _next_boundary(self, a: int) -> int:
        nxt = math.inf
        for b in self._bounds:
            if b > a:
                nxt = b
                break
        return int(min(nxt, a + 10**12))

    def _active(self, a: int) -> list[ScheduledFault]:
        return active_faults(self._faults, a)

    def _state(self, a: int) -> FaultState:
        return fault_state(self._faults, a, (None, self._ctrl_channel))

    def _update_heat(self, a: int) -> None:
        """At a thermal step boundary: mean coil power over the last step -> temperature, Re."""
        h = self._heat
        if h is None or a == 0 or a % self._n_th:
            return
        # An elementwise square and a pairwise sum, not BLAS dot (threaded BLAS burns CPU).
        power_w = float(np.square(self._th_buf).sum()) / self._n_th * self._re_now
        target = power_w * h.thermal_resistance_k_per_w
        decay = math.exp(-self._n_th / (self._fs * h.time_constant_s))
        self._rise_k = target + (self._rise_k - target) * decay
        self._re_now = self._re0 * (1.0 + h.tempco_per_k * self._rise_k)

    def _build_model(self, re_ohm: float | None, f_factor: float) -> None:
        """The shaker model (modal form and output cascades) for this coil resistance and modal
        frequency factor; the acceleration cascade is followed by the sensor-chain sections."""
        self._model = ModalSystem(*electromechanical_ss(
            self._plant, re_ohm=re_ohm, f_factor=f_factor), self._fs)
        if f_factor not in self._roots:  # the zeros do not move with the coil resistance
            self._roots[f_factor] = output_roots(electromechanical_tf(
                self._plant, re_ohm=re_ohm, f_factor=f_factor), self._model.n, self._fs)
        self._cascades = MotorCascades(self._model, self._roots[f_factor])
        self._n_acc = self._cascades.sos[2].shape[0]
        self._acc_sos = np.ascontiguousarray(np.vstack((self._cascades.sos[2], self._tail)))
        # No section with memory: each is y = b0 x (its state stays zero).
        self._acc_static = not np.any(self._acc_sos[:, [1, 2, 4, 5]])

    def _rebuild(self, re_ohm: float | None, f_factor: float, u0: float) -> None:
        """Swap the shaker model at the sample whose input is ``u0``, keeping the physical state
        (and the sensor chain's state)."""
        x_phys = self._model.physical(self._cascades.to_modal(self._states), u0)
        tail_zi = self._states[2][:, self._n_acc:]
        self._build_model(re_ohm, f_factor)
        states = self._cascades.from_modal(self._model.modal(x_phys, u0))
        states[2] = np.ascontiguousarray(np.concatenate((states[2], tail_zi), axis=1))
        self._states = states

    def _set_sensor_gain(self, gain: float) -> None:
        """Put the sensor_gain fault's factor into the sensor chain's first section."""
        if gain != self._tail_sensor_gain:
            self._tail[0, :3] = self._tail_b0 * gain
            self._acc_sos[self._n_acc, :3] = self._tail[0, :3]
            self._tail_sensor_gain = gain

    def _run(self, r: int, v: np.ndarray, out: np.ndarray, sections: slice = slice(None)
             ) -> np.ndarray:
        """Output ``r`` of the cascades (``sections`` of them) for input ``v``, into ``out``
        (a ``(1, n)`` row of a work array); the state carries over."""
        sos, zi = (self._cascades.sos[r], self._states[r]) if r < 2 else \
            (self._acc_sos[sections], self._states[2][:, sections])
        if self._acc_static and r == 2:  # gains only (ideal shaker, DC-coupled sensor chain)
            np.multiply(v, sos[0, 0], out=out[0])
            for b0 in sos[1:, 0]:
                out[0] *= b0
            return out[0]
        out[0] = v
        sosfilt_inplace(sos, out, zi)
        return out[0]

    def _motor_piece(self, v: np.ndarray, a: int, st: FaultState, outs: np.ndarray) -> None:
        """Shaker and sensor chain for amplifier volts ``v`` from rig sample ``a``.

        Writes coil current, table excursion and the response before noise (FS) into the rows
        0, 1 and 3 of ``outs`` (row 2 holds the acceleration where the Xmax compression needs
        it). Updates the coil temperature on a step boundary, rebuilds the model (carrying the
        physical state) when Re or the modal frequencies moved, and trips the amplifier on the
        first sample whose current exceeds ``i_max_a`` (the piece is then run again with 0 V
        from the next sample on).
        """
        self._update_heat(a)
        if self._tripped_at is not None and self._tripped_at <= a:
            v = np.zeros(v.size)
        rel = 0.0 if self._re0 is None else abs(self._re_now - self._re_model) / self._re0
        if st.f_factor != self._f_factor or rel > RE_STEP:
            self._rebuild(self._re_now, st.f_factor, float(v[0]))
            self._f_factor, self._re_model = st.f_factor, self._re_now
        self._set_sensor_gain(st.sensor_gain)
        x, x_peak = None, 0.0
        if self._motor:
            i_max = self._plant.amplifier.i_max_a
            can_trip = i_max is not None and self._tripped_at is None
            saved = [None if zi is None else zi.copy() for zi in self._states] if can_trip \
                else self._states
            cur = self._run(0, v, outs[0:1])
            i_peak = _peak(cur)
            if can_trip and i_peak > i_max:
                k = int(np.argmax(np.abs(cur) > i_max))
                self._tripped_at = a + k + 1
                v = v.copy()
                v[k + 1:] = 0.0
                self._states = saved
                i_peak = _peak(self._run(0, v, outs[0:1]))
            x = self._run(1, v, outs[1:2])
            x_peak = _peak(x)
            self._i_peak = max(self._i_peak, i_peak)
            self._x_peak = max(self._x_peak, x_peak)
            self._x_last = max(self._x_last, x_peak)
        xmax = self._plant.shaker.xmax_m
        squeeze = x is not None and xmax is not None and x_peak > xmax
        if not (squeeze or st.detached or self._mon_idx):  # shaker and sensor chain in one pass
            self._run(2, v, outs[3:4])
            return
        acc = self._run(2, v, outs[2:3], slice(None, self._n_acc))
        if squeeze:
            ax = np.abs(x)
            beyond = ax > xmax
            self._counts["xmax"] += int(np.count_nonzero(beyond))
            np.multiply(acc, xmax / np.where(beyond, ax, xmax), out=acc)
        if self._mon_idx:
            self._monitor_piece(acc, st.f_factor, a)
        if st.detached:
            acc[:] = 0.0
        self._run(2, acc, outs[3:4], slice(self._n_acc, None))

    def _work(self, n: int) -> tuple[np.ndarray, np.ndarray]:
        """Reused work arrays: ``(4, n)`` (current, excursion, acceleration, response) and noise
        ``(n,)`` float32."""
        if self._outs.shape[1] < n:
            cap = max(n, 2 * self._outs.shape[1])
            self._outs, self._noise = np.empty((4, cap)), np.empty(cap, np.float32)
        return self._outs[:, :n], self._noise[:n]

    def _add_noise(self, r: np.ndarray, rng: np.random.Generator, rms: float,
                   buf: np.ndarray) -> None:
        """``r += rms x`` white Gaussian noise drawn in float32 (scaled in float32), in place."""
        rng.standard_normal(r.size, dtype=np.float32, out=buf)
        np.multiply(buf, np.float32(rms), out=buf)
        r += buf

    def _segment(self, d: np.ndarray, a: int) -> np.ndarray:
        """One stretch of samples starting at rig sample ``a`` with constant fault state.

        Returns a new array; the work arrays it uses are reused from call to call.
        """
        n = d.size
        st = self._state(a)
        outs, noise = self._work(n)
        # Card output and amplifier.
        if self._up is None:
            v = d * self._up_gain
        else:
            v = np.empty((1, n))
            v[0] = d
            sosfilt_inplace(self._up, v, self._up_zi)
            v = v[0]
        if st.plant_gain != 1.0:
            v *= st.plant_gain
        vmax = self._plant.amplifier.v_out_max_v
        if vmax is not None:
            v = self._clip(v, vmax, "amp")
        if self._tripped_at is None and st.trip:
            self._tripped_at = a
        if self._tripped_at is not None:
            v = np.zeros(n)
        # Shaker, payload and sensor chain, in pieces that end on the coil-temperature steps.
        if self._heat is None:
            self._motor_piece(v, a, st, outs)
        else:
            pos = 0
            while pos < n:
                stop = min(n, ((a + pos) // self._n_th + 1) * self._n_th - a)
                self._motor_piece(v[pos:stop], a + pos, st, outs[:, pos:stop])
                j = (a + pos) % self._n_th
                self._th_buf[j:j + stop - pos] = outs[0, pos:stop]
                pos = stop
        r = outs[3].copy()
        # Sensor noise (scaled by the sensor chain) and card noise: one white source.
        noise_var = (self._sensor_noise_fs * st.sensor_gain) ** 2 + self._card_noise_fs**2
        if noise_var > 0:
            self._add_noise(r, self._rng_noise, math.sqrt(noise_var), noise)
        if st.burst_var > 0:
            self._add_noise(r, self._rng_burst, math.sqrt(st.burst_var), noise)
        if self._hum is not None:
            r += self._hum.block(n) * self.calibration.fs_per_g
        r = self._clip(r, 1.0, "input")
        if st.dropout:
            r = np.zeros(n)
        return r

_NEUTRAL = FaultState()


def sim_inputs(roles: Iterable[Any], plant: Plant) -> tuple[tuple[int, str], ...]:
    """The ``inputs`` of a :class:`SimRig` for a test definition's input roles
    (:meth:`liveshape.testdef.spec.RigSelection.input_roles`).

    The first control input is the plant's control point; every other control or monitor input
    is the payload point its ``name`` names (a fixture point, else a resonance); the reference is
    the drive's loopback.

    Raises
    ------
    ConfigError
        An input's name is no point of the plant (one line naming the input and the points).
    """
    pl = plant.payload
    points = {p.name for p in pl.fixture_points}
    modes = {r.name for r in pl.resonances}
    out: list[tuple[int, str]] = []
    first = True
    for r in roles:
        if r.role == "reference":
            out.append((r.channel, "reference"))
        elif r.role == "control" and first:
            out.append((r.channel, "control"))
            first = False
        elif r.name in points:
            out.append((r.channel, f"fixture:{r.name}"))
        elif r.name in modes:
            out.append((r.channel, f"mode:{r.name}"))
        else:
            known = ", ".join(sorted(points | modes)) or "none"
            raise ConfigError(f"rig.inputs: {r.role} input {r.channel} ({r.name!r}) names no "
                              f"point of the simulated plant {plant.name!r} (fixture points "
                              f"and resonances: {known})")
    return tuple(out)


def _peak(x: np.ndarray) -> float:
    """``max |x|`` without an array of magnitudes."""
    return max(float(x.max()), -float(x.min()))
