"""Token hashes of the words met lately, so most words of a message cost no BLAKE2b.

A set-associative table in one numpy array of shape (sets, 8): row ``k & (sets - 1)`` holds
up to four keys and, after them, their token hashes, 64 bytes that start on a cache line, so
a lookup gathers one line with one ``take``.  Eight keys in one array and their hashes in
another took two gathers: 15 thousand instructions more a 4 KB message in the daemon, for a
hit rate on the development corpus of 93.7% at 200,000 entries either way (88.5 against 88.0%
with four ways at 20,000).  The key of a token is Python's own
``hash()`` of its text: a str computes it once and keeps it, and the tokenizer has already
asked for it (every token passes through a dict), so keying costs nothing per word.  That
hash is salted per process, which suits a cache that never leaves one.  Two different texts
with the same 64-bit key would share a token hash; among the 10**5-10**6 keys held that has a
chance near 10**-8 per process lifetime (the birthday bound), far below the chance that two
of the model's own tokens share a BLAKE2b hash (``hashing.py``).

A slot costs 16 bytes, about 20-40 per entry with the slack of a set-associative table,
against about 140 for a dict of token text to digest (measured: 80 bytes for the entry and
its 8-byte digest, 61 for the text it keeps alive).  A lookup is a fixed handful of
whole-array steps; a full set replaces one of its entries (the way picked by other bits of
the key), so nothing is ever emptied at once.  Key -1 marks an empty slot: ``hash()`` never
gives -1 (CPython keeps it for errors), so the keys need no remapping.

One lock guards the table: threads tokenize too (mid-sized messages, feedback), and a key
read with another entry's hash would give a token the wrong hash.
"""

from __future__ import annotations

import threading

import numpy as np
import numpy.typing as npt

from .aligned import line_aligned

WAYS = 4  # a set's keys and their hashes: 4 x 16 bytes, one cache line
_EMPTY = -1  # never a str's hash()
_MIN_SETS = 16
_FLAGS = np.dtype(f"u{WAYS}")  # a set's WAYS match flags read as one word

_Keys = npt.NDArray[np.int64]


class DigestCache:
    """Python ``hash()`` of a token's text -> the token's 64-bit hash, about ``entries`` held."""

    def __init__(self, entries: int) -> None:
        self._lock = threading.Lock()
        self.resize(entries)

    @property
    def capacity(self) -> int:
        return int(self._sets.shape[0]) * WAYS

    def __len__(self) -> int:
        return int(np.count_nonzero(self._sets[:, :WAYS] != _EMPTY))

    def resize(self, entries: int) -> None:
        """Empty the cache and give it room for at least *entries* (a power of two of sets)."""
        sets = _MIN_SETS
        while sets * WAYS < entries:
            sets *= 2
        with self._lock:
            self._sets = line_aligned((sets, 2 * WAYS), np.int64)  # keys, then their hashes
            self._sets[:, :WAYS] = _EMPTY
            self._mask = np.int64(sets - 1)

    def clear(self) -> None:
        with self._lock:
            self._sets[:, :WAYS] = _EMPTY

    def get(self, keys: _Keys) -> tuple[_Keys, npt.NDArray[np.bool_]]:
        """Token hashes for *keys* (0 where not held) and a mask of which were held."""
        rows = keys & self._mask
        # ``take`` gathers rows in a third of the time of indexing with an array (2 against
        # 6 µs for a message's 280 words).  The rows are turned to shape (8, n), so the
        # comparison and sum run along n values at a time, as in store/cache.py.
        with self._lock:
            held = self._sets.take(rows, axis=0).T.copy()
        match = held[:WAYS] == keys
        values = held[WAYS:]
        values *= match  # at most one match per column: the sum is its hash, or 0
        return values.sum(axis=0), match.any(axis=0)

    def put(self, keys: _Keys, values: _Keys) -> None:
        """Hold these entries: in the way already holding the key, else an empty way of its
        set, else one picked by bits 32-33 of the key.  Of repeats in one call, one is kept."""
        rows = keys & self._mask
        with self._lock:
            # As in ``get``: rows gathered with ``take``, a row's flags read as one word, and
            # the slots written through flat numbers (a third of the time of indexing with
            # pairs of arrays, for the hundreds a flush puts).
            held = self._sets.take(rows, axis=0)[:, :WAYS]
            same, empty = held == keys[:, None], held == _EMPTY
            way = np.where(_any_way(empty), empty.argmax(axis=1), (keys >> 32) & (WAYS - 1))
            way = np.where(_any_way(same), same.argmax(axis=1), way)
            rows *= 2 * WAYS
            rows += way
            flat = self._sets.reshape(-1)
            flat[rows] = keys
            flat[rows + WAYS] = values


def _any_way(flags: npt.NDArray[np.bool_]) -> npt.NDArray[np.bool_]:
    """Per row of shape (n, WAYS): whether any flag is set, its bytes read as one word."""
    found: npt.NDArray[np.bool_] = flags.view(_FLAGS).reshape(-1) != 0
    return found


def keys_of(tokens: list[str]) -> _Keys:
    """The cache keys of *tokens*: their Python hashes."""
    return np.fromiter(map(hash, tokens), dtype=np.int64, count=len(tokens))
