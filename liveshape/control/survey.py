"""A low-level resonance survey: flat random drive, H1 and coherence, resonances.

Pure. :class:`SurveySource` has the controller's block interface (``exchange``,
``request_stop``, ``finished``, ``result``), so the simulated rig, the JACK virtual rig and a
real card run it the same way as a test. It plays band-limited flat random noise at
``level_fs`` rms (faded in and out, per-sample ramps) for ``duration_s``, keeps the drive and the
response in preallocated buffers, and at the end estimates the loop delay (cross-correlation),
the FRF H1 and the coherence (Welch, Hann 50 %, aligned by the delay) and finds the resonances
(:func:`liveshape.dsp.resonance.find_resonances`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from liveshape.control.runstate import frozen_array
from liveshape.dsp.delay import estimate_delay
from liveshape.dsp.resonance import Resonance, find_resonances
from liveshape.dsp.spectra import CrossSpectrum, welch_dof
from liveshape.dsp.synth import RandomPhaseSynth
from liveshape.errors import ConfigError

__all__ = ["SurveyResult", "SurveySettings", "SurveySource"]

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
class SurveyResult:
    """What a survey measured.

    ``f_hz``, ``h1`` (g/FS with the calibration given, else response FS per drive FS),
    ``coherence`` on the band lines; ``dof`` of the estimate; ``delay_samples`` found;
    ``resonances``; ``status`` (``completed`` or ``stopped``) and ``stop_reason``;
    ``response_rms_fs`` and ``drive_rms_fs`` over the analysed stretch.
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
    """

    def __init__(self, settings: SurveySettings, *, g_per_fs: float = 1.0,
                 block_size: int = 1024) -> None:
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
        self._resp = np.zeros(total + self._b)
        self._n_out = 0
        self._n_in = 0
        self._fading_out = False
        self._stop_reason: str | None = None
        self._finished = False
        self._result: SurveyResult | None = None

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
        """Take one response block, return the next drive block (FS)."""
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
        return SurveyResult(
            f_hz=frozen_array(f), h1=frozen_array(h1, complex), coherence=frozen_array(coh),
            dof=float(dof), delay_samples=int(d), resonances=res, status=status,
            stop_reason=self._stop_reason,
            drive_rms_fs=float(np.sqrt(np.mean(x[a:b] ** 2))),
            response_rms_fs=float(np.sqrt(np.mean(y[a + d:b + d] ** 2))))
