"""Margin training: learn a message only when the model misjudges it or is unsure of it.

A message whose true class the current model already gives with a log-odds of at least the
margin teaches it little, and counting it anyway lets the common kinds of mail crowd out the
rare ones.  Training only on errors and near-misses is the "thick threshold" of Siefkes et al.
("Combining Winnow and Orthogonal Sparse Bigrams for Incremental Spam Filtering", PKDD 2004);
on the development corpus it took (1-AUC)% from 0.163 to 0.103 and stored a quarter fewer
tokens (bench/ACCURACY.md).

Bulk training decides message by message in order, each against the counts as they stand
after the messages before it, while still writing in large batches: :class:`PendingCounts`
adds the decided but not yet written messages to what the store returns.
"""

from __future__ import annotations

import math
from typing import Final

import numpy as np
import numpy.typing as npt

from mailweir.daemon.settings import PolicySettings
from mailweir.model.hashing import sorted_unique
from mailweir.model.nb import NaiveBayes
from mailweir.model.types import (
    SPAM,
    UNREAD_VOCABULARY,
    ClassCounts,
    TokenCounts,
    TokenHashes,
    Vocabulary,
)
from mailweir.store import ModelStore
from mailweir.store.vocab import VocabularyTracker

DEFAULT_TRAIN_MARGIN: Final = 10.0
"""Log-odds; the plateau of 10-20 measured in bench/ACCURACY.md (5 was too thin)."""

META_MARGIN: Final = "train_margin"
EVERY_MESSAGE: Final = "every"  # meta value: train every message (no margin)


def parse_margin(text: str) -> float | None:
    """A margin from the command line or the model's meta: log-odds >= 0, or ``every``."""
    if text.strip().lower() == EVERY_MESSAGE:
        return None
    try:
        value = float(text)
    except ValueError:
        raise ValueError(
            f"margin must be a number of log-odds >= 0 or 'every', got {text!r}"
        ) from None
    if not (value >= 0 and math.isfinite(value)):
        raise ValueError(f"margin must be a finite number of log-odds >= 0, got {text!r}")
    return value


def margin_text(margin: float | None) -> str:
    return EVERY_MESSAGE if margin is None else f"{margin:g}"


def signed_log_odds(probability: float, label: int) -> float:
    """Log-odds of the true class: > 0 judged right, < 0 judged wrong.

    The probability is clipped to [1e-300, 1 - 1e-16] first, so a verdict rounded to 0 or 1
    gives a large finite value instead of an infinity.
    """
    p = min(max(probability, 1e-300), 1.0 - 1e-16)
    logit = math.log(p) - math.log1p(-p)
    return logit if label == SPAM else -logit


MARGIN_WARMUP: Final = PolicySettings.min_trained  # the guard's default, 50
"""Messages of a class trained whatever the margin says, before the margin applies to it.

A small first import of clearly separate mail would otherwise stop training after a dozen
messages of a class, and the daemon's cold-start guard (``policy.min_trained``, whose default
this is) would hold for good: the guard counts trained messages."""


def should_train(
    probability: float, label: int, margin: float | None, class_trained: int = MARGIN_WARMUP
) -> bool:
    """True unless the model already gives the true class with at least ``margin`` log-odds
    (and already holds ``MARGIN_WARMUP`` trained messages of that class)."""
    if margin is None or class_trained < MARGIN_WARMUP:
        return True
    return outside_margin(signed_log_odds(probability, label), margin)


def outside_margin(signed: float, margin: float) -> bool:
    """Misjudged or undecided (signed log-odds <= 0), or judged right by less than the margin.

    An undecided 0.5 is never "right", so even margin 0 (errors only) trains an empty model.
    """
    return signed <= 0 or signed < margin


class PendingCounts:
    """The store's counts plus the messages decided for training but not yet written.

    Lookups, class totals and the vocabulary summary are what the store will hold once the
    pending messages are written, so each decision sees every message before it.  A digest
    seen twice is counted once, as the store's ledger does.  (A message the ledger holds under
    the other class is moved by the store; here it only adds until the batch is written.)

    The counts of a batch's tokens are read from the store once (``prefetch``, one query) and
    held in arrays sorted by hash, stored and pending counts added together, so deciding one
    message is a ``searchsorted`` and no store lookup.  The store is not written until the
    batch is, so what it would answer per message is what was read for the batch.
    """

    def __init__(self, store: ModelStore) -> None:
        self._store = store
        self.clear()

    def clear(self) -> None:
        """Forget the pending messages once the store holds them."""
        self._keys = np.empty(0, dtype=np.int64)  # sorted unique hashes held
        self._counts = np.zeros((0, 2), dtype=np.int64)  # stored + pending, row per key
        self._classes = np.zeros(2, dtype=np.int64)
        self._digests: set[bytes] = set()
        self._delta = VocabularyTracker()  # from zero: the pending change to the summary
        self._unapplied: list[tuple[TokenCounts, int]] = []  # added since the summary was made
        self._base: Vocabulary | None = None  # the store's, read once per batch

    def prefetch(self, hashes: TokenHashes) -> None:
        """Read the stored counts of ``hashes`` (every token of a batch, repeats allowed) that
        are not held yet, in one lookup."""
        # A copy sorted in place: numpy 2's np.unique of a batch's 300,000 hashes takes its
        # hash-table path, 100 ms against 22 for the sort (it still sorts what it finds).
        wanted = sorted_unique(np.array(hashes, dtype=np.int64))
        if len(self._keys):
            wanted = wanted[~_held(self._keys, wanted)]
        if not len(wanted):
            return
        stored = self._store.lookup(wanted)
        keys = np.concatenate([self._keys, wanted])
        order = np.argsort(keys, kind="stable")
        self._keys = keys[order]
        self._counts = np.concatenate([self._counts, stored])[order]

    def lookup(self, hashes: TokenHashes) -> TokenCounts:
        """Shape (n, 2): stored counts plus pending ones for ``hashes`` (unique)."""
        return self._counts[self._rows(hashes)]

    def _rows(self, hashes: TokenHashes) -> npt.NDArray[np.intp]:
        """Row of each hash in the held arrays, reading any not held yet from the store."""
        hashes = np.asarray(hashes, dtype=np.int64)
        if len(self._keys):
            rows = np.minimum(np.searchsorted(self._keys, hashes), len(self._keys) - 1)
            if (self._keys[rows] == hashes).all():
                return rows
        self.prefetch(hashes)
        return np.searchsorted(self._keys, hashes)

    def class_count(self) -> ClassCounts:
        return self._store.class_count() + self._classes

    def vocabulary(self) -> Vocabulary:
        if self._base is None:
            self._base = self._store.vocabulary()
        base = self._base
        if not self._digests:
            return base
        delta = self._delta
        for before, label in self._unapplied:  # deferred: a scorer may never ask for it
            after = before.copy()
            after[:, label] += 1
            delta.apply(before, after)
        self._unapplied.clear()
        width = max(base.count_histogram.shape[1], delta.histogram.shape[1])
        histogram = np.zeros((2, width), dtype=np.int64)
        histogram[:, : base.count_histogram.shape[1]] += base.count_histogram
        histogram[:, : delta.histogram.shape[1]] += delta.histogram
        return Vocabulary(base.size + delta.size, base.token_total + delta.token_total, histogram)

    def probability(self, scorer: NaiveBayes, hashes: TokenHashes) -> tuple[float, TokenCounts]:
        """The spam probability of a message's tokens now, and the counts it was scored on."""
        counts = self.lookup(hashes)
        # A scorer that never reads the summary gets the empty one: the store's would cost a
        # read of every trained token's old counts with each batch written.
        vocabulary = self.vocabulary() if scorer.uses_vocabulary else UNREAD_VOCABULARY
        return scorer.spam_probability(counts, self.class_count(), vocabulary), counts

    def add(self, hashes: TokenHashes, counts: TokenCounts, label: int, digest: bytes) -> None:
        """Count a message decided for training; ``counts`` are its tokens' counts before it."""
        if digest in self._digests:
            return
        self._digests.add(digest)
        self._classes[label] += 1
        self._unapplied.append((counts, label))
        # A message's hashes are unique, so each row gains one at most.
        self._counts[self._rows(hashes), label] += 1


def _held(keys: TokenHashes, hashes: TokenHashes) -> npt.NDArray[np.bool_]:
    """Which of ``hashes`` the sorted, non-empty ``keys`` hold."""
    rows = np.minimum(np.searchsorted(keys, hashes), len(keys) - 1)
    held: npt.NDArray[np.bool_] = keys[rows] == hashes
    return held
