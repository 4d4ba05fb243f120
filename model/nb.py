"""Naive Bayes scoring: the methods by name, and one way to build a scorer from settings.

Import scoring names from here; the methods live in their own modules.
"""

from __future__ import annotations

from typing import Final

from mailweir.model.bernoulli import BernoulliNB
from mailweir.model.fisher import RobinsonFisher, chi2_log_survival_even, chi2_survival_even
from mailweir.model.multinomial import MultinomialBooleanNB
from mailweir.model.nb_base import UNTRAINED_PROBABILITY, Evidence, NaiveBayes, Score

__all__ = [
    "METHODS",
    "UNTRAINED_PROBABILITY",
    "BernoulliNB",
    "Evidence",
    "MultinomialBooleanNB",
    "NaiveBayes",
    "RobinsonFisher",
    "Score",
    "chi2_log_survival_even",
    "chi2_survival_even",
    "make_scorer",
]

METHODS: Final[dict[str, type[NaiveBayes]]] = {
    method.name: method for method in (BernoulliNB, MultinomialBooleanNB, RobinsonFisher)
}


def make_scorer(name: str, **params: float) -> NaiveBayes:
    """Build the scoring method called ``name`` with the given parameters.

    Raises
    ------
    ValueError
        When ``name`` is not in :data:`METHODS` or a parameter is unknown or out of range;
        the message names the method and what is allowed.
    """
    method = METHODS.get(name)
    if method is None:
        raise ValueError(f"unknown scoring method {name!r}; allowed: {', '.join(sorted(METHODS))}")
    allowed = method.parameter_names()
    unknown = sorted(set(params) - set(allowed))
    if unknown:
        raise ValueError(
            f"scoring method {name!r} has no parameter {', '.join(map(repr, unknown))}; "
            f"allowed: {', '.join(allowed) or '(none)'}"
        )
    return method(**params)
