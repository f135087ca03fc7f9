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


# Files that may carry a citation: the package, tests, docs, examples, calibration, top files.
_TEXT_SUFFIXES = {".py", ".md", ".yaml", ".yml", ".csv", ".txt", ".toml", ".sh", ".cfg", ".ini"}
_SKIP_DIRS = {".git", ".venv", "venv", "__pycache__", "build", "dist", "runs", ".ruff_cache",
              ".pytest_cache"}
# A notes file outside the repository, by name or by path (written so as not to match itself).
_OUTSIDE_CITATION = re.compile(r"DOMAIN\.md|\.\./shared|/work/shar[e]d")


def _repo_text_files() -> list[Path]:
    files = []
    for p in REPO.rglob("*"):
        rel = p.relative_to(REPO)
        if any(part in _SKIP_DIRS or part.endswith(".egg-info") for part in rel.parts[:-1]):
            continue
        if p.is_file() and p.suffix in _TEXT_SUFFIXES:
            files.append(p)
    return files


def test_no_file_cites_a_notes_file_outside_the_repository() -> None:
    # Someone who clones the repository must be able to follow every citation: primary sources
    # are named beside each check and derivations live in docs/methods.md.
    files = _repo_text_files()
    assert any(p.name == "test_docs.py" for p in files)  # the scan sees the tests
    hits = []
    for p in files:
        for i, line in enumerate(p.read_text(encoding="utf-8", errors="replace").splitlines(), 1):
            if _OUTSIDE_CITATION.search(line):
                hits.append(f"{p.relative_to(REPO)}:{i}: {line.strip()}")
    assert hits == [], "\n".join(hits)


#: Sections of docs/methods.md that the code and the tests point to.
METHODS_SECTIONS = (
    "Profile integrals",
    "Synthesis window: power complementarity",
    "Welch estimates: degrees of freedom",
    "χ² confidence bands and dB scatter",
    "Equalizer update laws and their scatter",
    "Gaussian drive: crest factor, kurtosis and clipping",
    "Sampling scatter of rms and kurtosis",
    "Response of a single-degree-of-freedom item",
    "FRF (H1) and coherence",
    "Loop delay through JACK",
    "Chain calibration (V/FS, mV/g)",
)
# What names a source: a year of publication, an edition, a standard, scipy, a manual page, or
# the tags the contributor rules ask for when there is no published source.
_SOURCE = re.compile(r"\b(?:1[89]\d\d|20\d\d)\b|\d(?:st|nd|rd|th) ed\.|\b(?:IEC|ISO|IEEE|MIL-STD)"
                     r"\b|scipy|manual page|common practice|from memory|no published source")


def _methods_sections() -> dict[str, str]:
    text = (REPO / "docs" / "methods.md").read_text(encoding="utf-8")
    parts = re.split(r"^## (.+)$", text, flags=re.M)
    return {title.strip(): body for title, body in zip(parts[1::2], parts[2::2], strict=True)}


def test_methods_document_has_the_derivations_the_code_relies_on() -> None:
    sections = _methods_sections()
    missing = [s for s in METHODS_SECTIONS if s not in sections]
    assert missing == [], f"docs/methods.md lacks sections: {missing}"
    unsourced = [title for title, body in sections.items() if not _SOURCE.search(body)]
    assert unsourced == [], f"docs/methods.md sections that name no source: {unsourced}"


def test_methods_sections_cited_in_the_code_exist() -> None:
    # Comments and docstrings point to a section of docs/methods.md by its title in quotes
    # after the file name: every section so named must be there.
    sections = _methods_sections()
    cited = set()
    for p in _repo_text_files():
        if p.suffix == ".py":
            text = re.sub(r"\s*\n\s*#?\s*", " ", p.read_text(encoding="utf-8"))
            cited |= set(re.findall(r'docs/methods\.md, "([^"]+)"', text))
    assert cited, "no code cites docs/methods.md"
    assert cited <= set(sections), cited - set(sections)
