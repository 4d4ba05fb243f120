"""ModelStore.preload: every token's counts in memory, so a lookup never reads the database.

The oracle is the database itself: after any mix of our own training, untraining, pruning
and another process's writes, every lookup must give what the token rows say (zero for a
token with no row).
"""

from __future__ import annotations

import threading
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pytest
from sqlalchemy import event
from store_helpers import digest_of, hashes_of, random_write, truth

from mailweir.model.types import HAM, SPAM
from mailweir.store import ModelStore, lookup


def selects_during(store: ModelStore, action: Callable[[], object]) -> int:
    seen: list[str] = []

    def tracer(_conn: object, _cursor: object, statement: str, *_args: object) -> None:
        seen.append(statement)

    event.listen(store.engine, "before_cursor_execute", tracer)
    try:
        action()
    finally:
        event.remove(store.engine, "before_cursor_execute", tracer)
    return sum(1 for s in seen if "weir_token" in s)


def test_preload_answers_every_lookup_from_memory(
    open_store: Callable[..., ModelStore],
) -> None:
    writer = open_store()
    writer.train(hashes_of(1, 2, 3), SPAM, digest=digest_of("a"), source="t")
    writer.train(hashes_of(3, 4), HAM, digest=digest_of("b"), source="t")
    store = open_store(staleness_seconds=3600.0)
    assert store.preload() and store.complete
    wanted = hashes_of(1, 3, 4, 99, -5)
    assert selects_during(store, lambda: store.lookup(wanted)) == 0
    assert store.lookup(wanted).tolist() == truth(store, wanted)
    answer = store.cached_counts(wanted)  # the event loop's call needs no local read either
    assert answer is not None and answer[1].tolist() == truth(store, wanted)


def test_preload_reads_the_table_in_chunks_and_misses_none(
    open_store: Callable[..., ModelStore], monkeypatch: pytest.MonkeyPatch
) -> None:
    """The table is read and stored a chunk at a time (the peak of memory): a chunk size
    that divides the rows unevenly must still bring every row, and only those."""
    writer = open_store()
    for n in range(12):
        tokens = hashes_of(*range(10 * n, 10 * n + 7))
        writer.train(tokens, n % 2, digest=digest_of(f"m{n}"), source="t")
    store = open_store(staleness_seconds=3600.0)
    monkeypatch.setattr(lookup, "_CHUNK_ROWS", 5)  # 84 rows: 16 chunks of 5, then 4
    assert store.preload() and store.complete
    wanted = hashes_of(*range(-3, 125))
    assert selects_during(store, lambda: store.lookup(wanted)) == 0
    assert store.lookup(wanted).tolist() == truth(store, wanted)


def test_own_writes_keep_memory_complete(open_store: Callable[..., ModelStore]) -> None:
    store = open_store(staleness_seconds=3600.0)
    store.train(hashes_of(1, 2), SPAM, digest=digest_of("a"), source="t")
    assert store.preload()
    store.train(hashes_of(2, 5, 6), HAM, digest=digest_of("b"), source="t")  # 5, 6 are new
    store.train_many([(hashes_of(6, 7), SPAM, digest_of("c"), "t")])
    store.untrain(hashes_of(1, 2), digest=digest_of("a"))
    store.prune(max_count=1, unseen_days=0, today=10**6)  # rows of count 1 go
    wanted = hashes_of(*range(0, 10))
    assert store.complete
    assert selects_during(store, lambda: store.lookup(wanted)) == 0
    assert store.lookup(wanted).tolist() == truth(store, wanted)


def test_another_process_writing_ends_completeness(
    open_store: Callable[..., ModelStore],
) -> None:
    store = open_store(staleness_seconds=0.0)  # notices other writers at once
    other = open_store()
    store.train(hashes_of(1), SPAM, digest=digest_of("a"), source="t")
    assert store.preload()
    other.train(hashes_of(1, 8), HAM, digest=digest_of("b"), source="t")
    wanted = hashes_of(1, 8, 9)
    assert store.lookup(wanted).tolist() == truth(store, wanted) == [[1, 1], [1, 0], [0, 0]]
    assert not store.complete
    assert store.preload() and store.complete  # and the next preload restores it
    assert store.lookup(wanted).tolist() == truth(store, wanted)


def test_preload_declines_a_model_over_the_token_limit(
    open_store: Callable[..., ModelStore],
) -> None:
    store = open_store(cache_tokens=3, staleness_seconds=3600.0)
    store.train(hashes_of(1, 2, 3, 4), SPAM, digest=digest_of("a"), source="t")
    assert not store.preload() and not store.complete
    assert store.lookup(hashes_of(1, 4, 9)).tolist() == [[0, 1], [0, 1], [0, 0]]


def test_training_past_the_token_limit_ends_completeness(
    open_store: Callable[..., ModelStore],
) -> None:
    store = open_store(cache_tokens=4, staleness_seconds=3600.0)
    store.train(hashes_of(1, 2), SPAM, digest=digest_of("a"), source="t")
    assert store.preload()
    store.train(hashes_of(3, 4, 5), HAM, digest=digest_of("b"), source="t")  # 5 tokens > 4
    assert not store.complete
    wanted = hashes_of(1, 3, 5, 9)
    assert store.lookup(wanted).tolist() == truth(store, wanted)


def test_preload_gives_way_to_a_write_in_flight(open_store: Callable[..., ModelStore]) -> None:
    store = open_store(staleness_seconds=3600.0)
    store.train(hashes_of(1), SPAM, digest=digest_of("a"), source="t")
    results: list[bool] = []
    with store.transaction():  # a write of ours between its read and its commit
        reader = threading.Thread(target=lambda: results.append(store.preload()))
        reader.start()
        reader.join(30)
    assert results == [False] and not store.complete
    assert store.preload()


def test_preloaded_lookups_match_the_database_through_mixed_writes(
    open_store: Callable[..., ModelStore],
) -> None:
    # Random own and foreign writes, preloads now and then; every lookup checked against the
    # rows (seeded, bounded: 60 steps over 40 token values).
    store = open_store(cache_tokens=30, staleness_seconds=0.0)
    other = open_store()
    rng = np.random.default_rng(11)
    trained: list[tuple[np.ndarray, bytes]] = []
    for step in range(60):
        action = rng.integers(0, 6)
        tokens = hashes_of(*rng.integers(0, 40, rng.integers(1, 6)).tolist())
        random_write(store, other, rng, tokens, step, trained, action)
        wanted = hashes_of(*range(0, 40))
        assert store.lookup(wanted).tolist() == truth(store, wanted), step


def test_release_free_memory_calls_glibc_where_there_is_one() -> None:
    import platform

    from mailweir.store import memory

    memory.release_free_memory()  # never raises
    if platform.system() == "Linux" and platform.libc_ver()[0] == "glibc":
        assert memory._glibc("malloc_trim") is not None


def resident_kib_of(path: str) -> int:
    """Resident KiB of this process's mappings of *path* (Linux /proc/self/smaps)."""
    total, current = 0, None
    with open("/proc/self/smaps") as smaps:
        for line in smaps:
            fields = line.split()
            if "-" in fields[0] and len(fields) >= 5 and ":" in fields[3]:
                current = fields[5] if len(fields) > 5 else None
            elif fields[0] == "Rss:" and current == path:
                total += int(fields[1])
    return total


@pytest.mark.parametrize("whole_table_read", ["preload", "vocabulary", "stats"])
def test_whole_table_reads_leave_no_pages_mapped(tmp_path: Path, whole_table_read: str) -> None:
    """Reading every token row goes through SQLite's memory map; a pooled connection would
    keep those pages resident (as much memory as the file) long after.  Such reads use a
    connection of their own that is closed afterwards."""
    path = str(tmp_path / "model.sqlite3")
    writer = ModelStore.open(path)
    hashes = np.unique(np.random.default_rng(3).integers(-(2**63), 2**63 - 1, 60_000))
    writer.train(hashes, SPAM, digest=digest_of("a"), source="t")
    writer.close()
    store = ModelStore.open(path, staleness_seconds=3600.0)
    try:
        getattr(store, whole_table_read)()
        size_kib = (tmp_path / "model.sqlite3").stat().st_size // 1024
        assert size_kib > 1000
        assert resident_kib_of(path) < size_kib // 10
    finally:
        store.close()


def test_read_connections_close_once_memory_is_complete(tmp_path: Path) -> None:
    """Before the preload finishes, mail is looked up through the file (each thread keeps a
    connection, and SQLite keeps every page it read mapped).  Once memory is complete the
    thread's next lookup closes them, so those pages stop counting against the daemon."""
    path = str(tmp_path / "model.sqlite3")
    hashes = np.unique(np.random.default_rng(4).integers(-(2**63), 2**63 - 1, 60_000))
    writer = ModelStore.open(path)
    writer.train(hashes, SPAM, digest=digest_of("a"), source="t")
    writer.close()
    store = ModelStore.open(path, staleness_seconds=3600.0)
    try:
        for chunk in np.array_split(hashes, 40):  # the whole file read through, piece by piece
            store.lookup(chunk)
        assert store.cached_counts(hashes_of(7, 8), local_read=True) is not None  # the loop's
        size_kib = (tmp_path / "model.sqlite3").stat().st_size // 1024
        assert resident_kib_of(path) > size_kib // 2
        assert store.preload()
        assert store.cached_counts(hashes_of(7, 8), local_read=True) is not None
        assert store.lookup(hashes[:5]).tolist() == [[0, 1]] * 5
        assert resident_kib_of(path) < size_kib // 10
    finally:
        store.close()


def test_a_lookup_connection_retired_while_in_use_closes_when_it_comes_back(
    open_store: Callable[..., ModelStore], monkeypatch: pytest.MonkeyPatch
) -> None:
    store = open_store()
    store.train(hashes_of(1, 2), SPAM, digest=digest_of("a"), source="t")
    reader = store._reader
    real_fetch = reader.fetch
    used: list[object] = []

    def fetch_then_retire(conn: object, unique: np.ndarray) -> np.ndarray:
        used.append(conn)
        counts = real_fetch(conn, unique)  # type: ignore[arg-type]
        store._retire_reads()  # a preload finishing meanwhile, in another thread
        return counts

    monkeypatch.setattr(reader, "fetch", fetch_then_retire)
    assert store.lookup(hashes_of(1, 2, 3)).tolist() == [[0, 1], [0, 1], [0, 0]]
    assert not store._idle_reads and used[0].closed  # type: ignore[attr-defined]
    monkeypatch.setattr(reader, "fetch", real_fetch)
    store.lookup(hashes_of(4))
    assert len(store._idle_reads) == 1  # the next one is kept for the lookups after it
