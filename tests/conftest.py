"""Shared fixtures.

``jack_server``: one private JACK server (dummy driver, 48 kHz, 1024-frame periods) for the whole
session, started on first use and killed by its PID at the end (see ``tests/jackserver.py``).
Tests using it are marked ``@pytest.mark.jack``. When jackd, JACK-Client or PortAudio is missing
they are skipped locally and fail when ``CI=true``.
"""

from __future__ import annotations

from collections.abc import Iterator

import pytest
from jackserver import JackServer, jack_session, missing_reason, skip_or_fail


@pytest.fixture(scope="session")
def jack_server() -> Iterator[JackServer]:
    reason = missing_reason()
    if reason is not None:
        skip_or_fail(reason)
    with jack_session(fs_hz=48000, period_frames=1024) as server:
        yield server
