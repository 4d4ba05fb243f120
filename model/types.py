"""Names for the shapes that flow through the model.

Class columns follow scikit-learn's sorted class order: column 0 is ham, column 1 is spam.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Final, TypeAlias

import numpy as np
import numpy.typing as npt

HAM: Final = 0
SPAM: Final = 1
LABELS: Final = ("ham", "spam")

TokenHashes: TypeAlias = npt.NDArray[np.int64]
"""Shape (n,): unique 64-bit token hashes of one message, stored signed so SQL BIGINT holds them."""

TokenCounts: TypeAlias = npt.NDArray[np.int64]
"""Shape (n, 2): for each token, the number of trained ham and spam messages containing it."""

ClassCounts: TypeAlias = npt.NDArray[np.int64]
"""Shape (2,): the number of trained ham and spam messages."""


@dataclass(frozen=True)
class Vocabulary:
    """What the whole model knows beyond one message's tokens.

    Attributes
    ----------
    size : int
        V, the number of distinct tokens with a non-zero count in either class.
    token_total : ClassCounts, shape (2,)
        Sum over the vocabulary of each class's token counts (the multinomial denominator).
    count_histogram : ndarray of int64, shape (2, K)
        ``count_histogram[c, k]`` is the number of vocabulary tokens whose count in class c is k
        (k = 0 included).  Lets the Bernoulli model sum its absent-token terms over the whole
        vocabulary in O(K) instead of O(V).
    """

    size: int
    token_total: ClassCounts
    count_histogram: npt.NDArray[np.int64]

    @staticmethod
    def from_token_counts(token_count: TokenCounts) -> Vocabulary:
        """Build the summary from every token's counts (tests, replays, small models)."""
        counts = np.asarray(token_count, dtype=np.int64).reshape(-1, 2)
        counts = counts[(counts > 0).any(axis=1)]
        top = int(counts.max()) + 1 if counts.size else 1
        histogram = np.stack([np.bincount(counts[:, c], minlength=top) for c in (HAM, SPAM)])
        return Vocabulary(len(counts), counts.sum(axis=0), histogram.astype(np.int64))


UNREAD_VOCABULARY: Final = Vocabulary.from_token_counts(np.zeros((0, 2), dtype=np.int64))
"""The empty summary, handed to a scorer that declares it never reads one
(``NaiveBayes.uses_vocabulary`` False) instead of the model's real one, which costs whoever
keeps it up to date a read of every trained token's old counts."""


OWN_HEADER_PREFIX: Final = "mailweir-"
"""Lower-case name prefix of every header field mailweir adds.  The tokenizer never reads such
fields and the daemon strips incoming ones, so a sender cannot forge a verdict."""
