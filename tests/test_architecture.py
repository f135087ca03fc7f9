"""The architecture rules of DEVELOPERS.md, checked on the source itself.

The folders name the layers; arrows point down only (cli -> session -> {rigs, record, views} ->
control -> testdef -> dsp). Exactly one module imports each of sounddevice, rich, yaml, argparse,
jack and matplotlib; the pure core imports none of them; no module-level import cycle; nothing
calls ``yaml.load`` or prints outside the shell. (Project rules, not an outside reference.)

Every rule is a function of a ``{module path: imported names}`` map, so the tests below also
plant violations in a copy of the map and check that each rule names the file and the import.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PKG = Path(__file__).resolve().parents[1] / "liveshape"

#: library -> the only module allowed to import it
OWNERS = {
    "sounddevice": "rigs/audio.py",
    "rich": "views/dashboard.py",
    "yaml": "testdef/config.py",
    "argparse": "cli.py",
    "jack": "rigs/jackrig.py",
    "matplotlib": "record/report.py",
}

#: Top-level modules: the shell (cli, session, __main__, __init__) and the leaves every layer may
#: use (errors, schema, atomic).
TOP_LEVEL = {"__init__.py", "__main__.py", "cli.py", "session.py", "errors.py", "schema.py",
             "atomic.py"}
LEAVES = {"liveshape.errors", "liveshape.schema", "liveshape.atomic"}

#: subpackage -> the other subpackages it may import (besides itself and the leaves), and why
MAY_IMPORT: dict[str, set[str]] = {
    "dsp": set(),                                   # numpy/scipy only
    "testdef": {"dsp"},                             # a profile is dsp arithmetic
    "control": {"dsp", "testdef"},                  # the loop runs a test definition
    "rigs": {"dsp", "testdef"},                     # what the controller drives, not the loop
    "record": {"dsp", "testdef", "control"},        # writes the loop's frozen records
    "views": {"dsp", "testdef", "control"},         # shows the loop's frozen views
}

#: the functional core: numpy, scipy, the standard library and each other only
PURE_PACKAGES = ("dsp", "control")
PURE_MODULES = [
    "errors.py", "schema.py", "atomic.py", "testdef/chain.py", "testdef/tolerance.py",
    "testdef/overrides.py", "testdef/fault_spec.py", "testdef/profilefile.py",
    "testdef/hum_spec.py", "testdef/tone_spec.py", "rigs/hum.py",
    "views/textplot.py", "views/textformat.py", "views/runtext.py", "views/checktext.py",
    "views/surveytext.py",
    "rigs/plantmodel.py", "rigs/calmath.py", "rigs/modal.py", "rigs/cascade.py",
    "rigs/faults.py", "rigs/sim.py", "rigs/feasibility.py", "rigs/ring.py", "rigs/blocks.py",
]
NOT_PURE = {"sounddevice", "rich", "yaml", "argparse", "jack", "matplotlib", "soundfile",
            "liveshape.testdef.config", "liveshape.cli", "liveshape.views.dashboard",
            "liveshape.session", "liveshape.rigs.audio", "liveshape.rigs.jackrig"}
# testdef/spec.py and rigs/plant.py turn files into frozen data: pure functions of mappings plus a
# loader that reads YAML through testdef/config.py (the documented exception).


def _type_checking_block(node: ast.AST) -> bool:
    test = getattr(node, "test", None)
    return isinstance(node, ast.If) and (
        (isinstance(test, ast.Name) and test.id == "TYPE_CHECKING")
        or (isinstance(test, ast.Attribute) and test.attr == "TYPE_CHECKING"))


def imports_of(path: Path, *, module_level_only: bool = False) -> set[str]:
    """Absolute names a module imports (``from a import b`` gives ``a`` and ``a.b``).

    Imports under ``if TYPE_CHECKING:`` are left out (they never run); with
    ``module_level_only`` so are imports inside functions (they run on use, after import).
    """
    tree = ast.parse(path.read_text(encoding="utf-8"))
    names: set[str] = set()

    def visit(node: ast.AST, in_function: bool) -> None:
        for child in ast.iter_child_nodes(node):
            if _type_checking_block(child):
                for stmt in child.orelse:  # the else branch does run
                    visit(stmt, in_function)
                continue
            nested = in_function or isinstance(child, (ast.FunctionDef, ast.AsyncFunctionDef))
            if not (module_level_only and nested):
                if isinstance(child, ast.Import):
                    names.update(a.name for a in child.names)
                elif isinstance(child, ast.ImportFrom) and child.module and child.level == 0:
                    names.add(child.module)
                    names.update(f"{child.module}.{a.name}" for a in child.names)
            visit(child, nested)

    visit(tree, False)
    return names


def modules() -> list[Path]:
    return sorted(PKG.rglob("*.py"))


def rel(path: Path) -> str:
    return path.relative_to(PKG).as_posix()


def import_map(*, module_level_only: bool = False) -> dict[str, set[str]]:
    return {rel(p): imports_of(p, module_level_only=module_level_only) for p in modules()}


def _subpackage(name: str) -> str | None:
    """``liveshape.dsp.synth`` -> ``dsp``; a top-level module or a leaf -> None."""
    parts = name.split(".")
    if parts[0] != "liveshape" or len(parts) < 2 or parts[1] not in MAY_IMPORT:
        return None
    return parts[1]


def layer_violations(imports: dict[str, set[str]]) -> list[str]:
    """``file imports name (rule)`` for every import that runs up or across the layers."""
    bad = []
    for path, names in sorted(imports.items()):
        here = path.split("/")[0] if "/" in path else None
        for name in sorted(names):
            if not name.startswith("liveshape.") or name == "liveshape.__version__" or any(
                    name == leaf or name.startswith(leaf + ".") for leaf in LEAVES):
                continue
            there = _subpackage(name)
            if here is None:  # top level
                if path in {"errors.py", "schema.py", "atomic.py"}:
                    bad.append(f"{path} imports {name} (a leaf imports no other liveshape module)")
                elif path not in ("cli.py", "__main__.py") and name.startswith("liveshape.cli"):
                    bad.append(f"{path} imports {name} (only the entry point imports cli)")
                continue
            if there is None:
                top = name.split(".")[1]
                if top not in {"errors", "schema", "atomic"}:
                    bad.append(f"liveshape/{path} imports {name} ({here} may not import the "
                               f"shell: {top})")
            elif there != here and there not in MAY_IMPORT[here]:
                allowed = ", ".join(sorted(MAY_IMPORT[here])) or "no other subpackage"
                bad.append(f"liveshape/{path} imports {name} ({here} may import {allowed})")
    return bad


def owner_violations(imports: dict[str, set[str]]) -> list[str]:
    bad = []
    for lib, owner in sorted(OWNERS.items()):
        for path, names in sorted(imports.items()):
            if path != owner and any(n == lib or n.startswith(lib + ".") for n in names):
                bad.append(f"liveshape/{path} imports {lib} (only liveshape/{owner} may)")
    return bad


def _module_of(path: str) -> str:
    return "liveshape." + path.removesuffix(".py").removesuffix("/__init__").replace("/", ".")


def import_cycles(imports: dict[str, set[str]]) -> list[str]:
    """Module-level import cycles between liveshape modules, as ``a -> b -> a``."""
    known = {_module_of(p) for p in imports}
    graph = {_module_of(p): sorted(n for n in names if n in known and n != _module_of(p))
             for p, names in imports.items()}
    cycles, state = [], {}

    def dfs(node: str, stack: list[str]) -> None:
        state[node] = "open"
        for nxt in graph.get(node, []):
            if state.get(nxt) == "open":
                cycles.append(" -> ".join(stack[stack.index(nxt):] + [nxt]))
            elif nxt not in state:
                dfs(nxt, stack + [nxt])
        state[node] = "done"

    for start in sorted(graph):
        if start not in state:
            dfs(start, [start])
    return cycles


# -- the rules on the real source --------------------------------------------------------------
def test_top_level_is_the_shell_and_the_leaves() -> None:
    top = {p.name for p in PKG.glob("*.py")}
    assert top <= TOP_LEVEL, f"modules at the top of liveshape/ beyond the shell: {top - TOP_LEVEL}"
    subs = {p.name for p in PKG.iterdir() if (p / "__init__.py").exists()}
    assert subs == set(MAY_IMPORT), f"subpackages {sorted(subs)} != rules {sorted(MAY_IMPORT)}"


def test_layers_import_downward_only() -> None:
    assert layer_violations(import_map()) == []


@pytest.mark.parametrize("lib", sorted(OWNERS))
def test_one_module_imports_each_io_library(lib: str) -> None:
    users = [p for p, names in import_map().items()
             if any(n == lib or n.startswith(lib + ".") for n in names)]
    assert users == [OWNERS[lib]]


def test_no_module_level_import_cycle() -> None:
    assert import_cycles(import_map(module_level_only=True)) == []


def _pure_paths() -> list[str]:
    listed = [rel(p) for sub in PURE_PACKAGES for p in sorted((PKG / sub).glob("*.py"))]
    return listed + PURE_MODULES


@pytest.mark.parametrize("name", _pure_paths())
def test_pure_core_imports_no_io(name: str) -> None:
    path = PKG / name
    if not path.exists():
        pytest.fail(f"{name} is listed as pure but does not exist (update PURE_MODULES)")
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
                assert rel(path) in ("cli.py", "views/dashboard.py"), f"{rel(path)} prints"


# -- planted violations: each rule fails, naming the file and the import ----------------------
def test_a_planted_upward_import_is_named() -> None:
    imports = import_map()
    imports["dsp/synth.py"] = imports["dsp/synth.py"] | {"liveshape.control.safety"}
    imports["rigs/sim.py"] = imports["rigs/sim.py"] | {"liveshape.views.textplot"}
    imports["control/safety.py"] = imports["control/safety.py"] | {"liveshape.session"}
    assert layer_violations(imports) == [
        "liveshape/control/safety.py imports liveshape.session (control may not import the "
        "shell: session)",
        "liveshape/dsp/synth.py imports liveshape.control.safety (dsp may import no other "
        "subpackage)",
        "liveshape/rigs/sim.py imports liveshape.views.textplot (rigs may import dsp, testdef)",
    ]


def test_a_planted_second_importer_is_named() -> None:
    imports = import_map()
    imports["rigs/sim.py"] = imports["rigs/sim.py"] | {"sounddevice"}
    imports["control/controller.py"] = imports["control/controller.py"] | {"rich.table"}
    assert owner_violations(imports) == [
        "liveshape/control/controller.py imports rich (only liveshape/views/dashboard.py may)",
        "liveshape/rigs/sim.py imports sounddevice (only liveshape/rigs/audio.py may)",
    ]
    assert owner_violations(import_map()) == []


def test_a_planted_cycle_is_named() -> None:
    imports = import_map(module_level_only=True)
    imports["dsp/profile.py"] = imports["dsp/profile.py"] | {"liveshape.dsp.response"}
    imports["dsp/response.py"] = imports["dsp/response.py"] | {"liveshape.dsp.profile"}
    assert import_cycles(imports) == [
        "liveshape.dsp.profile -> liveshape.dsp.response -> liveshape.dsp.profile"]


def test_type_checking_imports_do_not_count(tmp_path: Path) -> None:
    src = tmp_path / "m.py"
    src.write_text("from typing import TYPE_CHECKING\nif TYPE_CHECKING:\n"
                   "    from liveshape.control import safety\nimport numpy\n"
                   "def f():\n    from liveshape.rigs import sim\n", encoding="utf-8")
    assert imports_of(src) == {"typing", "typing.TYPE_CHECKING", "numpy", "liveshape.rigs",
                               "liveshape.rigs.sim"}
    assert imports_of(src, module_level_only=True) == {"typing", "typing.TYPE_CHECKING", "numpy"}


def test_public_api_is_listed_in_one_place_and_resolves() -> None:
    import importlib

    import liveshape

    for name, module in liveshape.PUBLIC_API.items():
        assert getattr(liveshape, name) is getattr(importlib.import_module(module), name), name
        assert f"``{name}``" in liveshape.__doc__, f"{name} missing from the package docstring"
    for short, module in liveshape.PUBLIC_MODULES.items():
        assert getattr(liveshape, short) is importlib.import_module(module)
    from liveshape import Controller, SimRig, load_spec, profile, welch_psd  # noqa: F401
    with pytest.raises(AttributeError, match="no attribute 'nonesuch'"):
        liveshape.nonesuch  # noqa: B018
