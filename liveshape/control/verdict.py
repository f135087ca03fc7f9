"""The test verdict: did the control hold the target inside the spec's tolerance at full level?

Pure numpy. :class:`FullLevelAverage` pools the independent equalizer update estimates made at
full level into one time-averaged control spectrum and counts the full-level decisions that
were in alarm; :func:`decide_verdict` turns that, with the run's status, into a frozen
:class:`Verdict`.

The rule (see docs/methods.md, "Verdict"):

* ``pass`` — the run completed its time at full level, and the full-level average (every update
  estimate made at full level, pooled; its DOF is the sum of theirs) lies inside the alarm limit
  on every line, its rms inside the rms alarm limit, and the fraction of the full-level
  decisions that were in alarm is at most ``tolerance.max_alarm_fraction``;
* ``fail`` — the run completed but one of those conditions does not hold (each one that fails is
  a reason);
* ``incomplete`` — the run was aborted or stopped, or it made no estimate at full level: such a
  run has no pass.

Holding the averaged control within ±3 dB per line and its rms within ±1 dB of the target is the
tolerance of IEC 60068-2-64 (random vibration, digitally controlled) applied to the estimate of
the whole test; allowing a short fraction of the test in alarm is common practice (no published
figure; the default of 10 % is this project's choice).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from liveshape.control.runstate import frozen_array
from liveshape.control.stages import Judgement, judge

__all__ = ["VERDICTS", "FullLevelAverage", "Verdict", "decide_verdict", "verdict_rule_text"]

VERDICTS = ("pass", "fail", "incomplete")


def verdict_rule_text(max_alarm_fraction: float) -> str:
    """One line stating the rule a verdict follows."""
    return ("pass: completed, and the full-level average inside the alarm limit on every line "
            "and inside the rms alarm limit, and at most "
            f"{100.0 * max_alarm_fraction:g} % of the full-level decisions in alarm")


class FullLevelAverage:
    """Pools the update estimates made at full level (band lines, g²/Hz, full-level target).

    Each estimate enters with its DOF as weight, so the pooled estimate is the DOF-weighted mean
    and its DOF the sum (the update estimates are independent: each starts after the last drive
    change, on data no other estimate used). Decisions at full level are counted to give the
    fraction in alarm (decisions come one per update, evenly spaced in run time, so this is the
    fraction of the full-level time spent in alarm).
    """

    def __init__(self, n_lines: int) -> None:
        self._sum = np.zeros(int(n_lines))
        self._dof = 0.0
        self.n_estimates = 0
        self.n_decisions = 0
        self.n_alarm = 0
        self.first_t_s = math.nan
        self.last_t_s = math.nan

    def push(self, control_psd: np.ndarray, dof: float, t_s: float) -> None:
        """Add one update estimate ``control_psd`` (g²/Hz) of ``dof`` DOF made at ``t_s``."""
        c = np.asarray(control_psd, dtype=float)
        self._sum += float(dof) * c
        self._dof += float(dof)
        self.n_estimates += 1
        if self.n_estimates == 1:
            self.first_t_s = float(t_s)
        self.last_t_s = float(t_s)

    def count_decision(self, in_tolerance: bool) -> None:
        """Count one tolerance decision made at full level."""
        self.n_decisions += 1
        if not in_tolerance:
            self.n_alarm += 1

    @property
    def dof(self) -> float:
        """DOF of the pooled estimate (sum of the update estimates' DOF)."""
        return self._dof

    @property
    def psd(self) -> np.ndarray | None:
        """The pooled control PSD, g²/Hz (read-only copy), or None before any estimate."""
        if self._dof <= 0:
            return None
        return frozen_array(self._sum / self._dof)

    @property
    def alarm_fraction(self) -> float:
        """Fraction of the full-level decisions that were in alarm (nan before any)."""
        return self.n_alarm / self.n_decisions if self.n_decisions else math.nan


@dataclass(frozen=True)
class Verdict:
    """Outcome of a test against its tolerance.

    Attributes
    ----------
    verdict : str
        ``pass``, ``fail`` or ``incomplete``.
    reasons : tuple of str
        One line per condition that failed (empty for a pass).
    rule : str
        The rule applied, in one line.
    judgement : Judgement or None
        The full-level average held against the full-level target (None without one).
    alarm_fraction : float
        Fraction of the full-level decisions in alarm (nan when none was made).
    max_alarm_fraction : float
        The limit on it.
    """

    verdict: str
    reasons: tuple[str, ...]
    rule: str
    judgement: Judgement | None
    alarm_fraction: float
    max_alarm_fraction: float

    @property
    def dof(self) -> float:
        """DOF of the full-level average (0 without one)."""
        return 0.0 if self.judgement is None else self.judgement.dof


def decide_verdict(
    status: str,
    average: FullLevelAverage,
    target_psd: np.ndarray,
    *,
    alarm_db: np.ndarray,
    abort_db: np.ndarray,
    rms_alarm_db: float,
    max_alarm_fraction: float,
    df_hz: float,
    status_reason: str | None = None,
    exclude: np.ndarray | None = None,
) -> Verdict:
    """The verdict of a run that ended with ``status`` (``completed``, ``aborted``, ``stopped``).

    Parameters
    ----------
    status : str
        The run's status.
    average : FullLevelAverage
        The full-level estimates and decisions.
    target_psd : ndarray
        Target on the band lines at full level, g²/Hz.
    alarm_db, abort_db : ndarray
        ± limits per band line, dB.
    rms_alarm_db : float
        ± limit of the rms error, dB.
    max_alarm_fraction : float
        Largest fraction of the full-level decisions allowed in alarm for a pass.
    df_hz : float
        Line spacing, Hz.
    status_reason : str, optional
        Why the run ended early (the trip's or the stop's message).
    exclude : ndarray of bool, optional
        Band lines left out of the verdict (lines the drive does not cause).
    """
    rule = verdict_rule_text(max_alarm_fraction)
    psd = average.psd
    j = None
    if psd is not None:
        j = judge(psd, target_psd, alarm_db=alarm_db, abort_db=abort_db,
                  rms_alarm_db=rms_alarm_db, dof=average.dof, df_hz=df_hz, exclude=exclude)
    frac = average.alarm_fraction
    if status != "completed":
        why = f"run {status}" + (f": {status_reason}" if status_reason else "")
        return Verdict("incomplete", (why,), rule, j, frac, max_alarm_fraction)
    if j is None:
        return Verdict("incomplete", ("no control estimate was made at full level",), rule, j,
                       frac, max_alarm_fraction)
    reasons = []
    if j.lines_outside_alarm:
        worst = j.max_dev_db if abs(j.max_dev_db) >= abs(j.min_dev_db) else j.min_dev_db
        reasons.append(
            f"{j.lines_outside_alarm} of {j.lines_judged} lines of the full-level average "
            f"outside the alarm limit (worst {worst:.2f} dB)")
    if not abs(j.rms_error_db) <= rms_alarm_db:
        reasons.append(f"rms error of the full-level average {j.rms_error_db:.2f} dB is outside "
                       f"±{rms_alarm_db:g} dB")
    if math.isfinite(frac) and frac > max_alarm_fraction:
        reasons.append(
            f"{average.n_alarm} of {average.n_decisions} full-level decisions in alarm "
            f"({100.0 * frac:.0f} % > {100.0 * max_alarm_fraction:g} %)")
    return Verdict("fail" if reasons else "pass", tuple(reasons), rule, j, frac,
                   max_alarm_fraction)
