"""The daemon's background tasks (digest schedule, upkeep schedule, report refresher)."""

from __future__ import annotations

import asyncio
import contextlib

# How often a stop asks again.  A cancellation can be lost on the way: on Python 3.11,
# asyncio.wait_for (aiosmtplib's command timeouts use it) returns its result and drops the
# cancellation when both arrive in the same turn of the loop; the task then carries on into
# its next sleep (the digest schedule's is 300 s) as if never asked to stop.
_ASK_AGAIN = 0.1


async def stop_task(task: asyncio.Task[None] | None) -> None:
    """Cancel ``task`` (if any) and wait until it has ended; its cancellation is expected.

    The task is cancelled again every ``_ASK_AGAIN`` seconds until it ends, so a
    cancellation swallowed somewhere inside it cannot keep it running."""
    if task is None:
        return
    while not task.done():
        task.cancel()
        await asyncio.wait({task}, timeout=_ASK_AGAIN)
    with contextlib.suppress(asyncio.CancelledError):
        await task
