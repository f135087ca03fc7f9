"""Strict reading of plain mappings (from YAML or the command line) into typed values.

Pure: no I/O. Every failure is a one-line :class:`~liveshape.errors.ConfigError` that names the
place (file and dotted key), the value and the rule; an unknown key suggests the nearest valid one.
"""

from __future__ import annotations

import difflib
import math
from collections.abc import Iterable, Mapping
from typing import Any

from liveshape.errors import ConfigError


class Where:
    """A place in a document: file name plus dotted key path, for error messages.

    >>> str(Where("bench.yaml").key("profile").index(3).key("f_hz"))
    'bench.yaml: profile[3].f_hz'
    """

    def __init__(self, source: str, path: str = "") -> None:
        self.source = source
        self.path = path

    def key(self, name: str) -> Where:
        return Where(self.source, f"{self.path}.{name}" if self.path else name)

    def index(self, i: int) -> Where:
        return Where(self.source, f"{self.path}[{i}]")

    def __str__(self) -> str:
        return f"{self.source}: {self.path}" if self.path else self.source

    def fail(self, value: Any, rule: str) -> ConfigError:
        """Return (not raise) the error ``WHERE = VALUE RULE``."""
        if self.path:
            return ConfigError(f"{self} = {value!r} {rule}")
        return ConfigError(f"{self}: {value!r} {rule}")


def check_keys(
    data: Any, allowed: Iterable[str], where: Where, *, required: Iterable[str] = ()
) -> dict[str, Any]:
    """Check that ``data`` is a mapping with only ``allowed`` keys and all ``required`` ones.

    An unknown key is an error that suggests the nearest valid key (difflib).
    """
    allowed = list(allowed)
    if data is None:
        data = {}
    if not isinstance(data, Mapping):
        raise ConfigError(f"{where} must be a mapping of keys, got {type(data).__name__}")
    for k in data:
        if not isinstance(k, str) or k not in allowed:
            near = difflib.get_close_matches(str(k), allowed, n=1, cutoff=0.6)
            hint = f"; did you mean '{near[0]}'?" if near else ""
            raise ConfigError(
                f"{where.key(str(k))}: unknown key (valid: {', '.join(allowed)}){hint}"
            )
    for k in required:
        if k not in data:
            raise ConfigError(f"{where.key(k)}: required key is missing")
    return dict(data)


def as_float(
    value: Any,
    where: Where,
    *,
    gt: float | None = None,
    ge: float | None = None,
    lt: float | None = None,
    le: float | None = None,
) -> float:
    """A finite number within the given bounds."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        try:
            if isinstance(value, str):
                value = float(value)
            else:
                raise ValueError
        except ValueError:
            raise where.fail(value, "is not a number") from None
    x = float(value)
    if not math.isfinite(x):
        raise where.fail(value, "is not a finite number")
    if gt is not None and not x > gt:
        raise where.fail(value, f"must be > {gt:g}")
    if ge is not None and not x >= ge:
        raise where.fail(value, f"must be >= {ge:g}")
    if lt is not None and not x < lt:
        raise where.fail(value, f"must be < {lt:g}")
    if le is not None and not x <= le:
        raise where.fail(value, f"must be <= {le:g}")
    return x


def as_int(value: Any, where: Where, *, ge: int | None = None, le: int | None = None) -> int:
    """A whole number within the given bounds."""
    if isinstance(value, bool):
        raise where.fail(value, "is not a whole number")
    if isinstance(value, float) and value.is_integer():
        value = int(value)
    if isinstance(value, str):
        try:
            value = int(value)
        except ValueError:
            raise where.fail(value, "is not a whole number") from None
    if not isinstance(value, int):
        raise where.fail(value, "is not a whole number")
    if ge is not None and value < ge:
        raise where.fail(value, f"must be >= {ge}")
    if le is not None and value > le:
        raise where.fail(value, f"must be <= {le}")
    return value


def as_choice(value: Any, where: Where, choices: Iterable[str]) -> str:
    """One of a fixed set of words."""
    choices = list(choices)
    if not isinstance(value, str) or value not in choices:
        near = difflib.get_close_matches(str(value), choices, n=1, cutoff=0.6)
        hint = f"; did you mean '{near[0]}'?" if near else ""
        raise where.fail(value, f"is not one of {', '.join(choices)}{hint}")
    return value


def as_bool(value: Any, where: Where) -> bool:
    """``true`` or ``false``."""
    if not isinstance(value, bool):
        raise where.fail(value, "must be true or false")
    return value


def as_str(value: Any, where: Where) -> str:
    """A non-empty string."""
    if not isinstance(value, str) or not value.strip():
        raise where.fail(value, "must be a non-empty string")
    return value


def as_list(value: Any, where: Where, *, min_len: int = 0) -> list[Any]:
    """A list (YAML sequence) with at least ``min_len`` items."""
    if not isinstance(value, list):
        raise where.fail(value, "must be a list")
    if len(value) < min_len:
        raise ConfigError(f"{where}: needs at least {min_len} items, got {len(value)}")
    return value
