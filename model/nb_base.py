"""The shared frame of every scoring method: inputs, the posterior step and the evidence list.

Each method overrides two kernels, :meth:`NaiveBayes.joint_log_likelihood` (one message's
class scores) and :meth:`NaiveBayes.token_weights` (each token's signed share of the log-odds);
:meth:`NaiveBayes.score` is built on them here, as scikit-learn's ``_BaseNB`` builds ``predict*``
on ``_joint_log_likelihood``.

Conventions shared by all methods
---------------------------------
- A token with zero counts in both classes is unknown to the model: it is not in the
  vocabulary, so it contributes nothing (Robinson-Fisher with ``assumed != 0.5`` is the one
  documented exception, see :class:`~mailweir.model.fisher.RobinsonFisher`).
- A model with no trained message in either class is untrained: ``score`` answers 0.5 and no
  evidence, and the kernels refuse with ``ValueError`` because no posterior is defined.
"""

from __future__ import annotations

import math
from abc import ABC, abstractmethod
from bisect import bisect_left, bisect_right
from dataclasses import dataclass, fields
from itertools import chain, repeat
from operator import itemgetter
from typing import ClassVar, NamedTuple

import numpy as np
import numpy.typing as npt

from mailweir.model.types import HAM, SPAM, ClassCounts, TokenCounts, TokenHashes, Vocabulary

FloatArray = npt.NDArray[np.float64]

UNTRAINED_PROBABILITY = 0.5

# Up to this many weights, evidence is ranked by one numpy sort and the rest in plain Python
# (numpy's per-call cost is far above the work).
_FEW_WEIGHTS = 64
_WEIGHT_OF_PAIR = itemgetter(1)  # of (hash, weight)


class Evidence(NamedTuple):
    """One token's signed share of the verdict.

    A named tuple rather than a frozen dataclass: a judge makes eight for every message, and
    a frozen dataclass's ``__init__`` sets each field through ``object.__setattr__`` (42
    against 29 thousand instructions for eight).

    Attributes
    ----------
    token_hash : int
        The token's 64-bit hash (signed, as stored).
    weight : float
        Contribution to the log-odds of spam, natural log; > 0 pushes toward spam.
    """

    token_hash: int
    weight: float


@dataclass(frozen=True)
class Score:
    """One message's verdict from a scoring method.

    Attributes
    ----------
    spam_probability : float
        In [0, 1]; 0.5 when the model is untrained.
    evidence : tuple of Evidence
        Up to ``n_evidence`` tokens pushing toward spam, then up to ``n_evidence`` pushing
        toward ham, each side sorted by ``abs(weight)`` descending (ties by hash).
    """

    spam_probability: float
    evidence: tuple[Evidence, ...]


def is_trained(class_count: ClassCounts) -> bool:
    """True when both classes have at least one trained message."""
    # Compared as Python numbers: an array reduction costs more than the two comparisons.
    return all(count > 0 for count in np.asarray(class_count).ravel().tolist())


def count_arrays(
    token_count: TokenCounts, class_count: ClassCounts
) -> tuple[npt.NDArray[np.integer], npt.NDArray[np.integer]]:
    """One message's counts as arrays, their dtypes and shapes checked (not yet their values).

    `check_counts` goes on to check the values; a method that scans the counts anyway may
    check them in its own scan and fall back to `check_counts` for the error.
    """
    counts = np.asarray(token_count)
    classes = np.asarray(class_count)
    for label, array in (("token_count", counts), ("class_count", classes)):
        if array.size and array.dtype.kind not in "iu":  # np.integer's kinds, checked cheaply
            raise ValueError(f"{label} must hold integers, got dtype {array.dtype}")
    if counts.ndim != 2 or counts.shape[1] != 2:
        raise ValueError(f"token_count must have shape (n, 2), got {counts.shape}")
    if classes.shape != (2,):
        raise ValueError(f"class_count must have shape (2,), got {classes.shape}")
    return counts, classes


def check_counts(
    token_count: TokenCounts, class_count: ClassCounts
) -> tuple[npt.NDArray[np.int64], npt.NDArray[np.int64]]:
    """Validate one message's counts; return them as int64 arrays of shape (n, 2) and (2,)."""
    counts, classes = count_arrays(token_count, class_count)
    if counts.size and counts.min() < 0:
        raise ValueError(f"token_count must be non-negative, got minimum {counts.min()}")
    if min(classes.tolist()) < 0:
        raise ValueError(f"class_count must be non-negative, got {classes.tolist()}")
    return counts.astype(np.int64, copy=False), classes.astype(np.int64, copy=False)


def check_score_inputs(
    token_hashes: TokenHashes, n_tokens: int, n_evidence: int
) -> npt.NDArray[np.integer]:
    """The hashes of ``score``, checked against the number of tokens, and ``n_evidence``."""
    hashes = np.asarray(token_hashes)
    if hashes.shape != (n_tokens,):
        raise ValueError(
            f"token_hashes must have shape ({n_tokens},) to match token_count, got {hashes.shape}"
        )
    if n_evidence < 0:
        raise ValueError(f"n_evidence must be >= 0, got {n_evidence}")
    return hashes


def check_alpha(method: str, alpha: float) -> None:
    """Lidstone smoothing must be a finite positive number (1.0 is Laplace's add-one)."""
    if not alpha > 0 or not np.isfinite(alpha):
        raise ValueError(f"{method}: alpha must be finite and > 0, got {alpha}")


def check_frequency(frequency: npt.ArrayLike | None, n_tokens: int) -> FloatArray:
    """Validate term frequencies of shape (n,); ``None`` means every token once."""
    if frequency is None:
        return np.ones(n_tokens)
    values = np.asarray(frequency, dtype=np.float64)
    if values.shape != (n_tokens,):
        raise ValueError(f"frequency must have shape ({n_tokens},), got {values.shape}")
    if not np.all(np.isfinite(values)) or (values.size and values.min() < 0):
        raise ValueError("frequency must be finite and non-negative")
    return values


def require_trained(class_count: npt.NDArray[np.int64], method: str) -> None:
    """Refuse kernels on an untrained model, where no posterior is defined."""
    if not is_trained(class_count):
        raise ValueError(
            f"{method}: untrained model (class_count={class_count.tolist()}); "
            "both classes need a trained message before a likelihood is defined"
        )


def class_log_prior(class_count: npt.NDArray[np.int64]) -> FloatArray:
    """Shape (2,): log P(c) estimated from message counts, as scikit-learn's fit_prior."""
    counts = class_count.astype(np.float64)
    prior: FloatArray = np.log(counts) - np.log(counts.sum())
    return prior


def known_tokens(token_count: npt.NDArray[np.int64]) -> npt.NDArray[np.bool_]:
    """Shape (n,): tokens with a count in either class, i.e. members of the vocabulary."""
    return np.asarray((token_count > 0).any(axis=1))


def posterior_spam(joint_log_likelihood: FloatArray) -> float:
    """P(spam | message) = exp(jll[spam] - logsumexp(jll)), stable for any magnitude."""
    log_total = np.logaddexp(joint_log_likelihood[HAM], joint_log_likelihood[SPAM])
    return float(np.exp(joint_log_likelihood[SPAM] - log_total))


def strongest_evidence(
    token_hashes: TokenHashes, weights: FloatArray, n_evidence: int
) -> tuple[Evidence, ...]:
    """Up to ``n_evidence`` tokens each way, spam side first, each by ``abs(weight)`` desc."""
    if n_evidence < 0:
        raise ValueError(f"n_evidence must be >= 0, got {n_evidence}")
    hashes = np.asarray(token_hashes, dtype=np.int64)
    if n_evidence == 0:
        return ()
    if len(weights) <= max(_FEW_WEIGHTS, 2 * n_evidence):
        return _few_strongest(hashes, weights, n_evidence)
    # A bigram message uses hundreds of tokens, and ranking them all cost more than the rest
    # of scoring it.  One partition finds the n-th weakest and n-th strongest weight; every
    # weight at least that strong (ties too) is a candidate, and only the candidates are
    # ranked.  NaN partitions last, among the strongest n, where it would hide a weight that
    # belongs in: then (never from a scorer's own weights) every weight is ranked.
    top = len(weights) - n_evidence
    bounds = np.partition(weights, (n_evidence - 1, top))
    if math.isnan(np.add.reduce(bounds[top:])):  # NaN, or inf and -inf: ranked in full
        return _few_strongest(hashes, weights, n_evidence)
    ham_bound, spam_bound = bounds[n_evidence - 1], bounds[top]
    spam = weights >= spam_bound if spam_bound > 0 else weights > 0
    ham = weights <= ham_bound if ham_bound < 0 else weights < 0
    candidates = np.flatnonzero(spam | ham)
    return _few_strongest(hashes[candidates], weights[candidates], n_evidence)


def _few_strongest(
    hashes: npt.NDArray[np.int64], weights: FloatArray, n_evidence: int
) -> tuple[Evidence, ...]:
    """`strongest_evidence` of a few weights: one numpy sort, the rest on Python lists.

    Sorted by weight then hash, the ham side is the head, ties in hash order as the full
    ranking breaks them.  The spam side is the tail read backwards, which would put ties in
    reverse hash order: from the first pair tied with the n-th strongest, a stable sort on
    the weight alone puts them back.
    """
    order = np.lexsort((hashes, weights))  # NaN sorts last
    ranked = weights[order].astype(np.float64, copy=False).tolist()
    ranked_hashes = hashes[order].tolist()
    while ranked and ranked[-1] != ranked[-1]:  # NaN is never listed
        ranked.pop()
        ranked_hashes.pop()
    ham_count = min(n_evidence, bisect_left(ranked, 0.0))  # zero weights are never listed
    nth_spam = max(bisect_right(ranked, 0.0), len(ranked) - n_evidence)
    spam: list[tuple[int, float]] = []
    if nth_spam < len(ranked):
        start = bisect_left(ranked, ranked[nth_spam])
        tail = zip(ranked_hashes[start:], ranked[start:], strict=True)
        # Stable, even reversed: ties keep their hash order.
        spam = sorted(tail, key=_WEIGHT_OF_PAIR, reverse=True)[:n_evidence]
    ham = zip(ranked_hashes[:ham_count], ranked[:ham_count], strict=True)
    # tuple.__new__ makes each Evidence without the named tuple's Python-level __new__.
    return tuple(map(tuple.__new__, repeat(Evidence), chain(spam, ham)))


class NaiveBayes(ABC):
    """Base of every scoring method: ``score`` built on two kernels.

    Subclasses are frozen dataclasses whose fields are the method's parameters, and set the
    class attribute ``name`` (the key in :data:`mailweir.model.nb.METHODS`).
    """

    name: ClassVar[str]
    uses_vocabulary: ClassVar[bool] = True
    """False when the vocabulary summary never changes a result (callers may skip making it)."""

    @abstractmethod
    def joint_log_likelihood(
        self,
        token_count: TokenCounts,
        class_count: ClassCounts,
        vocabulary: Vocabulary,
        frequency: npt.ArrayLike | None = None,
    ) -> FloatArray:
        """Shape (2,): log P(c) + log P(d | c) for ham and spam.

        Parameters
        ----------
        token_count : TokenCounts, shape (n, 2)
            Trained ham and spam messages containing each of the message's tokens.
        class_count : ClassCounts, shape (2,)
            Trained ham and spam messages.
        vocabulary : Vocabulary
            Summary of the whole model.
        frequency : array_like of float, shape (n,), optional
            Term frequencies of the message's tokens (default: each once).  Only the
            multinomial model counts repeats; presence models treat ``frequency > 0`` as
            present and ``frequency == 0`` as absent.

        Raises
        ------
        ValueError
            On malformed inputs, or when either class has no trained message.
        """

    @abstractmethod
    def token_weights(
        self, token_count: TokenCounts, class_count: ClassCounts, vocabulary: Vocabulary
    ) -> FloatArray:
        """Shape (n,): each token's signed log-odds contribution (> 0 toward spam)."""

    def spam_probability(
        self,
        token_count: TokenCounts,
        class_count: ClassCounts,
        vocabulary: Vocabulary,
        frequency: npt.ArrayLike | None = None,
    ) -> float:
        """P(spam | message) in [0, 1]; 0.5 when the model is untrained."""
        _, classes = check_counts(token_count, class_count)
        if not is_trained(classes):
            return UNTRAINED_PROBABILITY
        return posterior_spam(
            self.joint_log_likelihood(token_count, class_count, vocabulary, frequency)
        )

    def score(
        self,
        token_hashes: TokenHashes,
        token_count: TokenCounts,
        class_count: ClassCounts,
        vocabulary: Vocabulary,
        n_evidence: int = 8,
    ) -> Score:
        """Score one message: spam probability and the strongest evidence both ways.

        Parameters
        ----------
        token_hashes : TokenHashes, shape (n,)
            The message's unique token hashes, aligned with ``token_count`` rows.
        token_count : TokenCounts, shape (n, 2)
        class_count : ClassCounts, shape (2,)
        vocabulary : Vocabulary
        n_evidence : int
            Most tokens listed per direction.

        Returns
        -------
        Score
            Probability 0.5 and no evidence when the model is untrained.
        """
        counts, classes = check_counts(token_count, class_count)
        hashes = check_score_inputs(token_hashes, len(counts), n_evidence)
        if not is_trained(classes):
            return Score(UNTRAINED_PROBABILITY, ())
        probability, weights = self.probability_and_weights(counts, classes, vocabulary)
        return Score(probability, strongest_evidence(hashes, weights, n_evidence))

    def probability_and_weights(
        self, token_count: TokenCounts, class_count: ClassCounts, vocabulary: Vocabulary
    ) -> tuple[float, FloatArray]:
        """P(spam | message) and ``token_weights``; a method may share work between them."""
        jll = self.joint_log_likelihood(token_count, class_count, vocabulary)
        return posterior_spam(jll), self.token_weights(token_count, class_count, vocabulary)

    @classmethod
    def parameter_names(cls) -> tuple[str, ...]:
        """The method's parameter names, as accepted by ``make_scorer``."""
        return tuple(f.name for f in fields(cls))  # type: ignore[arg-type]
