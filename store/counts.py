"""ModelStore: token counts, class totals, ledger, meta, verdict and feedback logs.

In-memory state (count cache, class totals, vocabulary summary) is tagged with the database
revision it reflects.  Every write transaction advances the revision by two (one per class
row) and learns the value it produced, so after commit it can update the memory in place
exactly when nothing else wrote in between, and otherwise drops it.  Other processes'
writes are noticed by re-reading the revision once ``staleness_seconds`` have passed.
"""

from __future__ import annotations

import collections
import functools
import sqlite3
import threading
import time
from collections import Counter
from collections.abc import Callable, Iterable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt
from sqlalchemy import Connection, Engine, delete, func, select
from sqlalchemy import exc as sa_exc

from mailweir.model.hashing import sorted_unique
from mailweir.model.types import ClassCounts, TokenCounts, TokenHashes, Vocabulary
from mailweir.store import schema, verdicts
from mailweir.store.cache import CountCache
from mailweir.store.engine import NO_BEGIN, READ_ONLY, make_engine
from mailweir.store.errors import StoreBusy, retryable, store_errors
from mailweir.store.lookup import CountReader, hash_chunks, packed_count_chunks
from mailweir.store.memory import release_free_memory
from mailweir.store.meta import database_bytes, get_meta, row_count, set_meta
from mailweir.store.migrations import migrate
from mailweir.store.presence import PresenceFilter
from mailweir.store.training import (
    Plan,
    TrainItem,
    TrainResult,
    apply_counts,
    bump_totals,
    resolve_training,
    resolve_untraining,
)
from mailweir.store.verdicts import FeedbackRecord, VerdictRecord
from mailweir.store.vocab import VocabularyTracker

# Bulk training flushes a batch once it holds this many token occurrences.
_BATCH_TOKENS = 300_000
PRUNE_CHUNK_ROWS = 100_000  # rows one prune transaction deletes (memory, and training's wait)
INT64_MIN, INT64_MAX = -(2**63), 2**63 - 1  # token hashes are signed 64-bit
_WRITE_ATTEMPTS = 3
LOCAL_READ_MAX = 64  # most uncached hashes cached_counts reads itself (real mail: about 6)
# token_count on a model whose vocabulary summary memory lacks: the database counts the live
# rows, and that count serves while the revision stays, or at most this many seconds.
TOKEN_COUNT_EVERY = 600.0
# A presence filter is sized for the model's tokens and this share more (own training adds to
# it; past that it is built anew), at 2 bytes a token of that (store/presence.py).
PRESENCE_ROOM = 0.25


@dataclass(frozen=True)
class ModelStats:
    tokens: int
    ham_messages: int
    spam_messages: int
    ledger_rows: int
    verdict_rows: int
    database_bytes: int
    backend: str
    tokenizer: str | None
    method: str | None


def day_number() -> int:
    """Day number (days since 1970-01-01 UTC), the unit of ``last_seen``."""
    return int(time.time() // 86400)


def _close_for_good(conn: Connection) -> None:
    """Close a connection and its database handle, rather than hand it back to the pool."""
    conn.invalidate()
    conn.close()


class ModelStore:
    """The naive Bayes model's counts and the logs around them, on SQLite or PostgreSQL."""

    def __init__(self, engine: Engine, *, cache_tokens: int, staleness_seconds: float) -> None:
        self._engine = engine
        self._reader = CountReader(engine.dialect.name)
        self._cache = CountCache(cache_tokens)
        self._staleness = staleness_seconds
        self._lock = threading.RLock()
        self._local = threading.local()
        self._vocab: VocabularyTracker | None = None
        self._counted: tuple[int, int, float] | None = None  # token_count: revision, n, when
        self._totals = np.zeros(2, dtype=np.int64)
        self._revision = -1
        self._checked = float("-inf")
        self._epoch = 0  # advances on every in-memory change; guards cache fills
        self._writers = 0  # transactions in flight in this process that may change counts
        # Event-loop reads keep a connection per thread that never waits for a lock; lookups
        # share idle connections, each taken for one query (``_fetch``).
        self._nowait_conns: list[Connection] = []
        self._idle_reads: collections.deque[tuple[int, Connection]] = collections.deque()
        self._read_generation = 0  # advanced when idle lookup connections are retired
        self._complete = False  # memory holds every token's counts (``preload``)
        # Or, for a model too large for that, which tokens it holds (``preload``); None when
        # unknown.  Memory's revision governs it as it governs the cache.
        self._presence: PresenceFilter | None = None
        postgres = engine.dialect.name == "postgresql"
        self._autocommit: dict[str, Any] = (
            {"isolation_level": "AUTOCOMMIT"} if postgres else {NO_BEGIN: True}
        )

    @classmethod
    def open(
        cls,
        target: str,
        *,
        cache_tokens: int = 1_000_000,
        staleness_seconds: float = 5.0,
        create: bool = True,
    ) -> ModelStore:
        """Open (and migrate) the store at a SQLAlchemy URL or a SQLite file path."""
        with store_errors():
            engine = make_engine(target, create=create)
            try:
                migrate(engine, create=create)
            except BaseException:
                engine.dispose()
                raise
        store = cls(engine, cache_tokens=cache_tokens, staleness_seconds=staleness_seconds)
        store._check_fresh(force=True)
        return store

    def close(self) -> None:
        with self._lock:
            conns, self._nowait_conns = self._nowait_conns, []
        for conn in conns:
            conn.close()
        self._retire_reads()
        self._engine.dispose()

    @property
    def engine(self) -> Engine:
        return self._engine

    # -- transactions --------------------------------------------------------------------------

    @contextmanager
    def transaction(self, *, counts: bool = True) -> Iterator[Connection]:
        """A write transaction; nested use opens a savepoint on the same connection.

        ``counts=False`` promises that this level leaves token counts alone (the verdict and
        feedback logs, meta): lookups running meanwhile may then keep what they read.
        """
        local = self._local
        conn: Connection | None = getattr(local, "conn", None)
        with store_errors():
            if conn is not None:
                if counts:
                    self._counting()
                yield from self._nested(conn)
                return
            conn = self._engine.connect()
            local.conn, local.after, local.counting = conn, [[]], False
            committed = False
            try:
                if counts:
                    self._counting()
                with conn.begin():
                    yield conn
                committed = True
            finally:
                after, counting = local.after[0], local.counting
                local.conn, local.after, local.counting = None, None, False
                conn.close()
                with self._lock:
                    if committed:
                        for step in after:
                            step()
                    if counting:
                        self._writers -= 1
                        self._epoch += 1

    def _counting(self) -> None:
        """Mark this thread's transaction as one that may change counts, before it does."""
        if not self._local.counting:
            with self._lock:
                self._writers += 1
                self._epoch += 1
            self._local.counting = True

    def _nested(self, conn: Connection) -> Iterator[Connection]:
        after = self._local.after
        after.append([])
        try:
            with conn.begin_nested():
                yield conn
        except BaseException:
            after.pop()
            raise
        after[-2].extend(after.pop())

    def _after_commit(self, step: Callable[[], None]) -> None:
        self._local.after[-1].append(step)

    @contextmanager
    def _reading(
        self, *, snapshot: bool = False, whole_table: bool = False
    ) -> Iterator[Connection]:
        """A connection for reads: autocommit, or one consistent snapshot when asked.

        *whole_table*: the read walks every page of the token table.  Through SQLite's memory
        map those pages then stay resident for as long as the connection lives (as much
        memory again as the file's size), so the connection is closed afterwards instead of
        going back to the pool."""
        options: dict[str, Any] = self._autocommit
        if snapshot:
            postgres = self._engine.dialect.name == "postgresql"
            options = {"isolation_level": "REPEATABLE READ"} if postgres else {READ_ONLY: True}
        with store_errors(), self._engine.connect() as conn:
            if whole_table and not self._reader.postgres:
                # Past the memory map, with a small page cache: a 10-million-token file's
                # pages (214 MB) read through the map stayed resident until the connection
                # closed, 283 MB at the peak of building its presence filter against 82
                # (3.7 s to build it so, 3.3 through the map).
                raw = conn.connection.dbapi_connection  # beside SQLAlchemy: no transaction
                assert raw is not None
                raw.execute("PRAGMA mmap_size = 0")
                raw.execute("PRAGMA cache_size = -2048")
            try:
                yield conn.execution_options(**options)
            finally:
                if whole_table and not self._reader.postgres:
                    conn.invalidate()

    # -- freshness -----------------------------------------------------------------------------

    def _check_fresh(self, *, force: bool = False) -> None:
        now = time.monotonic()
        if not force and now - self._checked < self._staleness:
            return
        with self._lock:
            epoch = self._epoch
        with self._reading() as conn:
            revision, totals = self._read_totals(conn)
        with self._lock:
            # An own commit that landed during the read moved memory past what was read; it
            # is then newer than the read, so it stays.  Otherwise a revision that differs
            # (higher, or lower after the database was recreated) replaces memory.
            raced = epoch != self._epoch and revision < self._revision
            if revision != self._revision and not raced:
                self._reset(revision, totals)
            self._checked = now

    @staticmethod
    def _read_totals(conn: Connection) -> tuple[int, ClassCounts]:
        """The database revision (sum over both class rows) and the class totals."""
        ct = schema.class_total
        rows = conn.execute(select(ct.c.label, ct.c.messages, ct.c.revision)).all()
        totals = np.zeros(2, dtype=np.int64)
        for label, messages, _ in rows:
            totals[label] = messages
        return sum(int(row[2]) for row in rows), totals

    def _reset(self, revision: int, totals: ClassCounts) -> None:
        self._cache.clear()
        self._complete = False
        self._presence = None
        self._vocab = None
        self._totals = totals
        self._revision = revision
        self._epoch += 1

    def _committed(
        self,
        revision: int,
        hashes: TokenHashes,
        delta: TokenCounts,
        old: TokenCounts | None,
        messages: ClassCounts,
    ) -> None:
        """Bring memory up to *revision* after our own commit (lock held)."""
        if self._revision >= revision:
            return  # memory was reloaded after our commit and already includes it
        if self._revision != revision - 2:
            self._checked = float("-inf")  # someone else wrote too: reload on next read
            self._reset(-1, self._totals)
            return
        if self._complete:  # a token memory lacks had no counts; one past the limit ends that
            self._complete = self._cache.add_or_insert(hashes, delta)
        else:
            self._cache.add(hashes, delta)
        if self._presence is not None:
            self._presence_add(hashes[(delta > 0).any(axis=1)])
        self._totals = self._totals + messages
        if self._vocab is not None:
            if old is None:
                self._vocab = None
            else:
                self._vocab.apply(old, np.maximum(old + delta, 0))
        self._revision = revision

    # -- scoring side --------------------------------------------------------------------------

    def lookup(self, hashes: TokenHashes) -> TokenCounts:
        """Counts, shape (n, 2), for *hashes*; zeros for unknown tokens."""
        hashes = np.asarray(hashes, dtype=np.int64)
        self._check_fresh()
        with self._lock:
            counts, found = self._cache.get(hashes)
            epoch, writers, complete = self._epoch, self._writers, self._complete
            found = self._known_absent(hashes, found, complete)
        if complete or found.all():  # complete: what memory lacks has no counts
            return counts
        with store_errors():
            self._fill(hashes, counts, found, self._fetch, epoch, writers)
        return counts

    def _known_absent(
        self, hashes: TokenHashes, found: npt.NDArray[np.bool_], complete: bool
    ) -> npt.NDArray[np.bool_]:
        """*found*, with the hashes memory lacks that the presence filter rules out marked
        found too (their counts, zeros, are right): only the rest are read.  Lock held."""
        if self._presence is None or complete or found.all():
            return found
        missing = np.flatnonzero(~found)
        absent = missing[~self._presence.may_hold(hashes[missing])]
        found[absent] = True
        return found

    def _presence_add(self, grown: TokenHashes) -> None:
        """Add the tokens an own write grew to the filter (lock held); those it already
        reports are not counted, so ``full`` counts new tokens, and a full one is dropped
        (``preload`` builds it anew)."""
        assert self._presence is not None
        new = grown[~self._presence.may_hold(grown)]
        self._presence.add(new)
        if self._presence.full:
            self._presence = None

    def _fill(
        self,
        hashes: TokenHashes,
        counts: TokenCounts,
        found: npt.NDArray[np.bool_],
        fetch: Callable[[TokenHashes], TokenCounts],
        epoch: int,
        writers: int,
        wait: bool = True,
    ) -> bool:
        """Fetch the counts memory lacked into *counts* and cache them, unless a write landed
        since memory was read (*epoch*, *writers*): then False, and nothing is cached.

        Without *wait* (the event loop) it also gives False, caching nothing, rather than wait
        for the lock or rehash the cache: a worker thread's ``lookup`` does either."""
        missing = hashes[~found]
        # A copy sorted in place: numpy 2's np.unique takes a hash table, slower for this.
        unique = sorted_unique(missing.copy())
        fetched = fetch(unique)
        counts[~found] = fetched[np.searchsorted(unique, missing)]
        if not self._lock.acquire(blocking=wait):
            return False
        try:
            # A write committing meanwhile may or may not be in what we read: don't cache it.
            settled = writers == 0 and epoch == self._epoch
            if settled and not wait and not self._cache.roomy(len(unique)):
                settled = False
            if settled:
                self._cache.put(unique, fetched)
        finally:
            self._lock.release()
        return settled

    def cached_counts(
        self, hashes: TokenHashes, *, local_read: bool = False
    ) -> tuple[ClassCounts, TokenCounts] | None:
        """Class totals and counts for *hashes* without waiting, or None when answering would:
        memory is due for its freshness check, or (unless *local_read*) a hash is not cached.

        With *local_read* on SQLite, hashes missing from memory are read from the local file
        on a connection that never waits for a lock (busy timeout 0): about 0.1 ms for the
        handful a message brings, less than handing them to a thread.  A busy database,
        PostgreSQL (a network round trip), more than ``LOCAL_READ_MAX`` missing (a cold cache
        after a start, where each may be a disk read) or any error gives None.  So do the
        store's lock held by a thread and a put that would rehash the cache: either could
        stall the caller for 0.1 s or more.  The event loop may call this; ``lookup`` and
        ``class_count`` (in a worker thread) answer what it declines."""
        if time.monotonic() - self._checked >= self._staleness:
            return None
        hashes = np.asarray(hashes, dtype=np.int64)
        # Never wait here: a thread may hold the lock through a rehash (0.1 s or more).
        if not self._lock.acquire(blocking=False):
            return None
        try:
            counts, found = self._cache.get(hashes)
            totals = self._totals.copy()
            epoch, writers, complete = self._epoch, self._writers, self._complete
            found = self._known_absent(hashes, found, complete)
        finally:
            self._lock.release()
        own = getattr(self._local, "nowait_conn", None)
        if own is not None and (complete or self._local.nowait_generation != self._read_generation):
            # Not needed while memory is complete, and retired by a preload or a presence
            # filter (``_retire_reads``): closed now, not at a next read that may not come.
            self._drop_nowait_connection()
        if complete or found.all():  # complete: what memory lacks has no counts
            return totals, counts
        if not local_read or self._reader.postgres or len(found) - found.sum() > LOCAL_READ_MAX:
            return None
        try:
            dbapi = self._nowait_connection().connection.dbapi_connection
            fetch = functools.partial(self._reader.fetch_sqlite, dbapi)
            settled = self._fill(hashes, counts, found, fetch, epoch, writers, wait=False)
        except (sa_exc.SQLAlchemyError, sqlite3.Error):
            self._drop_nowait_connection()
            return None
        # A write landed meanwhile: lookup (in a thread) reads it properly.
        return (totals, counts) if settled else None

    def _nowait_connection(self) -> Connection:
        conn = getattr(self._local, "nowait_conn", None)
        if conn is None:
            conn = self._engine.connect().execution_options(**self._autocommit)
            conn.detach()  # its busy timeout of 0 must never reach another user of the pool
            conn.exec_driver_sql("PRAGMA busy_timeout = 0")
            with self._lock:
                self._nowait_conns.append(conn)
            self._local.nowait_conn = conn
            self._local.nowait_generation = self._read_generation
        return conn

    def _drop_nowait_connection(self) -> None:
        conn = getattr(self._local, "nowait_conn", None)
        self._local.nowait_conn = None
        if conn is not None:
            with self._lock:
                self._nowait_conns.remove(conn)
            conn.close()

    def _fetch(self, unique: TokenHashes) -> TokenCounts:
        # Lookups share idle autocommit connections, each taken for one query: cheaper than
        # the pool's checkout and return (which cost more than the query), and one idle when
        # memory becomes complete can be closed at once.  A failed one is closed, not reused.
        try:
            generation, conn = self._idle_reads.pop()
        except IndexError:
            generation = self._read_generation
            conn = self._engine.connect().execution_options(**self._autocommit)
        try:
            counts = self._reader.fetch(conn, unique)
        except BaseException:
            _close_for_good(conn)
            raise
        if generation == self._read_generation:
            self._idle_reads.append((generation, conn))
        else:
            _close_for_good(conn)  # retired while it was in use
        return counts

    def _retire_reads(self) -> None:
        """Close the idle lookup connections, and those in use as they come back, and each
        thread's no-wait connection at its next ``cached_counts``: each keeps every page of
        the file it has read mapped (resident) while it is open."""
        with self._lock:
            self._read_generation += 1
        while True:
            try:
                _, conn = self._idle_reads.pop()
            except IndexError:
                return
            _close_for_good(conn)

    @property
    def complete(self) -> bool:
        """Whether memory holds every token's counts (``preload``), so a lookup reads nothing."""
        return self._complete

    @property
    def presence_known(self) -> bool:
        """Whether memory knows which tokens the model holds: every count (``complete``), or
        for a model too large for the cache, a presence filter (``preload``)."""
        return self._complete or self._presence is not None

    def preload(self) -> bool:
        """Read every token's counts into memory, so a hash memory lacks is known to have none
        and a lookup never reads the database.  Own writes keep memory complete; another
        process's write (noticed within ``staleness_seconds``) or the token limit ends it, and
        lookups read through again until the next preload.

        A model with more tokens than the cache may hold gets a presence filter instead
        (``store/presence.py``, 2.5 bytes a token): a token the filter rules out is not read,
        nor cached; the others are read through as before.  Own writes add to it; another
        process's write drops it, as it ends a complete memory.

        On PostgreSQL too: the daemons sharing a model write only when they learn (a
        correction, ``mailweir train``), so memory stays complete between those writes, and a
        lookup there is a network round trip in a worker thread (``bench/bench_relay.py
        --postgres``).  True when memory is now complete; False when the model was too large
        (see ``presence_known``) or a write landed meanwhile."""
        with self._lock:
            epoch = self._epoch
        cache = CountCache(self._cache.max_tokens)
        presence: PresenceFilter | None = None
        with self._reading(snapshot=True, whole_table=True) as conn, conn.begin():
            revision, totals = self._read_totals(conn)
            rows = row_count(conn, schema.token)
            if rows > self._cache.max_tokens:
                presence = PresenceFilter(int(rows * (1 + PRESENCE_ROOM)) + 1)
                for hashes in hash_chunks(conn):
                    presence.add(hashes)
            else:
                # Sized once and filled a chunk at a time as it is read: reading the whole
                # table into arrays first and putting them at once, rehashing as the cache
                # grew, peaked at 172 MB resident for 521,759 tokens against 96 now, to settle
                # at 83 (bench/bench_scoring.py).
                cache.reserve(rows)
                for hashes, counts in packed_count_chunks(conn):
                    cache.put(hashes, counts)
        with self._lock:
            installed = epoch == self._epoch and not self._writers
            if installed:
                if revision != self._revision:
                    self._reset(revision, totals)
                if presence is None:
                    cache, self._cache, self._complete = self._cache, cache, True
                    self._epoch += 1
                else:
                    self._presence = presence
        del cache  # the one replaced (or the one not installed)
        if installed:
            # Lookups now read nothing, or only what the filter cannot rule out: the
            # connections that read before (the event loop's too, at its next call) are
            # closed, and with them the file's pages they kept mapped (about 190 MB of a
            # 10-million-token model's 214 after a start under load).
            self._retire_reads()
        release_free_memory()  # after both are gone: what was read, and the cache replaced
        return installed and presence is None

    def class_count(self) -> ClassCounts:
        """Trained ham and spam messages, shape (2,)."""
        self._check_fresh()
        with self._lock:
            return self._totals.copy()

    def vocabulary(self) -> Vocabulary:
        """Size, token totals and count histogram of the whole vocabulary."""
        self._check_fresh()
        with self._lock:
            if self._vocab is not None:
                return self._vocab.snapshot()
        while True:
            with self._lock:
                epoch = self._epoch
            with self._reading(snapshot=True, whole_table=True) as conn, conn.begin():
                revision, totals = self._read_totals(conn)
                tracker = VocabularyTracker.load(conn)
            with self._lock:
                if revision < self._revision and epoch != self._epoch:
                    continue  # our own commit landed after the snapshot: read again
                if revision != self._revision:  # lower: the database was restored
                    self._reset(revision, totals)
                self._vocab = tracker
                return tracker.snapshot()

    def token_count(self) -> int:
        """Tokens with a count: ``vocabulary().size``, without building the summary for it.

        From the summary when memory holds it (kept current by this process's training).
        Otherwise the database counts the live rows, in its own code: building the summary
        reads every row into Python, which for a model of ten million tokens took over 12 s of
        CPU at each start (the model gauge asks at once), contending with mail for the
        interpreter; SQLite counts them in about a second and lets go of the interpreter
        meanwhile.  That count serves while the revision stays the same, or for up to
        ``TOKEN_COUNT_EVERY`` seconds after it (a gauge may lag that much behind training)."""
        self._check_fresh()
        with self._lock:
            if self._vocab is not None:
                return self._vocab.size
            revision, counted = self._revision, self._counted
        now = time.monotonic()
        if counted is not None and (counted[0] == revision or now - counted[2] < TOKEN_COUNT_EVERY):
            return counted[1]
        t = schema.token
        live = select(func.count()).where((t.c.ham > 0) | (t.c.spam > 0))
        with self._reading(whole_table=True) as conn:
            tokens = int(conn.execute(live).scalar_one())
        with self._lock:
            self._counted = (revision, tokens, now)
        return tokens

    # -- learning side -------------------------------------------------------------------------

    def train(self, hashes: TokenHashes, label: int, *, digest: bytes, source: str) -> TrainResult:
        """Count one message under *label* unless the ledger already has it so."""
        return self._write(
            lambda conn: resolve_training(conn, [(hashes, label, digest, source)], time.time())
        )[0]

    def untrain(self, hashes: TokenHashes, *, digest: bytes) -> TrainResult:
        """Take a trained message back out of the counts and the ledger."""
        return self._write(lambda conn: resolve_untraining(conn, hashes, digest))[0]

    def train_many(self, items: Iterable[TrainItem]) -> Counter[TrainResult]:
        """Bulk training in large transactions, one upsert per distinct token per batch."""
        results: Counter[TrainResult] = Counter()
        batch: list[TrainItem] = []
        pending = 0
        for item in items:
            batch.append(item)
            pending += len(item[0])
            if pending >= _BATCH_TOKENS:
                results.update(self._write_batch(batch))
                batch, pending = [], 0
        if batch:
            results.update(self._write_batch(batch))
        return results

    def _write_batch(self, batch: list[TrainItem]) -> list[TrainResult]:
        return self._write(lambda conn: resolve_training(conn, batch, time.time()))

    def _write(self, resolve: Callable[[Connection], Plan]) -> list[TrainResult]:
        # A transaction of our own that PostgreSQL picked as a deadlock victim is run again.
        outermost = getattr(self._local, "conn", None) is None
        for attempt in range(_WRITE_ATTEMPTS if outermost else 1):
            try:
                return self._write_once(resolve)
            except StoreBusy as exc:
                if attempt + 1 >= _WRITE_ATTEMPTS or not outermost or not retryable(exc):
                    raise
        raise AssertionError("unreachable")

    def _write_once(self, resolve: Callable[[Connection], Plan]) -> list[TrainResult]:
        with self.transaction() as conn:
            plan = resolve(conn)
            if plan.messages.any() or len(plan.hashes):
                old = self._reader.fetch(conn, plan.hashes) if self._vocab is not None else None
                apply_counts(conn, plan.hashes, plan.delta, day_number())
                revision = bump_totals(conn, plan.messages)
                self._after_commit(
                    lambda: self._committed(revision, plan.hashes, plan.delta, old, plan.messages)
                )
        return plan.results

    def prune(
        self,
        *,
        max_count: int = 1,
        unseen_days: int = 60,
        today: int | None = None,
        chunk_rows: int = PRUNE_CHUNK_ROWS,
    ) -> int:
        """Delete rare tokens (ham + spam <= max_count) not trained for *unseen_days* days.

        In chunks of *chunk_rows* in hash order, each its own transaction: memory stays
        bounded with tens of millions of rows, and training waits at most one chunk."""
        day = day_number() if today is None else today
        removed, after = 0, INT64_MIN
        while True:
            count, last = self._prune_chunk(max_count, day - unseen_days, after, chunk_rows)
            removed += count
            if count < chunk_rows or last is None or last == INT64_MAX:
                return removed
            after = last + 1

    def _prune_chunk(
        self, max_count: int, before_day: int, after: int, chunk_rows: int
    ) -> tuple[int, int | None]:
        """One chunk of :meth:`prune` from hash *after* on; (rows removed, last hash)."""
        t = schema.token
        doomed = (
            select(t.c.hash)
            .where(t.c.hash >= after, t.c.ham + t.c.spam <= max_count, t.c.last_seen < before_day)
            .order_by(t.c.hash)
            .limit(chunk_rows)
        )
        with self.transaction() as conn:
            rows = conn.execute(
                delete(t).where(t.c.hash.in_(doomed)).returning(t.c.hash, t.c.ham, t.c.spam)
            ).all()
            if not rows:
                return 0, None
            gone = np.array([tuple(r) for r in rows], dtype=np.int64).reshape(-1, 3)
            hashes, old = gone[:, 0], gone[:, 1:]
            revision = bump_totals(conn, np.zeros(2, dtype=np.int64))
            self._after_commit(
                lambda: self._committed(revision, hashes, -old, old, np.zeros(2, np.int64))
            )
        return len(rows), int(hashes.max())

    # -- bookkeeping ---------------------------------------------------------------------------

    def stats(self) -> ModelStats:
        with self._reading(whole_table=True) as conn:
            totals: dict[int, int] = dict(
                conn.execute(
                    select(schema.class_total.c.label, schema.class_total.c.messages)
                ).all()
            )
            return ModelStats(
                tokens=row_count(conn, schema.token),
                ham_messages=int(totals.get(0, 0)),
                spam_messages=int(totals.get(1, 0)),
                ledger_rows=row_count(conn, schema.ledger),
                verdict_rows=row_count(conn, schema.verdict),
                database_bytes=database_bytes(conn),
                backend=conn.dialect.name,
                tokenizer=get_meta(conn, "tokenizer"),
                method=get_meta(conn, "method"),
            )

    def get_meta(self, key: str) -> str | None:
        with self._reading() as conn:
            return get_meta(conn, key)

    def set_meta(self, key: str, value: str) -> None:
        with self.transaction(counts=False) as conn:
            set_meta(conn, key, value)

    # -- verdict and feedback logs -------------------------------------------------------------

    def record_verdicts(self, records: Sequence[VerdictRecord]) -> None:
        with self.transaction(counts=False) as conn:
            verdicts.record_verdicts(conn, records)

    def find_verdict(self, tracking_id: str) -> VerdictRecord | None:
        with self._reading() as conn:
            return verdicts.find_verdict(conn, tracking_id)

    def expire_verdict_tokens(self, older_than: float) -> int:
        """Drop the token hashes of verdicts received before *older_than*; keep the rows."""
        with self.transaction(counts=False) as conn:
            return verdicts.expire_verdict_tokens(conn, older_than)

    def record_feedback(self, entry: FeedbackRecord) -> None:
        with self.transaction(counts=False) as conn:
            verdicts.record_feedback(conn, entry)
