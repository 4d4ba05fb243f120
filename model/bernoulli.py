"""Bernoulli naive Bayes over token presence, with Lidstone smoothing."""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar

import numpy as np
import numpy.typing as npt

from mailweir.model.nb_base import (
    FloatArray,
    NaiveBayes,
    check_alpha,
    check_counts,
    check_frequency,
    class_log_prior,
    known_tokens,
    require_trained,
)
from mailweir.model.types import ClassCounts, TokenCounts, Vocabulary


@dataclass(frozen=True)
class BernoulliNB(NaiveBayes):
    """Bernoulli naive Bayes: every vocabulary token is a yes/no feature of the message.

    With ``n_tc`` trained messages of class c containing token t and ``N_c`` trained messages
    of class c, ``p(t|c) = (n_tc + alpha) / (N_c + 2 alpha)`` and

        log P(c|d) + const = log P(c) + sum_{t in V} log(1 - p(t|c))
                                      + sum_{t in d} [log p(t|c) - log(1 - p(t|c))].

    The absent-token sum runs over the whole vocabulary; tokens sharing a count k share a
    term, so it costs O(K) from ``vocabulary.count_histogram``:

        sum_{t in V} log(1 - p(t|c)) = sum_k hist[c, k] log(N_c + alpha - k) - V log(N_c + 2 alpha).

    Unknown tokens (zero counts in both classes) are not in the vocabulary: they have no
    absent-token term in that sum, so they get no present-token term either and are ignored.
    This equals scikit-learn's ``BernoulliNB`` fitted on a presence matrix whose columns are
    the vocabulary.

    Parameters
    ----------
    alpha : float
        Lidstone smoothing, > 0; 1.0 is Laplace's add-one.

    References
    ----------
    C. D. Manning, P. Raghavan, H. Schütze, *Introduction to Information Retrieval*,
    Cambridge University Press, 2008, section 13.3.
    """

    name: ClassVar[str] = "bernoulli"
    alpha: float = 1.0

    def __post_init__(self) -> None:
        check_alpha(self.name, self.alpha)

    def _log_probabilities(
        self, counts: npt.NDArray[np.int64], class_count: npt.NDArray[np.int64]
    ) -> tuple[FloatArray, FloatArray]:
        """Shapes (n, 2): log p(t|c) and log(1 - p(t|c)) for the given rows."""
        if np.any(counts > class_count):
            raise ValueError(
                "bernoulli: a token is counted in more messages than were trained "
                f"(class_count={class_count.tolist()})"
            )
        log_denominator = np.log(class_count + 2 * self.alpha)
        log_present = np.log(counts + self.alpha) - log_denominator
        # 1 - p = (N_c + alpha - n_tc) / (N_c + 2 alpha), formed exactly before the log.
        log_absent = np.log(class_count + self.alpha - counts) - log_denominator
        return log_present, log_absent

    def _absent_log_likelihood(
        self, class_count: npt.NDArray[np.int64], vocabulary: Vocabulary
    ) -> FloatArray:
        """Shape (2,): sum over the whole vocabulary of log(1 - p(t|c))."""
        histogram = np.asarray(vocabulary.count_histogram)
        if histogram.ndim != 2 or histogram.shape[0] != 2:
            raise ValueError(f"count_histogram must have shape (2, K), got {histogram.shape}")
        if np.any(histogram.sum(axis=1) != vocabulary.size):
            raise ValueError(
                "count_histogram rows must each sum to the vocabulary size "
                f"{vocabulary.size}, got {histogram.sum(axis=1).tolist()}"
            )
        total = np.empty(2)
        for c in range(2):
            ks = np.flatnonzero(histogram[c])
            if ks.size and ks[-1] > class_count[c]:
                raise ValueError(
                    f"count_histogram has a token count {ks[-1]} above class_count[{c}]="
                    f"{class_count[c]}"
                )
            terms = histogram[c, ks] * np.log(class_count[c] + self.alpha - ks)
            total[c] = terms.sum() - vocabulary.size * np.log(class_count[c] + 2 * self.alpha)
        return total

    def joint_log_likelihood(
        self,
        token_count: TokenCounts,
        class_count: ClassCounts,
        vocabulary: Vocabulary,
        frequency: npt.ArrayLike | None = None,
    ) -> FloatArray:
        """Shape (2,): log P(c) + log P(d|c) over the whole vocabulary; see the class docs."""
        counts, classes = check_counts(token_count, class_count)
        require_trained(classes, self.name)
        present = (check_frequency(frequency, len(counts)) > 0) & known_tokens(counts)
        log_present, log_absent = self._log_probabilities(counts[present], classes)
        jll: FloatArray = (
            class_log_prior(classes)
            + self._absent_log_likelihood(classes, vocabulary)
            + (log_present - log_absent).sum(axis=0)
        )
        return jll

    def token_weights(
        self, token_count: TokenCounts, class_count: ClassCounts, vocabulary: Vocabulary
    ) -> FloatArray:
        """Shape (n,): logit p(t|spam) - logit p(t|ham); 0 for unknown tokens.

        These are exactly the present-token terms of the log-odds, so the posterior log-odds
        equal the empty message's log-odds plus the sum of the weights.
        """
        counts, classes = check_counts(token_count, class_count)
        require_trained(classes, self.name)
        known = known_tokens(counts)
        log_present, log_absent = self._log_probabilities(counts[known], classes)
        logit = log_present - log_absent
        weights = np.zeros(len(counts))
        weights[known] = logit[:, 1] - logit[:, 0]
        return weights
