"""Evaluation measures for a spam filter's scores: ROC, AUC and error rates at a cutoff.

Labels are 1 for spam and 0 for ham; a higher score means more spam-like.  A message is
called spam when its score is at or above the cutoff.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from mailweir.model.types import HAM, SPAM

FloatArray = npt.NDArray[np.float64]


@dataclass(frozen=True)
class Rates:
    """Misfiling at one cutoff.

    Attributes
    ----------
    false_positive_rate : float
        Ham scored at or above the cutoff, over all ham; nan when there is no ham.
    false_negative_rate : float
        Spam scored below the cutoff, over all spam; nan when there is no spam.
    false_positives, false_negatives : int
        The two error counts.
    ham, spam : int
        Messages of each class.
    """

    false_positive_rate: float
    false_negative_rate: float
    false_positives: int
    false_negatives: int
    ham: int
    spam: int


def _check(
    labels: npt.ArrayLike, scores: npt.ArrayLike
) -> tuple[npt.NDArray[np.bool_], FloatArray]:
    """Validate and return (is_spam, scores), both of shape (m,)."""
    label_array = np.asarray(labels)
    score_array = np.asarray(scores, dtype=np.float64)
    if label_array.ndim != 1 or label_array.shape != score_array.shape:
        raise ValueError(
            "labels and scores must be 1-d of equal length, got shapes "
            f"{label_array.shape} and {score_array.shape}"
        )
    if not np.all((label_array == HAM) | (label_array == SPAM)):
        raise ValueError(f"labels must be 0 (ham) or 1 (spam), got {np.unique(label_array)}")
    if np.isnan(score_array).any():
        raise ValueError("scores must not contain nan")
    return label_array == SPAM, score_array


def _check_both_classes(is_spam: npt.NDArray[np.bool_]) -> None:
    if is_spam.all() or not is_spam.any():
        raise ValueError("ROC needs at least one ham and one spam label")


def roc_curve(
    labels: npt.ArrayLike, scores: npt.ArrayLike
) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Receiver operating characteristic, one point per distinct score.

    Parameters
    ----------
    labels : array_like, shape (m,)
        1 for spam, 0 for ham; both must occur.
    scores : array_like of float, shape (m,)

    Returns
    -------
    fpr, tpr, thresholds : ndarray of float, shape (k + 1,)
        ``thresholds`` are the k distinct scores in decreasing order after a leading +inf;
        ``fpr[i]`` and ``tpr[i]`` are the rates when scores >= ``thresholds[i]`` count as spam.
        Tied scores move the curve diagonally, as in scikit-learn's ``roc_curve`` with
        ``drop_intermediate=False``.
    """
    is_spam, values = _check(labels, scores)
    _check_both_classes(is_spam)
    order = np.argsort(-values, kind="stable")
    ranked, ranked_spam = values[order], is_spam[order]
    # Last index of each run of equal scores: the cumulative counts there include the tie.
    ends = np.r_[np.flatnonzero(ranked[1:] != ranked[:-1]), len(ranked) - 1]
    true_positives = np.cumsum(ranked_spam)[ends]
    false_positives = (ends + 1) - true_positives
    fpr = np.r_[0.0, false_positives / (~is_spam).sum()]
    tpr = np.r_[0.0, true_positives / is_spam.sum()]
    return fpr, tpr, np.r_[np.inf, ranked[ends]]


def roc_auc(labels: npt.ArrayLike, scores: npt.ArrayLike) -> float:
    """Area under the ROC curve (trapezoids, so a tied spam-ham pair counts one half)."""
    fpr, tpr, _ = roc_curve(labels, scores)
    return float(np.sum(np.diff(fpr) * (tpr[1:] + tpr[:-1]) / 2.0))


def one_minus_auc_percent(labels: npt.ArrayLike, scores: npt.ArrayLike) -> float:
    """(1 - AUC) x 100, the summary figure of the TREC spam track; lower is better."""
    return (1.0 - roc_auc(labels, scores)) * 100.0


def error_rates(labels: npt.ArrayLike, scores: npt.ArrayLike, cutoff: float) -> Rates:
    """False positive and false negative rates when scores >= ``cutoff`` count as spam."""
    is_spam, values = _check(labels, scores)
    called_spam = values >= cutoff
    ham, spam = int((~is_spam).sum()), int(is_spam.sum())
    false_positives = int((called_spam & ~is_spam).sum())
    false_negatives = int((~called_spam & is_spam).sum())
    return Rates(
        false_positive_rate=false_positives / ham if ham else math.nan,
        false_negative_rate=false_negatives / spam if spam else math.nan,
        false_positives=false_positives,
        false_negatives=false_negatives,
        ham=ham,
        spam=spam,
    )


def _check_target(target: float) -> None:
    if not 0.0 <= target <= 1.0:
        raise ValueError(f"target false positive rate must be in [0, 1], got {target}")


def cutoff_for_false_positive_rate(
    labels: npt.ArrayLike, scores: npt.ArrayLike, target: float
) -> float:
    """The lowest cutoff, among the observed scores and +inf, whose FPR is <= ``target``.

    Lowering the cutoff only adds messages called spam, so this cutoff catches the most spam
    the false positive budget allows.  +inf (nothing called spam) when even the highest
    score is ham and ``target`` allows no false positive.
    """
    _check_target(target)
    fpr, _, thresholds = roc_curve(labels, scores)
    # fpr is non-decreasing along decreasing thresholds: take the last point within budget.
    return float(thresholds[np.flatnonzero(fpr <= target)[-1]])


def spam_caught_at_false_positive_rate(
    labels: npt.ArrayLike, scores: npt.ArrayLike, target: float
) -> float:
    """True positive rate at :func:`cutoff_for_false_positive_rate`."""
    _check_target(target)
    fpr, tpr, _ = roc_curve(labels, scores)
    return float(tpr[np.flatnonzero(fpr <= target)[-1]])
