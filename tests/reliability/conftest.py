"""Fixtures for the reliability tests (helpers in reliability_helpers.py).

The next-hop sink is tests/daemon's own (smtp_helpers.NextHop), so both suites test against
the same stand-in for the organisation's mail server.
"""

from __future__ import annotations

import sys
from collections.abc import AsyncIterator
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "daemon"))

from reliability_helpers import FaultyNextHop


@pytest.fixture
async def sink() -> AsyncIterator[FaultyNextHop]:
    next_hop = FaultyNextHop()
    await next_hop.start()
    try:
        yield next_hop
    finally:
        await next_hop.stop()
