"""Time of ``liveshape check`` on a long measured profile (figures, not pass/fail tests).

A two-column CSV of 10⁵ points (20-2000 Hz, log-spaced, a rippled 0.01 g²/Hz level) is
checked through a fresh ``python -m liveshape`` process, as text (the table) and with
``--json``; the figure is the wall time of each, best of 2. The table lists at most
``MAX_SEGMENT_ROWS`` segments and sums up the rest, so the text time stays near the JSON time.

Run with ``python -m tests.benchmarks check``; set ``PYTHONPATH`` to another checkout to
measure that version with the same input.
"""

from __future__ import annotations

import subprocess
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np

N_POINTS = 100_000


def _write_profile(path: Path) -> None:
    f = np.geomspace(20.0, 2000.0, N_POINTS)
    a = 0.01 * (1.0 + 0.1 * np.sin(np.arange(f.size)))
    path.write_text("".join(f"{x:.9g}, {y:.6g}\n" for x, y in zip(f, a, strict=True)),
                    encoding="utf-8")


def _time(argv: list[str], cwd: str) -> float:
    best = float("inf")
    for _ in range(2):
        t0 = time.perf_counter()
        proc = subprocess.run([sys.executable, "-m", "liveshape", *argv], cwd=cwd,
                              capture_output=True, text=True, timeout=600)
        dt = time.perf_counter() - t0
        if proc.returncode != 0:
            raise RuntimeError(proc.stderr.strip().splitlines()[-1])
        best = min(best, dt)
    return best


def run(report: Callable[[str, float, str], None]) -> None:
    with tempfile.TemporaryDirectory() as tmp:
        csv = Path(tmp) / "long-profile.csv"
        _write_profile(csv)
        report("check.csv_1e5_text_s", _time(["check", str(csv)], tmp), "s")
        report("check.csv_1e5_json_s", _time(["check", str(csv), "--json"], tmp), "s")


if __name__ == "__main__":
    run(lambda name, value, unit: print(f"{name}: {value:.3g} {unit}"))
