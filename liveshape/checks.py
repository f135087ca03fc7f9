"""What ``liveshape check`` reports about a test definition: pure numbers, no printing.

The report is a plain dict (JSON-safe) so the command line can print it as JSON or hand it to the
dashboard for a table. Profile integrals are exact (see :mod:`liveshape.profile`); the data
length needed for the target DOF uses the Welch (1967) equivalent DOF of Hann segments at 50 %
overlap (:func:`liveshape.spectra.welch_dof`).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from liveshape.spec import TestSpec
from liveshape.spectra import welch_dof


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
        ``grms_g``, ``velocity_rms_m_s``, ``displacement_rms_m``, ``displacement_pp_3sigma_m``,
        ``f_min_hz``, ``f_max_hz``, ``segments`` (per segment: ends, slope in dB/oct, mean-square
        area in g²), ``tolerance``, ``control`` (lines in band, DOF, seconds of data needed for
        the target DOF) and optionally ``rig``.
    """
    prof = spec.profile
    ctl = spec.control
    areas = prof.segment_areas_g2()
    total = float(np.sum(areas))
    segments = []
    for i, (slope, area) in enumerate(zip(prof.slopes_db_oct, areas, strict=True)):
        segments.append(
            {
                "f_lo_hz": prof.f_hz[i],
                "f_hi_hz": prof.f_hz[i + 1],
                "asd_lo_g2_hz": prof.asd_g2_hz[i],
                "asd_hi_g2_hz": prof.asd_g2_hz[i + 1],
                "slope_db_oct": float(slope),
                "area_g2": float(area),
                "share_of_ms": float(area) / total if total > 0 else 0.0,
            }
        )
    tol = spec.tolerance
    hop = ctl.frame_length // 2
    k = segments_for_dof(ctl.target_dof)
    f = np.arange(ctl.frame_length // 2 + 1) * ctl.fs_hz / ctl.frame_length
    lines = int(np.count_nonzero((f >= prof.f_min_hz) & (f <= prof.f_max_hz)))
    report: dict[str, Any] = {
        "name": spec.name,
        "source": spec.source,
        "f_min_hz": prof.f_min_hz,
        "f_max_hz": prof.f_max_hz,
        "grms_g": prof.grms,
        "velocity_rms_m_s": prof.velocity_rms_m_s,
        "displacement_rms_m": prof.displacement_rms_m,
        "displacement_pp_3sigma_m": prof.displacement_pp_3sigma_m,
        "segments": segments,
        "tolerance": {
            "alarm_db": tol.alarm_db,
            "abort_db": tol.abort_db,
            "rms_alarm_db": tol.rms_alarm_db,
            "rms_abort_db": tol.rms_abort_db,
            "bands": [
                {
                    "f_lo_hz": b.f_lo_hz,
                    "f_hi_hz": b.f_hi_hz,
                    "alarm_db": b.alarm_db,
                    "abort_db": b.abort_db,
                }
                for b in tol.bands
            ],
        },
        "control": {
            "fs_hz": ctl.fs_hz,
            "frame_length": ctl.frame_length,
            "df_hz": ctl.fs_hz / ctl.frame_length,
            "lines_in_band": lines,
            "target_dof": ctl.target_dof,
            "segments_for_target_dof": k,
            "dof_reached": welch_dof(k),
            "seconds_for_target_dof": (ctl.frame_length + (k - 1) * hop) / ctl.fs_hz,
        },
    }
    if feasibility is not None:
        report["rig"] = feasibility.to_dict()
    return report
