"""The daemon keeps every token's counts in memory: preloaded at start, again after it ends."""

from __future__ import annotations

import asyncio
import dataclasses
import threading
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from postgres_helpers import BACKENDS, empty_postgres_database
from smtp_helpers import wait_until

from mailweir.daemon.preload import KeepPreloaded


class FakeStore:
    """Stands in for ModelStore.preload/complete; the gate holds a preload in its thread."""

    def __init__(self, too_large: bool = False) -> None:
        self.complete = False
        self.too_large = too_large  # preload builds a presence filter, memory stays partial
        self.filtered = False
        self.calls = 0
        self.fail_next = 0
        self.gate = threading.Event()
        self.gate.set()
        self.entered = threading.Event()

    def preload(self) -> bool:
        self.calls += 1
        self.entered.set()
        assert self.gate.wait(10), "test left the gate shut"
        if self.fail_next:
            self.fail_next -= 1
            raise RuntimeError("database is locked")
        if self.too_large:
            self.filtered = True
            return False
        self.complete = True
        return True

    @property
    def presence_known(self) -> bool:
        return self.complete or self.filtered


async def test_preloads_at_start_and_again_once_memory_is_no_longer_complete() -> None:
    store = FakeStore()
    keeper = KeepPreloaded(store, every=0.01)
    keeper.start()
    await wait_until(lambda: store.complete)
    await asyncio.sleep(0.05)
    assert store.calls == 1  # complete: nothing more to read
    store.complete = False  # another process wrote
    await wait_until(lambda: store.complete)
    assert store.calls == 2
    await keeper.stop()


async def test_a_model_too_large_is_filtered_once_and_again_after_a_write(
    caplog: pytest.LogCaptureFixture,
) -> None:
    caplog.set_level("INFO", logger="mailweir.preload")
    store = FakeStore(too_large=True)
    keeper = KeepPreloaded(store, every=0.01)
    keeper.start()
    await wait_until(lambda: store.filtered)
    await asyncio.sleep(0.05)
    assert store.calls == 1 and not store.complete  # the filter known: nothing more to read
    assert "presence filter built" in caplog.text
    store.filtered = False  # another process wrote
    await wait_until(lambda: store.filtered)
    assert store.calls == 2
    await keeper.stop()


async def test_a_failed_preload_is_logged_and_tried_again(
    caplog: pytest.LogCaptureFixture,
) -> None:
    store = FakeStore()
    store.fail_next = 1
    keeper = KeepPreloaded(store, every=0.01)
    keeper.start()
    await wait_until(lambda: store.complete)
    assert store.calls == 2
    assert "preloading the token counts failed" in caplog.text
    await keeper.stop()


async def test_stop_waits_for_a_preload_in_its_thread() -> None:
    store = FakeStore()
    store.gate.clear()
    keeper = KeepPreloaded(store, every=3600)
    keeper.start()
    await asyncio.to_thread(store.entered.wait, 10)
    stopping = asyncio.create_task(keeper.stop())
    await asyncio.sleep(0.05)
    assert not stopping.done()  # the store must not close under the reading thread
    store.gate.set()
    await asyncio.wait_for(stopping, 10)


async def _daemon_on(tmp_path: Path, hashes: np.ndarray, **model: object) -> Any:
    """A started daemon (``Service``) on a model that has trained *hashes* as spam once,
    with *model* settings changed; the caller shuts it down."""
    from mailweir.daemon.service import Service
    from mailweir.daemon.settings import HostPort, Settings, SmtpSettings
    from mailweir.model.hashing import message_digest
    from mailweir.model.types import SPAM
    from mailweir.store import ModelStore

    base = Settings(state_dir=tmp_path)
    settings = dataclasses.replace(
        base,
        smtp=SmtpSettings(listen=HostPort("127.0.0.1", 0), hostname="filter.harbourlane.example"),
        http=dataclasses.replace(base.http, listen=HostPort("127.0.0.1", 0)),
        model=dataclasses.replace(base.model, **model),
    )
    store = ModelStore.open(settings.database)
    store.train(hashes, SPAM, digest=message_digest(hashes), source="t")
    store.close()
    service = Service(settings)
    await service.startup()
    return service


@pytest.mark.parametrize("preload", [True, False])
async def test_the_daemon_holds_its_whole_model_in_memory(tmp_path: Path, preload: bool) -> None:
    service = await _daemon_on(tmp_path, np.arange(1, 50, dtype=np.int64), preload=preload)
    try:
        if preload:
            await wait_until(lambda: service.store.complete)
        else:  # model.preload = false: tokens are read as mail brings them
            await asyncio.sleep(0.2)
            assert service.preload is None and not service.store.complete
        assert service.store.lookup(np.array([7, 500])).tolist() == [[0, 1], [0, 0]]
        held = "counts" if preload else "none"  # /metrics says what memory holds
        text = service.metrics.render().decode()
        assert f'mailweir_model_in_memory{{state="{held}"}} 1.0' in text
    finally:
        await service.shutdown(grace=1)


async def test_the_daemon_keeps_a_presence_filter_of_a_model_too_large(tmp_path: Path) -> None:
    hashes = np.random.default_rng(8).integers(-(2**63), 2**63 - 1, 50)
    service = await _daemon_on(tmp_path, hashes, cache_tokens=20)
    try:
        await wait_until(lambda: service.store.presence_known)
        assert not service.store.complete
        wanted = np.sort(hashes[:3])
        assert service.store.lookup(wanted).tolist() == [[0, 1]] * 3
        text = service.metrics.render().decode()
        assert 'mailweir_model_in_memory{state="presence"} 1.0' in text
        assert service.observing is not None
        page = await service.observing.page.render()
        assert "<dt>in memory</dt><dd>which tokens it holds" in page
    finally:
        await service.shutdown(grace=1)


@pytest.mark.parametrize("backend", BACKENDS)
async def test_a_preloaded_daemon_reads_no_token_until_another_process_writes(
    tmp_path: Path, backend: str
) -> None:
    # On PostgreSQL too, where several daemons share the model: between writes, a message's
    # unknown tokens are known from memory to have no counts; another daemon's write is seen
    # within model.staleness_seconds and its counts are read.
    from sqlalchemy import event

    from mailweir.model.types import HAM
    from mailweir.store import ModelStore

    database = empty_postgres_database() if backend == "postgresql" else ""
    service = await _daemon_on(
        tmp_path, np.arange(1, 50, dtype=np.int64), database=database, staleness_seconds=0.2
    )
    token_reads: list[str] = []

    def seen(_conn: object, _cursor: object, statement: str, *_args: object) -> None:
        if "weir_token" in statement:
            token_reads.append(statement)

    event.listen(service.store.engine, "before_cursor_execute", seen)
    try:
        await wait_until(lambda: service.store.complete)
        token_reads.clear()
        unknown = np.array([7, 500, 501, 502])
        assert service.store.lookup(unknown).tolist() == [[0, 1], [0, 0], [0, 0], [0, 0]]
        # The event loop's own call; None only if the 0.2 s bound passed since the lookup
        # (a slow machine), when it leaves the freshness check to the worker thread.
        answer = service.store.cached_counts(unknown)
        assert answer is None or answer[1].tolist() == [[0, 1], [0, 0], [0, 0], [0, 0]]
        assert token_reads == []
        other = ModelStore.open(service.settings.database)  # another daemon learns
        other.train(np.array([500]), HAM, digest=b"\x01" * 16, source="t")
        other.close()
        await asyncio.sleep(0.3)  # past the staleness bound
        assert service.store.lookup(unknown).tolist() == [[0, 1], [1, 0], [0, 0], [0, 0]]
        assert token_reads and not service.store.complete
    finally:
        event.remove(service.store.engine, "before_cursor_execute", seen)
        await service.shutdown(grace=1)
        if backend == "postgresql":
            empty_postgres_database()  # an unstamped model would look damaged to other tests
