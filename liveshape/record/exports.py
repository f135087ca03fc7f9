"""CSV exports of a run's final spectra: one row per controlled line, units in the column names.

Pure numpy and the standard library. :func:`spectra_csv_text` builds the table from arrays;
:func:`spectra_from_run` takes them from a run folder read back by
:func:`liveshape.record.runfolder.load_run` (the full-level average when the record holds one,
else the last tolerance decision, else the last update estimate; the ``control_source`` column
says which). Files are written atomically (:func:`liveshape.atomic.atomic_write_text`).
"""

from __future__ import annotations

import math
import os
from pathlib import Path
from typing import Any

import numpy as np

from liveshape.atomic import atomic_write_text

__all__ = ["INPUTS_CSV", "SPECTRA_COLUMNS", "SPECTRA_CSV", "inputs_csv_text", "spectra_csv_text",
           "spectra_from_run", "write_spectra_csv"]

#: File name of the spectra table in a run folder.
SPECTRA_CSV = "spectra.csv"
#: Columns of the table, units in the names (g²/Hz written g2_hz; FS: digital full scale).
SPECTRA_COLUMNS = (
    "f_hz", "target_g2_hz", "alarm_low_g2_hz", "alarm_high_g2_hz", "abort_low_g2_hz",
    "abort_high_g2_hz", "control_g2_hz", "control_dof", "control_source", "drive_fs2_hz",
    "frf_mag_g_per_fs", "frf_phase_deg", "coherence",
)


def _num(x: float) -> str:
    return "" if not math.isfinite(x) else f"{x:.9g}"


def spectra_csv_text(*, f_hz: Any, target_g2_hz: Any, alarm_db: Any, abort_db: Any,
                     control_g2_hz: Any, control_dof: float, control_source: str,
                     drive_fs2_hz: Any, h1_g_per_fs: Any, coherence: Any) -> str:
    """The spectra table as CSV text (header row, then one row per line; empty cells for NaN).

    Parameters
    ----------
    f_hz : array
        Line frequencies, Hz.
    target_g2_hz, control_g2_hz : array
        Target and control ASD, g²/Hz.
    alarm_db, abort_db : array
        ± limits about the target per line, dB (the limit columns are the target times
        10^(±limit/10)).
    control_dof : float
        DOF of the control estimate.
    control_source : str
        Which estimate the control column is (``full_level``, ``decision``, ``update``).
    drive_fs2_hz : array
        Drive PSD as played, FS²/Hz.
    h1_g_per_fs : array, complex
        FRF estimate, g per FS (magnitude and phase in degrees are written).
    coherence : array
        Ordinary coherence, 0–1.
    """
    f = np.asarray(f_hz, dtype=float)
    cols = [np.asarray(a, dtype=float) for a in (target_g2_hz, alarm_db, abort_db,
                                                  control_g2_hz, drive_fs2_hz, coherence)]
    tgt, alarm, abort, ctrl, drive, coh = cols
    h1 = np.asarray(h1_g_per_fs, dtype=complex)
    lines = [",".join(SPECTRA_COLUMNS)]
    mag, ph = np.abs(h1), np.degrees(np.angle(h1))
    for i in range(f.size):
        row = (f[i], tgt[i], tgt[i] * 10 ** (-alarm[i] / 10), tgt[i] * 10 ** (alarm[i] / 10),
               tgt[i] * 10 ** (-abort[i] / 10), tgt[i] * 10 ** (abort[i] / 10), ctrl[i])
        lines.append(",".join([*(_num(float(v)) for v in row), _num(float(control_dof)),
                               control_source, _num(float(drive[i])), _num(float(mag[i])),
                               _num(float(ph[i])), _num(float(coh[i]))]))
    return "\n".join(lines) + "\n"


#: The per-input table of a run with several inputs (full-level average).
INPUTS_CSV = "inputs.csv"


def inputs_csv_text(full: dict[str, Any]) -> str | None:
    """The full-level per-input arrays as CSV text (None when the run had one input).

    Columns: ``f_hz``, then every per-line array of ``full`` whose name starts with ``input_``
    (each input's PSD in g²/Hz; each monitor's transmissibility over the first control input:
    magnitude, phase in degrees, coherence), the reference's FRF (magnitude g/FS and phase) and
    output gain (dB), and the notch (dB, 0 where none), in that order.
    """
    f = np.asarray(full["f_hz"], dtype=float)
    names = [k for k in full if k.startswith("input_")]
    for k in ("reference_h1_g_per_fs", "reference_coherence", "output_gain_db", "notch_db",
              "notch_deepest_db"):
        if k in full:
            names.append(k)
    if not names:
        return None
    cols: list[tuple[str, np.ndarray]] = []
    for k in names:
        a = np.asarray(full[k])
        if np.iscomplexobj(a):
            cols += [(f"{k}_mag", np.abs(a)), (f"{k}_phase_deg", np.degrees(np.angle(a)))]
        else:
            cols.append((k, a.astype(float)))
    lines = [",".join(["f_hz", *(c for c, _ in cols)])]
    for i in range(f.size):
        lines.append(",".join([_num(float(f[i])), *(_num(float(a[i])) for _, a in cols)]))
    return "\n".join(lines) + "\n"


def spectra_from_run(run: Any) -> str | None:
    """The spectra table of a run read back (:class:`~liveshape.record.runfolder.RunData`).

    None when the run made no update (there is no spectrum to export).
    """
    u = run.updates
    if u.index.size == 0:
        return None
    last = -1
    full = getattr(run, "full_level", None)
    if full is not None:
        ctrl, dof, source = full["control_psd_g2_hz"], float(full["dof"]), "full_level"
        tgt = full["target_psd_g2_hz"]
        alarm, abort = full["alarm_db"], full["abort_db"]
    else:
        dec = u.arrays.get("decision_psd")
        ddof = u.numbers.get("decision_dof")
        rows = [] if dec is None else [i for i in range(u.index.size)
                                       if np.all(np.isfinite(dec[i]))]
        if rows:
            k = rows[-1]
            ctrl, dof, source, tgt = dec[k], float(ddof[k]), "decision", u.target_psd[k]
        else:
            ctrl, source, tgt = u.control_psd[last], "update", u.target_psd[last]
            dof = float(u.numbers["dof"][last]) if "dof" in u.numbers else math.nan
        alarm = u.arrays.get("alarm_db", np.full(u.f_hz.size, math.nan))
        abort = u.arrays.get("abort_db", np.full(u.f_hz.size, math.nan))
        if alarm.ndim == 2:
            alarm, abort = alarm[last], abort[last]
    return spectra_csv_text(
        f_hz=u.f_hz, target_g2_hz=tgt, alarm_db=alarm, abort_db=abort, control_g2_hz=ctrl,
        control_dof=dof, control_source=source, drive_fs2_hz=u.drive_psd[last],
        h1_g_per_fs=u.h1[last], coherence=u.coherence[last])


def write_spectra_csv(path: str | os.PathLike[str], text: str) -> Path:
    """Write the table atomically to ``path`` and return it."""
    p = Path(path)
    atomic_write_text(p, text)
    return p
