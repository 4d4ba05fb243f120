"""Evaluation measures against scikit-learn's metrics (test-only oracle) and by brute force."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.metrics import roc_auc_score
from sklearn.metrics import roc_curve as oracle_roc_curve

from mailweir.model.evaluate import (
    Rates,
    cutoff_for_false_positive_rate,
    error_rates,
    one_minus_auc_percent,
    roc_auc,
    roc_curve,
    spam_caught_at_false_positive_rate,
)


def _tied_scores(seed: int, size: int = 300) -> tuple[np.ndarray, np.ndarray]:
    """Seeded labels (both classes) and scores on a coarse grid, so many scores tie."""
    rng = np.random.default_rng(seed)
    labels = rng.integers(0, 2, size)
    labels[:2] = [0, 1]
    scores = np.round(np.clip(rng.normal(0.35 + 0.3 * labels, 0.2), 0, 1), 1)
    return labels, scores


@pytest.mark.parametrize("seed", range(10))
def test_roc_curve_matches_sklearn_with_ties(seed: int) -> None:
    # Oracle: sklearn.metrics.roc_curve(drop_intermediate=False).
    labels, scores = _tied_scores(seed)
    ours = roc_curve(labels, scores)
    expected = oracle_roc_curve(labels, scores, drop_intermediate=False)
    for got, want in zip(ours, expected, strict=True):
        np.testing.assert_allclose(got, want, rtol=1e-15)


@pytest.mark.parametrize("seed", range(10))
def test_roc_auc_matches_sklearn_with_ties(seed: int) -> None:
    # Oracle: sklearn.metrics.roc_auc_score.
    labels, scores = _tied_scores(seed)
    assert roc_auc(labels, scores) == pytest.approx(roc_auc_score(labels, scores), rel=1e-12)


@settings(max_examples=100, deadline=None)
@given(
    pairs=st.lists(
        st.tuples(st.integers(0, 1), st.sampled_from([0.0, 0.1, 0.5, 0.9, 1.0])),
        min_size=2,
        max_size=40,
    ).filter(lambda p: len({label for label, _ in p}) == 2)
)
def test_roc_auc_is_pairwise_win_rate(pairs: list[tuple[int, float]]) -> None:
    # AUC = P(spam score > ham score) + P(tie) / 2 (Mann-Whitney; common practice, no source).
    labels = np.array([label for label, _ in pairs])
    scores = np.array([score for _, score in pairs])
    spam, ham = scores[labels == 1], scores[labels == 0]
    wins = (spam[:, None] > ham[None, :]).sum() + 0.5 * (spam[:, None] == ham[None, :]).sum()
    assert roc_auc(labels, scores) == pytest.approx(wins / (len(spam) * len(ham)), rel=1e-12)
    assert roc_auc(labels, scores) == pytest.approx(roc_auc_score(labels, scores), rel=1e-12)


def test_one_minus_auc_percent_of_perfect_and_reversed_ranking() -> None:
    labels = np.array([0, 0, 1, 1])
    assert one_minus_auc_percent(labels, [0.1, 0.2, 0.8, 0.9]) == 0.0
    assert one_minus_auc_percent(labels, [0.9, 0.8, 0.2, 0.1]) == 100.0
    assert one_minus_auc_percent(labels, [0.5, 0.5, 0.5, 0.5]) == 50.0


def test_error_rates_count_at_and_above_cutoff_as_spam() -> None:
    labels = np.array([0, 0, 0, 0, 1, 1, 1])
    scores = np.array([0.1, 0.5, 0.7, 0.2, 0.5, 0.9, 0.4])
    assert error_rates(labels, scores, cutoff=0.5) == Rates(
        false_positive_rate=2 / 4,
        false_negative_rate=1 / 3,
        false_positives=2,
        false_negatives=1,
        ham=4,
        spam=3,
    )


def test_error_rates_without_a_class_are_nan() -> None:
    rates = error_rates([1, 1], [0.2, 0.8], cutoff=0.5)
    assert math.isnan(rates.false_positive_rate)
    assert rates.false_negative_rate == 0.5


def _brute_force_cutoff(labels: np.ndarray, scores: np.ndarray, target: float) -> float:
    candidates = sorted({*scores.tolist(), math.inf})
    ham = (labels == 0).sum()
    fine = [c for c in candidates if ((scores >= c) & (labels == 0)).sum() / ham <= target]
    return min(fine)


@pytest.mark.parametrize("seed", range(10))
@pytest.mark.parametrize("target", [0.0, 0.001, 0.01, 0.05, 0.1, 0.5, 1.0])
def test_cutoff_is_lowest_within_false_positive_budget(seed: int, target: float) -> None:
    labels, scores = _tied_scores(seed)
    cutoff = cutoff_for_false_positive_rate(labels, scores, target)
    assert cutoff == _brute_force_cutoff(labels, scores, target)
    assert error_rates(labels, scores, cutoff).false_positive_rate <= target
    lower = scores[scores < cutoff]
    if lower.size:  # the next observed score down would break the budget
        assert error_rates(labels, scores, lower.max()).false_positive_rate > target
    caught = spam_caught_at_false_positive_rate(labels, scores, target)
    rates = error_rates(labels, scores, cutoff)
    assert caught == pytest.approx(1.0 - rates.false_negative_rate, rel=1e-15)


def test_cutoff_is_infinite_when_top_score_is_ham_and_budget_is_zero() -> None:
    labels = np.array([1, 0, 1])
    scores = np.array([0.8, 0.9, 0.3])
    assert cutoff_for_false_positive_rate(labels, scores, 0.0) == math.inf
    assert spam_caught_at_false_positive_rate(labels, scores, 0.0) == 0.0
    assert cutoff_for_false_positive_rate(labels, scores, 1.0) == 0.3


def test_spam_caught_rises_with_the_budget() -> None:
    labels, scores = _tied_scores(seed=3)
    caught = [spam_caught_at_false_positive_rate(labels, scores, t) for t in np.linspace(0, 1, 21)]
    assert caught == sorted(caught)
    assert caught[-1] == 1.0


@pytest.mark.parametrize(
    ("labels", "scores", "message"),
    [
        ([0, 1], [0.1], "equal length"),
        ([0, 2], [0.1, 0.2], "0 \\(ham\\) or 1 \\(spam\\)"),
        ([0, 1], [0.1, math.nan], "nan"),
        ([1, 1], [0.1, 0.2], "one ham and one spam"),
    ],
)
def test_roc_rejects_bad_input(labels: list[int], scores: list[float], message: str) -> None:
    with pytest.raises(ValueError, match=message):
        roc_auc(labels, scores)


def test_cutoff_rejects_target_outside_unit_interval() -> None:
    with pytest.raises(ValueError, match="in \\[0, 1\\]"):
        cutoff_for_false_positive_rate([0, 1], [0.1, 0.9], 1.5)
