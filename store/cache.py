"""A read-through cache of token counts kept in numpy arrays.

Entries live in an open-addressing hash table of buckets, one int64 array of shape
(buckets, 16): a row holds ``_BUCKET`` (8) keys, then their counts, each (ham, spam) pair
stored as the two int32 halves of one int64.  A key's home bucket comes from the top 32 bits
of ``key * 0x9E3779B97F4A7C15`` (Fibonacci hashing) scaled to the bucket count, so small or
patterned keys spread as well as the random 64-bit token hashes do.  A key whose home bucket
is full goes to the next one (linear probing by buckets) and marks the bucket it passed as
spilled.  Entries are never removed one by one, so a miss in a bucket that never spilled is
final.

``get`` gathers the home row of every hash at once (one random 128-byte read per hash where a
binary search makes about twenty), matches keys and picks counts with whole-array operations,
and looks further, one hash at a time, only for the two or three hashes of a message that miss
in a spilled bucket (``python_get``; where ``_count_probe.c`` was built, one loop in C does
the same for each hash in turn).  Every int64 is a possible token hash, so no key value can
mean "empty": the empty slots of bucket ``b`` hold a key whose home is bucket ``b + 1``, which
no search that reads bucket ``b`` can be looking for (such a search starts past ``b`` and ends
long before it could wrap round the table).

A slot costs 16 bytes.  The table is rehashed into about 1.3 times the buckets when its load
would pass 0.55, back to 0.42, so a held token costs 30-39 bytes including the empty slots
(16 for the two sorted runs this replaced, ~150 for a dict of tuples).  Measured on the
shared 2-core development machine with 500,000 random entries, ``get`` of 206 sorted hashes
(80% cached) takes about 0.04 ms of CPU against 0.11 ms for a binary search in each of two
sorted runs (whole-array steps cost 1-3 microseconds each there, so fewer steps beat less
arithmetic); a rehash of 700,000 entries takes about 0.13 s.  Unknown tokens are cached as
zeros, so a repeated lookup costs no query.

There is no per-entry eviction: when a put would take the cache past its token limit it is
emptied and keeps the lowest keys of that put, up to the limit, then refills from the lookups
that follow.  A small organisation's vocabulary usually fits; the limit only bounds memory.
"""

from __future__ import annotations

import math

import numpy as np
import numpy.typing as npt

from mailweir.model.aligned import line_aligned
from mailweir.model.types import TokenCounts, TokenHashes

try:  # the compiled lookup and put, where the build made them (setup.py: optional)
    from ._count_probe import get as compiled_get
    from ._count_probe import put_few as compiled_put_few
except ImportError:  # depends on the build: a C compiler and Python's headers
    compiled_get = compiled_put_few = None

_BUCKET = 8  # keys per bucket: 64 bytes, one cache line, and its counts in the next
_MAX_LOAD = 0.55  # past this, spilled buckets (misses looked for further on) multiply
_GROWN_LOAD = 0.42  # load just after a rehash: 16.25 B per slot / 0.42 = 39 B per token
_MIN_BUCKETS = 64
_REHASH_ROWS = 8192  # buckets moved at a time when the table grows
_FEW = 16  # puts of at most this many entries go one at a time (``_put_few``)
# 2**64 divided by the golden ratio, rounded down to odd (checked with decimal arithmetic);
# the method is Knuth's multiplicative hashing (TAOCP vol. 3, section 6.4, from memory).
# Multiplying by it mixes every bit of the key into the top bits that pick the bucket.
_MIX = np.uint64(0x9E3779B97F4A7C15)
_MIX_INT = int(_MIX)
_UNMIX = np.uint64(pow(0x9E3779B97F4A7C15, -1, 2**64))  # its inverse modulo 2**64

_HALF = np.uint64(32)

_Index = npt.NDArray[np.int64]


class CountCache:
    """Token hash -> (ham, spam) counts, bounded to ``max_tokens`` entries."""

    def __init__(self, max_tokens: int) -> None:
        self.max_tokens = max(0, int(max_tokens))
        self.clear()

    def __len__(self) -> int:
        return self._size

    def roomy(self, new: int) -> bool:
        """Whether *new* more entries fit without a rehash or emptying the table (a put that
        does either takes 0.1 s or more for a big table)."""
        return new <= self._room()

    def _room(self) -> float:
        """Entries that fit before the token limit or the next rehash."""
        return min(self.max_tokens, _MAX_LOAD * _BUCKET * len(self._fill)) - self._size

    def clear(self) -> None:
        """Forget every entry."""
        self._allocate(_MIN_BUCKETS)

    def reserve(self, tokens: int) -> None:
        """Make room for *tokens* entries in all (at most ``max_tokens``), so that filling
        the table rehashes it no more: each rehash holds the old table and the new at once."""
        tokens = min(tokens, self.max_tokens)
        if tokens > _MAX_LOAD * _BUCKET * len(self._fill):
            self._grow(tokens)

    def get(self, hashes: TokenHashes) -> tuple[TokenCounts, npt.NDArray[np.bool_]]:
        """Counts for *hashes* (zeros where not cached) and a mask of which were cached.

        One pass in C where ``_count_probe`` was built, else ``python_get`` (the
        specification the tests hold the C to)."""
        if compiled_get is None:
            return self.python_get(hashes)
        hashes = np.ascontiguousarray(hashes, dtype=np.int64)
        counts = np.empty((len(hashes), 2), dtype=np.int64)
        found = np.empty(len(hashes), dtype=np.bool_)
        compiled_get(hashes, self._table, self._spilled, counts, found)
        return counts, found

    def python_get(self, hashes: TokenHashes) -> tuple[TokenCounts, npt.NDArray[np.bool_]]:
        hashes = np.asarray(hashes, dtype=np.int64)
        bucket = self._home(hashes)
        found, packed = self._scan(hashes, bucket)
        # A miss in a bucket that something passed over may sit further on.  That is rare
        # (two or three hashes of a message at the highest load), so they go one at a time:
        # a whole-array round costs more than a few scalar ones.
        onward = (self._spilled[bucket] > found).nonzero()[0]
        keys, homes = hashes[onward].tolist(), bucket[onward].tolist()
        for i, key, home in zip(onward.tolist(), keys, homes, strict=True):
            packed[i], found[i] = self._follow(key, home)
        return packed.view(np.int32).reshape(-1, 2).astype(np.int64), found

    def put(self, hashes: TokenHashes, counts: TokenCounts) -> None:
        """Insert or overwrite entries."""
        if self.max_tokens == 0 or len(hashes) == 0:
            return
        if len(hashes) <= _FEW and self._put_few(hashes, counts):
            return
        hashes, first = np.unique(np.asarray(hashes, dtype=np.int64), return_index=True)
        counts = np.asarray(counts, dtype=np.int64)[first]
        where, slots = self._find(hashes)
        if self._size + len(hashes) - len(where) > self.max_tokens:
            self.clear()
            self._insert(hashes[: self.max_tokens], counts[: self.max_tokens])
            return
        self._pairs[slots + _BUCKET] = counts[where]
        fresh = np.ones(len(hashes), dtype=np.bool_)
        fresh[where] = False
        self._insert(hashes[fresh], counts[fresh])

    def _put_few(self, hashes: TokenHashes, counts: TokenCounts) -> bool:
        """``put`` of a few entries one at a time (False: left to the whole-array path).

        A message usually brings a handful of tokens the cache lacks; for those a whole-array
        round costs more (about 0.2 ms) than walking their buckets one by one: in C where
        ``_count_probe`` was built, else in plain Python (``python_put_few``, the
        specification the tests hold the C to)."""
        if compiled_put_few is None:
            return self.python_put_few(hashes, counts)
        added = compiled_put_few(
            np.ascontiguousarray(hashes, dtype=np.int64),
            np.ascontiguousarray(counts, dtype=np.int64),
            self._table,
            self._spilled,
            self._fill,
            math.floor(self._room()),  # as roomy() decides
        )
        if added < 0:
            return False  # overflow or growth: the whole-array path's rules
        self._size += added
        return True

    def python_put_few(self, hashes: TokenHashes, counts: TokenCounts) -> bool:
        keys = np.asarray(hashes, dtype=np.int64).tolist()
        rows = np.asarray(counts, dtype=np.int64).tolist()
        first = dict(zip(reversed(keys), reversed(rows), strict=True))  # the first of repeats
        if not self.roomy(len(first)):
            return False  # overflow or growth: the whole-array path's rules
        mask = (1 << 64) - 1
        buckets = int(self._buckets)
        for key, pair in first.items():
            top = ((key & mask) * _MIX_INT & mask) >> 32
            self._put_one(key, pair, (top * buckets) >> 32)
        return True

    def _put_one(self, key: int, pair: list[int], bucket: int) -> None:
        """Overwrite *key*'s counts, or place it in the first bucket from its home with room
        (marking each full bucket passed over as spilled, as ``_insert`` does)."""
        while True:
            fill = int(self._fill[bucket])
            held = self._table[bucket, :fill].tolist()
            if key in held:
                self._pairs[bucket * 2 * _BUCKET + _BUCKET + held.index(key)] = pair
                return
            if fill < _BUCKET:
                slot = bucket * 2 * _BUCKET + fill
                self._flat[slot] = key
                self._pairs[slot + _BUCKET] = pair
                self._fill[bucket] = fill + 1
                self._size += 1
                return
            self._spilled[bucket] = True
            bucket = (bucket + 1) % len(self._fill)

    def add(self, hashes: TokenHashes, delta: TokenCounts) -> None:
        """Add *delta* to cached entries (others stay uncached), clamping at zero.

        *hashes* should be unique: a repeated hash gets its delta once, not once per repeat.
        """
        self._add_held(np.asarray(hashes, dtype=np.int64), np.asarray(delta, dtype=np.int64))

    def add_or_insert(self, hashes: TokenHashes, delta: TokenCounts) -> bool:
        """``add``, and cache the hashes not held as ``max(delta, 0)`` (for a cache that holds
        every token there is: those had no counts).  False, inserting none, when they would
        pass the token limit.  *hashes* should be unique."""
        hashes = np.asarray(hashes, dtype=np.int64)
        delta = np.asarray(delta, dtype=np.int64)
        where = self._add_held(hashes, delta)
        fresh = np.ones(len(hashes), dtype=np.bool_)
        fresh[where] = False
        new = int(fresh.sum())
        if self._size + new > self.max_tokens:
            return False
        if new:
            self._insert(hashes[fresh], np.maximum(delta[fresh], 0))
        return True

    def _add_held(self, hashes: npt.NDArray[np.int64], delta: npt.NDArray[np.int64]) -> _Index:
        """Add *delta* to the entries held, clamping at zero; return where they are in *hashes*."""
        where, slots = self._find(hashes)
        updated = self._pairs[slots + _BUCKET] + delta[where]
        self._pairs[slots + _BUCKET] = np.maximum(updated, 0)
        return where

    # -- the table -----------------------------------------------------------------------------

    def _allocate(self, buckets: int) -> None:
        """Start an empty table of *buckets* buckets."""
        self._buckets = np.uint64(buckets)
        self._size = 0
        # The empty marker of bucket b: a key whose mixed top half h is the least with
        # h * buckets >> 32 == b + 1, so _home maps it to the next bucket.
        nxt = np.arange(1, buckets + 1, dtype=np.uint64) % self._buckets
        top = ((nxt << _HALF) + self._buckets - np.uint64(1)) // self._buckets
        # A bucket's 128 bytes on two cache lines, not three (model/aligned.py).
        self._table = line_aligned((buckets, 2 * _BUCKET), np.int64)
        self._table[:, :_BUCKET] = ((top << _HALF) * _UNMIX).view(np.int64)[:, None]
        flat = self._table.reshape(-1)  # slot s: key at flat[s], counts at flat[s + _BUCKET]
        self._flat = flat
        self._pairs = flat.view(np.int32).reshape(-1, 2)  # the same memory as (ham, spam)
        self._fill = np.zeros(buckets, dtype=np.uint8)
        self._spilled = np.zeros(buckets, dtype=np.bool_)

    def _home(self, hashes: npt.NDArray[np.int64]) -> _Index:
        # Scaling the top 32 mixed bits by the bucket count (multiply-shift range reduction,
        # D. Lemire 2016, from memory) lets the table grow by less than doubling, which
        # bounds its slack.
        top = (hashes.view(np.uint64) * _MIX) >> _HALF
        return ((top * self._buckets) >> _HALF).view(np.int64)  # below 2**32: the view is exact

    def _scan(
        self, hashes: npt.NDArray[np.int64], bucket: _Index
    ) -> tuple[npt.NDArray[np.bool_], npt.NDArray[np.int64]]:
        """Which *hashes* sit in their *bucket*, and their packed counts (0 where not).

        The rows are turned to shape (16, n) so each comparison and sum below runs along n
        values at a time; along a row's 8 keys numpy pays its per-row overhead n times.
        """
        rows = self._table.take(bucket, axis=0).T.copy()
        match = rows[:_BUCKET] == hashes
        # At most one match per column.  Zeroing the others and summing runs numpy's plain
        # loops, where ``sum(where=match)`` took its masked one (95 against 103 thousand
        # instructions for 216 hashes).
        counts = rows[_BUCKET:]
        counts *= match
        return match.any(axis=0), counts.sum(axis=0)

    def _follow(self, key: int, bucket: int) -> tuple[int, bool]:
        """Packed counts of *key*, searched for past its spilled home *bucket*, and whether
        it was found; the search ends at a bucket nothing passed over."""
        while True:
            bucket = (bucket + 1) % len(self._fill)
            keys = self._table[bucket, :_BUCKET].tolist()
            if key in keys:
                return int(self._table[bucket, _BUCKET + keys.index(key)]), True
            if not self._spilled[bucket]:
                return 0, False

    def _find(self, hashes: npt.NDArray[np.int64]) -> tuple[_Index, _Index]:
        """Positions in *hashes* of the cached ones, and the slots that hold them."""
        bucket = self._home(hashes)
        probing = np.arange(len(hashes))
        where: list[_Index] = [probing[:0]]
        slots: list[_Index] = [probing[:0]]
        while len(probing):
            keys = self._table.take(bucket, axis=0)[:, :_BUCKET]
            row, col = np.nonzero(keys == hashes[probing, None])
            where.append(probing[row])
            slots.append(bucket[row] * (2 * _BUCKET) + col)
            onward = self._spilled.take(bucket)
            onward[row] = False
            probing, bucket = probing[onward], (bucket[onward] + 1) % len(self._fill)
        return np.concatenate(where), np.concatenate(slots)

    def _insert(self, hashes: npt.NDArray[np.int64], counts: npt.NDArray[np.int64]) -> None:
        """Add unique hashes that are not in the table yet."""
        if self._size + len(hashes) > _MAX_LOAD * _BUCKET * len(self._fill):
            self._grow(self._size + len(hashes))
        self._size += len(hashes)
        bucket = self._home(hashes)
        while len(hashes):
            order = np.argsort(bucket, kind="stable")
            bucket, hashes, counts = bucket[order], hashes[order], counts[order]
            starts = np.flatnonzero(np.r_[True, bucket[1:] != bucket[:-1]])
            runs = np.diff(np.r_[starts, len(bucket)])
            heads = bucket[starts]
            # Each hash's place in its bucket: the bucket's fill plus its rank in the run.
            place = np.arange(len(bucket)) - np.repeat(starts - self._fill[heads], runs)
            fits = place < _BUCKET
            slot = bucket[fits] * (2 * _BUCKET) + place[fits]
            self._flat[slot] = hashes[fits]
            self._pairs[slot + _BUCKET] = counts[fits]
            filled = self._fill[heads] + runs
            self._spilled[heads[filled > _BUCKET]] = True
            self._fill[heads] = np.minimum(filled, _BUCKET)
            over = ~fits
            hashes, counts, bucket = (
                hashes[over],
                counts[over],
                (bucket[over] + 1) % len(self._fill),
            )

    def _grow(self, size: int) -> None:
        """Rehash into enough buckets to hold *size* entries at ``_GROWN_LOAD``.

        The old rows move over a slice at a time: moving them all at once would need some
        hundred bytes of temporary arrays per entry, which the allocator tends to keep.
        """
        rows, fill = self._table, self._fill
        self._allocate(max(_MIN_BUCKETS, math.ceil(size / (_GROWN_LOAD * _BUCKET))))
        for start in range(0, len(fill), _REHASH_ROWS):
            part = rows[start : start + _REHASH_ROWS]
            held = np.arange(_BUCKET) < fill[start : start + _REHASH_ROWS, None]
            counts = part[:, _BUCKET:][held].view(np.int32).reshape(-1, 2)
            self._insert(part[:, :_BUCKET][held], counts.astype(np.int64))
