"""Places of values in a test definition, naming the command line for overridden keys.

Pure. A value of a test definition comes from a file (``bench.yaml: control.fs_hz``) or from a
command-line override (``command line: control.fs_hz``); :class:`OverrideWhere` is the
:class:`~liveshape.schema.Where` that names the right one in a one-line error.
:func:`did_you_mean` gives the hint for a misspelled word.
"""

from __future__ import annotations

import difflib
from collections.abc import Sequence

from liveshape.schema import Where

__all__ = ["COMMAND_LINE", "OverrideWhere", "did_you_mean"]

#: The source named in errors about values given on the command line.
COMMAND_LINE = "command line"


def did_you_mean(word: str, valid: Sequence[str]) -> str:
    """``"; did you mean 'x'?"`` for the closest of ``valid`` (difflib ratio >= 0.6), or ``""``."""
    near = difflib.get_close_matches(str(word), list(valid), n=1, cutoff=0.6)
    return f"; did you mean '{near[0]}'?" if near else ""


class OverrideWhere(Where):
    """A :class:`Where` that names ``command line`` for keys that came from overrides."""

    def __init__(self, source: str, path: str = "", overridden: frozenset[str] = frozenset()):
        super().__init__(source, path)
        self.overridden = overridden

    def key(self, name: str) -> OverrideWhere:
        return OverrideWhere(self.source, super().key(name).path, self.overridden)

    def index(self, i: int) -> OverrideWhere:
        return OverrideWhere(self.source, super().index(i).path, self.overridden)

    @property
    def from_command_line(self) -> bool:
        """True when the value at this place came from an override."""
        return any(
            self.path == o or self.path.startswith((o + ".", o + "[")) for o in self.overridden
        )

    def __str__(self) -> str:
        return f"{COMMAND_LINE}: {self.path}" if self.from_command_line else super().__str__()
