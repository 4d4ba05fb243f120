"""Fixtures for end-to-end SMTP tests (helpers live in smtp_helpers.py)."""

from __future__ import annotations

from collections.abc import AsyncIterator

import pytest
from smtp_helpers import NextHop, running_daemon

__all__ = ["next_hop", "running_daemon"]


@pytest.fixture
async def next_hop() -> AsyncIterator[NextHop]:
    sink = NextHop()
    await sink.start()
    try:
        yield sink
    finally:
        await sink.stop()
