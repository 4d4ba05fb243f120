"""A model larger than the count cache: the presence filter, and lookups through it.

The filter must never call a token it was given absent (that token's counts would be lost
from a verdict); its false "may hold" answers only cost a read.  The store tests use the
database as the oracle, as test_preload.py does: whatever memory holds, every lookup gives
what the token rows say.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from store_helpers import digest_of, random_write, truth
from test_preload import resident_kib_of

from mailweir.model.pairs import mix64
from mailweir.model.types import HAM, SPAM
from mailweir.store import ModelStore, lookup
from mailweir.store.counts import LOCAL_READ_MAX
from mailweir.store.presence import PresenceFilter

INT64 = st.integers(min_value=-(2**63), max_value=2**63 - 1)


def spread(*tokens: int) -> np.ndarray:
    """Token hashes as the tokenizer makes them (well mixed 64-bit values), sorted unique."""
    values = np.array(tokens, dtype=np.uint64) + np.uint64(1)
    return np.unique(mix64(values).view(np.int64))


class Reads:
    """Counts the hashes the store reads from the database, on either read path."""

    def __init__(self, store: ModelStore, monkeypatch: pytest.MonkeyPatch) -> None:
        self.hashes = 0
        reader = store._reader
        for name in ("fetch", "fetch_sqlite"):
            original = getattr(reader, name)

            def counted(conn: object, unique: np.ndarray, _original=original) -> object:  # type: ignore[no-untyped-def]
                self.hashes += len(unique)
                return _original(conn, unique)

            monkeypatch.setattr(reader, name, counted)


@settings(max_examples=200, deadline=None)
@given(st.lists(INT64 | st.integers(-5, 5), max_size=300), st.integers(1, 500))
def test_the_filter_never_calls_an_added_token_absent(values: list[int], capacity: int) -> None:
    # Small values too (their top bits all zero: one word of the table takes them all).
    presence = PresenceFilter(capacity)
    hashes = np.array(values, dtype=np.int64)
    presence.add(hashes[: len(hashes) // 2])
    presence.add(hashes[len(hashes) // 2 :])
    assert presence.may_hold(hashes).all()
    assert presence.full == (len(values) > presence.capacity)


def test_the_filter_rules_out_nearly_every_absent_token() -> None:
    # At the capacity it is built for, 16 bits of table a token and 3 bits set in one word:
    # measured 0.78-0.82% false "may hold" on random 64-bit hashes (a plain Bloom filter of
    # the same size would give (1 - e^(-3/16))^3 = 0.5%, the formula from memory; one word a
    # token costs a little more).  Seeded, so the figure is fixed.
    rng = np.random.default_rng(5)
    presence = PresenceFilter(200_000)
    presence.add(rng.integers(-(2**63), 2**63 - 1, 200_000, dtype=np.int64))
    others = rng.integers(-(2**63), 2**63 - 1, 200_000, dtype=np.int64)
    assert presence.may_hold(others).mean() < 0.012
    assert presence.nbytes == 200_000 * 2
    assert not presence.may_hold(np.zeros(0, dtype=np.int64)).size


def too_large(open_store: Callable[..., ModelStore], **options: object) -> ModelStore:
    """A store of 40 tokens whose count cache holds 10, with its presence filter built."""
    store = open_store(cache_tokens=10, **options)
    store.train(spread(*range(0, 30)), SPAM, digest=digest_of("a"), source="t")
    store.train(spread(*range(20, 40)), HAM, digest=digest_of("b"), source="t")
    assert not store.preload()  # not complete: too large
    assert store.presence_known and not store.complete
    return store


def test_absent_tokens_are_not_read(
    open_store: Callable[..., ModelStore], monkeypatch: pytest.MonkeyPatch
) -> None:
    store = too_large(open_store, staleness_seconds=3600.0)
    reads = Reads(store, monkeypatch)
    absent = spread(*range(1000, 1300))
    assert store.lookup(absent).tolist() == [[0, 0]] * 300
    assert reads.hashes <= 12  # false "may hold": about 1 in 125 (above), 300 asked
    # The event loop's call too, though more are missing than it would read itself.
    assert len(absent) > LOCAL_READ_MAX
    before = reads.hashes
    answer = store.cached_counts(absent, local_read=True)
    assert answer is not None and answer[1].tolist() == [[0, 0]] * 300
    assert reads.hashes - before <= 12


def test_held_tokens_are_read_through_the_filter(
    open_store: Callable[..., ModelStore], monkeypatch: pytest.MonkeyPatch
) -> None:
    store = too_large(open_store, staleness_seconds=3600.0)
    reads = Reads(store, monkeypatch)
    # The event loop's call reads a few itself (it declines to fill the cache past its room).
    few = np.unique(np.concatenate([spread(0, 1, 25, 39), spread(*range(600, 700))]))
    answer = store.cached_counts(few, local_read=True)
    if store.engine.dialect.name == "postgresql":
        # No local read there (a network round trip): the worker thread's lookup reads them.
        assert answer is None and reads.hashes == 0
        answer = (None, store.lookup(few))
    assert answer is not None and answer[1].tolist() == truth(store, few)
    assert 4 <= reads.hashes <= 8
    wanted = np.unique(np.concatenate([spread(*range(0, 40)), spread(*range(500, 540))]))
    assert store.lookup(wanted).tolist() == truth(store, wanted)
    assert 40 <= reads.hashes <= 50


def test_own_training_adds_to_the_filter(open_store: Callable[..., ModelStore]) -> None:
    store = too_large(open_store, staleness_seconds=3600.0)
    store.train(spread(*range(100, 105)), SPAM, digest=digest_of("c"), source="t")
    store.train_many([(spread(105, 106, 1), HAM, digest_of("d"), "t")])
    store.untrain(spread(*range(0, 30)), digest=digest_of("a"))  # rows that reach 0/0 go
    assert store.presence_known
    wanted = spread(*range(0, 120))
    assert store.lookup(wanted).tolist() == truth(store, wanted)


def test_another_process_writing_drops_the_filter(open_store: Callable[..., ModelStore]) -> None:
    store = too_large(open_store, staleness_seconds=0.0)  # notices other writers at once
    other = open_store()
    other.train(spread(7, 200, 201), HAM, digest=digest_of("z"), source="t")
    wanted = spread(7, 200, 201, 202)
    assert store.lookup(wanted).tolist() == truth(store, wanted)
    assert not store.presence_known
    assert not store.preload() and store.presence_known  # built anew, with the new tokens
    assert store.lookup(wanted).tolist() == truth(store, wanted)


def test_a_filter_outgrown_by_training_is_dropped(open_store: Callable[..., ModelStore]) -> None:
    # Built for 40 tokens and a quarter more: 20 new ones end it, and lookups read through.
    store = too_large(open_store, staleness_seconds=3600.0)
    store.train(spread(*range(300, 320)), HAM, digest=digest_of("c"), source="t")
    assert not store.presence_known
    wanted = spread(*range(0, 40), *range(300, 330))
    assert store.lookup(wanted).tolist() == truth(store, wanted)


def test_lookups_through_the_filter_match_the_database_through_mixed_writes(
    open_store: Callable[..., ModelStore],
) -> None:
    # Random own and foreign writes, filters built now and then, on a model larger than
    # memory; every lookup checked against the rows (seeded, bounded: 80 steps).
    store = open_store(cache_tokens=15, staleness_seconds=0.0)
    other = open_store()
    rng = np.random.default_rng(17)
    trained: list[tuple[np.ndarray, bytes]] = []
    filtered = 0
    for step in range(80):
        action = rng.integers(0, 6)
        tokens = spread(*rng.integers(0, 60, rng.integers(1, 12)).tolist())
        random_write(store, other, rng, tokens, step, trained, action)
        filtered += store.presence_known and not store.complete
        wanted = spread(*range(0, 70))
        assert store.lookup(wanted).tolist() == truth(store, wanted), step
    assert filtered >= 5  # the filter was there for part of the run


def test_read_connections_close_once_the_filter_is_built(tmp_path: Path) -> None:
    """Before the filter is built, mail is looked up through the file, and SQLite keeps every
    page each connection read mapped.  Once it is built those connections close (the event
    loop's at its next call, even one that reads nothing), and with them those pages."""
    path = str(tmp_path / "model.sqlite3")
    # Large enough that the pages a few reads map afterwards (B-tree root and branches,
    # about 30 of 4 KiB) stay far below a tenth of the file.
    hashes = np.unique(np.random.default_rng(4).integers(-(2**63), 2**63 - 1, 200_000))
    writer = ModelStore.open(path)
    writer.train(hashes, SPAM, digest=digest_of("a"), source="t")
    writer.close()
    store = ModelStore.open(path, cache_tokens=1_000, staleness_seconds=3600.0)
    try:
        for chunk in np.array_split(hashes, 100):  # the whole file read through, piece by piece
            store.lookup(chunk)
            assert store.cached_counts(chunk[:3], local_read=True) is not None  # the loop's
        size_kib = (tmp_path / "model.sqlite3").stat().st_size // 1024
        assert resident_kib_of(path) > size_kib // 2
        assert not store.preload() and store.presence_known
        absent = spread(*range(50))
        answer = store.cached_counts(absent, local_read=True)
        # None when one passed the filter and its read would overfill the full cache.
        assert answer is None or not answer[1].any()
        assert store.lookup(hashes[:5]).tolist() == [[0, 1]] * 5
        assert resident_kib_of(path) < size_kib // 10
    finally:
        store.close()


@pytest.mark.parametrize("cache_tokens", [1000, 20])  # the whole model; a presence filter
def test_preload_reads_every_row_in_packed_chunks(
    open_store: Callable[..., ModelStore], monkeypatch: pytest.MonkeyPatch, cache_tokens: int
) -> None:
    """Both preloads read the table in chunks of rows that SQLite packs into text: chunk sizes
    that divide the rows unevenly, and the least and greatest int64 hashes, lose nothing."""
    store = open_store(cache_tokens=cache_tokens, staleness_seconds=3600.0)
    edges = np.array([-(2**63), -(2**63) + 1, -1, 0, 1, 2**63 - 2, 2**63 - 1], dtype=np.int64)
    tokens = np.unique(np.concatenate([edges, spread(*range(40))]))
    store.train(tokens, SPAM, digest=digest_of("a"), source="t")
    store.train(tokens[::3], HAM, digest=digest_of("b"), source="t")
    for rows in (3, 7, 47, 48):  # 47 rows in all: a chunk of one, and one left empty
        monkeypatch.setattr(lookup, "_CHUNK_ROWS", rows)
        fresh = open_store(cache_tokens=cache_tokens, staleness_seconds=3600.0)
        assert fresh.preload() == (cache_tokens > len(tokens))
        assert fresh.presence_known
        wanted = np.unique(np.concatenate([tokens, spread(*range(100, 140))]))
        assert fresh.lookup(wanted).tolist() == truth(fresh, wanted)
