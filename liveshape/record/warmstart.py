"""Read a warm start (an earlier run's equalized drive and FRF) from a run folder.

The checks are :func:`liveshape.control.warmstart.mismatch`; this module reads the record and
turns a mismatch into the one-line refusal (ConfigError) before anything is driven.
"""

from __future__ import annotations

import os
from collections.abc import Mapping
from typing import Any

import numpy as np

from liveshape.control.stages import control_lines
from liveshape.control.warmstart import WarmStart, mismatch
from liveshape.errors import ConfigError
from liveshape.record.drivefile import run_drive_psd
from liveshape.record.runfolder import load_run

__all__ = ["OPTION", "load_warm_start"]

#: The command-line option that names the earlier run.
OPTION = "--warm-start"


def load_warm_start(run_dir: str | os.PathLike[str], spec: Any, *, rig: Mapping[str, Any],
                    calibration: Mapping[str, Any]) -> WarmStart:
    """The last equalized drive and FRF of the completed run in ``run_dir``.

    Parameters
    ----------
    run_dir : path
        The earlier run's folder.
    spec : TestSpec
        The test about to run.
    rig, calibration : mapping
        The rig and calibration as this run will record them (``rig.yaml``, ``run.json``).

    Raises
    ------
    ConfigError
        One line: not a completed run, no drive update, or a different rig, calibration, sample
        rate or set of lines.
    """
    run = load_run(run_dir)
    where = f"{OPTION} {str(run.root)!r}"
    if run.status != "completed":
        raise ConfigError(f"{where}: the run's status is {run.status!r}, not 'completed'; its "
                          "last drive may not be equalized")
    control = run.spec.get("control") or {}
    n_then = int(control.get("frame_length", 0) or 0)
    n_now = int(spec.control.frame_length)
    u = run.updates
    why = None
    if n_then != n_now:
        why = f"control.frame_length differs ({n_then} there, {n_now} now)"
    elif u.n == 0:
        why = "the run has no update"
    else:
        why = mismatch(rig_now=rig, rig_then=run.rig, cal_now=calibration,
                       cal_then=run.meta.get("calibration") or {}, fs_now=spec.control.fs_hz,
                       fs_then=run.fs_hz, f_hz_now=control_lines(spec).f_hz, f_hz_then=u.f_hz)
    if why is not None:
        raise ConfigError(f"{where}: {why}; a warm start needs the same rig, calibration, "
                          "sample rate and lines")
    psd, update = run_drive_psd(run, n_now)
    row = int(np.flatnonzero(u.index == update)[-1])
    return WarmStart(drive_psd=psd, h1=np.asarray(u.h1[row]),
                     coherence=np.asarray(u.coherence[row]), source=str(run.root),
                     update=update)
