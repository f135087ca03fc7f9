"""The one module that imports :mod:`yaml`.

It turns a YAML file into plain Python data (``dict``/``list``/scalars) and back, with errors that
name the file and line. Everything that gives the data meaning (strict keys, ranges, units) lives in
pure modules (:mod:`liveshape.schema`, :mod:`liveshape.testdef.spec`, :mod:`liveshape.rigs.plant`,
...). Only :func:`yaml.safe_load` semantics are used (a :class:`yaml.SafeLoader` subclass that
also refuses a key repeated within a mapping).
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

import yaml

from liveshape.atomic import atomic_write_text
from liveshape.errors import ConfigError


class _DuplicateKey(Exception):
    """A mapping repeats a key (raised by :class:`_StrictSafeLoader`, turned into ConfigError)."""

    def __init__(self, key: Any, first_line: int, second_line: int) -> None:
        super().__init__(key, first_line, second_line)
        self.key = key
        self.first_line = first_line
        self.second_line = second_line


class _StrictSafeLoader(yaml.SafeLoader):
    """:class:`yaml.SafeLoader` that refuses a key repeated within one mapping.

    YAML 1.2 §3.2.1.1 requires the keys of a mapping to be unique; PyYAML keeps the last value
    silently, so a repeated ``schedule:`` could drop a safety schedule without a word. Only the
    mapping constructor is changed: the tags and types are those of :func:`yaml.safe_load`.
    """

    def construct_mapping(self, node: yaml.MappingNode, deep: bool = False) -> dict[Any, Any]:
        if isinstance(node, yaml.MappingNode):
            # Only the keys written in this mapping count; keys merged in with ``<<`` may be
            # overridden by them (YAML merge-key type, yaml.org/type/merge.html).
            seen: dict[Any, int] = {}
            for key_node, _value_node in node.value:
                if key_node.tag == "tag:yaml.org,2002:merge":
                    continue
                key = self.construct_object(key_node, deep=deep)
                try:
                    first = seen.get(key)
                except TypeError:  # unhashable key: SafeLoader reports it below
                    continue
                line = key_node.start_mark.line + 1
                if first is not None:
                    raise _DuplicateKey(key, first, line)
                seen[key] = line
        return super().construct_mapping(node, deep=deep)


def _safe_load(text: str) -> Any:
    """:func:`yaml.safe_load` semantics, refusing repeated mapping keys."""
    loader = _StrictSafeLoader(text)
    try:
        return loader.get_single_data()
    finally:
        loader.dispose()


def read_yaml_text(text: str, where: str) -> Any:
    """Parse YAML text with :func:`yaml.safe_load`.

    Parameters
    ----------
    text : str
        The YAML document.
    where : str
        Name used in error messages (usually the file name).

    Raises
    ------
    ConfigError
        One line naming ``where``, the line and column, and what the parser found; a key
        repeated within one mapping names the key and both lines.
    """
    try:
        return _safe_load(text)
    except _DuplicateKey as dup:
        raise ConfigError(
            f"{where}: key {dup.key!r} is given twice (lines {dup.first_line} and "
            f"{dup.second_line}); each key may appear once per mapping"
        ) from None
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark
        pos = f" line {mark.line + 1} column {mark.column + 1}" if mark is not None else ""
        problem = (exc.problem or str(exc)).strip()
        raise ConfigError(f"{where}:{pos}: malformed YAML ({problem})") from None
    except yaml.YAMLError as exc:
        raise ConfigError(f"{where}: malformed YAML ({str(exc).splitlines()[0]})") from None


def read_yaml_file(path: str | os.PathLike[str]) -> Any:
    """Read and parse a YAML file; a missing or unreadable file is a :class:`ConfigError`."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise ConfigError(f"{p}: file not found") from None
    except IsADirectoryError:
        raise ConfigError(f"{p}: is a directory, expected a YAML file") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(f"{p}: cannot read ({exc.__class__.__name__}: {exc})") from None
    return read_yaml_text(text, str(p))


def dump_yaml_text(data: Any) -> str:
    """Serialize plain data (dicts, lists, scalars) to YAML text, keys in insertion order."""
    return yaml.safe_dump(data, sort_keys=False, default_flow_style=None, allow_unicode=True)


def write_yaml_file(path: str | os.PathLike[str], data: Any) -> None:
    """Write plain data as YAML atomically (:func:`liveshape.atomic.atomic_write_text`).

    Raises
    ------
    ConfigError
        One line naming the file when it cannot be written.
    """
    p = Path(path)
    text = dump_yaml_text(data)
    try:
        atomic_write_text(p, text)
    except OSError as exc:
        raise ConfigError(f"{p}: cannot write ({exc.strerror or exc})") from None
