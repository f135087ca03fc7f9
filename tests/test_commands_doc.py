"""What the README promises about the command name, the install and ``--rig sim``.

Outside references: the README and pyproject.toml themselves (the promise and the packaging
metadata), and the plant presets' own names.
"""

from __future__ import annotations

import json
import re
import subprocess
import sys
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]
README = (REPO / "README.md").read_text(encoding="utf-8")
CAL_README = (REPO / "calibration" / "README.md").read_text(encoding="utf-8")
PYPROJECT = (REPO / "pyproject.toml").read_text(encoding="utf-8")


def _extra(name: str) -> set[str]:
    m = re.search(rf"^{name} = \[(.*?)\]", PYPROJECT, re.M)
    assert m, name
    return {re.split(r"[<>=!~ ]", d.strip().strip('"'))[0].lower()
            for d in m.group(1).split(",") if d.strip()}


def test_one_command_name_throughout() -> None:
    # the venv is activated once; every command is then `liveshape ...`
    for text in (README, CAL_README):
        assert ".venv/bin/liveshape" not in text
    first = re.search(r"```sh\n(.*?)\n```", README, re.S).group(1)
    steps = [s.strip() for s in first.split("&&")]
    assert steps[0] == "python3 -m venv .venv"
    assert steps[1] == ". .venv/bin/activate"
    assert steps.index(". .venv/bin/activate") < min(
        i for i, s in enumerate(steps) if s.startswith("liveshape "))


def test_first_install_has_what_report_needs() -> None:
    first = re.search(r"```sh\n(.*?)\n```", README, re.S).group(1)
    assert "pip install -q '.[plot]'" in first
    # report imports matplotlib lazily (record/report.py); the plot extra must carry it
    assert "matplotlib" in (REPO / "liveshape" / "record" / "report.py").read_text()
    assert "matplotlib" in _extra("plot")
    # tests/run.sh installs the test extra: it must hold what plot and jack give
    assert '.[test]' in (REPO / "tests" / "run.sh").read_text()
    assert _extra("plot") | _extra("jack") <= _extra("test")
    assert "bash tests/run.sh" in (REPO / ".ci" / "run").read_text()


def _run_sim(tmp_path: Path, spec_text: str, *rig: str) -> dict:
    spec = tmp_path / "t.yaml"
    spec.write_text(spec_text)
    proc = subprocess.run(
        [sys.executable, "-m", "liveshape", "run", str(spec), *rig, "--fast", "--json",
         "--duration", "1", "--record", "spectra", "--out", str(tmp_path / "runs")],
        capture_output=True, text=True, cwd=REPO, timeout=600)
    assert proc.returncode in (0, 4), proc.stderr
    return json.loads(proc.stdout)


SPEC = ("name: rig-choice\n"
        "profile: {units: g2/Hz, breakpoints: [{f_hz: 100, asd: 0.0005}, "
        "{f_hz: 500, asd: 0.0005}]}\n"
        "schedule: {steps_db: [0], hold_s: 0.5}\n"
        "control: {fs_hz: 48000, frame_length: 4096}\n")


@pytest.mark.parametrize("rig", [(), ("--rig", "sim")])
def test_rig_sim_means_the_files_plant(tmp_path: Path, rig: tuple[str, ...]) -> None:
    out = _run_sim(tmp_path, SPEC + "rig: {kind: sim, plant: bench}\n", *rig)
    assert out["rig"]["plant"] == "bench"


def test_rig_sim_without_a_plant_is_the_loudspeaker(tmp_path: Path) -> None:
    out = _run_sim(tmp_path, SPEC, "--rig", "sim")
    assert out["rig"]["plant"] == "loudspeaker"


def test_help_and_readme_say_what_rig_sim_means() -> None:
    proc = subprocess.run([sys.executable, "-m", "liveshape", "run", "--help"],
                          capture_output=True, text=True, cwd=REPO, timeout=60)
    text = " ".join(proc.stdout.split())
    assert "sim (default: the simulated plant the file names, the loudspeaker preset when it " \
        "names none)" in text
    readme = " ".join(README.split())
    assert "`sim` (default): the simulated plant the test file names (`rig: {plant: ...}`), or " \
        "the loudspeaker preset when it names none; `--rig sim` on the command line means the " \
        "same." in readme
