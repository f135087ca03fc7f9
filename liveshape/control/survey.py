"""A low-level resonance survey: flat random drive, H1 and coherence, resonances.

Pure. :class:`SurveySource` has the controller's block interface (``exchange``,
``request_stop``, ``finished``, ``result``), so the simulated rig, the JACK virtual rig and a
real card run it the same way as a test. It plays band-limited flat random noise at
``level_fs`` rms (faded in and out, per-sample ramps) for ``duration_s``, keeps the drive and the
response in preallocated buffers, and at the end estimates the loop delay (cross-correlation),
the FRF H1 and the coherence (Welch, Hann 50 %, aligned by the delay) and finds the resonances
(:func:`liveshape.dsp.resonance.find_resonances`).

With several inputs (``roles``, the rig's :class:`~liveshape.testdef.inputs.InputRole` list, and
``(samples, inputs)`` response blocks, columns in the roles' order) the first control input is
analysed exactly as the one input of a plain survey; every other input adds its own FRF from the
drive (same loop delay: one card samples every input), its resonances, and for control and
monitor inputs the transmissibility over the first control input, ``T = G_cm / G_cc`` with the
coherence ``|G_cm|² / (G_cc G_mm)`` (Bendat & Piersol, *Random Data*, 4th ed., §9.1). A
reference input (the drive's loopback) gives the FRF from the digital drive to the drive as it
left the card, in drive FS per FS: the card's output gain per line.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from liveshape.control.runstate import frozen_array
from liveshape.dsp.delay import estimate_delay
from liveshape.dsp.resonance import Resonance, compare_resonances, find_resonances
from liveshape.dsp.spectra import CrossSpectrum, welch_dof
from liveshape.dsp.synth import RandomPhaseSynth
from liveshape.errors import ConfigError

__all__ = ["InputSurvey", "SurveyResult", "SurveySettings", "SurveySource", "compare_inputs"]

#: Fade in and out of the survey drive, s.
SURVEY_FADE_S = 0.25


@dataclass(frozen=True)
class SurveySettings:
    """What a survey plays and how it is analysed.

    ``level_fs`` drive rms (FS), ``duration_s`` of drive at that level, ``band_hz`` of the flat
    noise, ``frame_length`` of the analysis (lines ``fs/frame_length`` apart), ``seed``,
    ``max_delay_s`` searched for the loop delay.
    """

    fs_hz: float
    level_fs: float
    duration_s: float
    band_hz: tuple[float, float]
    frame_length: int = 32768
    seed: int | None = 1
    max_delay_s: float = 0.5

    def __post_init__(self) -> None:
        if not (0 < self.level_fs <= 0.5):
            raise ConfigError(f"survey: level = {self.level_fs!r} FS rms must be in (0, 0.5]")
        if not (1.0 <= self.duration_s <= 3600.0):
            raise ConfigError(f"survey: duration = {self.duration_s!r} s must be 1-3600 s")
        lo, hi = self.band_hz
        if not (0 < lo < hi <= 0.45 * self.fs_hz):
            raise ConfigError(f"survey: band {lo:g}-{hi:g} Hz must lie in (0, 0.45 fs]")
        n = self.frame_length
        if n < 256 or n & (n - 1):
            raise ConfigError(f"survey: frame_length = {n!r} must be a power of 2 >= 256")
        if self.duration_s * self.fs_hz < 4 * n:
            raise ConfigError(
                f"survey: duration = {self.duration_s:g} s holds fewer than 4 frames of "
                f"{n} samples (use a longer survey or a shorter frame)")


@dataclass(frozen=True)
class InputSurvey:
    """What a survey measured at one input of a rig with several inputs.

    ``h1`` is the FRF from the drive (g/FS; a reference input: drive FS per drive FS, the card's
    output gain) with its ``coherence`` on the survey's lines and its ``resonances``;
    ``trans`` the transmissibility over the first control input (g/g) with ``trans_coherence``
    and ``trans_resonances`` (None and empty for the first control input and the reference);
    ``response_rms_fs`` over the analysed stretch.
    """

    name: str
    channel: int
    role: str
    h1: np.ndarray
    coherence: np.ndarray
    resonances: tuple[Resonance, ...]
    trans: np.ndarray | None
    trans_coherence: np.ndarray | None
    trans_resonances: tuple[Resonance, ...]
    response_rms_fs: float

    @property
    def units(self) -> str:
        """Units of :attr:`h1` (``g/FS``, or ``FS/FS`` for the reference)."""
        return "FS/FS" if self.role == "reference" else "g/FS"


@dataclass(frozen=True)
class SurveyResult:
    """What a survey measured.

    ``f_hz``, ``h1`` (g/FS with the calibration given, else response FS per drive FS),
    ``coherence`` on the band lines; ``dof`` of the estimate; ``delay_samples`` found;
    ``resonances``; ``status`` (``completed`` or ``stopped``) and ``stop_reason``;
    ``response_rms_fs`` and ``drive_rms_fs`` over the analysed stretch (all of the first
    control input); ``inputs``: every input of a rig with several inputs, in the roles' order
    (empty for one input).
    """

    f_hz: np.ndarray
    h1: np.ndarray
    coherence: np.ndarray
    dof: float
    delay_samples: int
    resonances: tuple[Resonance, ...]
    status: str
    stop_reason: str | None
    drive_rms_fs: float
    response_rms_fs: float
    inputs: tuple[InputSurvey, ...] = ()

    @property
    def exit_status(self) -> int:
        return 0 if self.status == "completed" else 130


class SurveySource:
    """Flat random drive in, response collected; the survey's analysis at the end.

    Parameters
    ----------
    settings : SurveySettings
    g_per_fs : float
        Response g per input FS (1.0 leaves the FRF in FS/FS).
    block_size : int
        Samples per :meth:`exchange`.
    roles : sequence of InputRole, optional
        The rig's inputs (:meth:`liveshape.testdef.spec.RigSelection.input_roles`); with more
        than one, :meth:`exchange` takes ``(samples, len(roles))`` blocks and every input is
        analysed. ``g_per_fs`` then applies to the first control input.
    calibration : ChainCalibration, optional
        With ``roles``: each input's g per FS (:meth:`g_per_fs_at`) and the reference's drive FS
        per FS (:meth:`drive_fs_per_input_fs`); None: 1.0 for every other input.
    """

    def __init__(self, settings: SurveySettings, *, g_per_fs: float = 1.0,
                 block_size: int = 1024, roles: Sequence[Any] | None = None,
                 calibration: Any = None) -> None:
        s = settings
        self.settings = s
        self.fs_hz = fs = float(s.fs_hz)
        self._g = float(g_per_fs)
        self._b = int(block_size)
        n = s.frame_length
        self._synth = RandomPhaseSynth(fs, n, seed=s.seed, gain=0.0, fade_s=SURVEY_FADE_S)
        f = self._synth.f_hz
        band = (f >= s.band_hz[0]) & (f <= s.band_hz[1])
        band[0] = band[-1] = False
        self._band = band
        psd = np.where(band, s.level_fs**2 / (np.count_nonzero(band) * self._synth.delta_f), 0.0)
        self._synth.set_psd(psd)
        self._synth.set_gain(1.0)
        self._fade = int(math.ceil(SURVEY_FADE_S * fs))
        self._max_lag = int(round(s.max_delay_s * fs))
        self._drive_end = self._fade + int(round(s.duration_s * fs))  # fade-out starts here
        total = self._drive_end + self._fade + self._max_lag + self._b
        self._drive = np.zeros(total + self._b)
        self._roles = tuple(roles) if roles is not None and len(roles) > 1 else ()
        if self._roles:
            self._primary = next(i for i, r in enumerate(self._roles) if r.role == "control")
            self._scale = [self._input_scale(r, calibration) for r in self._roles]
            self._scale[self._primary] = self._g
            self._rows = np.zeros((len(self._roles), total + self._b))
            self._resp = self._rows[self._primary]  # a view: the first control input
        else:
            self._resp = np.zeros(total + self._b)
        self._n_out = 0
        self._n_in = 0
        self._fading_out = False
        self._stop_reason: str | None = None
        self._finished = False
        self._result: SurveyResult | None = None

    @staticmethod
    def _input_scale(role: Any, calibration: Any) -> float:
        """g per FS of an accelerometer input, drive FS per FS of the reference (1.0 without a
        calibration)."""
        if calibration is None:
            return 1.0
        if role.role == "reference":
            return float(calibration.drive_fs_per_input_fs(role.channel))
        return float(calibration.g_per_fs_at(role.channel))

    @property
    def n_inputs(self) -> int:
        """Columns of the response blocks :meth:`exchange` takes (1: a 1-D block)."""
        return len(self._roles) or 1

    # -- the controller's block interface ------------------------------------------------
    @property
    def finished(self) -> bool:
        return self._finished

    @property
    def t_s(self) -> float:
        return self._n_in / self.fs_hz

    def request_stop(self, reason: str = "stop requested") -> None:
        """Fade the drive out now and end the survey (its result says ``stopped``)."""
        if self._stop_reason is None:
            self._stop_reason = reason
            self._begin_fade_out()

    def _begin_fade_out(self) -> None:
        if not self._fading_out:
            self._fading_out = True
            self._synth.set_gain(0.0)
            self._drive_end = min(self._drive_end, self._n_out)

    def exchange(self, response: np.ndarray) -> np.ndarray:
        """Take one response block, return the next drive block (FS).

        With several inputs the block is ``(samples, inputs)``, columns in the roles' order.
        """
        if self._roles:
            rows = np.asarray(response, dtype=float)
            if rows.ndim != 2 or rows.shape[1] != len(self._roles):
                raise ValueError(f"survey: response block of shape {rows.shape}; expected "
                                 f"(samples, {len(self._roles)})")
            room = self._rows.shape[1] - self._n_in
            k = min(rows.shape[0], room)
            self._rows[:, self._n_in: self._n_in + k] = rows[:k].T
        else:
            y = np.asarray(response, dtype=float).ravel()
            room = self._resp.size - self._n_in
            k = min(y.size, room)
            self._resp[self._n_in: self._n_in + k] = y[:k]
        self._n_in += k
        b = self._b
        if not self._fading_out and self._n_out + b > self._drive_end:
            self._begin_fade_out()
        x = self._synth.read(b)
        room = self._drive.size - self._n_out
        self._drive[self._n_out: self._n_out + min(b, room)] = x[: min(b, room)]
        self._n_out += b
        if self._n_in >= self._drive_end + self._fade + self._max_lag + b or room < b:
            self._finished = True
        return x

    def result(self) -> SurveyResult:
        """The survey's analysis (computed once, when asked)."""
        if self._result is None:
            self._result = self._analyse()
        return self._result

    # -- analysis ---------------------------------------------------------------------------
    def _analyse(self) -> SurveyResult:
        s = self.settings
        a, b = self._fade, self._drive_end  # the stretch at full survey level
        x = self._drive[:self._n_in]
        y = self._resp[:self._n_in]
        n = s.frame_length
        lines = np.flatnonzero(self._band)
        f = self._synth.f_hz[self._band]
        status = "completed" if self._stop_reason is None else "stopped"
        if b - a < 2 * n or y.size < b + self._max_lag:
            empty = np.zeros(0)
            return SurveyResult(frozen_array(empty), frozen_array(empty, complex),
                                frozen_array(empty), 0.0, 0, (), status, self._stop_reason,
                                math.nan, math.nan)
        m = self._max_lag
        d = estimate_delay(x[a:b + m], y[a:b + m], max_lag=m).samples
        # pairs (x(t - d), y(t)): the estimator delays x by d and drops y's first d samples
        cs = CrossSpectrum(self.fs_hz, n, delay_samples=d)
        cs.push(x[a:b + d], y[a:b + d])
        h1 = cs.h1[lines] * self._g
        coh = np.nan_to_num(cs.coherence[lines], nan=0.0)
        dof = welch_dof(cs.n_segments)
        res = find_resonances(f, h1, coh, dof, band_hz=s.band_hz)
        inputs = self._analyse_inputs(a, b, d, lines, f, dof, h1, coh, res) if self._roles \
            else ()
        return SurveyResult(
            f_hz=frozen_array(f), h1=frozen_array(h1, complex), coherence=frozen_array(coh),
            dof=float(dof), delay_samples=int(d), resonances=res, status=status,
            stop_reason=self._stop_reason,
            drive_rms_fs=float(np.sqrt(np.mean(x[a:b] ** 2))),
            response_rms_fs=float(np.sqrt(np.mean(y[a + d:b + d] ** 2))), inputs=inputs)

    def _analyse_inputs(self, a: int, b: int, d: int, lines: np.ndarray, f: np.ndarray,
                        dof: float, h1: np.ndarray, coh: np.ndarray,
                        res: tuple[Resonance, ...]) -> tuple[InputSurvey, ...]:
        """Every input's FRF from the drive, resonances and transmissibility (see the module
        docstring); the first control input's are the survey's own."""
        s = self.settings
        n = s.frame_length
        x = self._drive[:self._n_in]
        p = self._primary
        yp = self._rows[p, :self._n_in]
        out: list[InputSurvey] = []
        for i, role in enumerate(self._roles):
            ym = self._rows[i, :self._n_in]
            rms = float(np.sqrt(np.mean(ym[a + d:b + d] ** 2)))
            if i == p:
                out.append(InputSurvey(role.name, role.channel, role.role, h1, coh, res, None,
                                       None, (), rms))
                continue
            cs = CrossSpectrum(self.fs_hz, n, delay_samples=d)
            cs.push(x[a:b + d], ym[a:b + d])
            hi = cs.h1[lines] * self._scale[i]
            ci = np.nan_to_num(cs.coherence[lines], nan=0.0)
            if role.role == "reference":
                out.append(InputSurvey(role.name, role.channel, role.role,
                                       frozen_array(hi, complex), frozen_array(ci), (), None,
                                       None, (), rms))
                continue
            ri = find_resonances(f, hi, ci, dof, band_hz=s.band_hz)
            # control and this input sampled together: no delay between them
            ct = CrossSpectrum(self.fs_hz, n)
            ct.push(yp[a + d:b + d], ym[a + d:b + d])
            t = ct.h1[lines] * (self._scale[i] / self._scale[p])
            tc = np.nan_to_num(ct.coherence[lines], nan=0.0)
            rt = tuple(r for r in find_resonances(f, t, tc, dof, band_hz=s.band_hz)
                       if r.kind == "peak")
            out.append(InputSurvey(role.name, role.channel, role.role, frozen_array(hi, complex),
                                   frozen_array(ci), ri, frozen_array(t, complex),
                                   frozen_array(tc), rt, rms))
        return tuple(out)


def compare_inputs(before: Any, after: Any, *, shift_pct: float = 2.0,
                   peak_drop_db: float = 0.92) -> list[tuple[str | None, Any]]:
    """Pair the resonances of two surveys input by input.

    ``before`` and ``after`` have ``resonances`` (the first control input's) and ``inputs``
    (name -> ``{"resonances", "trans_resonances"}``; empty for one-input surveys). Returns
    ``(label, changes)`` groups (:func:`liveshape.dsp.resonance.compare_resonances`): one group
    labelled None when either survey has one input (exactly the plain compare, of the first
    control inputs); otherwise one per input of the first survey, by name, its FRF from the
    drive (label ``NAME``) and, for inputs with one, its transmissibility over the first
    control input (label ``NAME/T``). An input of the first survey missing from the second is a
    group whose every feature is flagged as not found.
    """
    kw = {"shift_pct": shift_pct, "peak_drop_db": peak_drop_db}
    bi, ai = dict(before.inputs or {}), dict(after.inputs or {})
    if not bi or not ai:
        return [(None, compare_resonances(before.resonances, after.resonances, **kw))]
    groups: list[tuple[str | None, Any]] = []
    for name, b in bi.items():
        a = ai.get(name, {"resonances": (), "trans_resonances": ()})
        groups.append((name, compare_resonances(b["resonances"], a["resonances"], **kw)))
        if b.get("trans_resonances"):
            groups.append((f"{name}/T", compare_resonances(
                b["trans_resonances"], a.get("trans_resonances") or (), **kw)))
    return groups
