"""Level schedule and safety supervisor: when to step up, when to stop, and why.

Pure. Two small state machines that the controller feeds with numbers; neither touches the drive
itself (the controller ramps it down when :class:`Supervisor` returns a :class:`Trip`).

:class:`LevelSchedule` (in :mod:`liveshape.control.schedule`, re-exported here)
    Steps the test level through ``schedule.steps_db`` (e.g. −12, −9, −6, −3, 0 dB). It steps up
    only after the control has been inside tolerance (every line within its alarm limit and the
    rms within the rms alarm limit) continuously for ``hold_s``; time at full level is counted
    only at 0 dB with the gain settled there (reduced-level time is not counted toward the test
    duration; common practice).

:class:`Supervisor`
    The abort rules. Every threshold comes from ``spec.safety`` and ``spec.tolerance``:

    ==================  =======================================================================
    rule                trips when
    ==================  =======================================================================
    ``rms_abort``       control grms above target by more than ``rms_abort_db`` (update
                        estimate; also a fast check on each new Welch segment with a 5-sigma
                        statistical allowance, so a jump is caught within a segment)
    ``lines_abort``     ≥ ``abort_min_lines`` lines beyond the abort band on
                        ``abort_persist_updates`` consecutive (independent) update estimates;
                        the band is widened where the χ² scatter of the estimate alone could
                        put that many lines outside (see :func:`scatter_limits_db`)
    ``drive_limit``     drive rms at its ceiling (or peak clipped) while the control is still
                        below target by more than ``rms_alarm_db``, persistent
    ``input_overload``  ``|response| >= input_overload_fs`` on any sample
    ``loop_open``       control below what the identified FRF predicts for the drive played
                        by more than ``loop_open_db``, persistent (and the same fast
                        per-segment check as rms_abort)
    ``response_silent`` response rms below ``silent_floor_fs`` for a hop while drive is up
    ``non_finite``      a NaN or infinity in the response
    ``controller_late`` the rig reports a drive underflow (the output ran dry)
    ``connect_check``   the control channel does not respond to the low-level connection drive
    ==================  =======================================================================

Each rule has its own process exit status (:data:`EXIT_STATUS`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import special, stats

from liveshape.control.schedule import LevelSchedule
from liveshape.errors import SafetyAbort

__all__ = ["EXIT_STATUS", "RULES", "LevelSchedule", "Supervisor", "Trip", "UpdateVerdict",
           "band_sum_dof", "db_std", "exit_status", "scatter_limits_db"]

#: Exit status of a completed run.
EXIT_COMPLETED = 0
#: Exit status of a usage or configuration error (reserved for the command line).
EXIT_USAGE = 2
#: Exit status of a run stopped by Ctrl-C or SIGTERM (128 + SIGINT, shell convention).
EXIT_STOPPED = 130
#: Exit status of each safety rule.
EXIT_STATUS: dict[str, int] = {
    "rms_abort": 10,
    "lines_abort": 11,
    "drive_limit": 12,
    "input_overload": 13,
    "loop_open": 14,
    "response_silent": 15,
    "non_finite": 16,
    "controller_late": 17,
    "connect_check": 18,
    "audio_stall": 19,  # the audio stream stopped delivering input (device or server gone)
    "level_unreachable": 20,  # a step below full level lasted longer than schedule.max_step_s
    "disk_space": 21,  # free space for the record ran low, or the record could not be written
    "tone_abort": 22,  # a sine-on-random tone left its abort band (liveshape.control.tonestage)
    "input_lost": 23,  # one of several control inputs fell far below the others (inputset)
}
RULES: tuple[str, ...] = tuple(EXIT_STATUS)
#: Exit status of ``check --rig`` when the profile is infeasible on the rig, and of ``run`` when
#: it refuses such a profile before any drive (without ``--accept-infeasible``).
EXIT_INFEASIBLE = 3
#: Exit status of a run that completed but whose verdict is ``fail`` (its control was outside
#: the spec's tolerance; see :mod:`liveshape.control.verdict`).
VERDICT_FAIL_EXIT = 4

#: False-count probability per update estimate that sets the statistical widening of the
#: abort band (lines_abort): a control exactly on target shows ``abort_min_lines`` lines beyond
#: the widened band with probability at most this, from χ² scatter alone.
LINES_FALSE_ALARM = 1e-6
#: Chunk length (samples) on which silence is judged.
SILENT_CHUNK = 64
#: z of the statistical allowance of the fast rms check (one-sided normal tail 2.9e-7).
FAST_RMS_Z = 5.0
# Correlation of Hann-window periodogram values one and two lines apart, for white noise:
# w² = 3/8 − cos/2 + cos(2·)/8 so the complex correlations are −2/3 and 1/6 and the power
# correlations their squares [calc from the window's coefficients].
_HANN_RHO2 = (4.0 / 9.0, 1.0 / 36.0)
_DB = 10.0 / math.log(10.0)


def exit_status(status: str, trip: Trip | None = None) -> int:
    """Process exit status for a run ``status`` (completed | aborted | stopped)."""
    if status == "completed":
        return EXIT_COMPLETED
    if status == "stopped":
        return EXIT_STOPPED
    if status == "aborted":
        if trip is None:
            raise ValueError("an aborted run needs its trip")
        return EXIT_STATUS[trip.rule]
    raise ValueError(f"unknown run status {status!r}")


@dataclass(frozen=True)
class Trip:
    """A tripped safety rule.

    Attributes
    ----------
    rule : str
        One of :data:`RULES`.
    message : str
        One line a person reads, with the numbers.
    t_s : float
        Run time of the trip, s (samples / fs).
    detail : dict
        The numbers that tripped it, with units in the key names.
    """

    rule: str
    message: str
    t_s: float = 0.0
    detail: dict[str, Any] = field(default_factory=dict)

    def __post_init__(self) -> None:
        if self.rule not in EXIT_STATUS:
            raise ValueError(f"unknown safety rule {self.rule!r}")

    @property
    def exit_status(self) -> int:
        return EXIT_STATUS[self.rule]

    def as_error(self) -> SafetyAbort:
        return SafetyAbort(self.rule, self.message, self.detail)


# ---- statistics -----------------------------------------------------------------------------


def scatter_limits_db(
    dof: float, n_lines: int, min_lines: int, alpha: float = LINES_FALSE_ALARM
) -> tuple[float, float]:
    """How far χ² scatter alone may put ``min_lines`` of ``n_lines`` lines, in dB.

    With ``ν Ĝ/G ~ χ²_ν`` per line (Bendat & Piersol), the per-line two-sided probability ``p``
    is chosen so that the binomial probability of ``min_lines`` or more of ``n_lines`` lines
    beyond it is ``alpha`` (``scipy.special.bdtri``); the limits are the χ² quantiles at
    ``p/2`` on each side. Example: ν = 40, 338 lines, 3 lines, α = 1e-6 gives about
    −5.1/+3.4 dB, inside the usual ±6 dB abort band, so the band is not widened.

    Returns
    -------
    lo_db, hi_db : float
        Magnitudes (both > 0) of the lower and upper scatter limits in dB.
    """
    if not dof > 0:
        return math.inf, math.inf
    n = max(int(n_lines), 1)
    k = max(int(min_lines), 1)
    if k > n:
        return math.inf, math.inf
    p = float(special.bdtri(k - 1, n, 1.0 - alpha))  # P(X >= k) = alpha
    lo = stats.chi2.ppf(p / 2, dof) / dof
    hi = stats.chi2.isf(p / 2, dof) / dof
    return -_DB * math.log(lo), _DB * math.log(hi)


def band_sum_dof(psd: np.ndarray, dof: float) -> float:
    """Equivalent DOF of a sum of PSD lines, each a χ²_ν estimate (Satterthwaite).

    ``ν_eff = ν (ΣG)² / (ΣG² + 2 Σ ρ₁² G_k G_{k+1} + 2 Σ ρ₂² G_k G_{k+2})`` with the power
    correlations of neighbouring Hann lines ρ₁² = 4/9, ρ₂² = 1/36 [calc]. A flat band of M lines
    gives ``ν M / 1.94``.
    """
    g = np.asarray(psd, dtype=float)
    total = float(g.sum())
    if not total > 0 or not dof > 0:
        return 0.0
    quad = float(np.dot(g, g))
    for j, r2 in enumerate(_HANN_RHO2, start=1):
        if g.size > j:
            quad += 2.0 * r2 * float(np.dot(g[:-j], g[j:]))
    return dof * total * total / quad


def db_std(dof: float) -> float:
    """dB standard deviation of a χ²_ν estimate: ``4.343 √ψ1(ν/2)``.

    ``ln(χ²_ν/ν)`` is the log of a gamma variate of shape ν/2, whose variance is the trigamma
    ``ψ1(ν/2)`` (Johnson, Kotz & Balakrishnan, *Continuous Univariate Distributions*, Vol. 1,
    2nd ed., ch. 17 [from memory]); 4.343 = 10/ln 10 turns it into dB (docs/methods.md,
    "χ² confidence bands and dB scatter").
    """
    return _DB * math.sqrt(float(special.polygamma(1, 0.5 * dof)))


# ---- supervisor -----------------------------------------------------------------------------


@dataclass(frozen=True)
class UpdateVerdict:
    """What the supervisor concluded from one update estimate.

    Attributes
    ----------
    trip : Trip or None
    pending : tuple of str
        Rules whose condition holds but has not yet persisted long enough to trip; while any
        is pending the controller lets the drive go down only.
    rms_error_db : float
        ``10 log10(Σ control / Σ target)`` over the band, dB.
    lines_beyond_abort : int
        Lines beyond the (statistically widened) abort band.
    abort_lo_db, abort_hi_db : float
        Scatter limits from :func:`scatter_limits_db` for this estimate's DOF (the band used is
        the larger of these and the tolerance's abort limit).
    loop_gap_db : float
        ``10 log10(Σ control / Σ predicted)``, dB (nan without a prediction).
    """

    trip: Trip | None
    pending: tuple[str, ...]
    rms_error_db: float
    lines_beyond_abort: int
    abort_lo_db: float
    abort_hi_db: float
    loop_gap_db: float
    #: ``lines_abort`` held its count because the lines beyond abort came back by more than
    #: their scatter since the previous estimate (see :meth:`Supervisor.check_update`).
    converging: bool = False


#: How much the summed excess beyond abort must fall between two estimates, in standard
#: deviations of its scatter, to count as converging [common practice: a 2σ decision].
CONVERGING_Z = 2.0


class Supervisor:
    """The abort rules, evaluated per block (:meth:`check_block`) and per update estimate.

    Parameters
    ----------
    safety : spec.SafetyLimits
    tolerance : profile.Tolerance
    fs_hz : float
        Sample rate, Hz (time = samples / fs).
    silent_window : int
        Consecutive samples of silence that trip ``response_silent`` (the controller passes one
        hop, ``frame_length / 2``).
    """

    def __init__(self, safety: Any, tolerance: Any, *, fs_hz: float, silent_window: int) -> None:
        self.safety = safety
        self.tolerance = tolerance
        self.fs_hz = float(fs_hz)
        self.silent_window = int(silent_window)
        self._silent_run = 0
        self._silent_seen = False
        self._allow: dict[float, float] = {}
        self._persist: dict[str, int] = {"lines_abort": 0, "drive_limit": 0, "loop_open": 0}
        self._excess: tuple[float, int] | None = None  # previous estimate's excess, lines
        self._grace = 0  # estimates held as converging in this episode

    def reset_persistence(self) -> None:
        """Forget counts of consecutive updates (after a level change)."""
        for k in self._persist:
            self._persist[k] = 0
        self._excess, self._grace = None, 0

    # -- per block ----------------------------------------------------------------------
    def check_block(
        self, t_s: float, response_fs: np.ndarray, *, drive_up: bool | None
    ) -> Trip | None:
        """Sample-level rules on one response block: non_finite, input_overload, silence.

        ``drive_up`` says the drive that produced this block was on (silence is only a fault
        then); None skips the silence rule and leaves its count alone (for a caller that checks
        silence separately on the delay-aligned block).
        """
        y = np.asarray(response_fs, dtype=float)
        if y.size == 0:
            return None
        peak = max(float(y.max()), -float(y.min()))  # nan or inf when a sample is not finite
        if not math.isfinite(peak):
            bad = int(np.count_nonzero(~np.isfinite(y)))
            return Trip("non_finite", f"response contains {bad} non-finite samples (NaN/inf)",
                        t_s, {"samples_bad": bad})
        limit = float(self.safety.input_overload_fs)
        if peak >= limit:
            return Trip(
                "input_overload",
                f"control input overload: |response| {peak:.3f} FS >= {limit:.3f} FS",
                t_s, {"response_peak_fs": peak, "input_overload_fs": limit},
            )
        if drive_up is None:
            return None
        return self.check_silence(t_s, y, drive_up=drive_up)

    def check_silence(self, t_s: float, response_fs: np.ndarray, *, drive_up: bool) -> Trip | None:
        """``response_silent``: the response below ``silent_floor_fs`` rms for
        ``silent_window`` consecutive samples while ``drive_up``.

        Silence is judged on chunks of :data:`SILENT_CHUNK` samples, so a dropout inside a block
        is seen (:attr:`silent_in_last_block`) and runs carry over from block to block.
        """
        y = np.asarray(response_fs, dtype=float)
        self._silent_seen = False
        if y.size == 0:
            return None
        if not drive_up:
            self._silent_run = 0
            return None
        floor = float(self.safety.silent_floor_fs)
        c = SILENT_CHUNK
        full = y.size // c
        m = full + (1 if y.size % c else 0)
        energy = np.empty(m)
        v = y[: full * c].reshape(full, c)
        np.einsum("ij,ij->i", v, v, out=energy[:full])
        sizes = np.full(m, c)
        if m > full:
            tail = y[full * c:]
            energy[full] = float(np.dot(tail, tail))
            sizes[full] = tail.size
        quiet = energy < floor * floor * sizes
        if not quiet.any():
            self._silent_run = 0
            return None
        self._silent_seen = True
        if quiet.all():
            self._silent_run += y.size
            longest = self._silent_run
        else:
            lead = int(np.argmin(quiet))  # first loud chunk
            trail = int(np.argmin(quiet[::-1]))
            edges = np.diff(np.concatenate(([0], quiet.astype(np.int8), [0])))
            runs = np.flatnonzero(edges == -1) - np.flatnonzero(edges == 1)
            longest = max(self._silent_run + lead * c, int(runs.max()) * c)
            self._silent_run = int(np.sum(sizes[m - trail:])) if trail else 0
        if longest >= self.silent_window:
            dur = longest / self.fs_hz
            return Trip(
                "response_silent",
                f"control input silent for {dur:.3f} s while driving (rms < {floor:.2e} FS)",
                t_s, {"silent_floor_fs": floor, "silent_s": dur},
            )
        return None

    @property
    def silent_in_last_block(self) -> bool:
        """The last block given to :meth:`check_silence` had a silent chunk while driving."""
        return self._silent_seen

    def report_underflow(self, t_s: float, count: int) -> Trip | None:
        """The rig ran out of drive samples ``count`` times: trips ``controller_late``."""
        if count <= 0:
            return None
        return Trip(
            "controller_late",
            f"drive underflow: the output ran dry {count} times (controller too late)",
            t_s, {"underflows": int(count)},
        )

    @property
    def silent_run_samples(self) -> int:
        """Consecutive silent samples seen so far while driving."""
        return self._silent_run

    def check_segment(
        self,
        t_s: float,
        *,
        control_sum: float,
        target_sum: float,
        band_dof: float,
        predicted_sum: float | None = None,
        rms_sum: float | None = None,
    ) -> Trip | None:
        """Fast rules on the newest Welch segment alone: ``rms_abort`` and ``loop_open``.

        ``rms_sum`` (several control inputs): the combined control's band sum, for the rms rule;
        ``control_sum`` is then the input whose FRF ``predicted_sum`` was identified on.

        ``control_sum``, ``target_sum`` and ``predicted_sum`` are band sums of PSD lines (g²/Hz)
        of the newest segment, the target at the level played and the FRF prediction for the
        drive played. The limits are widened by ``FAST_RMS_Z`` standard deviations of the band
        sum's dB scatter (``band_dof`` from :func:`band_sum_dof`, Satterthwaite), so one
        segment's χ² scatter cannot trip them, while a jump of the plant or sensor trips within
        one segment instead of waiting for the update estimate.
        """
        if not (band_dof > 0 and target_sum > 0):
            return None
        allow = self._allow.get(band_dof)
        if allow is None:  # the band DOF takes a few values only: keep their allowances
            allow = self._allow[band_dof] = FAST_RMS_Z * db_std(band_dof)
        ctrl = control_sum if rms_sum is None else rms_sum
        err = _DB * math.log(ctrl / target_sum) if ctrl > 0 else -math.inf
        limit = float(self.tolerance.rms_abort_db)
        if err > limit + allow:
            return Trip(
                "rms_abort",
                f"control rms {err:+.2f} dB above target in the newest segment (limit "
                f"+{limit:.2f} dB, +{allow:.2f} dB allowed for its {band_dof:.0f} DOF)",
                t_s, {"rms_error_db": err, "rms_abort_db": limit, "allowance_db": allow,
                      "band_dof": band_dof},
            )
        if predicted_sum is not None and predicted_sum > 0:
            gap = _DB * math.log(control_sum / predicted_sum) if control_sum > 0 else -math.inf
            lo = float(self.safety.loop_open_db)
            if gap < -(lo + allow):
                return Trip(
                    "loop_open",
                    f"loop open: control {gap:+.1f} dB below what the identified FRF predicts "
                    f"for the drive in the newest segment (limit -{lo:.1f} dB, "
                    f"-{allow:.2f} dB allowed for its {band_dof:.0f} DOF)",
                    t_s, {"loop_gap_db": gap, "loop_open_db": lo, "allowance_db": allow,
                          "band_dof": band_dof},
                )
        return None

    # -- per update ---------------------------------------------------------------------
    def check_update(
        self,
        t_s: float,
        *,
        control_psd: np.ndarray,
        target_psd: np.ndarray,
        dof: float,
        abort_db: np.ndarray,
        predicted_psd: np.ndarray | None = None,
        drive_at_limit: bool = False,
    ) -> UpdateVerdict:
        """Rules on one update estimate (band lines only, g²/Hz).

        Parameters
        ----------
        control_psd, target_psd : ndarray
            Estimated control and target on the band lines, g²/Hz.
        dof : float
            DOF per line of ``control_psd``.
        abort_db : ndarray
            Abort limit (± dB) per band line.
        predicted_psd : ndarray, optional
            Control the identified FRF predicts for the drive played (|Ĥ|²·drive), g²/Hz.
        drive_at_limit : bool
            The drive is at its rms ceiling or peak limit.
        """
        ctrl = np.asarray(control_psd, dtype=float)
        tgt = np.asarray(target_psd, dtype=float)
        lim = self.tolerance
        s = self.safety
        c_sum, r_sum = float(ctrl.sum()), float(tgt.sum())
        rms_err = _DB * math.log(c_sum / r_sum) if c_sum > 0 and r_sum > 0 else -math.inf
        detail_base = {"rms_error_db": rms_err, "dof": float(dof)}

        # rms_abort: a band sum over many lines has little scatter: no persistence.
        if rms_err > lim.rms_abort_db:
            trip = Trip(
                "rms_abort",
                f"control rms {rms_err:+.2f} dB above target (limit +{lim.rms_abort_db:.2f} dB)",
                t_s, {**detail_base, "rms_abort_db": float(lim.rms_abort_db)},
            )
            return UpdateVerdict(trip, (), rms_err, 0, math.nan, math.nan, math.nan)

        # lines_abort, statistics-aware
        with np.errstate(divide="ignore", invalid="ignore"):
            dev = _DB * np.log(np.where(tgt > 0, ctrl / tgt, 1.0))
        dev = np.where(np.isfinite(dev), dev, -np.inf)  # a dead line (0) is far below
        lo_s, hi_s = scatter_limits_db(dof, ctrl.size, int(s.abort_min_lines))
        abort = np.asarray(abort_db, dtype=float)
        beyond = (dev > np.maximum(abort, hi_s)) | (dev < -np.maximum(abort, lo_s))
        n_beyond = int(np.count_nonzero(beyond))
        gap = math.nan
        if predicted_psd is not None:
            p_sum = float(np.sum(predicted_psd))
            if p_sum > 0:
                gap = _DB * math.log(c_sum / p_sum) if c_sum > 0 else -math.inf
        below = rms_err < -float(lim.rms_alarm_db)
        converging = self._converging(dev, beyond, abort, lo_s, hi_s, dof)
        # every persistent rule keeps its count; the most specific diagnosis wins
        pending: list[str] = []
        trips = [
            self._persistent(
                "loop_open", gap < -float(s.loop_open_db), t_s, pending,
                lambda n: (
                    f"loop open: control {gap:+.1f} dB below what the identified FRF predicts "
                    f"for the drive (limit -{float(s.loop_open_db):.1f} dB) for {n} "
                    "consecutive updates"
                ),
                {**detail_base, "loop_gap_db": gap, "loop_open_db": float(s.loop_open_db)},
            ),
            self._persistent(
                "drive_limit", bool(drive_at_limit) and below, t_s, pending,
                lambda n: (
                    f"drive limit reached: control {rms_err:+.2f} dB below target with the "
                    f"drive at its limit for {n} consecutive updates"
                ),
                {**detail_base, "rms_alarm_db": float(lim.rms_alarm_db)},
            ),
            self._persistent(
                "lines_abort", n_beyond >= int(s.abort_min_lines), t_s, pending, hold=converging,
                message=lambda n: (
                    f"{n_beyond} lines beyond the abort limits for {n} consecutive updates "
                    f"(max {float(np.max(dev)):+.1f} dB, min {float(np.min(dev)):+.1f} dB)"
                ),
                detail={**detail_base, "lines_beyond_abort": n_beyond,
                        "max_dev_db": float(np.max(dev)), "min_dev_db": float(np.min(dev)),
                        "scatter_lo_db": lo_s, "scatter_hi_db": hi_s},
            ),
        ]
        trip = next((t for t in trips if t is not None), None)
        if trip is not None:
            pending = []
        return UpdateVerdict(trip, tuple(pending), rms_err, n_beyond, lo_s, hi_s, gap,
                             converging=converging and trip is None)

    def _converging(self, dev: np.ndarray, beyond: np.ndarray, abort: np.ndarray, lo_s: float,
                    hi_s: float, dof: float) -> bool:
        """The lines beyond abort are coming back: their summed excess beyond the (widened)
        abort band fell by more than :data:`CONVERGING_Z` standard deviations of its scatter
        since the previous estimate. Granted for at most ``abort_persist_updates`` estimates in
        a row; a dead line (no signal) never converges."""
        n = int(np.count_nonzero(beyond))
        if n < int(self.safety.abort_min_lines):
            self._excess, self._grace = None, 0
            return False
        band = np.where(dev > 0, np.maximum(abort, hi_s), np.maximum(abort, lo_s))
        excess = float(np.sum((np.abs(dev) - band)[beyond]))
        prev, self._excess = self._excess, (excess, n)
        if prev is None or not math.isfinite(excess) or \
                self._grace >= int(self.safety.abort_persist_updates):
            return False
        sd = db_std(dof) * math.sqrt(n + prev[1])  # each line's dB scatter, summed
        if prev[0] - excess > CONVERGING_Z * sd:
            self._grace += 1
            return True
        return False

    def _persistent(self, rule, condition, t_s, pending, message, detail, *,
                    hold: bool = False) -> Trip | None:
        """Count a persistent rule; ``hold``: the condition holds but the loop is converging,
        so the count neither grows nor resets and the drive is not held (no pending)."""
        if not condition:
            self._persist[rule] = 0
            return None
        if hold:
            return None
        self._persist[rule] += 1
        n = self._persist[rule]
        need = int(self.safety.abort_persist_updates)
        if n >= need:
            return Trip(rule, message(n), t_s, {**detail, "updates": n})
        pending.append(rule)
        return None
