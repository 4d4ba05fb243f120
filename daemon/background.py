"""The daemon's background tasks (digest schedule, upkeep schedule, report refresher)."""

from __future__ import annotations

import asyncio
import contextlib


async def stop_task(task: asyncio.Task[None] | None) -> None:
    """Cancel ``task`` (if any) and wait until it has ended; its cancellation is expected."""
    if task is None:
        return
    task.cancel()
    with contextlib.suppress(asyncio.CancelledError):
        await task
