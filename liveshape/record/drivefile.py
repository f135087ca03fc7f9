"""Offline drive files: a random record of the target ASD streamed to a WAV, with a JSON sidecar.

:func:`make_drive_file` synthesizes the test's profile in g with :class:`~liveshape.dsp.synth.
RandomPhaseSynth` (Gaussian, random-phase overlap-add), scales it so the largest sample is full
scale, and streams it block by block to a float32 mono WAV (the whole record is never in memory).
Beside the WAV it writes a JSON sidecar (same stem, ``.json``) that says how to read the numbers
(``sample * full_scale_g`` = acceleration in g) and verifies the record: rms, crest factor,
kurtosis, clipped fraction and a Welch PSD of the written signal against the target with its
chi-square band (Welch 1967; Bendat & Piersol, Random Data).

Both files are written under temporary names in the target folder and renamed when complete
(:func:`os.replace` is atomic on POSIX): an error or Ctrl-C leaves no partial output.

Scaling: no written sample exceeds ±1. With clipping (``clip_sigma``), full scale is the clip
level, ``clip_sigma`` times the target's rms, known before synthesis, so each realization is
written in one pass (over a long record the peak is the clip level anyway). Without clipping,
full scale is the realization's peak, found by a statistics pass; the writing pass then
regenerates the same realization from its seed.

Sine tones (sine-on-random) are added phase-continuously to the random after its clipping
(:class:`~liveshape.dsp.tones.ToneBank`, amplitudes in g, peak). With clipping, full scale is then
the clip level plus the sum of the tones' amplitudes (the worst case of peaks that add); the
statistics are those of the written sum; the PSD check leaves out the lines within
``TONE_LINES`` lines of each tone (of a swept tone's whole range), and the sidecar lists the
tones. Realization ``k`` (0, 1, ...) draws from
``numpy.random.default_rng(numpy.random.SeedSequence([seed, k]))``; with crest-factor limits,
realizations are tried in turn until one meets them.
"""

from __future__ import annotations

import json
import math
import os
import secrets
from collections.abc import Callable
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any, NoReturn

import numpy as np

from liveshape.dsp.moments import RunningMoments
from liveshape.dsp.nongauss import (
    GROUP_FRAMES,
    BlockKurtosis,
    check_kurtosis,
    clip_sigma_needed,
    required_crest_factor,
)
from liveshape.dsp.spectra import PsdAverager, chi2_interval_db, welch_dof
from liveshape.dsp.synth import CLIP_SIGMA_MIN, RandomPhaseSynth, SynthStats
from liveshape.dsp.tones import Tone, ToneBank, tone_line_mask
from liveshape.errors import ConfigError
from liveshape.record.diskspace import check_file_space

#: Lines this close to a band edge (in lines) are left out of the PSD check: the synthesis
#: window (about 3 lines wide) and the Hann estimate round the edge, the edge line reads about
#: 1.1 dB low and the next one 0.1 dB low.
EDGE_LINES = 2
#: Lines either side of a tone left out of the random's PSD check (a Hann-windowed tone holds
#: ±2 lines, Harris 1978; one more for margin).
TONE_LINES = 3
#: Samples per block streamed to disk (512 kB of float64).
BLOCK = 1 << 16
#: Largest data chunk of a RIFF WAV; longer records are written as RF64.
_WAV_MAX_BYTES = 0xFFFFFFFF - 1024


@dataclass(frozen=True)
class PsdCheck:
    """Welch PSD of a record against its target on the lines inside the band.

    Attributes
    ----------
    dof : float
        Equivalent DOF of the estimate (Welch 1967, Hann at 50 %).
    mean_dev_db, max_dev_db : float
        Mean of ``10 log10(estimate / target)`` and its largest absolute value, dB.
    chi2_90_lo_db, chi2_90_hi_db : float
        The 90 % range of ``10 log10(estimate / target)`` for a chi-square estimate with ``dof``
        DOF (Bendat & Piersol), e.g. -0.98 / +0.87 dB at 120 DOF.
    fraction_inside : float
        Fraction of the checked lines inside that range (about 0.9 for a correct record).
    n_lines : int
        Lines checked.
    f_lo_hz, f_hi_hz : float
        Lowest and highest line checked, Hz.
    """

    dof: float
    mean_dev_db: float
    max_dev_db: float
    chi2_90_lo_db: float
    chi2_90_hi_db: float
    fraction_inside: float
    n_lines: int
    f_lo_hz: float
    f_hi_hz: float

    def to_dict(self) -> dict[str, Any]:
        return {k: _json_number(v) for k, v in asdict(self).items()}


@dataclass(frozen=True)
class DriveFileResult:
    """What :func:`make_drive_file` wrote, and its verification (also in the sidecar).

    ``sample * full_scale_g`` is the acceleration in g: full scale is the clip level
    (``clip_sigma`` times the target grms) with clipping, else the record's peak. The statistics
    (``rms_g``, ``crest_factor``, ``kurtosis``, ``clipped_fraction``) are those of the realization
    written; float32 rounding in the file changes them by < 1e-7 relative. ``tries`` counts the
    realizations made; the one written is number ``tries - 1``.
    """

    path: str
    sidecar_path: str
    fs_hz: float
    duration_s: float
    n_samples: int
    seed: int
    frame_length: int
    full_scale_g: float
    rms_g: float
    target_grms: float
    crest_factor: float
    kurtosis: float
    clipped_fraction: float
    tries: int
    settings: dict[str, Any] = field(default_factory=dict)
    psd_check: PsdCheck | None = None
    kurtosis_check: dict[str, Any] | None = None

    def to_dict(self) -> dict[str, Any]:
        """Plain data (the sidecar's content)."""
        d = {k: _json_number(v) for k, v in asdict(self).items() if k != "psd_check"}
        d["settings"] = dict(self.settings)
        d["psd_check"] = self.psd_check.to_dict() if self.psd_check else None
        if self.kurtosis_check is None:
            d.pop("kurtosis_check", None)
        return d


def check_psd(
    f_hz: np.ndarray,
    psd_est: np.ndarray,
    psd_target: np.ndarray,
    dof: float,
    f_min_hz: float,
    f_max_hz: float,
    *,
    edge_lines: int = EDGE_LINES,
) -> PsdCheck:
    """Compare an estimated PSD with its target on the lines inside ``[f_min_hz, f_max_hz]``.

    Lines closer than ``edge_lines`` lines to either band edge are left out (the synthesis and
    estimation windows round the edges); so are lines where the target is zero.

    Parameters
    ----------
    f_hz : ndarray
        Line frequencies, Hz.
    psd_est, psd_target : ndarray
        Estimated and target one-sided PSDs on those lines (same units^2/Hz).
    dof : float
        Equivalent DOF of the estimate (> 0).
    f_min_hz, f_max_hz : float
        Band of the target, Hz.
    edge_lines : int, optional
        Lines left out at each edge.
    """
    f = np.asarray(f_hz, dtype=float)
    df = f[1] - f[0]
    est = np.asarray(psd_est, dtype=float)
    tgt = np.asarray(psd_target, dtype=float)
    sel = (
        (f >= f_min_hz + edge_lines * df - 1e-9 * df)
        & (f <= f_max_hz - edge_lines * df + 1e-9 * df)
        & (tgt > 0)
    )
    lo_true, hi_true = chi2_interval_db(dof, 0.90)
    lo, hi = -float(hi_true), -float(lo_true)  # range of the estimate about the true PSD
    n = int(np.count_nonzero(sel))
    if n == 0:
        nan = math.nan
        return PsdCheck(float(dof), nan, nan, lo, hi, nan, 0, nan, nan)
    with np.errstate(divide="ignore"):
        dev = 10.0 * np.log10(est[sel] / tgt[sel])
    return PsdCheck(
        dof=float(dof),
        mean_dev_db=float(np.mean(dev)),
        max_dev_db=float(np.max(np.abs(dev))),
        chi2_90_lo_db=lo,
        chi2_90_hi_db=hi,
        fraction_inside=float(np.mean((dev >= lo) & (dev <= hi))),
        n_lines=n,
        f_lo_hz=float(f[sel][0]),
        f_hi_hz=float(f[sel][-1]),
    )


def make_drive_file(
    spec: Any,
    out_path: str | os.PathLike[str],
    *,
    duration_s: float,
    fs_hz: float | None = None,
    seed: int | None = None,
    clip_sigma: float | None = None,
    crest_min: float | None = None,
    crest_max: float | None = None,
    max_tries: int = 10,
    kurtosis: float | None = None,
    tones: Any = (),
    progress: Callable[[float], None] | None = None,
) -> DriveFileResult:
    """Write a drive file of the spec's profile: float32 mono WAV plus a JSON sidecar.

    Parameters
    ----------
    spec : liveshape.testdef.spec.TestSpec
        The test; its profile (g²/Hz) is synthesized on ``spec.control.frame_length`` lines.
    out_path : path
        The ``.wav`` file to write; the sidecar is the same path with ``.json``. The folder must
        exist; existing files are replaced only once the new ones are complete.
    duration_s : float
        Length of the record, s (at least one frame).
    fs_hz : float, optional
        Sample rate, Hz, a whole number (default ``spec.control.fs_hz``); the profile's upper
        frequency must lie below Nyquist.
    seed : int, optional
        Base seed, >= 0 (default ``spec.seed``; if both are None a fresh seed is drawn and
        recorded in the sidecar).
    clip_sigma : float, optional
        Clip at this multiple of the rms, >= 2.5 (default ``spec.safety.clip_sigma``; None there
        means no clipping).
    crest_min, crest_max : float, optional
        Crest-factor limits (peak / rms) of the whole record; realizations are tried until one
        meets them.
    max_tries : int, optional
        Realizations to try before giving up (ConfigError naming the limits and the best crest
        factor reached).
    kurtosis : float, optional
        Kurtosis target (>= 3; default None: Gaussian, the same stream as before). Above 3 the
        frames get random gains that keep the PSD (:mod:`liveshape.dsp.nongauss`), with fixed
        line amplitudes. Refused (ConfigError) when ``clip_sigma`` would cut the kurtosis by more
        than 2 % (:func:`~liveshape.dsp.nongauss.clip_sigma_needed`). The sidecar's
        ``kurtosis_check`` gives the kurtosis with its standard error from the scatter of
        independent blocks and the record length a +-0.1 accuracy (90 %) needs.
    tones : sequence of liveshape.dsp.tones.Tone, optional
        Sine tones added to the random (amplitude in g, peak; fixed or swept; each below
        Nyquist). Recorded in the sidecar's ``settings.tones``.
    progress : callable, optional
        Called with the fraction of the planned work done (0 .. 1, never decreasing; it jumps
        ahead when a realization is accepted before ``max_tries``).

    Returns
    -------
    DriveFileResult
        Also written to the sidecar (``to_dict``). ``psd_check`` compares a Welch estimate of
        the written signal (Hann, 50 %, ``nperseg = frame_length``, accumulated while writing)
        with the target on the lines at least ``EDGE_LINES`` lines inside the band.

    Raises
    ------
    ConfigError
        A bad option (one line naming it), an unwritable path, or crest limits not met.
    """
    import soundfile as sf

    out = Path(out_path)
    opts = _resolve(spec, out, duration_s, fs_hz, seed, clip_sigma, crest_min, crest_max, max_tries)
    fs, n_frame, n_samples, base_seed, clip = opts
    kurt = _resolve_kurtosis(spec, kurtosis, clip, n_samples)
    tones = tuple(tones)
    ToneBank(tones, fs)  # every tone below Nyquist (one-line error otherwise)
    lines = spec.profile.lines(fs, n_frame)
    if not np.any(lines > 0):
        raise ConfigError(
            f"fs_hz = {fs:g}, frame_length = {n_frame}: no line falls in the profile band "
            f"{spec.profile.f_min_hz:g}-{spec.profile.f_max_hz:g} Hz"
        )
    # The WAV (float32 mono) and its sidecar must fit before anything is written.
    check_file_space(out, 4 * n_samples + 64 * 1024)
    report = _Progress(progress)

    job = _Job(
        lines=lines,
        fs_hz=fs,
        frame_length=n_frame,
        seed=base_seed,
        clip_sigma=clip,
        n_samples=n_samples,
        wav_format="RF64" if 4 * n_samples > _WAV_MAX_BYTES else "WAV",
        f_min_hz=spec.profile.f_min_hz,
        f_max_hz=spec.profile.f_max_hz,
        kurtosis=kurt,
        tones=tones,
    )
    limits = crest_min is not None or crest_max is not None
    n_tries = max_tries if limits else 1
    # With clipping, full scale is the clip level, known before synthesis: each realization is
    # written while its statistics are gathered (one pass). Without clipping a statistics pass
    # finds the peak, then the writing pass regenerates the same realization.
    one_pass = clip is not None
    tone_peak_g = float(sum(t.amplitude for t in tones))
    full_scale_g = (clip * math.sqrt(float(np.sum(lines)) * fs / n_frame) + tone_peak_g
                    if one_pass else 0.0)
    sidecar = out.with_suffix(".json")
    tmp_wav = _temp_name(out)
    try:
        best: tuple[float, float] | None = None  # (distance to the limits, crest)
        chosen: tuple[int, SynthStats, PsdCheck | None] | None = None
        for k in range(n_tries):
            if one_pass:
                span = (k / n_tries, (k + 1) / n_tries)
                st, check = _write_realization(sf, tmp_wav, job, k, full_scale_g, report, span)
            else:
                span = (0.5 * k / n_tries, 0.5 * (k + 1) / n_tries)
                st, check = _realization(job, k, report, span, None), None
            crest = st.crest_factor
            miss = max((crest_min or crest) - crest, crest - (crest_max or crest), 0.0)
            if best is None or miss < best[0]:
                best = (miss, crest)
            if miss == 0.0:
                chosen = (k, st, check)
                break
        if chosen is None:
            hint = ""
            if clip is not None and crest_min is not None and crest_min > clip:
                hint = f"; clip_sigma = {clip:g} keeps the crest factor near {clip:g}"
            raise ConfigError(
                f"crest_min = {crest_min}, crest_max = {crest_max}: no realization met the "
                f"limits in max_tries = {max_tries} (best crest factor "
                f"{best[1] if best else math.nan:.3f}, seed {base_seed}){hint}"
            )
        k, st, check = chosen
        if not one_pass:
            full_scale_g = st.peak
            st, check = _write_realization(sf, tmp_wav, job, k, full_scale_g, report, (0.5, 1.0))
        assert check is not None
        result = DriveFileResult(
            path=str(out),
            sidecar_path=str(sidecar),
            fs_hz=fs,
            duration_s=n_samples / fs,
            n_samples=n_samples,
            seed=base_seed,
            frame_length=n_frame,
            full_scale_g=full_scale_g,
            rms_g=st.rms,
            target_grms=float(spec.profile.grms),
            crest_factor=st.crest_factor,
            kurtosis=st.kurtosis,
            clipped_fraction=st.clipped_fraction,
            tries=k + 1,
            settings={
                "profile": spec.profile.name,
                "spec_source": spec.source,
                "amplitudes": "fixed" if kurt > 3.0 else "rayleigh",
                "kurtosis_target": kurt,
                "kurtosis_method": (
                    "random frame gains, gamma shares of groups of "
                    f"{GROUP_FRAMES} frames (PSD kept)" if kurt > 3.0 else "Gaussian"
                ),
                "clip_sigma": clip,
                "crest_min": crest_min,
                "crest_max": crest_max,
                "max_tries": max_tries,
                "wav_format": f"{job.wav_format} float32 mono",
                "realization_seed": f"numpy SeedSequence([{base_seed}, {k}])",
                "tones": [_tone_mapping(t) for t in tones],
                "tone_lines_excluded": TONE_LINES if tones else 0,
            },
            psd_check=check[0],
            kurtosis_check=check[1],
        )
        _publish(tmp_wav, out, sidecar, result)
    except BaseException as exc:
        _write_failed(exc, sf, tmp_wav, out)
    report(1.0)
    return result


@dataclass(frozen=True)
class _Job:
    """What every realization of one drive file shares."""

    lines: np.ndarray
    fs_hz: float
    frame_length: int
    seed: int
    clip_sigma: float | None
    n_samples: int
    wav_format: str
    f_min_hz: float
    f_max_hz: float
    kurtosis: float = 3.0
    tones: tuple[Tone, ...] = ()


def _tone_mapping(t: Tone) -> dict[str, Any]:
    d: dict[str, Any] = {"f_hz": t.f_hz, "amplitude_g": t.amplitude, "phase_rad": t.phase_rad}
    if t.swept:
        d.update(f_hi_hz=t.f_hi_hz, rate_oct_min=t.rate_oct_min)
    return d


def _check_lines(job: _Job) -> np.ndarray:
    """The target lines with those near a tone (or a sweep's range) set to 0 (not checked)."""
    lines = np.array(job.lines, dtype=float)
    if not job.tones:
        return lines
    df = job.fs_hz / job.frame_length
    f = np.arange(lines.size) * df
    for t in job.tones:
        top = t.f_hi_hz if t.swept else t.f_hz
        near = tone_line_mask(f, [t.f_hz, top], df, TONE_LINES) | ((f >= t.f_hz) & (f <= top))
        lines[near] = 0.0
    return lines


def _realization(job: _Job, k: int, report, span, sink) -> SynthStats:
    """Synthesize realization ``k`` block by block, feeding ``sink``; return its statistics."""
    rng = np.random.default_rng(np.random.SeedSequence([job.seed, k]))
    if job.kurtosis > 3.0:
        synth = RandomPhaseSynth(
            job.fs_hz,
            job.frame_length,
            seed=rng,
            clip_sigma=job.clip_sigma,
            amplitudes="fixed",
            kurtosis=job.kurtosis,
        )
    else:
        synth = RandomPhaseSynth(job.fs_hz, job.frame_length, seed=rng, clip_sigma=job.clip_sigma)
    synth.set_psd(job.lines)
    bank = ToneBank(job.tones, job.fs_hz) if job.tones else None
    moments = RunningMoments() if bank is not None else None
    buf = np.empty(BLOCK)
    n = job.n_samples
    done = 0
    while done < n:
        m = min(BLOCK, n - done)
        x = synth.read(m, out=buf[:m])
        if bank is not None:
            x += bank.read(m)
            moments.update(x)
        if sink is not None:
            sink(x)
        done += m
        report(span[0] + (span[1] - span[0]) * done / n)
    st = synth.stats
    if moments is None:
        return st
    # the statistics of the written sum (random after clipping, plus the tones)
    rms, peak = moments.rms, moments.peak
    return SynthStats(n_samples=st.n_samples, rms=rms, peak=peak,
                      crest_factor=peak / rms if rms > 0 else math.nan,
                      kurtosis=moments.kurtosis, clipped_fraction=st.clipped_fraction)


def _write_realization(sf, path, job: _Job, k: int, full_scale_g: float, report, span):
    """Write realization ``k`` scaled by ``1 / full_scale_g``; return its stats and PSD check."""
    averager = PsdAverager(job.fs_hz, job.frame_length)
    blocks = BlockKurtosis(_kurtosis_block(job))
    buf32 = np.empty(BLOCK, dtype=np.float32)
    scale = 1.0 / full_scale_g
    with sf.SoundFile(
        path, "w", samplerate=int(job.fs_hz), channels=1, format=job.wav_format, subtype="FLOAT"
    ) as wav:

        def write(x: np.ndarray) -> None:
            y = buf32[: x.size]
            np.multiply(x, scale, out=y, casting="same_kind")
            np.clip(y, -1.0, 1.0, out=y)  # guards the last rounding at the clip level
            wav.write(y)
            averager.push(x)
            blocks.push(x)

        st = _realization(job, k, report, span, write)
    check = check_psd(
        averager.f_hz,
        averager.psd,
        _check_lines(job),
        welch_dof(averager.n_segments),
        job.f_min_hz,
        job.f_max_hz,
    )
    return st, (check, _kurtosis_check(blocks))


def _kurtosis_block(job: _Job) -> int:
    """Block length of the kurtosis scatter: 2 groups of frame gains, <= 1/20 of the record."""
    hop = job.frame_length // 2
    return max(min(2 * GROUP_FRAMES * hop, job.n_samples // 20), hop)


def _kurtosis_check(blocks: BlockKurtosis) -> dict[str, Any] | None:
    try:
        r = blocks.result()
    except ConfigError:
        return None
    d = r.to_dict()
    d["accuracy_90"] = 1.645 * r.std_error
    d["samples_for_0.1"] = r.samples_for(0.1)
    return d


# ------------------------------------------------------------------------------------- helpers
def _resolve(spec, out, duration_s, fs_hz, seed, clip_sigma, crest_min, crest_max, max_tries):
    fs = float(spec.control.fs_hz if fs_hz is None else fs_hz)
    if not math.isfinite(fs) or fs <= 0 or fs != round(fs):
        raise ConfigError(f"fs_hz = {fs_hz!r} must be a whole number of Hz > 0 (a WAV rate)")
    f_max = spec.profile.f_max_hz
    if not f_max < fs / 2:
        raise ConfigError(
            f"fs_hz = {fs:g} puts Nyquist at {fs / 2:g} Hz, not above the profile's "
            f"f_max_hz = {f_max:g} (fs_hz must exceed 2 f_max_hz)"
        )
    n_frame = int(spec.control.frame_length)
    d = _finite(duration_s, "duration_s")
    n_samples = int(round(d * fs))
    if d <= 0 or n_samples < n_frame:
        raise ConfigError(
            f"duration_s = {duration_s!r} must give at least one frame "
            f"({n_frame} samples = {n_frame / fs:g} s at {fs:g} Hz)"
        )
    if seed is None:
        seed = spec.seed
    if seed is None:
        seed = int(np.random.SeedSequence().entropy % (1 << 63))
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise ConfigError(f"seed = {seed!r} must be a whole number >= 0")
    clip = spec.safety.clip_sigma if clip_sigma is None else _finite(clip_sigma, "clip_sigma")
    if clip is not None and not clip >= CLIP_SIGMA_MIN:
        raise ConfigError(
            f"clip_sigma = {clip!r} must be >= {CLIP_SIGMA_MIN} "
            f"(IEC 60068-2-64 drive crest-factor floor of {CLIP_SIGMA_MIN})"
        )
    for name, v in (("crest_min", crest_min), ("crest_max", crest_max)):
        if v is not None and not _finite(v, name) > 0:
            raise ConfigError(f"{name} = {v!r} must be > 0")
    if crest_min is not None and crest_max is not None and not crest_min <= crest_max:
        raise ConfigError(f"crest_min = {crest_min!r} is above crest_max = {crest_max!r}")
    if isinstance(max_tries, bool) or not isinstance(max_tries, (int, np.integer)) or max_tries < 1:
        raise ConfigError(f"max_tries = {max_tries!r} must be a whole number >= 1")
    if out.suffix.lower() != ".wav":
        raise ConfigError(f"--output = {str(out)!r} must end in .wav")
    folder = out.parent
    if not folder.is_dir():
        raise ConfigError(f"--output = {str(out)!r}: folder {str(folder)!r} does not exist")
    if out.is_dir():
        raise ConfigError(f"--output = {str(out)!r} is a folder, not a file")
    if not os.access(folder, os.W_OK):
        raise ConfigError(f"--output = {str(out)!r}: folder {str(folder)!r} is not writable")
    return fs, n_frame, n_samples, int(seed), clip


def _resolve_kurtosis(spec, kurtosis, clip, n_samples) -> float:
    """The kurtosis target; refuse a clip level that would cap it (one line, with numbers)."""
    name = "kurtosis"
    k = 3.0 if kurtosis is None else check_kurtosis(kurtosis, name)
    if k > 3.0 and clip is not None:
        need = clip_sigma_needed(k)
        if clip < need:
            raise ConfigError(
                f"clip_sigma = {clip:g} would cut {name} = {k:g} by more than 2 %: it needs "
                f"clip_sigma >= {need:.2f} (peaks to ~{required_crest_factor(k, n_samples):.1f} "
                f"x rms in this record; raise --clip-sigma or safety.clip_sigma)"
            )
    return k


class _Progress:
    """Calls ``progress`` with a never-decreasing fraction, at most every 0.1 %."""

    def __init__(self, callback: Callable[[float], None] | None) -> None:
        self._cb = callback
        self._last = -1.0

    def __call__(self, fraction: float) -> None:
        if self._cb is None:
            return
        f = min(max(fraction, self._last, 0.0), 1.0)
        if f - self._last >= 1e-3 or (f == 1.0 and self._last < 1.0):
            self._last = f
            self._cb(f)


def _temp_name(path: Path) -> str:
    """Create an empty, unique temporary file beside ``path`` (mode 0666 less the umask)."""
    tmp = str(path.with_name(f".{path.name}.{os.getpid()}.{secrets.token_hex(4)}.tmp"))
    try:
        fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666)
    except OSError as exc:
        raise ConfigError(f"--output = {str(path)!r} cannot be written ({exc.strerror})") from None
    os.close(fd)
    return tmp


def _unlink(path: str) -> None:
    try:
        os.unlink(path)
    except FileNotFoundError:
        pass


def _finite(value: Any, name: str) -> float:
    try:
        x = float(value)
    except (TypeError, ValueError):
        raise ConfigError(f"{name} = {value!r} is not a number") from None
    if not math.isfinite(x):
        raise ConfigError(f"{name} = {value!r} is not a finite number")
    return x


def _json_number(v: Any) -> Any:
    if isinstance(v, float) and not math.isfinite(v):
        return None
    return v


# ------------------------------------------------------------------- drive files from a run
@dataclass(frozen=True)
class RunDriveFileResult:
    """What :func:`make_run_drive_file` wrote (also the sidecar's content, ``to_dict``)."""

    path: str
    sidecar_path: str
    source_run: str
    source_status: str
    source_update: int
    spec_file: str | None
    spec_sha256: str | None
    calibration: dict[str, Any] | None
    fs_hz: float
    frame_length: int
    duration_s: float
    n_samples: int
    seed: int
    clip_sigma: float | None
    rms_fs: float
    target_rms_fs: float
    peak_fs: float
    crest_factor: float
    psd_check: PsdCheck
    playback: str = "open-loop: the run's last equalized drive, no control during playback"
    units: str = "sample = drive in FS (full scale of the run's output), as the run played it"

    def to_dict(self) -> dict[str, Any]:
        d = {k: _json_number(v) for k, v in asdict(self).items() if k != "psd_check"}
        d["psd_check"] = self.psd_check.to_dict()
        return d


def run_drive_psd(run: Any, frame_length: int) -> tuple[np.ndarray, int]:
    """The last update's ``new_drive_psd`` (FS²/Hz) on all ``frame_length / 2 + 1`` lines.

    Returns the PSD (zero off the band lines) and the update number it comes from. Raises
    ConfigError (one line) when the run has no update with a drive spectrum.
    """
    u = run.updates
    new = u.arrays.get("new_drive_psd") if u.n else None
    rows = [] if new is None else [i for i in range(u.n) if np.all(np.isfinite(new[i]))]
    if not rows:
        raise ConfigError(
            f"--from-run {str(run.root)!r}: the run has no drive update (no new_drive_psd in "
            "updates/); nothing to export"
        )
    i = rows[-1]
    df = run.fs_hz / frame_length
    k = np.rint(np.asarray(u.f_hz) / df).astype(int)
    if np.any(np.abs(k * df - u.f_hz) > 1e-6 * df) or k.min() < 0 or k.max() > frame_length // 2:
        raise ConfigError(
            f"--from-run {str(run.root)!r}: update lines are not on the {df:g} Hz grid of "
            f"frame_length = {frame_length}"
        )
    psd = np.zeros(frame_length // 2 + 1)
    psd[k] = np.maximum(new[i], 0.0)
    return psd, int(u.index[i])


def make_run_drive_file(
    run_dir: str | os.PathLike[str],
    out_path: str | os.PathLike[str],
    *,
    duration_s: float,
    seed: int | None = None,
    force: bool = False,
) -> RunDriveFileResult:
    """Write a run's final equalized drive as a float32 WAV in FS with a JSON sidecar.

    The drive spectrum is the last update's ``new_drive_psd`` (FS²/Hz on the band lines, read
    with :func:`liveshape.record.runfolder.load_run`), synthesized Gaussian on the run's
    ``control.frame_length`` lines at its sample rate (:class:`RandomPhaseSynth`, clipped at
    the run spec's ``safety.clip_sigma``). Samples are the drive in FS at the level the run
    played, for open-loop playback on the same rig and calibration. Refused (ConfigError, one
    line): a run with no update, or a run that did not complete (aborted, stopped, killed)
    unless ``force``; a drive whose peaks would pass full scale or the run's
    ``safety.drive_peak_max_fs``.
    """
    import soundfile as sf

    from liveshape.record.runfolder import load_run

    run = load_run(run_dir)
    if run.status != "completed" and not force:
        raise ConfigError(
            f"--from-run {str(run.root)!r}: the run's status is {run.status!r}, not "
            "'completed'; its last drive may not be equalized (--force exports it anyway)"
        )
    control = run.spec.get("control") or {}
    safety = run.spec.get("safety") or {}
    n_frame = int(control.get("frame_length", 0) or 0)
    fs = run.fs_hz
    if n_frame < 4 or not math.isfinite(fs) or fs != round(fs):
        raise ConfigError(
            f"--from-run {str(run.root)!r}: spec.yaml gives no usable control.frame_length / "
            "fs_hz"
        )
    psd, update = run_drive_psd(run, n_frame)
    out = Path(out_path)
    _check_out(out)
    d = _finite(duration_s, "duration_s")
    n_samples = int(round(d * fs))
    if d <= 0 or n_samples < n_frame:
        raise ConfigError(
            f"duration_s = {duration_s!r} must give at least one frame "
            f"({n_frame} samples = {n_frame / fs:g} s at {fs:g} Hz)"
        )
    if seed is None:
        seed = int(np.random.SeedSequence().entropy % (1 << 63))
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise ConfigError(f"seed = {seed!r} must be a whole number >= 0")
    clip = safety.get("clip_sigma", None)
    clip = None if clip is None else max(float(clip), CLIP_SIGMA_MIN)
    peak_max = float(safety.get("drive_peak_max_fs", 1.0) or 1.0)
    target_rms = math.sqrt(float(np.sum(psd)) * fs / n_frame)
    if clip is not None and clip * target_rms > min(peak_max, 1.0):
        raise ConfigError(
            f"--from-run {str(run.root)!r}: the drive's clip level {clip:g} x {target_rms:.4g} "
            f"FS rms passes drive_peak_max_fs = {peak_max:g}; this drive cannot be exported"
        )
    synth = RandomPhaseSynth(
        fs, n_frame, seed=np.random.default_rng(np.random.SeedSequence([int(seed), 0])),
        clip_sigma=clip,
    )
    synth.set_psd(psd)
    averager = PsdAverager(fs, n_frame)
    sidecar = out.with_suffix(".json")
    tmp_wav = _temp_name(out)
    fmt = "RF64" if 4 * n_samples > _WAV_MAX_BYTES else "WAV"
    try:
        buf = np.empty(BLOCK)
        with sf.SoundFile(
            tmp_wav, "w", samplerate=int(fs), channels=1, format=fmt, subtype="FLOAT"
        ) as wav:
            done = 0
            while done < n_samples:
                m = min(BLOCK, n_samples - done)
                x = synth.read(m, out=buf[:m])
                wav.write(x.astype(np.float32))
                averager.push(x)
                done += m
        st = synth.stats
        if st.peak > min(peak_max, 1.0):
            raise ConfigError(
                f"--from-run {str(run.root)!r}: the drive's peak {st.peak:.4g} FS passes "
                f"drive_peak_max_fs = {peak_max:g} (no clip level in the run's spec)"
            )
        band = np.flatnonzero(psd)
        check = check_psd(
            averager.f_hz, averager.psd, expected_welch_psd(psd, n_frame),
            welch_dof(averager.n_segments),
            float(band[0]) * fs / n_frame, float(band[-1]) * fs / n_frame,
        )
        result = RunDriveFileResult(
            path=str(out),
            sidecar_path=str(sidecar),
            source_run=str(run.root.resolve()),
            source_status=run.status,
            source_update=update,
            spec_file=run.meta.get("spec_file"),
            spec_sha256=run.meta.get("spec_sha256"),
            calibration=run.meta.get("calibration"),
            fs_hz=fs,
            frame_length=n_frame,
            duration_s=n_samples / fs,
            n_samples=n_samples,
            seed=int(seed),
            clip_sigma=clip,
            rms_fs=st.rms,
            target_rms_fs=target_rms,
            peak_fs=st.peak,
            crest_factor=st.crest_factor,
            psd_check=check,
        )
        _publish(tmp_wav, out, sidecar, result)
    except BaseException as exc:
        _write_failed(exc, sf, tmp_wav, out)
    return result


def expected_welch_psd(psd: np.ndarray, frame_length: int) -> np.ndarray:
    """Expected Welch estimate (Hann, 50 %, ``nperseg = frame_length``) of the synthesized drive.

    A line ``j`` of an overlap-added frame (sine window ``w_s``, hop ``N / 2``) seen through a
    Hann segment ``h`` aligned with the frames leaks to line ``k`` with the weight
    ``K(k - j) = sum_o |DFT_{k-j}(h(n) w_s(n - o))|^2`` over the three frames ``o`` that overlap
    the segment (independent frames: powers add), normalized to sum 1. A jagged drive spectrum
    (an equalized drive scatters from line to line) is rounded by this kernel, about 3 lines wide,
    so this, not the raw line spectrum, is what a Welch estimate of the file should match.
    """
    from liveshape.dsp.synth import sine_window

    n = int(frame_length)
    hop = n // 2
    h = 0.5 - 0.5 * np.cos(2.0 * np.pi * np.arange(n) / n)  # periodic Hann, as scipy's welch
    ws = sine_window(n)
    idx = np.arange(n)
    kern = np.zeros(n)
    for o in (-hop, 0, hop):
        m = idx - o
        inside = (m >= 0) & (m < n)
        g = np.where(inside, h * ws[np.clip(m, 0, n - 1)], 0.0)
        kern += np.abs(np.fft.fft(g)) ** 2
    kern /= kern.sum()
    p = np.asarray(psd, dtype=float)
    full = np.zeros(n)
    full[: p.size] = p
    # circular convolution over the N-point line circle; the one-sided band sits far from DC
    # and Nyquist, where wrap-around is negligible
    out = np.real(np.fft.ifft(np.fft.fft(full) * np.fft.fft(kern)))
    return np.maximum(out[: p.size], 0.0)


def _check_out(out: Path) -> None:
    if out.suffix.lower() != ".wav":
        raise ConfigError(f"--output = {str(out)!r} must end in .wav")
    folder = out.parent
    if not folder.is_dir():
        raise ConfigError(f"--output = {str(out)!r}: folder {str(folder)!r} does not exist")
    if out.is_dir():
        raise ConfigError(f"--output = {str(out)!r} is a folder, not a file")


def _publish(tmp_wav: Path, out: Path, sidecar: Path, result: Any) -> None:
    """Write the sidecar of the finished temporary WAV, then move both into place (the WAV
    first: a sidecar never names a file that is not there)."""
    tmp_json = _temp_name(sidecar)
    try:
        with open(tmp_json, "w", encoding="utf-8") as fh:
            json.dump(result.to_dict(), fh, indent=2, allow_nan=False)
            fh.write("\n")
        os.replace(tmp_wav, out)
        os.replace(tmp_json, sidecar)
    except BaseException:
        _unlink(tmp_json)
        raise


def _write_failed(exc: BaseException, sf: Any, tmp_wav: Path, out: Path) -> NoReturn:
    """Remove the temporary WAV and re-raise ``exc``; a file error becomes one line."""
    _unlink(tmp_wav)
    if isinstance(exc, (OSError, getattr(sf, "LibsndfileError", OSError))):
        raise ConfigError(f"--output = {str(out)!r} cannot be written ({exc})") from exc
    raise exc
