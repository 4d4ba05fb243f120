"""One contract for every scoring method, as scikit-learn parametrises its naive Bayes tests.

The properties are consequences of the methods' definitions (common practice, no source);
the per-method files check the numbers against outside oracles.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from mailweir.model.nb import (
    METHODS,
    UNTRAINED_PROBABILITY,
    BernoulliNB,
    MultinomialBooleanNB,
    NaiveBayes,
    RobinsonFisher,
    Score,
    make_scorer,
)
from mailweir.model.types import HAM, SPAM, Vocabulary

ALL_METHODS = sorted(METHODS)


def _random_model(
    seed: int, tokens: int = 60, message: int = 20
) -> tuple[np.ndarray, np.ndarray, Vocabulary, np.ndarray]:
    """A consistent random model and one message: (counts, class_count, vocabulary, hashes)."""
    rng = np.random.default_rng(seed)
    class_count = rng.integers(1, 40, 2)
    full = np.stack([rng.integers(0, class_count[c] + 1, tokens) for c in (HAM, SPAM)], axis=1)
    full[rng.random(tokens) < 0.5] //= 4  # plenty of rare tokens, like real mail
    full = full[(full > 0).any(axis=1)]
    rows = rng.choice(len(full), size=min(message, len(full)), replace=False)
    counts = np.vstack([full[rows], np.zeros((2, 2), dtype=np.int64)])  # two unknown tokens
    hashes = rng.integers(-(2**63), 2**63 - 1, len(counts), dtype=np.int64)
    return counts.astype(np.int64), class_count, Vocabulary.from_token_counts(full), hashes


def _swapped(vocabulary: Vocabulary) -> Vocabulary:
    return Vocabulary(
        vocabulary.size, vocabulary.token_total[::-1], vocabulary.count_histogram[::-1]
    )


@pytest.mark.parametrize("name", ALL_METHODS)
@settings(max_examples=60, deadline=None)
@given(seed=st.integers(0, 2**32 - 1))
def test_contract_probability_in_unit_interval(name: str, seed: int) -> None:
    counts, class_count, vocabulary, hashes = _random_model(seed)
    score = make_scorer(name).score(hashes, counts, class_count, vocabulary)
    assert 0.0 <= score.spam_probability <= 1.0


@pytest.mark.parametrize("name", ALL_METHODS)
@settings(max_examples=60, deadline=None)
@given(seed=st.integers(0, 2**32 - 1))
def test_contract_swapping_classes_gives_one_minus_p(name: str, seed: int) -> None:
    counts, class_count, vocabulary, _ = _random_model(seed)
    model = make_scorer(name)
    p = model.spam_probability(counts, class_count, vocabulary)
    swapped = model.spam_probability(counts[:, ::-1], class_count[::-1], _swapped(vocabulary))
    assert swapped == pytest.approx(1.0 - p, abs=1e-9)


@pytest.mark.parametrize("name", ALL_METHODS)
@pytest.mark.parametrize("seed", range(20))
def test_contract_more_spam_count_on_spam_evidence_raises_p(name: str, seed: int) -> None:
    # One present token that already points to spam gets one more spam message; the class
    # totals and the vocabulary summary stay fixed so only that token's term moves.
    counts, class_count, vocabulary, _ = _random_model(seed)
    model = make_scorer(name)
    weights = model.token_weights(counts, class_count, vocabulary)
    candidates = np.flatnonzero((weights > 0) & (counts[:, SPAM] < class_count[SPAM]))
    if not len(candidates):
        pytest.skip("no spam-leaning token with room to grow in this model")
    raised = counts.copy()
    raised[candidates[0], SPAM] += 1
    before = model.spam_probability(counts, class_count, vocabulary)
    after = model.spam_probability(raised, class_count, vocabulary)
    assert after >= before
    if 1e-9 < before < 1 - 1e-9:
        assert after > before


@pytest.mark.parametrize("name", ALL_METHODS)
@pytest.mark.parametrize("seed", range(20))
def test_contract_more_ham_count_on_ham_evidence_lowers_p(name: str, seed: int) -> None:
    counts, class_count, vocabulary, _ = _random_model(seed)
    model = make_scorer(name)
    weights = model.token_weights(counts, class_count, vocabulary)
    candidates = np.flatnonzero((weights < 0) & (counts[:, HAM] < class_count[HAM]))
    if not len(candidates):
        pytest.skip("no ham-leaning token with room to grow in this model")
    raised = counts.copy()
    raised[candidates[-1], HAM] += 1
    before = model.spam_probability(counts, class_count, vocabulary)
    after = model.spam_probability(raised, class_count, vocabulary)
    assert after <= before
    if 1e-9 < before < 1 - 1e-9:
        assert after < before


@pytest.mark.parametrize("model", [BernoulliNB(), MultinomialBooleanNB()])
@pytest.mark.parametrize("seed", range(10))
def test_contract_adding_a_spam_leaning_token_raises_p(model: NaiveBayes, seed: int) -> None:
    # Holds for the naive Bayes methods, whose log-odds add up token weights.  Not part of
    # Fisher's contract: there a weak spam token can dilute strong spam evidence (three tokens
    # at f = 0.9 give I = 0.982; adding one at f = 0.6 gives I = 0.971).
    counts, class_count, vocabulary, _ = _random_model(seed)
    weights = model.token_weights(counts, class_count, vocabulary)
    for i in np.flatnonzero(weights > 0)[:3]:
        without = np.delete(counts, i, axis=0)
        before = model.spam_probability(without, class_count, vocabulary)
        after = model.spam_probability(counts, class_count, vocabulary)
        assert after >= before


@pytest.mark.parametrize("name", ALL_METHODS)
@pytest.mark.parametrize("class_count", [(0, 0), (0, 5), (5, 0)])
def test_contract_untrained_model_answers_one_half(name: str, class_count: tuple[int, int]) -> None:
    counts = np.array([[0, 0], [0, 1], [1, 0]], dtype=np.int64)
    counts = np.minimum(counts, class_count)
    classes = np.array(class_count, dtype=np.int64)
    vocabulary = Vocabulary.from_token_counts(counts)
    model = make_scorer(name)
    score = model.score(np.arange(3, dtype=np.int64), counts, classes, vocabulary)
    assert score == Score(UNTRAINED_PROBABILITY, ())
    assert model.spam_probability(counts, classes, vocabulary) == 0.5
    with pytest.raises(ValueError, match="untrained"):
        model.joint_log_likelihood(counts, classes, vocabulary)


@pytest.mark.parametrize("name", ALL_METHODS)
@pytest.mark.parametrize("direction", [SPAM, HAM])
def test_contract_five_thousand_tokens_stay_finite(name: str, direction: int) -> None:
    rng = np.random.default_rng(direction)
    class_count = np.array([3000, 2000])
    full = np.stack([rng.integers(0, 30, 20000), rng.integers(0, 30, 20000)], axis=1)
    full[:5000, direction] = class_count[direction] - rng.integers(0, 10, 5000)
    vocabulary = Vocabulary.from_token_counts(full)
    model = make_scorer(name)
    message = full[:5000]
    score = model.score(np.arange(5000, dtype=np.int64), message, class_count, vocabulary)
    expected = 1.0 if direction == SPAM else 0.0
    assert score.spam_probability == pytest.approx(expected, abs=1e-9)
    assert np.isfinite(model.joint_log_likelihood(message, class_count, vocabulary)).any()
    mixed = full[5000:10000]
    assert 0.0 <= model.spam_probability(mixed, class_count, vocabulary) <= 1.0
    assert all(np.isfinite(e.weight) for e in score.evidence)


@pytest.mark.parametrize("name", ALL_METHODS)
@pytest.mark.parametrize("n_evidence", [0, 1, 3, 8, 100])
def test_contract_evidence_sorted_both_ways(name: str, n_evidence: int) -> None:
    counts, class_count, vocabulary, hashes = _random_model(seed=7, message=30)
    model = make_scorer(name)
    score = model.score(hashes, counts, class_count, vocabulary, n_evidence=n_evidence)
    weights = model.token_weights(counts, class_count, vocabulary)
    spam = [e for e in score.evidence if e.weight > 0]
    ham = [e for e in score.evidence if e.weight < 0]
    assert list(score.evidence) == spam + ham  # spam side first, no zero weights
    assert len(spam) == min(n_evidence, int((weights > 0).sum()))
    assert len(ham) == min(n_evidence, int((weights < 0).sum()))
    for side in (spam, ham):
        strengths = [abs(e.weight) for e in side]
        assert strengths == sorted(strengths, reverse=True)
    by_hash = dict(zip(hashes.tolist(), weights.tolist(), strict=True))
    assert all(by_hash[e.token_hash] == e.weight for e in score.evidence)
    # Nothing left out is stronger than what was listed.
    for side, mask in ((spam, weights > 0), (ham, weights < 0)):
        ranked = np.sort(np.abs(weights[mask]))[::-1]
        if 0 < len(side) < len(ranked):
            assert abs(side[-1].weight) >= ranked[len(side)]


def test_contract_methods_are_registered_by_name() -> None:
    assert {
        "bernoulli": BernoulliNB,
        "multinomial": MultinomialBooleanNB,
        "fisher": RobinsonFisher,
    } == METHODS
    for name, method in METHODS.items():
        assert method.name == name
        assert isinstance(make_scorer(name), method)
    assert make_scorer("fisher", strength=2.0, max_tokens=15.0) == RobinsonFisher(
        strength=2.0, max_tokens=15
    )


def test_contract_make_scorer_unknown_method_names_the_choices() -> None:
    with pytest.raises(ValueError, match=r"'naive'; allowed: bernoulli, fisher, multinomial"):
        make_scorer("naive")


def test_contract_make_scorer_unknown_parameter_names_the_choices() -> None:
    with pytest.raises(
        ValueError, match=r"'bernoulli' has no parameter 'strength'; allowed: alpha"
    ):
        make_scorer("bernoulli", strength=1.0)


@pytest.mark.parametrize("name", ALL_METHODS)
def test_contract_rejects_misshapen_inputs(name: str) -> None:
    counts, class_count, vocabulary, hashes = _random_model(seed=1)
    model = make_scorer(name)
    with pytest.raises(ValueError, match="token_hashes must have shape"):
        model.score(hashes[:-1], counts, class_count, vocabulary)
    with pytest.raises(ValueError, match=r"token_count must have shape \(n, 2\)"):
        model.score(hashes, counts[:, :1], class_count, vocabulary)
    with pytest.raises(ValueError, match="non-negative"):
        model.score(hashes, -counts, class_count, vocabulary)
    with pytest.raises(ValueError, match="n_evidence"):
        model.score(hashes, counts, class_count, vocabulary, n_evidence=-1)
    with pytest.raises(ValueError, match="token_count must hold integers"):
        model.score(hashes, counts + 0.5, class_count, vocabulary)  # type: ignore[arg-type]
