"""What ``liveshape check`` reports about a test definition: pure numbers, no printing.

The report is a plain dict (JSON-safe) so the command line can print it as JSON or hand it to the
dashboard for a table. Profile integrals are exact (see :mod:`liveshape.dsp.profile`); the data
length needed for the target DOF uses the Welch (1967) equivalent DOF of Hann segments at 50 %
overlap (:func:`liveshape.dsp.spectra.welch_dof`).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from liveshape.dsp.profile import Profile
from liveshape.dsp.spectra import welch_dof
from liveshape.testdef.spec import TestSpec
from liveshape.testdef.tolerance import Tolerance


def segments_for_dof(target_dof: float) -> int:
    """Smallest number of Hann-50 % segments whose Welch equivalent DOF reaches ``target_dof``."""
    if target_dof <= 0:
        return 0
    # Each segment adds about 36/19 DOF (Welch 1967); start just below and step up.
    k = max(1, int(math.floor(target_dof * 19.0 / 36.0)) - 2)
    while welch_dof(k) < target_dof:
        k += 1
    return k


def check_report(spec: TestSpec, feasibility: Any = None) -> dict[str, Any]:
    """Numbers a test engineer reads before a test.

    Parameters
    ----------
    spec : TestSpec
        The resolved test definition.
    feasibility : object with ``to_dict()``, optional
        Rig feasibility (:func:`liveshape.rigs.feasibility.assess`), added under ``rig``.

    Returns
    -------
    dict
        :func:`report_from_parts` of the spec's profile, tolerance and control settings, named
        after the spec and its source file.
    """
    return report_from_parts(spec.profile, spec.tolerance, spec.control, feasibility,
                             name=spec.name, source=spec.source)


def report_from_parts(
    profile: Profile,
    tolerance: Tolerance,
    control: Any,
    feasibility: Any = None,
    *,
    name: str | None = None,
    source: str | None = None,
) -> dict[str, Any]:
    """The check report from a profile, a tolerance and control settings.

    Parameters
    ----------
    profile : Profile
        The target ASD.
    tolerance : Tolerance
        Alarm and abort limits, dB.
    control : ControlSettings or alike
        Needs ``fs_hz`` (Hz), ``frame_length`` (samples) and ``target_dof``; ``averaging`` is
        reported when it has one.
    feasibility : object with ``to_dict()`` or mapping, optional
        Rig feasibility (:func:`liveshape.rigs.feasibility.assess`), added under ``rig``.
    name, source : str, optional
        The test's name (default: the profile's) and the file it came from.

    Returns
    -------
    dict
        ``name``, ``source``, ``grms_g``, ``velocity_rms_m_s``, ``displacement_rms_m``,
        ``displacement_pp_3sigma_m``, ``f_min_hz``, ``f_max_hz``, ``segments`` (per segment:
        ends, slope in dB/oct, mean-square area in g² and its share), ``tolerance``, ``control``
        (lines in band, DOF, seconds of data needed for the target DOF, Welch 1967) and
        optionally ``rig``.
    """
    areas = profile.segment_areas_g2()
    total = float(np.sum(areas))
    segments = []
    for i, (slope, area) in enumerate(zip(profile.slopes_db_oct, areas, strict=True)):
        segments.append(
            {
                "f_lo_hz": profile.f_hz[i],
                "f_hi_hz": profile.f_hz[i + 1],
                "asd_lo_g2_hz": profile.asd_g2_hz[i],
                "asd_hi_g2_hz": profile.asd_g2_hz[i + 1],
                "slope_db_oct": float(slope),
                "area_g2": float(area),
                "share_of_ms": float(area) / total if total > 0 else 0.0,
            }
        )
    hop = control.frame_length // 2
    k = segments_for_dof(control.target_dof)
    f = np.arange(control.frame_length // 2 + 1) * control.fs_hz / control.frame_length
    lines = int(np.count_nonzero((f >= profile.f_min_hz) & (f <= profile.f_max_hz)))
    report: dict[str, Any] = {
        "name": getattr(profile, "name", "") if name is None else name,
        "source": source,
        "f_min_hz": profile.f_min_hz,
        "f_max_hz": profile.f_max_hz,
        "grms_g": profile.grms,
        "velocity_rms_m_s": profile.velocity_rms_m_s,
        "displacement_rms_m": profile.displacement_rms_m,
        "displacement_pp_3sigma_m": profile.displacement_pp_3sigma_m,
        "segments": segments,
        "tolerance": {
            "alarm_db": tolerance.alarm_db,
            "abort_db": tolerance.abort_db,
            "rms_alarm_db": tolerance.rms_alarm_db,
            "rms_abort_db": tolerance.rms_abort_db,
            "bands": [
                {
                    "f_lo_hz": b.f_lo_hz,
                    "f_hi_hz": b.f_hi_hz,
                    "alarm_db": b.alarm_db,
                    "abort_db": b.abort_db,
                }
                for b in tolerance.bands
            ],
        },
        "control": {
            "fs_hz": control.fs_hz,
            "frame_length": control.frame_length,
            "df_hz": control.fs_hz / control.frame_length,
            "lines_in_band": lines,
            "target_dof": control.target_dof,
            "averaging": getattr(control, "averaging", None),
            "segments_for_target_dof": k,
            "dof_reached": welch_dof(k),
            "seconds_for_target_dof": (control.frame_length + (k - 1) * hop) / control.fs_hz,
        },
    }
    if feasibility is not None:
        to_dict = getattr(feasibility, "to_dict", None)
        report["rig"] = dict(to_dict() if callable(to_dict) else feasibility)
    return report
