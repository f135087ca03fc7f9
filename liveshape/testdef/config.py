"""The one module that imports :mod:`yaml`.

It turns a YAML file into plain Python data (``dict``/``list``/scalars) and back, with errors that
name the file and line. Everything that gives the data meaning (strict keys, ranges, units) lives in
pure modules (:mod:`liveshape.schema`, :mod:`liveshape.testdef.spec`, :mod:`liveshape.rigs.plant`,
...). Only :func:`yaml.safe_load` is ever used.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

import yaml

from liveshape.atomic import atomic_write_text
from liveshape.errors import ConfigError


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
        One line naming ``where``, the line and column, and what the parser found.
    """
    try:
        return yaml.safe_load(text)
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
