"""The README says what the code does: exit statuses, example paths, commands (no drift)."""

from __future__ import annotations

import re
from pathlib import Path

from liveshape.cli import build_parser
from liveshape.control.safety import EXIT_STATUS

REPO = Path(__file__).resolve().parents[1]
README = (REPO / "README.md").read_text(encoding="utf-8")


def test_exit_status_table_matches_the_supervisor() -> None:
    rows = dict((rule, int(code)) for code, rule in re.findall(r"^\| (\d+) \| `(\w+)`", README,
                                                              flags=re.M))
    assert rows == EXIT_STATUS


def test_readme_paths_exist() -> None:
    for path in set(re.findall(r"(examples/[\w./-]+\.(?:yaml|csv)|calibration/[\w.-]+)", README)):
        assert (REPO / path).exists(), path


def test_readme_commands_exist() -> None:
    commands = set(build_parser()._subparsers._group_actions[0].choices)  # noqa: SLF001
    # commands as the README shows them: in backticks or code blocks, after `liveshape `
    named = set(re.findall(r"(?:`|/)liveshape ([a-z][a-z-]+)", README))
    assert named and named <= commands, named - commands
    assert {"check", "synth", "run", "report", "devices", "calibrate", "virtual-rig"} <= commands


def test_contributor_guide_maps_every_module() -> None:
    # DEVELOPERS.md draws the module map by subpackage; a module missing from it is drift
    guide = (REPO / "DEVELOPERS.md").read_text(encoding="utf-8")
    block = guide.split("```", 2)[1]  # the first code block is the map
    current, listed = "", set()
    for line in block.splitlines():
        m = re.match(r"^  (\w+)/", line)
        if m:
            current = m.group(1) + "/"
            continue
        for name in re.findall(r"(?<![\w/])(\w+\.py)", line):
            listed.add((current if line.startswith("    ") else "") + name)
    package = REPO / "liveshape"
    actual = {p.relative_to(package).as_posix() for p in package.rglob("*.py")
              if p.name != "__init__.py" or p.parent == package}
    actual.discard("__main__.py")
    assert actual - listed == set(), "modules missing from the DEVELOPERS.md map"
    assert listed - actual == set(), "the DEVELOPERS.md map names modules that do not exist"
