"""Exceptions a user can cause, and the safety abort.

Every error a user can cause (a bad file, key, option or value) is a :class:`ConfigError` whose
message is one line naming the file, key or option, the value and the rule. The command line turns
any :class:`LiveshapeError` into that one line on stderr and exit status 2 (see ``cli.py``).
"""

from __future__ import annotations


class LiveshapeError(Exception):
    """Base class of every error liveshape raises on purpose."""


class ConfigError(LiveshapeError, ValueError):
    """A file, key, option or value given by the user breaks a rule.

    The message is one line: ``WHERE: KEY = VALUE RULE`` for example
    ``bench.yaml: profile.breakpoints[3].f_hz = 1800 is not above breakpoints[2].f_hz = 2000
    (frequencies must increase)``.
    """


class DeviceError(LiveshapeError, RuntimeError):
    """The audio device or audio library cannot do what was asked."""


class SafetyAbort(LiveshapeError):
    """A safety rule tripped; carries the rule's name and the numbers that tripped it.

    Parameters
    ----------
    rule : str
        Short machine name of the rule (``rms_abort``, ``lines_abort``, ``drive_limit``, ...).
    message : str
        One line a person reads.
    detail : dict, optional
        The numbers that tripped the rule (values with units in their key names).
    """

    def __init__(self, rule: str, message: str, detail: dict | None = None) -> None:
        super().__init__(message)
        self.rule = rule
        self.detail = dict(detail or {})
