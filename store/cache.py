"""A read-through cache of token counts kept in numpy arrays.

Entries live in two sorted runs: a large ``main`` run and a small ``recent`` run that takes
new entries (``np.insert`` into a short array is cheap) and is merged into ``main`` when it
grows past an eighth of it.  A lookup is a ``searchsorted`` in each run.  An entry costs
16 bytes (int64 key, two int32 counts), about 16 MB per million tokens against ~150 MB for a
dict of tuples.  Unknown tokens are cached as zeros, so a repeated lookup costs no query.

There is no per-entry eviction: when the cache would exceed its token limit it is emptied
and refills from the lookups that follow.  A small organisation's vocabulary usually fits;
the limit only bounds memory.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

from mailweir.model.types import TokenCounts, TokenHashes

_MIN_RECENT = 4096


class _Run:
    """Sorted unique keys with their counts."""

    def __init__(self) -> None:
        self.keys = np.empty(0, dtype=np.int64)
        self.counts = np.empty((0, 2), dtype=np.int32)

    def find(self, hashes: npt.NDArray[np.int64]) -> npt.NDArray[np.int64]:
        """Index of each hash in this run, or -1."""
        if not len(self.keys):
            return np.full(len(hashes), -1, dtype=np.int64)
        pos = np.searchsorted(self.keys, hashes)
        pos[pos == len(self.keys)] = 0
        return np.where(self.keys[pos] == hashes, pos, -1)

    def insert(self, hashes: npt.NDArray[np.int64], counts: npt.NDArray[np.int64]) -> None:
        """Add sorted unique hashes that are not in the run yet."""
        pos = np.searchsorted(self.keys, hashes)
        self.keys = np.insert(self.keys, pos, hashes)
        self.counts = np.insert(self.counts, pos, counts.astype(np.int32), axis=0)


class CountCache:
    """Token hash -> (ham, spam) counts, bounded to ``max_tokens`` entries."""

    def __init__(self, max_tokens: int) -> None:
        self.max_tokens = max(0, int(max_tokens))
        self.clear()

    def __len__(self) -> int:
        return len(self._main.keys) + len(self._recent.keys)

    def clear(self) -> None:
        """Forget every entry."""
        self._main = _Run()
        self._recent = _Run()

    def get(self, hashes: TokenHashes) -> tuple[TokenCounts, npt.NDArray[np.bool_]]:
        """Counts for *hashes* (zeros where not cached) and a mask of which were cached."""
        hashes = np.asarray(hashes, dtype=np.int64)
        counts = np.zeros((len(hashes), 2), dtype=np.int64)
        found = np.zeros(len(hashes), dtype=np.bool_)
        for run in (self._main, self._recent):
            if not len(run.keys):
                continue  # the recent run is often empty: skip its mask work
            idx = run.find(hashes)
            hit = idx >= 0
            counts[hit] = run.counts[idx[hit]]
            found |= hit
        return counts, found

    def put(self, hashes: TokenHashes, counts: TokenCounts) -> None:
        """Insert or overwrite entries."""
        if self.max_tokens == 0 or len(hashes) == 0:
            return
        hashes, first = np.unique(np.asarray(hashes, dtype=np.int64), return_index=True)
        counts = np.asarray(counts, dtype=np.int64)[first]
        if len(self) + len(hashes) > self.max_tokens:
            fresh = np.ones(len(hashes), dtype=np.bool_)
            for run in (self._main, self._recent):
                fresh &= run.find(hashes) < 0
            if len(self) + int(fresh.sum()) > self.max_tokens:
                self.clear()
                self._recent.insert(hashes[: self.max_tokens], counts[: self.max_tokens])
                return
        fresh = np.ones(len(hashes), dtype=np.bool_)
        for run in (self._main, self._recent):
            idx = run.find(hashes)
            hit = idx >= 0
            run.counts[idx[hit]] = counts[hit]
            fresh &= ~hit
        self._recent.insert(hashes[fresh], counts[fresh])
        if len(self._recent.keys) > max(_MIN_RECENT, len(self._main.keys) // 8):
            self._merge()

    def add(self, hashes: TokenHashes, delta: TokenCounts) -> None:
        """Add *delta* to cached entries (others stay uncached), clamping at zero.

        *hashes* should be unique: a repeated hash gets its delta once, not once per repeat.
        """
        hashes = np.asarray(hashes, dtype=np.int64)
        delta = np.asarray(delta, dtype=np.int64)
        for run in (self._main, self._recent):
            idx = run.find(hashes)
            hit = idx >= 0
            updated = run.counts[idx[hit]] + delta[hit]
            run.counts[idx[hit]] = np.maximum(updated, 0)

    def _merge(self) -> None:
        main, recent = self._main, self._recent
        main.insert(recent.keys, recent.counts.astype(np.int64))
        self._recent = _Run()
