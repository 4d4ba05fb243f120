"""Bernoulli naive Bayes against scikit-learn (test-only oracle) and its own algebra."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.naive_bayes import BernoulliNB as OracleBernoulliNB

from mailweir.model.nb import BernoulliNB
from mailweir.model.types import HAM, SPAM, Vocabulary


def _presence_data(seed: int, docs: int = 40, features: int = 30) -> tuple[np.ndarray, np.ndarray]:
    """A seeded 0/1 matrix and labels; columns never seen in training are dropped.

    Our vocabulary holds only tokens with a count, so the oracle's feature set must be the
    same: an all-zero column would add an absent-token term that we, by design, never see.
    """
    rng = np.random.default_rng(seed)
    matrix = (rng.random((docs, features)) < 0.3).astype(np.int64)
    labels = rng.integers(0, 2, docs)
    labels[:2] = [HAM, SPAM]
    return matrix[:, matrix.any(axis=0)], labels


def _model(matrix: np.ndarray, labels: np.ndarray) -> tuple[np.ndarray, np.ndarray, Vocabulary]:
    counts = np.stack([matrix[labels == HAM].sum(axis=0), matrix[labels == SPAM].sum(axis=0)], 1)
    class_count = np.bincount(labels, minlength=2).astype(np.int64)
    return counts, class_count, Vocabulary.from_token_counts(counts)


@pytest.mark.parametrize("seed", range(8))
def test_bernoulli_matches_sklearn_joint_log_likelihood(seed: int) -> None:
    # Oracle: scikit-learn BernoulliNB(alpha=1.0) on the same presence matrix.
    matrix, labels = _presence_data(seed)
    oracle = OracleBernoulliNB(alpha=1.0).fit(matrix, labels)
    counts, class_count, vocabulary = _model(matrix, labels)
    rng = np.random.default_rng(seed + 100)
    queries = np.vstack([matrix, (rng.random((10, matrix.shape[1])) < 0.3).astype(np.int64)])
    queries[-1] = 0  # an empty message: only the prior and the absent-token terms
    expected_jll = oracle.predict_joint_log_proba(queries)
    expected_proba = oracle.predict_proba(queries)
    model = BernoulliNB(alpha=1.0)
    for query, jll, proba in zip(queries, expected_jll, expected_proba, strict=True):
        present = query.astype(bool)
        ours = model.joint_log_likelihood(counts[present], class_count, vocabulary)
        np.testing.assert_allclose(ours, jll, rtol=1e-12)
        probability = model.spam_probability(counts[present], class_count, vocabulary)
        assert probability == pytest.approx(proba[SPAM], rel=1e-9, abs=1e-12)


@pytest.mark.parametrize("alpha", [0.01, 0.5, 2.0])
def test_bernoulli_matches_sklearn_with_lidstone_alpha(alpha: float) -> None:
    matrix, labels = _presence_data(seed=42)
    oracle = OracleBernoulliNB(alpha=alpha).fit(matrix, labels)
    counts, class_count, vocabulary = _model(matrix, labels)
    ours = np.array(
        [
            BernoulliNB(alpha=alpha).joint_log_likelihood(
                counts[row.astype(bool)], class_count, vocabulary
            )
            for row in matrix
        ]
    )
    np.testing.assert_allclose(ours, oracle.predict_joint_log_proba(matrix), rtol=1e-12)


def test_bernoulli_ignores_unknown_tokens() -> None:
    # Convention: a token with no counts is outside the vocabulary and contributes nothing.
    matrix, labels = _presence_data(seed=3)
    counts, class_count, vocabulary = _model(matrix, labels)
    message = counts[:5]
    with_unknown = np.vstack([message, np.zeros((3, 2), dtype=np.int64)])
    model = BernoulliNB()
    np.testing.assert_array_equal(
        model.joint_log_likelihood(with_unknown, class_count, vocabulary),
        model.joint_log_likelihood(message, class_count, vocabulary),
    )
    assert model.token_weights(with_unknown, class_count, vocabulary)[5:].tolist() == [0, 0, 0]


def test_bernoulli_log_odds_are_empty_message_plus_weights() -> None:
    matrix, labels = _presence_data(seed=5)
    counts, class_count, vocabulary = _model(matrix, labels)
    model = BernoulliNB()
    message = counts[::2]
    empty = model.joint_log_likelihood(counts[:0], class_count, vocabulary)
    full = model.joint_log_likelihood(message, class_count, vocabulary)
    weights = model.token_weights(message, class_count, vocabulary)
    assert full[SPAM] - full[HAM] == pytest.approx(empty[SPAM] - empty[HAM] + weights.sum())


def test_bernoulli_zero_frequency_means_absent() -> None:
    matrix, labels = _presence_data(seed=6)
    counts, class_count, vocabulary = _model(matrix, labels)
    model = BernoulliNB()
    frequency = np.array([2.0, 0.0, 1.0, 0.0])
    np.testing.assert_allclose(
        model.joint_log_likelihood(counts[:4], class_count, vocabulary, frequency),
        model.joint_log_likelihood(counts[[0, 2]], class_count, vocabulary),
        rtol=1e-15,
    )


def test_bernoulli_rejects_count_above_class_count() -> None:
    counts = np.array([[1, 4]], dtype=np.int64)
    with pytest.raises(ValueError, match="more messages than were trained"):
        BernoulliNB().joint_log_likelihood(
            counts, np.array([2, 3]), Vocabulary.from_token_counts(counts)
        )


def test_bernoulli_rejects_inconsistent_histogram() -> None:
    counts = np.array([[1, 2]], dtype=np.int64)
    vocabulary = Vocabulary(
        size=5, token_total=np.array([1, 2]), count_histogram=np.ones((2, 3), dtype=np.int64)
    )
    with pytest.raises(ValueError, match="sum to the vocabulary size 5"):
        BernoulliNB().joint_log_likelihood(counts, np.array([3, 3]), vocabulary)


@pytest.mark.parametrize("alpha", [0.0, -1.0, float("nan"), float("inf")])
def test_bernoulli_rejects_bad_alpha(alpha: float) -> None:
    with pytest.raises(ValueError, match="bernoulli: alpha"):
        BernoulliNB(alpha=alpha)
