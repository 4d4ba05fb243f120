"""Multinomial naive Bayes over Boolean (presence) features, with Lidstone smoothing."""

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
class MultinomialBooleanNB(NaiveBayes):
    """Multinomial naive Bayes on Boolean features ("binarized" multinomial).

    Each message is a bag of its distinct tokens, so ``n_tc`` (messages of class c containing
    t) is the token's occurrence count and ``T_c = vocabulary.token_total[c]`` its class total:

        p(t|c) = (n_tc + alpha) / (T_c + alpha V),
        log P(c|d) + const = log P(c) + sum_{t in d} f_t log p(t|c),

    with ``f_t = 1`` in production (``frequency`` lets a textbook example pass term counts,
    then ``token_count`` and ``token_total`` must hold term counts too).

    Conventions: the feature set is the vocabulary and is fixed at scoring time, as in
    scikit-learn, where the columns are fixed at fit.  ``V = vocabulary.size`` counts only
    tokens seen in training; unknown tokens (zero counts in both classes) are ignored rather
    than added to V, as the textbook's scoring procedure keeps only vocabulary tokens
    (Manning et al., figure 13.2, from memory).
    Counting them would give each one ``log(alpha / (T_c + alpha V))``, a penalty that is
    larger for the class with more training text and so pushes every new word toward the
    smaller class.

    Parameters
    ----------
    alpha : float
        Lidstone smoothing, > 0; 1.0 is Laplace's add-one.

    References
    ----------
    C. D. Manning, P. Raghavan, H. Schütze, *Introduction to Information Retrieval*,
    Cambridge University Press, 2008, section 13.2.
    """

    name: ClassVar[str] = "multinomial"
    alpha: float = 1.0

    def __post_init__(self) -> None:
        check_alpha(self.name, self.alpha)

    def _log_probabilities(
        self, counts: npt.NDArray[np.int64], vocabulary: Vocabulary
    ) -> FloatArray:
        """Shape (n, 2): log p(t|c) for the given (known) rows."""
        token_total = np.asarray(vocabulary.token_total, dtype=np.float64)
        if token_total.shape != (2,) or token_total.min() < 0:
            raise ValueError(
                f"token_total must be two non-negative totals, got {token_total.tolist()}"
            )
        if len(counts) and vocabulary.size < 1:
            raise ValueError("multinomial: known tokens but an empty vocabulary")
        log_denominator = np.log(token_total + self.alpha * vocabulary.size)
        log_prob: FloatArray = np.log(counts + self.alpha) - log_denominator
        return log_prob

    def joint_log_likelihood(
        self,
        token_count: TokenCounts,
        class_count: ClassCounts,
        vocabulary: Vocabulary,
        frequency: npt.ArrayLike | None = None,
    ) -> FloatArray:
        """Shape (2,): log P(c) + sum_t f_t log p(t|c) over the message's known tokens."""
        counts, classes = check_counts(token_count, class_count)
        require_trained(classes, self.name)
        weights = check_frequency(frequency, len(counts))
        known = known_tokens(counts)
        log_prob = self._log_probabilities(counts[known], vocabulary)
        return class_log_prior(classes) + weights[known] @ log_prob

    def token_weights(
        self, token_count: TokenCounts, class_count: ClassCounts, vocabulary: Vocabulary
    ) -> FloatArray:
        """Shape (n,): log p(t|spam) - log p(t|ham); 0 for unknown tokens.

        The posterior log-odds equal the prior log-odds plus the sum of the weights.
        """
        counts, classes = check_counts(token_count, class_count)
        require_trained(classes, self.name)
        known = known_tokens(counts)
        log_prob = self._log_probabilities(counts[known], vocabulary)
        weights = np.zeros(len(counts))
        weights[known] = log_prob[:, 1] - log_prob[:, 0]
        return weights
