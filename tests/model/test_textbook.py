"""Published worked examples, recomputed from the training data with exact fractions.

Source: C. D. Manning, P. Raghavan, H. Schütze, Introduction to Information Retrieval,
Cambridge University Press, 2008, chapter 13, Example 13.1 (multinomial) and Example 13.2
(Bernoulli).  Data and rounded results below are from memory of that book.

Training documents (class "China" is our spam column, the other class our ham column):
    d1 "Chinese Beijing Chinese"       China
    d2 "Chinese Chinese Shanghai"      China
    d3 "Chinese Macao"                 China
    d4 "Tokyo Japan Chinese"           not China
Test document d5 "Chinese Chinese Chinese Tokyo Japan".
"""

from __future__ import annotations

import math
from collections import Counter
from fractions import Fraction

import numpy as np
import pytest

from mailweir.model.nb import BernoulliNB, MultinomialBooleanNB
from mailweir.model.types import HAM, SPAM, Vocabulary

TRAINING = [
    ("Chinese Beijing Chinese", SPAM),
    ("Chinese Chinese Shanghai", SPAM),
    ("Chinese Macao", SPAM),
    ("Tokyo Japan Chinese", HAM),
]
TEST_DOCUMENT = "Chinese Chinese Chinese Tokyo Japan"
TERMS = ["Chinese", "Beijing", "Shanghai", "Macao", "Tokyo", "Japan"]


def _counts(presence: bool) -> np.ndarray:
    """Shape (6, 2): per term, ham and spam occurrences (or documents, if presence)."""
    counts = np.zeros((len(TERMS), 2), dtype=np.int64)
    for text, label in TRAINING:
        seen = Counter(text.split())
        for term, times in seen.items():
            counts[TERMS.index(term), label] += 1 if presence else times
    return counts


CLASS_COUNT = np.array([1, 3], dtype=np.int64)
TEST_TERMS = Counter(TEST_DOCUMENT.split())  # Chinese 3, Tokyo 1, Japan 1
TEST_ROWS = [TERMS.index(term) for term in TEST_TERMS]
TEST_FREQUENCY = np.array([TEST_TERMS[TERMS[i]] for i in TEST_ROWS], dtype=np.float64)


def _multinomial_fractions() -> tuple[Fraction, Fraction]:
    # Book's derivation: V = 6; China has 8 term occurrences, not-China 3; add-one smoothing.
    # P(Chinese|c) = (5+1)/(8+6) = 3/7, P(Tokyo|c) = P(Japan|c) = (0+1)/(8+6) = 1/14,
    # P(Chinese|~c) = P(Tokyo|~c) = P(Japan|~c) = (1+1)/(3+6) = 2/9.
    china = Fraction(3, 4) * Fraction(5 + 1, 8 + 6) ** 3 * Fraction(0 + 1, 8 + 6) ** 2
    other = Fraction(1, 4) * Fraction(1 + 1, 3 + 6) ** 3 * Fraction(1 + 1, 3 + 6) ** 2
    return china, other


def _bernoulli_fractions() -> tuple[Fraction, Fraction]:
    # Book's derivation: P(t|c) = (documents of c with t + 1) / (documents of c + 2).
    # China (3 docs): Chinese 4/5, Tokyo = Japan 1/5, Beijing = Shanghai = Macao 2/5 (absent).
    # not China (1 doc): Chinese = Tokyo = Japan 2/3, Beijing = Shanghai = Macao 1/3 (absent).
    china = (
        Fraction(3, 4)
        * Fraction(3 + 1, 3 + 2)
        * Fraction(0 + 1, 3 + 2) ** 2
        * (1 - Fraction(1 + 1, 3 + 2)) ** 3
    )
    other = Fraction(1, 4) * Fraction(1 + 1, 1 + 2) ** 3 * (1 - Fraction(0 + 1, 1 + 2)) ** 3
    return china, other


def test_textbook_multinomial_joint_likelihood_matches_example_13_1() -> None:
    counts = _counts(presence=False)
    vocabulary = Vocabulary.from_token_counts(counts)
    assert vocabulary.size == 6
    assert vocabulary.token_total.tolist() == [3, 8]
    jll = MultinomialBooleanNB(alpha=1.0).joint_log_likelihood(
        counts[TEST_ROWS], CLASS_COUNT, vocabulary, frequency=TEST_FREQUENCY
    )
    china, other = _multinomial_fractions()
    assert jll[SPAM] == pytest.approx(math.log(china), rel=1e-12)
    assert jll[HAM] == pytest.approx(math.log(other), rel=1e-12)
    # The book's rounded figures (from memory): about 0.0003 and 0.0001.
    assert round(float(china), 4) == 0.0003
    assert round(float(other), 4) == 0.0001


def test_textbook_multinomial_posterior_is_exact_ratio() -> None:
    counts = _counts(presence=False)
    probability = MultinomialBooleanNB().spam_probability(
        counts[TEST_ROWS], CLASS_COUNT, Vocabulary.from_token_counts(counts), TEST_FREQUENCY
    )
    china, other = _multinomial_fractions()
    assert probability == pytest.approx(float(china / (china + other)), rel=1e-12)
    assert probability > 0.5  # the book assigns d5 to China


def test_textbook_bernoulli_joint_likelihood_matches_example_13_2() -> None:
    counts = _counts(presence=True)
    jll = BernoulliNB(alpha=1.0).joint_log_likelihood(
        counts[TEST_ROWS], CLASS_COUNT, Vocabulary.from_token_counts(counts)
    )
    china, other = _bernoulli_fractions()
    assert jll[SPAM] == pytest.approx(math.log(china), rel=1e-12)
    assert jll[HAM] == pytest.approx(math.log(other), rel=1e-12)
    # The book's rounded figures (from memory): about 0.005 and 0.022.
    assert round(float(china), 3) == 0.005
    assert round(float(other), 3) == 0.022


def test_textbook_bernoulli_ignores_term_frequency() -> None:
    # Example 13.2's point: the Bernoulli model sees presence only, so d5 goes to not-China.
    counts = _counts(presence=True)
    vocabulary = Vocabulary.from_token_counts(counts)
    model = BernoulliNB()
    once = model.spam_probability(counts[TEST_ROWS], CLASS_COUNT, vocabulary)
    repeated = model.spam_probability(counts[TEST_ROWS], CLASS_COUNT, vocabulary, TEST_FREQUENCY)
    china, other = _bernoulli_fractions()
    assert once == repeated == pytest.approx(float(china / (china + other)), rel=1e-12)
    assert once < 0.5


def test_textbook_multinomial_evidence_names_the_deciding_terms() -> None:
    counts = _counts(presence=False)
    hashes = np.array(TEST_ROWS, dtype=np.int64)
    score = MultinomialBooleanNB().score(
        hashes, counts[TEST_ROWS], CLASS_COUNT, Vocabulary.from_token_counts(counts)
    )
    by_term = {TERMS[e.token_hash]: e.weight for e in score.evidence}
    # log(3/7) - log(2/9) toward China; log(1/14) - log(2/9) toward not-China.
    assert by_term["Chinese"] == pytest.approx(math.log(Fraction(3, 7) / Fraction(2, 9)))
    assert by_term["Tokyo"] == pytest.approx(math.log(Fraction(1, 14) / Fraction(2, 9)))
    assert [TERMS[e.token_hash] for e in score.evidence] == [
        "Chinese",
        "Tokyo",
        "Japan",
    ]  # tie by hash
