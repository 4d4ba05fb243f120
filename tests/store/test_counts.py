"""ModelStore unit tests, run on SQLite and (when configured) PostgreSQL."""

from __future__ import annotations

import contextlib
import threading
from collections import Counter
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pytest
from sqlalchemy import text
from store_helpers import digest_of, dump_model, hashes_of, vocabulary_parts

from mailweir.model.types import HAM, SPAM, Vocabulary
from mailweir.store import ModelStore, StoreUnavailable, TrainResult, lookup
from mailweir.store import counts as counts_module
from mailweir.store.engine import NO_BEGIN


def token_rows(store: ModelStore) -> dict[int, tuple[int, int]]:
    return {h: (ham, spam) for h, ham, spam in dump_model(store)["tokens"]}  # type: ignore[misc]


def test_lookup_unknown_tokens_are_zero(store: ModelStore) -> None:
    counts = store.lookup(hashes_of(1, 2, 3))
    assert counts.shape == (3, 2)
    assert counts.dtype == np.int64
    assert not counts.any()


def test_lookup_empty_input(store: ModelStore) -> None:
    assert store.lookup(np.empty(0, dtype=np.int64)).shape == (0, 2)


def test_train_counts_presence_and_class_total(store: ModelStore) -> None:
    assert store.train(hashes_of(1, 2, 3), SPAM, digest=digest_of("a"), source="t") is (
        TrainResult.TRAINED
    )
    assert store.train(hashes_of(2, 3, 4), HAM, digest=digest_of("b"), source="t") is (
        TrainResult.TRAINED
    )
    assert store.lookup(hashes_of(1, 2, 3, 4, 5)).tolist() == [
        [0, 1],
        [1, 1],
        [1, 1],
        [1, 0],
        [0, 0],
    ]
    assert store.class_count().tolist() == [1, 1]


def test_train_duplicate_hashes_count_once(store: ModelStore) -> None:
    store.train(np.array([7, 7, 7], dtype=np.int64), SPAM, digest=digest_of("a"), source="t")
    assert token_rows(store) == {7: (0, 1)}


def test_train_extreme_int64_hashes(store: ModelStore) -> None:
    edges = hashes_of(-(2**63), -1, 0, 2**63 - 1)
    store.train(edges, HAM, digest=digest_of("a"), source="t")
    assert store.lookup(edges).tolist() == [[1, 0]] * 4


def test_train_same_label_again_is_already_known(store: ModelStore) -> None:
    store.train(hashes_of(1, 2), SPAM, digest=digest_of("a"), source="t")
    before = dump_model(store)
    result = store.train(hashes_of(1, 2), SPAM, digest=digest_of("a"), source="t")
    assert result is TrainResult.ALREADY_KNOWN
    assert dump_model(store) == before


def test_train_other_label_moves_counts(store: ModelStore) -> None:
    store.train(hashes_of(1, 2), SPAM, digest=digest_of("a"), source="t")
    store.train(hashes_of(2, 3), SPAM, digest=digest_of("b"), source="t")
    result = store.train(hashes_of(1, 2), HAM, digest=digest_of("a"), source="feedback")
    assert result is TrainResult.MOVED
    assert token_rows(store) == {1: (1, 0), 2: (1, 1), 3: (0, 1)}
    assert store.class_count().tolist() == [1, 1]
    assert dict(dump_model(store)["ledger"]) == {digest_of("a"): HAM, digest_of("b"): SPAM}


def test_train_rejects_bad_label(store: ModelStore) -> None:
    with pytest.raises(ValueError, match="label"):
        store.train(hashes_of(1), 2, digest=digest_of("a"), source="t")
    assert dump_model(store)["ledger"] == []


def test_untrain_is_inverse_and_deletes_empty_rows(store: ModelStore) -> None:
    store.train(hashes_of(1, 2), HAM, digest=digest_of("a"), source="t")
    before = dump_model(store)
    store.train(hashes_of(2, 3), SPAM, digest=digest_of("b"), source="t")
    assert store.untrain(hashes_of(2, 3), digest=digest_of("b")) is TrainResult.UNTRAINED
    assert dump_model(store) == before
    assert 3 not in token_rows(store)


def test_untrain_unknown_digest_is_not_known(store: ModelStore) -> None:
    store.train(hashes_of(1), HAM, digest=digest_of("a"), source="t")
    before = dump_model(store)
    assert store.untrain(hashes_of(1), digest=digest_of("zzz")) is TrainResult.NOT_KNOWN
    assert dump_model(store) == before


def test_train_many_reports_each_outcome(store: ModelStore) -> None:
    store.train(hashes_of(1), SPAM, digest=digest_of("old"), source="t")
    items = [
        (hashes_of(1, 2), HAM, digest_of("new"), "import"),
        (hashes_of(1, 2), HAM, digest_of("new"), "import"),  # same message twice
        (hashes_of(1), SPAM, digest_of("old"), "import"),
        (hashes_of(1), HAM, digest_of("old"), "import"),
    ]
    results = store.train_many(items)
    assert results == Counter(
        {
            TrainResult.TRAINED: 1,
            TrainResult.ALREADY_KNOWN: 2,
            TrainResult.MOVED: 1,
        }
    )
    assert token_rows(store) == {1: (2, 0), 2: (1, 0)}
    assert store.class_count().tolist() == [2, 0]


def test_train_many_moves_back_and_forth_in_one_batch(store: ModelStore) -> None:
    items = [(hashes_of(5), label, digest_of("x"), "t") for label in (SPAM, HAM, SPAM, HAM, HAM)]
    results = store.train_many(items)
    assert results[TrainResult.MOVED] == 3
    assert token_rows(store) == {5: (1, 0)}
    assert store.class_count().tolist() == [1, 0]


def test_cache_updated_in_place_on_train(store: ModelStore) -> None:
    hashes = hashes_of(10, 11, 12)
    assert not store.lookup(hashes).any()  # now cached as zeros
    store.train(hashes_of(10, 11), SPAM, digest=digest_of("a"), source="t")
    assert store.lookup(hashes).tolist() == [[0, 1], [0, 1], [0, 0]]
    store.untrain(hashes_of(10, 11), digest=digest_of("a"))
    assert not store.lookup(hashes).any()


def test_other_store_writes_seen_after_staleness(open_store: Callable[..., ModelStore]) -> None:
    reader = open_store(staleness_seconds=0.0)
    writer = open_store()
    hashes = hashes_of(1, 2)
    reader.lookup(hashes)
    vocabulary_before = reader.vocabulary()
    writer.train(hashes, SPAM, digest=digest_of("a"), source="t")
    assert reader.lookup(hashes).tolist() == [[0, 1], [0, 1]]
    assert reader.class_count().tolist() == [0, 1]
    assert vocabulary_before.size == 0
    assert reader.vocabulary().size == 2


def test_other_store_writes_not_seen_before_staleness(
    open_store: Callable[..., ModelStore],
) -> None:
    reader = open_store(staleness_seconds=3600.0)
    writer = open_store()
    reader.lookup(hashes_of(1))
    writer.train(hashes_of(1), SPAM, digest=digest_of("a"), source="t")
    # Within the staleness window the cache answers; this is the documented trade-off.
    assert reader.lookup(hashes_of(1)).tolist() == [[0, 0]]


def test_token_count_without_the_summary_counts_live_rows(
    open_store: Callable[..., ModelStore],
) -> None:
    # The gauge's count on a model memory has not summarised: the database counts the rows
    # with a count (an untrained row left at zero is not a token), and no summary is built.
    writer = open_store()
    writer.train(hashes_of(1, 2, 3), SPAM, digest=digest_of("a"), source="t")
    writer.train(hashes_of(3, 4), HAM, digest=digest_of("b"), source="t")
    writer.untrain(hashes_of(3, 4), digest=digest_of("b"))  # 4 back to (0, 0); 3 keeps spam
    reader = open_store()
    assert reader.token_count() == 3
    assert reader._vocab is None  # nothing read every row
    assert reader.vocabulary().size == 3  # what the summary says, once built


def test_token_count_follows_own_training_and_others_after_their_revision(
    open_store: Callable[..., ModelStore], monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setattr(counts_module, "TOKEN_COUNT_EVERY", 0.0)
    reader = open_store(staleness_seconds=0.0)
    writer = open_store()
    assert reader.token_count() == 0
    writer.train(hashes_of(1, 2), SPAM, digest=digest_of("a"), source="t")
    assert reader.token_count() == 2  # another store's revision: counted again
    reader.train(hashes_of(2, 5), HAM, digest=digest_of("b"), source="t")
    assert reader.token_count() == 3
    reader.vocabulary()
    reader.train(hashes_of(6), HAM, digest=digest_of("c"), source="t")
    assert reader.token_count() == 4 == reader.vocabulary().size  # from the summary now


def test_token_count_reused_within_its_window(
    open_store: Callable[..., ModelStore], monkeypatch: pytest.MonkeyPatch
) -> None:
    # The documented lag: within TOKEN_COUNT_EVERY a changed revision does not recount.
    monkeypatch.setattr(counts_module, "TOKEN_COUNT_EVERY", 3600.0)
    reader = open_store(staleness_seconds=0.0)
    writer = open_store()
    writer.train(hashes_of(1), SPAM, digest=digest_of("a"), source="t")
    assert reader.token_count() == 1
    writer.train(hashes_of(2), SPAM, digest=digest_of("b"), source="t")
    assert reader.token_count() == 1
    monkeypatch.setattr(counts_module, "TOKEN_COUNT_EVERY", 0.0)
    assert reader.token_count() == 2


def test_vocabulary_tracks_training(store: ModelStore) -> None:
    empty = Vocabulary.from_token_counts(np.zeros((0, 2)))
    assert vocabulary_parts(store.vocabulary()) == vocabulary_parts(empty)
    store.train(hashes_of(1, 2), SPAM, digest=digest_of("a"), source="t")
    store.train(hashes_of(2, 3), HAM, digest=digest_of("b"), source="t")
    store.train(hashes_of(2), SPAM, digest=digest_of("c"), source="t")
    expected = Vocabulary.from_token_counts(np.array([[0, 1], [1, 2], [1, 0]]))
    assert vocabulary_parts(store.vocabulary()) == vocabulary_parts(expected)
    assert store.vocabulary().size == 3


def test_vocabulary_loaded_from_the_table_in_chunks_counts_every_row(
    open_store: Callable[..., ModelStore], monkeypatch: pytest.MonkeyPatch
) -> None:
    """On SQLite the table is read a few rows at a time (memory); a chunk size that divides
    the rows unevenly must give the summary of the whole table, untrained rows left out."""
    writer = open_store()
    for n in range(9):
        tokens = hashes_of(*range(n, n + 6))  # overlapping: counts from 1 to 6
        writer.train(tokens, n % 2, digest=digest_of(f"m{n}"), source="t")
    writer.untrain(hashes_of(*range(8, 14)), digest=digest_of("m8"))  # rows of zeros stay
    monkeypatch.setattr(lookup, "_CHUNK_ROWS", 4)
    rows = np.array([counts for counts in token_rows(writer).values()], dtype=np.int64)
    expected = Vocabulary.from_token_counts(rows)
    assert vocabulary_parts(open_store().vocabulary()) == vocabulary_parts(expected)


def test_prune_removes_rare_unseen_tokens(store: ModelStore) -> None:
    store.train(hashes_of(1, 2), SPAM, digest=digest_of("a"), source="t")
    store.train(hashes_of(2), HAM, digest=digest_of("b"), source="t")
    store.lookup(hashes_of(1, 2))
    store.vocabulary()
    with store.engine.begin() as conn:
        conn.execute(text("UPDATE weir_token SET last_seen = 100"))
    assert store.prune(max_count=1, unseen_days=60, today=161) == 1
    assert token_rows(store) == {2: (1, 1)}
    assert store.lookup(hashes_of(1, 2)).tolist() == [[0, 0], [1, 1]]
    assert vocabulary_parts(store.vocabulary()) == (1, [1, 1], [[0, 1], [0, 1]])


def test_prune_keeps_recent_and_frequent_tokens(store: ModelStore) -> None:
    store.train(hashes_of(1, 2), SPAM, digest=digest_of("a"), source="t")
    store.train(hashes_of(2), HAM, digest=digest_of("b"), source="t")
    with store.engine.begin() as conn:
        conn.execute(text("UPDATE weir_token SET last_seen = 100"))
    assert store.prune(max_count=1, unseen_days=60, today=160) == 0  # 60 days: not yet
    assert store.prune(max_count=1, unseen_days=60, today=10_000) == 1
    assert store.prune(max_count=2, unseen_days=60, today=10_000) == 1
    assert token_rows(store) == {}


def test_prune_in_small_chunks_removes_the_same_as_in_one(store: ModelStore) -> None:
    # Hashes across the whole signed range, including both ends, so the hash-order cursor
    # must start below the smallest and stop at the largest.
    keep = [-(2**63) + 5, -7, 11, 2**62]
    rare = [-(2**63), -(2**40), -3, 0, 3, 2**40, 2**63 - 1]
    store.train(hashes_of(*keep, *rare), SPAM, digest=digest_of("a"), source="t")
    store.train(hashes_of(*keep), HAM, digest=digest_of("b"), source="t")
    store.lookup(hashes_of(*keep, *rare))
    store.vocabulary()
    assert store.prune(max_count=1, unseen_days=0, today=10**6, chunk_rows=2) == len(rare)
    assert token_rows(store) == {h: (1, 1) for h in keep}
    assert store.lookup(hashes_of(*rare)).tolist() == [[0, 0]] * len(rare)
    assert store.vocabulary().size == len(keep)


def test_untrain_after_prune_never_goes_negative(store: ModelStore) -> None:
    store.train(hashes_of(1, 2), SPAM, digest=digest_of("a"), source="t")
    store.train(hashes_of(2), SPAM, digest=digest_of("b"), source="t")
    store.prune(max_count=1, unseen_days=0, today=10**6)
    store.untrain(hashes_of(1, 2), digest=digest_of("a"))
    assert token_rows(store) == {2: (0, 1)}


def test_transaction_rolls_back_training_and_memory(store: ModelStore) -> None:
    hashes = hashes_of(1, 2)
    store.lookup(hashes)
    with pytest.raises(RuntimeError), store.transaction():
        store.train(hashes, SPAM, digest=digest_of("a"), source="t")
        raise RuntimeError("abandon")
    assert dump_model(store)["tokens"] == []
    assert not store.lookup(hashes).any()
    assert store.class_count().tolist() == [0, 0]


def test_transaction_nested_savepoint_rolls_back_inner_only(store: ModelStore) -> None:
    with store.transaction():
        store.train(hashes_of(1), SPAM, digest=digest_of("a"), source="t")
        with pytest.raises(RuntimeError), store.transaction():
            store.train(hashes_of(2), SPAM, digest=digest_of("b"), source="t")
            raise RuntimeError("inner")
    assert token_rows(store) == {1: (0, 1)}
    assert store.lookup(hashes_of(1, 2)).tolist() == [[0, 1], [0, 0]]
    assert store.class_count().tolist() == [0, 1]


def test_meta_round_trip(store: ModelStore) -> None:
    assert store.get_meta("method") is None
    store.set_meta("method", "fisher")
    store.set_meta("method", "bernoulli")
    assert store.get_meta("method") == "bernoulli"
    assert store.get_meta("created") is not None


def test_stats_counts_rows(store: ModelStore) -> None:
    store.set_meta("tokenizer", "fp-1")
    store.train(hashes_of(1, 2, 3), SPAM, digest=digest_of("a"), source="t")
    stats = store.stats()
    assert (stats.tokens, stats.ham_messages, stats.spam_messages) == (3, 0, 1)
    assert (stats.ledger_rows, stats.verdict_rows) == (1, 0)
    assert stats.database_bytes > 0
    assert stats.backend in ("sqlite", "postgresql")
    assert stats.tokenizer == "fp-1"
    assert stats.method is None


def test_open_plain_path_creates_parent(tmp_path: Path) -> None:
    path = tmp_path / "deep" / "er" / "model.db"
    store = ModelStore.open(str(path))
    try:
        assert path.exists()
        assert store.stats().backend == "sqlite"
    finally:
        store.close()


def test_open_missing_file_without_create(tmp_path: Path) -> None:
    with pytest.raises(StoreUnavailable, match="does not exist"):
        ModelStore.open(str(tmp_path / "absent.db"), create=False)


def test_sqlite_pragmas_applied(tmp_path: Path) -> None:
    store = ModelStore.open(str(tmp_path / "m.db"))
    try:
        with store.engine.connect() as conn:
            assert conn.exec_driver_sql("PRAGMA journal_mode").scalar() == "wal"
            assert conn.exec_driver_sql("PRAGMA synchronous").scalar() == 1  # NORMAL
            assert conn.exec_driver_sql("PRAGMA busy_timeout").scalar() > 0
    finally:
        store.close()


def test_vocabulary_load_brings_class_totals_along(open_store: Callable[..., ModelStore]) -> None:
    reader = open_store(staleness_seconds=3600.0)
    writer = open_store()
    writer.train(hashes_of(1, 2), SPAM, digest=digest_of("a"), source="t")
    # The first vocabulary() reads a newer snapshot than the reader's memory: everything
    # in memory must move to that snapshot together, class totals included.
    assert reader.vocabulary().size == 2
    assert reader.class_count().tolist() == [0, 1]
    assert reader.lookup(hashes_of(1)).tolist() == [[0, 1]]


def test_move_after_prune_counts_only_the_new_class(store: ModelStore) -> None:
    store.train(hashes_of(1, 2), SPAM, digest=digest_of("a"), source="t")
    store.train(hashes_of(2), SPAM, digest=digest_of("b"), source="t")
    store.prune(max_count=1, unseen_days=0, today=10**6)  # token 1 goes
    result = store.train(hashes_of(1, 2), HAM, digest=digest_of("a"), source="t")
    assert result is TrainResult.MOVED
    assert token_rows(store) == {1: (1, 0), 2: (1, 1)}


def test_cached_counts_answer_from_memory_only(open_store: Callable[..., ModelStore]) -> None:
    store = open_store(staleness_seconds=3600.0)
    store.train(hashes_of(1, 2), SPAM, digest=digest_of("a"), source="t")
    assert store.cached_counts(hashes_of(1, 3)) is None  # never looked up: the database knows
    store.lookup(hashes_of(1, 3))
    totals, counts = store.cached_counts(hashes_of(1, 3)) or (None, None)
    assert totals is not None and counts is not None
    assert totals.tolist() == [0, 1]
    assert counts.tolist() == [[0, 1], [0, 0]]  # 3 is cached as unknown


def test_cached_counts_decline_when_memory_is_due_a_check(
    open_store: Callable[..., ModelStore],
) -> None:
    # With no staleness window every answer needs the database's revision first, which
    # cached_counts never reads: it leaves that to lookup.
    store = open_store(staleness_seconds=0.0)
    store.lookup(hashes_of(1))
    assert store.cached_counts(hashes_of(1)) is None


def test_cached_counts_local_read_fetches_what_memory_lacks(
    open_store: Callable[..., ModelStore],
) -> None:
    store = open_store(staleness_seconds=3600.0)
    store.train(hashes_of(1, 2), SPAM, digest=digest_of("a"), source="t")
    answer = store.cached_counts(hashes_of(1, 3), local_read=True)
    if store.engine.dialect.name == "postgresql":
        assert answer is None  # a network round trip: left to lookup in a thread
        return
    assert answer is not None
    assert answer[1].tolist() == [[0, 1], [0, 0]]
    # What it read is now in memory, so the plain memory answer has it too.
    memory = store.cached_counts(hashes_of(1, 3))
    assert memory is not None and memory[1].tolist() == [[0, 1], [0, 0]]


def test_cached_counts_local_read_gives_way_to_a_busy_database(
    store: ModelStore, monkeypatch: pytest.MonkeyPatch
) -> None:
    import sqlite3

    if store.engine.dialect.name == "postgresql":
        pytest.skip("local reads are SQLite only")
    store.lookup(hashes_of(1))  # memory fresh

    def busy(conn: object, hashes: object) -> object:
        raise sqlite3.OperationalError("database is locked")

    monkeypatch.setattr(store._reader, "fetch_sqlite", busy)
    assert store.cached_counts(hashes_of(1, 2), local_read=True) is None
    monkeypatch.undo()
    assert store.lookup(hashes_of(1, 2)).tolist() == [[0, 0], [0, 0]]


def test_cached_counts_local_read_keeps_its_zero_busy_timeout_to_itself(
    open_store: Callable[..., ModelStore],
) -> None:
    store = open_store(staleness_seconds=3600.0)
    if store.engine.dialect.name == "postgresql":
        pytest.skip("local reads are SQLite only")
    store.lookup(hashes_of(1))
    assert store.cached_counts(hashes_of(2), local_read=True) is not None
    store._drop_nowait_connection()  # as after an error: its connection is closed
    # Every pooled connection, the one a writer gets included, still waits for locks.
    with contextlib.ExitStack() as held:
        conns = [
            held.enter_context(store.engine.connect()).execution_options(**{NO_BEGIN: True})
            for _ in range(5)
        ]
        assert {c.exec_driver_sql("PRAGMA busy_timeout").scalar() for c in conns} == {10000}
    store.train(hashes_of(2), HAM, digest=digest_of("b"), source="t")


def test_cached_counts_never_wait_for_the_lock(open_store: Callable[..., ModelStore]) -> None:
    # A worker thread may hold the store's lock through a rehash of the count cache (0.1 s
    # or more); the event loop's call gives way at once rather than stall every connection.
    store = open_store(staleness_seconds=3600.0)
    store.lookup(hashes_of(1))
    holding, release = threading.Event(), threading.Event()

    def hold() -> None:
        with store._lock:
            holding.set()
            release.wait(30)

    holder = threading.Thread(target=hold)
    holder.start()
    try:
        assert holding.wait(30)
        assert store.cached_counts(hashes_of(1)) is None
        assert store.cached_counts(hashes_of(1), local_read=True) is None
    finally:
        release.set()
        holder.join()
    assert store.cached_counts(hashes_of(1)) is not None


def test_cached_counts_local_read_leaves_a_rehash_to_lookup(
    open_store: Callable[..., ModelStore],
) -> None:
    store = open_store(staleness_seconds=3600.0)
    if store.engine.dialect.name == "postgresql":
        pytest.skip("local reads are SQLite only")
    store.train(hashes_of(7), SPAM, digest=digest_of("a"), source="t")
    cache = store._cache
    filler = 0
    while cache.roomy(1):  # fill memory up to the point where one more entry rehashes it
        filler += 1
        cache.put(hashes_of(10_000 + filler), np.zeros((1, 2), dtype=np.int64))
    held, buckets = len(cache), len(cache._fill)
    assert store.cached_counts(hashes_of(7), local_read=True) is None
    assert (len(cache), len(cache._fill)) == (held, buckets)  # nothing cached, no rehash
    assert store.lookup(hashes_of(7)).tolist() == [[0, 1]]  # a worker thread's path does it
    assert len(cache) == held + 1 and len(cache._fill) > buckets


def test_fetch_straight_through_sqlite_equals_fetch(store: ModelStore) -> None:
    if store.engine.dialect.name == "postgresql":
        pytest.skip("the straight path is SQLite's")
    store.train(hashes_of(*range(0, 3000, 3)), SPAM, digest=digest_of("a"), source="t")
    store.train(hashes_of(*range(0, 3000, 5)), HAM, digest=digest_of("b"), source="t")
    wanted = np.unique(hashes_of(*range(0, 2500), -(2**63), 2**63 - 1))  # past one statement
    with store.engine.connect() as conn:
        plain = store._reader.fetch(conn, wanted)
        straight = store._reader.fetch_sqlite(conn.connection.dbapi_connection, wanted)
    assert straight.tolist() == plain.tolist()
    assert plain.sum() == 834 + 500  # multiples of 3 (spam) and of 5 (ham) below 2,500


def test_cached_counts_local_read_leaves_a_cold_cache_to_lookup(
    open_store: Callable[..., ModelStore],
) -> None:
    from mailweir.store.counts import LOCAL_READ_MAX

    store = open_store(staleness_seconds=3600.0)
    store.lookup(hashes_of(0))  # memory fresh, next to nothing cached
    many = hashes_of(*range(1, LOCAL_READ_MAX + 2))
    assert store.cached_counts(many, local_read=True) is None  # each might be a disk read
    if store.engine.dialect.name != "postgresql":
        assert store.cached_counts(many[:LOCAL_READ_MAX], local_read=True) is not None
