"""The daemon hands free memory back to the system while mail comes, never while none does
(daemon/memory_return.py; that glibc's trim returns pages is tests/store/test_memory.py)."""

from __future__ import annotations

import asyncio
import threading

import pytest
from smtp_helpers import wait_until

from mailweir.daemon.memory_return import ReturnFreeMemory


class Releases:
    """Counts calls of the release and the threads they ran in; can fail the next one."""

    def __init__(self) -> None:
        self.threads: list[int] = []
        self.fail_next = False

    def __call__(self) -> None:
        self.threads.append(threading.get_ident())
        if self.fail_next:
            self.fail_next = False
            raise OSError("no memory to map")


async def test_nothing_is_returned_while_no_mail_comes() -> None:
    releases = Releases()
    returner = ReturnFreeMemory(lambda: 7, every=0.005, release=releases)
    returner.start()
    await asyncio.sleep(0.1)  # about twenty intervals
    await returner.stop()
    assert releases.threads == []


async def test_memory_is_returned_in_a_thread_once_per_interval_with_mail() -> None:
    judged = [0]
    releases = Releases()
    returner = ReturnFreeMemory(lambda: judged[0], every=0.005, release=releases)
    returner.start()
    judged[0] = 1
    await wait_until(lambda: len(releases.threads) == 1)
    await asyncio.sleep(0.05)  # nothing judged since: no second return
    assert len(releases.threads) == 1
    assert releases.threads[0] != threading.get_ident()  # the loop's thread stays free
    judged[0] = 5
    await wait_until(lambda: len(releases.threads) == 2)
    await returner.stop()


async def test_a_failed_return_is_logged_and_the_next_one_still_runs(
    caplog: pytest.LogCaptureFixture,
) -> None:
    judged = [0]
    releases = Releases()
    releases.fail_next = True
    returner = ReturnFreeMemory(lambda: judged[0], every=0.005, release=releases)
    returner.start()
    judged[0] = 1
    await wait_until(lambda: len(releases.threads) == 1)
    judged[0] = 2
    await wait_until(lambda: len(releases.threads) == 2)
    await returner.stop()
    assert "returning free memory to the system failed" in caplog.text


async def test_stop_ends_the_task_and_may_be_called_twice() -> None:
    returner = ReturnFreeMemory(lambda: 0, every=0.005, release=Releases())
    returner.start()
    await returner.stop()
    await returner.stop()
