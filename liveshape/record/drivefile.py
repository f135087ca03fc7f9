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
regenerates the same realization from its seed. Realization ``k`` (0, 1, ...) draws from
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
from typing import Any

import numpy as np

from liveshape.dsp.nongauss import (
    GROUP_FRAMES,
    BlockKurtosis,
    check_kurtosis,
    clip_sigma_needed,
    required_crest_factor,
)
from liveshape.dsp.spectra import PsdAverager, chi2_interval_db, welch_dof
from liveshape.dsp.synth import CLIP_SIGMA_MIN, RandomPhaseSynth, SynthStats
from liveshape.errors import ConfigError

#: Lines this close to a band edge (in lines) are left out of the PSD check: the synthesis
#: window (about 3 lines wide) and the Hann estimate round the edge, the edge line reads about
#: 1.1 dB low and the next one 0.1 dB low.
EDGE_LINES = 2
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
        Kurtosis target (>= 3; default ``spec.drive.kurtosis``, 3 there: Gaussian). Above 3 the
        frames get random gains that keep the PSD (:mod:`liveshape.dsp.nongauss`), with fixed
        line amplitudes. Refused (ConfigError) when ``clip_sigma`` would cut the kurtosis by more
        than 2 % (:func:`~liveshape.dsp.nongauss.clip_sigma_needed`). The sidecar's
        ``kurtosis_check`` gives the kurtosis with its standard error from the scatter of
        independent blocks and the record length a +-0.1 accuracy (90 %) needs.
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
    lines = spec.profile.lines(fs, n_frame)
    if not np.any(lines > 0):
        raise ConfigError(
            f"fs_hz = {fs:g}, frame_length = {n_frame}: no line falls in the profile band "
            f"{spec.profile.f_min_hz:g}-{spec.profile.f_max_hz:g} Hz"
        )
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
    )
    limits = crest_min is not None or crest_max is not None
    n_tries = max_tries if limits else 1
    # With clipping, full scale is the clip level, known before synthesis: each realization is
    # written while its statistics are gathered (one pass). Without clipping a statistics pass
    # finds the peak, then the writing pass regenerates the same realization.
    one_pass = clip is not None
    full_scale_g = clip * math.sqrt(float(np.sum(lines)) * fs / n_frame) if one_pass else 0.0
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
            },
            psd_check=check[0],
            kurtosis_check=check[1],
        )
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
    except BaseException as exc:
        _unlink(tmp_wav)
        if isinstance(exc, (OSError, getattr(sf, "LibsndfileError", OSError))):
            raise ConfigError(f"--output = {str(out)!r} cannot be written ({exc})") from exc
        raise
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
    buf = np.empty(BLOCK)
    n = job.n_samples
    done = 0
    while done < n:
        m = min(BLOCK, n - done)
        x = synth.read(m, out=buf[:m])
        if sink is not None:
            sink(x)
        done += m
        report(span[0] + (span[1] - span[0]) * done / n)
    return synth.stats


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
        job.lines,
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
    if kurtosis is None:
        drive = getattr(spec, "drive", None)
        kurtosis = getattr(drive, "kurtosis", 3.0) if drive is not None else 3.0
        name = "drive.kurtosis"
    else:
        name = "kurtosis"
    k = check_kurtosis(kurtosis, name)
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
