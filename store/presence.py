"""Which tokens a model holds, for models larger than the count cache: a Bloom filter.

A model that fits the count cache is preloaded whole, and then a token memory lacks is known to
have no counts (``ModelStore.preload``).  A larger one (bigram models reach millions of tokens)
used to read every token memory lacked from the database, and a message brings many tokens
no model holds: about six new words of real mail, and with bigrams hundreds of word pairs
never seen together.  Those reads cost more than judging the rest of the message.  This
filter answers "certainly not in the model" for nearly all of them, so only the tokens that
may be there are read.

It is a register-blocked Bloom filter (Putze, Sanders and Singler, "Cache-, hash- and
space-efficient Bloom filters", 2007; title and year from memory): each token sets three bits
within one 64-bit word, so a lookup reads one word a token, a handful of whole-array steps
for a message.  Token hashes are BLAKE2b or splitmix64 outputs already, so their own bits
choose the word (the top 32, scaled to the word count by Lemire's multiply-shift, from
memory) and the three bits within it (three 6-bit fields of the low 18).  With 16 bits of
table per token about one absent token in 125 passes as possibly present (0.78-0.82% on
random hashes; ``tests/store/test_presence.py`` holds it below 1.2%); that one is read, as
all were before.  A token is never reported absent once added: a false "absent" would lose
its counts from the verdict.

Deleting from a Bloom filter is not possible; a token whose counts reach zero (untraining,
pruning) stays "possibly present" and is read, harmlessly, until the filter is next built.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

from mailweir.model.types import TokenHashes

_TABLE_BITS_PER_TOKEN = 16  # of table per token held, at the capacity it is built for
_MIN_WORDS = 64
_LOW6 = np.uint64(63)
_ONE = np.uint64(1)
_SHIFTS = (np.uint64(0), np.uint64(6), np.uint64(12))
_HIGH = np.uint64(32)


class PresenceFilter:
    """Token hashes that may be in the model; every one added is always reported.

    Parameters
    ----------
    capacity : int
        Tokens it is sized for (16 bits of table each).  It takes more, with more false
        "possibly present" answers; ``full`` says when the caller should build it anew.
    """

    def __init__(self, capacity: int) -> None:
        self.capacity = max(1, int(capacity))
        words = max(_MIN_WORDS, -(-self.capacity * _TABLE_BITS_PER_TOKEN // 64))
        self._words = np.zeros(words, dtype=np.uint64)
        self._count = np.uint64(words)
        self.added = 0

    @property
    def nbytes(self) -> int:
        return int(self._words.nbytes)

    @property
    def full(self) -> bool:
        """Whether more tokens were added than it was sized for."""
        return self.added > self.capacity

    def add(self, hashes: TokenHashes) -> None:
        """Record *hashes* as present (repeats and tokens already there are harmless)."""
        hashes = np.asarray(hashes, dtype=np.int64)
        if not len(hashes):
            return
        where, bits = self._slots(hashes)
        np.bitwise_or.at(self._words, where, bits)
        self.added += len(hashes)

    def may_hold(self, hashes: TokenHashes) -> npt.NDArray[np.bool_]:
        """Per hash: False when it was certainly never added, True when it may have been."""
        hashes = np.asarray(hashes, dtype=np.int64)
        where, bits = self._slots(hashes)
        held = self._words.take(where)
        held &= bits
        return held == bits

    def _slots(self, hashes: TokenHashes) -> tuple[npt.NDArray[np.intp], npt.NDArray[np.uint64]]:
        """Each hash's word (its top 32 bits scaled to the table, Lemire's multiply-shift
        range reduction) and the three bits it sets there (low 18 bits, 6 at a time)."""
        values = hashes.view(np.uint64)
        where = values >> _HIGH
        where *= self._count
        where >>= _HIGH
        bits = np.zeros(len(values), dtype=np.uint64)
        for shift in _SHIFTS:
            position = values >> shift
            position &= _LOW6
            bits |= np.left_shift(_ONE, position)
        return where.astype(np.intp), bits
