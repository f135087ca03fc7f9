"""Benchmarks: speed and memory figures, not pass/fail tests.

Each module ``bench_<topic>.py`` has a ``run(report)`` function that calls
``report(name, value, unit)`` once per figure. ``python -m tests.benchmarks`` runs all of them
(sorted by name) and prints ``name: value unit`` lines; ``python -m tests.benchmarks synth`` (or
``bench_synth``) runs only the named ones.
"""
