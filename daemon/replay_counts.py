"""Token counts held in numpy arrays for replays that need no database.

A replay knows every message before it starts, so each distinct hash of the corpus gets a dense
row once; looking a message up is then one fancy index and training one scatter-add.  The counts
and the vocabulary summary are the same numbers the store would hold after the same training
(tests/daemon/test_replay_counts.py checks them against ``Vocabulary.from_token_counts``), at a
small fraction of the time, which is what makes sweeps over many variants affordable.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import numpy.typing as npt

from mailweir.model.types import HAM, SPAM, ClassCounts, TokenCounts, TokenHashes, Vocabulary


class MemoryCounts:
    """Presence counts for a fixed list of messages, trained one message at a time.

    Parameters
    ----------
    messages : sequence of TokenHashes
        Each message's unique token hashes; ``train(i, label)`` counts message ``i``.
    """

    def __init__(self, messages: Sequence[TokenHashes]) -> None:
        lengths = np.array([len(m) for m in messages], dtype=np.int64)
        joined = np.concatenate(list(messages)) if len(messages) else np.zeros(0, np.int64)
        unique, rows = np.unique(joined, return_inverse=True)
        self._rows = np.split(rows.astype(np.int64), np.cumsum(lengths)[:-1])
        self._counts = np.zeros((len(unique), 2), dtype=np.int64)
        self._classes = np.zeros(2, dtype=np.int64)
        self._token_total = np.zeros(2, dtype=np.int64)
        self._histogram = np.zeros((2, 64), dtype=np.int64)
        self._size = 0
        self._trained = np.zeros(len(messages), dtype=bool)

    def lookup(self, i: int) -> TokenCounts:
        """Shape (n, 2): counts of message ``i``'s tokens, in the order it was given."""
        return self._counts[self._rows[i]]

    def class_count(self) -> ClassCounts:
        return self._classes.copy()

    def vocabulary(self) -> Vocabulary:
        return Vocabulary(self._size, self._token_total.copy(), self._histogram.copy())

    @property
    def tokens(self) -> int:
        """Distinct tokens with a count in either class."""
        return self._size

    def train(self, i: int, label: int) -> None:
        """Count message ``i`` under ``label`` (once; a second call is refused)."""
        if self._trained[i]:
            raise ValueError(f"message {i} is already trained")
        self._trained[i] = True
        rows = self._rows[i]
        before = self._counts[rows]
        new = ~(before > 0).any(axis=1)
        other = SPAM if label == HAM else HAM
        self._grow(int(before[:, label].max(initial=0)) + 2)
        # Histogram rows count vocabulary tokens by their count in each class (k = 0 included):
        # a new token enters both rows, an old one moves up one bin in the trained class.
        np.add.at(self._histogram[other], 0, int(new.sum()))
        np.subtract.at(self._histogram[label], before[~new, label], 1)
        np.add.at(self._histogram[label], before[:, label] + 1, 1)
        self._size += int(new.sum())
        self._counts[rows, label] += 1
        self._classes[label] += 1
        self._token_total[label] += len(rows)

    def prune(self, max_count: int) -> int:
        """Forget tokens seen in at most ``max_count`` messages (as ``mailweir prune`` does).

        Returns the number of tokens removed; they count as new if they come back.
        """
        total = self._counts.sum(axis=1)
        gone = np.flatnonzero((total > 0) & (total <= max_count))
        old = self._counts[gone]
        for c in (HAM, SPAM):
            np.subtract.at(self._histogram[c], old[:, c], 1)
        self._token_total -= old.sum(axis=0)
        self._size -= len(gone)
        self._counts[gone] = 0
        return len(gone)

    def _grow(self, width: int) -> None:
        if width > self._histogram.shape[1]:
            grown = np.zeros((2, max(width, 2 * self._histogram.shape[1])), dtype=np.int64)
            grown[:, : self._histogram.shape[1]] = self._histogram
            self._histogram = grown

    def token_counts(self) -> npt.NDArray[np.int64]:
        """Shape (V, 2): counts of every token in the vocabulary (for checks)."""
        return self._counts[(self._counts > 0).any(axis=1)]
