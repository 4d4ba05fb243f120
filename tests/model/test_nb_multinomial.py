"""Multinomial naive Bayes on Boolean features against scikit-learn (test-only oracle)."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.naive_bayes import MultinomialNB as OracleMultinomialNB

from mailweir.model.nb import MultinomialBooleanNB
from mailweir.model.types import HAM, SPAM, Vocabulary


def _presence_data(seed: int, docs: int = 40, features: int = 30) -> tuple[np.ndarray, np.ndarray]:
    """A seeded 0/1 matrix and labels over the vocabulary (never-seen columns dropped).

    scikit-learn fixes the feature set at fit; ours is the vocabulary, the tokens with a
    count.  Building the matrix over the vocabulary makes both use the same V.
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
def test_multinomial_matches_sklearn_on_presence_matrix(seed: int) -> None:
    # Oracle: scikit-learn MultinomialNB(alpha=1.0) fitted on the same 0/1 matrix.
    matrix, labels = _presence_data(seed)
    oracle = OracleMultinomialNB(alpha=1.0).fit(matrix, labels)
    counts, class_count, vocabulary = _model(matrix, labels)
    rng = np.random.default_rng(seed + 100)
    queries = np.vstack([matrix, (rng.random((10, matrix.shape[1])) < 0.3).astype(np.int64)])
    expected_jll = oracle.predict_joint_log_proba(queries)
    expected_proba = oracle.predict_proba(queries)
    model = MultinomialBooleanNB(alpha=1.0)
    for query, jll, proba in zip(queries, expected_jll, expected_proba, strict=True):
        present = query.astype(bool)
        ours = model.joint_log_likelihood(counts[present], class_count, vocabulary)
        np.testing.assert_allclose(ours, jll, rtol=1e-12)
        probability = model.spam_probability(counts[present], class_count, vocabulary)
        assert probability == pytest.approx(proba[SPAM], rel=1e-9, abs=1e-12)


def test_multinomial_matches_sklearn_with_term_frequencies() -> None:
    # Oracle: MultinomialNB on a count matrix; our frequency argument carries the counts.
    rng = np.random.default_rng(9)
    matrix = rng.poisson(0.6, (30, 20)).astype(np.int64)
    labels = rng.integers(0, 2, 30)
    labels[:2] = [HAM, SPAM]
    matrix = matrix[:, matrix.any(axis=0)]
    oracle = OracleMultinomialNB(alpha=0.5).fit(matrix, labels)
    counts, class_count, vocabulary = _model(matrix, labels)
    for row, jll in zip(matrix, oracle.predict_joint_log_proba(matrix), strict=True):
        present = row > 0
        ours = MultinomialBooleanNB(alpha=0.5).joint_log_likelihood(
            counts[present], class_count, vocabulary, frequency=row[present]
        )
        np.testing.assert_allclose(ours, jll, rtol=1e-12)


def test_multinomial_ignores_unknown_tokens() -> None:
    # Convention: V is the trained vocabulary; a token with no counts is dropped, not added.
    matrix, labels = _presence_data(seed=3)
    counts, class_count, vocabulary = _model(matrix, labels)
    message = counts[:5]
    with_unknown = np.vstack([np.zeros((2, 2), dtype=np.int64), message])
    model = MultinomialBooleanNB()
    np.testing.assert_array_equal(
        model.joint_log_likelihood(with_unknown, class_count, vocabulary),
        model.joint_log_likelihood(message, class_count, vocabulary),
    )
    assert model.token_weights(with_unknown, class_count, vocabulary)[:2].tolist() == [0, 0]


def test_multinomial_log_odds_are_prior_plus_weights() -> None:
    matrix, labels = _presence_data(seed=5)
    counts, class_count, vocabulary = _model(matrix, labels)
    model = MultinomialBooleanNB()
    message = counts[1::3]
    jll = model.joint_log_likelihood(message, class_count, vocabulary)
    weights = model.token_weights(message, class_count, vocabulary)
    prior_log_odds = np.log(class_count[SPAM] / class_count[HAM])
    assert jll[SPAM] - jll[HAM] == pytest.approx(prior_log_odds + weights.sum())


@pytest.mark.parametrize("alpha", [0.0, -0.5, float("nan")])
def test_multinomial_rejects_bad_alpha(alpha: float) -> None:
    with pytest.raises(ValueError, match="multinomial: alpha"):
        MultinomialBooleanNB(alpha=alpha)
