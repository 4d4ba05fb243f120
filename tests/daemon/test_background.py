"""Stopping the daemon's background tasks (daemon/background.py)."""

from __future__ import annotations

import asyncio
import time

from mailweir.daemon.background import stop_task


async def test_stop_task_ends_a_task_that_lost_its_first_cancellation() -> None:
    # The task swallows one cancellation, as asyncio.wait_for on Python 3.11 can when the
    # awaited reply comes in the same turn, then sleeps as a schedule would between runs.
    swallowed = asyncio.Event()

    async def schedule() -> None:
        try:
            await asyncio.sleep(300)
        except asyncio.CancelledError:
            swallowed.set()
        await asyncio.sleep(300)

    task = asyncio.create_task(schedule())
    await asyncio.sleep(0)
    started = time.monotonic()
    await asyncio.wait_for(stop_task(task), timeout=10)
    assert swallowed.is_set() and task.cancelled()
    assert time.monotonic() - started < 5


async def test_stop_task_of_an_ended_task_or_none() -> None:
    async def quick() -> None:
        return None

    task = asyncio.create_task(quick())
    await task
    await stop_task(task)
    await stop_task(None)


async def test_stop_task_passes_on_the_task_failing_as_it_stops() -> None:
    async def failing() -> None:
        try:
            await asyncio.sleep(300)
        except asyncio.CancelledError:
            raise RuntimeError("cleanup failed") from None

    task = asyncio.create_task(failing())
    await asyncio.sleep(0)
    try:
        await stop_task(task)
    except RuntimeError as exc:
        assert str(exc) == "cleanup failed"
    else:
        raise AssertionError("the task's own error was lost")
