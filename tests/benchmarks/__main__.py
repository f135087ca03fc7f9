"""Run the benchmarks: ``python -m tests.benchmarks [NAME ...]``.

Imports every ``tests/benchmarks/bench_*.py`` in sorted order (or only the modules named on the
command line, with or without the ``bench_`` prefix) and calls its ``run(report)``. ``report``
prints ``name: value unit`` and flushes, so figures appear as they are measured. A benchmark that
raises is reported on stderr; the others still run and the exit status is 1.
"""

from __future__ import annotations

import importlib
import sys
import traceback
from pathlib import Path


def report(name: str, value: float, unit: str) -> None:
    """Print one figure as ``name: value unit``."""
    if isinstance(value, float):
        text = f"{value:.4g}"
    else:
        text = str(value)
    print(f"{name}: {text} {unit}".rstrip(), flush=True)


def available() -> list[str]:
    """Module names of the benchmarks, sorted."""
    here = Path(__file__).resolve().parent
    return sorted(p.stem for p in here.glob("bench_*.py"))


def main(argv: list[str]) -> int:
    names = available()
    if argv:
        wanted = []
        for arg in argv:
            name = arg if arg.startswith("bench_") else f"bench_{arg}"
            if name not in names:
                print(
                    f"benchmarks: unknown benchmark {arg!r} (available: "
                    f"{', '.join(n.removeprefix('bench_') for n in names)})",
                    file=sys.stderr,
                )
                return 2
            wanted.append(name)
        names = wanted
    status = 0
    for name in names:
        try:
            module = importlib.import_module(f"{__package__}.{name}")
            module.run(report)
        except Exception:  # report and go on with the other benchmarks
            print(f"benchmarks: {name} failed:", file=sys.stderr)
            traceback.print_exc()
            status = 1
    return status


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
