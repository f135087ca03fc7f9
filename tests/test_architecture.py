"""The architecture rules of DEVELOPERS.md, checked on the source itself.

Exactly one module imports each of sounddevice, rich, yaml, argparse, jack and matplotlib; the
pure core imports none of them; nothing in the package calls ``yaml.load`` or prints outside
the shell. (Project rules, not an outside reference.)
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PKG = Path(__file__).resolve().parents[1] / "liveshape"

#: library -> the only module allowed to import it
OWNERS = {
    "sounddevice": "rigs/audio.py",
    "rich": "dashboard.py",
    "yaml": "config.py",
    "argparse": "cli.py",
    "jack": "rigs/jackrig.py",
    "matplotlib": "report.py",
}

#: the functional core: numpy, scipy and the standard library only (and each other)
PURE = [
    "atomic.py", "errors.py", "schema.py", "chain.py", "profile.py", "synth.py", "frames.py",
    "ramp.py", "spectra.py", "spectral_stats.py", "welch_stream.py", "delay.py", "equalizer.py",
    "safety.py", "schedule.py", "stages.py", "connect.py", "controller.py", "loopstate.py",
    "drivestream.py", "runstate.py",
    "checks.py", "textplot.py", "textformat.py", "rigs/plantmodel.py", "rigs/calmath.py",
    "rigs/modal.py", "rigs/faults.py", "rigs/sim.py", "rigs/feasibility.py", "rigs/ring.py",
    "rigs/blocks.py",
]
NOT_PURE = {"sounddevice", "rich", "yaml", "argparse", "jack", "matplotlib", "soundfile",
            "liveshape.config", "liveshape.cli", "liveshape.dashboard", "liveshape.session"}
# spec.py and rigs/plant.py turn files into frozen data: pure functions of mappings plus a
# loader that reads YAML through config.py (the documented exception).


def imports_of(path: Path) -> set[str]:
    names: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            names.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            names.add(node.module)
    return names


def modules() -> list[Path]:
    return sorted(PKG.rglob("*.py"))


def rel(path: Path) -> str:
    return path.relative_to(PKG).as_posix()


@pytest.mark.parametrize("lib", sorted(OWNERS))
def test_one_module_imports_each_io_library(lib: str) -> None:
    users = [rel(p) for p in modules()
             if any(n == lib or n.startswith(lib + ".") for n in imports_of(p))]
    assert users == [OWNERS[lib]]


@pytest.mark.parametrize("name", PURE)
def test_pure_core_imports_no_io(name: str) -> None:
    path = PKG / name
    if not path.exists():
        pytest.fail(f"{name} is listed as pure but does not exist (update PURE)")
    bad = {n for n in imports_of(path)
           if any(n == b or n.startswith(b + ".") for b in NOT_PURE)}
    assert not bad, f"{name} imports {sorted(bad)}"


def test_no_unsafe_yaml_and_no_print_in_the_core() -> None:
    for path in modules():
        tree = ast.parse(path.read_text(encoding="utf-8"))
        for node in ast.walk(tree):
            if isinstance(node, ast.Call) and isinstance(node.func, ast.Attribute):
                assert not (node.func.attr == "load" and getattr(node.func.value, "id", "")
                            == "yaml"), f"{rel(path)} calls yaml.load"
            if (isinstance(node, ast.Call) and isinstance(node.func, ast.Name)
                    and node.func.id == "print"):
                assert rel(path) in ("cli.py", "dashboard.py"), f"{rel(path)} prints"
