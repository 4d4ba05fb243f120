"""Robinson-Fisher's fast scoring path equals a plain reference, bit for bit.

The reference below is the method written out as its docstring states it (Robinson 2003 for
f, Fisher's chi-square combining for I), one step at a time with no shortcut: every
token's f, a stable sort of the usable ones, the Poisson-sum survival function for each of H
and S separately, ``log([1 - I, I])`` through the shared posterior step, and the evidence
ranked over the whole weight vector.  The fast path must give the same floats, not merely
close ones: a ham message's I = (1 + H - S) / 2 is a small difference of numbers near 1, so
one ulp of S moves it by far more than 1e-12 of itself.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import chi2

from mailweir.model.fisher import (
    RobinsonFisher,
    _combined,
    _log_survivals_even,
    _logaddexp,
    chi2_log_survival_even,
)
from mailweir.model.nb_base import Evidence, Score, posterior_spam, strongest_evidence
from mailweir.model.types import HAM, SPAM, Vocabulary

VOCABULARY = Vocabulary(1, np.array([1, 1]), np.zeros((2, 1), dtype=np.int64))  # unread


def _reference_f(model: RobinsonFisher, counts: np.ndarray, classes: np.ndarray) -> np.ndarray:
    rate = counts / classes
    rate_total = rate[:, HAM] + rate[:, SPAM]
    p = np.divide(rate[:, SPAM], rate_total, out=np.zeros(len(counts)), where=rate_total > 0)
    n = counts[:, HAM] + counts[:, SPAM]
    return (model.strength * model.assumed + n * p) / (model.strength + n)


def _reference_selected(model: RobinsonFisher, f: np.ndarray) -> np.ndarray:
    deviation = np.abs(f - 0.5)
    keep = deviation > 0
    if model.min_deviation > 0:
        keep &= deviation >= model.min_deviation
    chosen = np.flatnonzero(keep)
    if model.max_tokens is None:  # every usable token, in index order (the sum's order)
        return chosen
    chosen = chosen[np.argsort(-deviation[chosen], kind="stable")]
    return chosen[: model.max_tokens]


def _reference_log_survival(statistic: float, dof: int) -> float:
    # Q(x; 2n) = exp(-m) sum_{i<n} m^i / i!, m = x / 2: the terms by t_i = t_(i-1) m / i;
    # from m = 700, where e^m nears the largest double, as log-sum-exp (that sum rounded once).
    half = statistic / 2.0
    if half == 0.0:
        return 0.0
    if half < 700.0:
        terms = np.multiply.accumulate(half / np.arange(1.0, dof // 2))  # t_1 .. t_(n-1)
        return min(0.0, math.log(1.0 + float(terms.sum())) - half)
    log_terms = [k * math.log(half) - math.lgamma(k + 1.0) for k in range(dof // 2)]
    top = max(log_terms)
    total = math.fsum(math.exp(term - top) for term in log_terms)
    return min(0.0, top + math.log(total) - half)


def _reference_indicator(log_f: np.ndarray, log_rest: np.ndarray) -> float:
    if len(log_f) == 0:
        return 0.5
    dof = 2 * len(log_f)
    h = math.exp(_reference_log_survival(-2.0 * float(log_f.sum()), dof))
    s = math.exp(_reference_log_survival(-2.0 * float(log_rest.sum()), dof))
    return min(1.0, max(0.0, (1.0 + h - s) / 2.0))


def _reference_posterior(indicator: float) -> float:
    with np.errstate(divide="ignore"):
        jll = np.array([np.log(1.0 - indicator), np.log(indicator)])
    return posterior_spam(jll)


def _reference_evidence(
    hashes: np.ndarray, weights: np.ndarray, n_evidence: int
) -> tuple[Evidence, ...]:
    signed = np.flatnonzero(weights)
    order = signed[np.lexsort((hashes[signed], -np.abs(weights[signed])))]
    ranked = weights[order]
    chosen = np.concatenate([order[ranked > 0][:n_evidence], order[ranked < 0][:n_evidence]])
    return tuple(Evidence(int(hashes[i]), float(weights[i])) for i in chosen)


def _reference_score(
    model: RobinsonFisher,
    hashes: np.ndarray,
    counts: np.ndarray,
    classes: np.ndarray,
    n_evidence: int,
) -> Score:
    if not (classes > 0).all():
        return Score(0.5, ())
    f = _reference_f(model, counts, classes)
    used = f[_reference_selected(model, f)]
    if not ((used > 0) & (used < 1)).all():
        raise ValueError("fisher: token probabilities must lie strictly between 0 and 1")
    log_f, log_rest = np.log(used), np.log1p(-used)
    weights = np.zeros(len(f))
    weights[_reference_selected(model, f)] = log_f - log_rest
    probability = _reference_posterior(_reference_indicator(log_f, log_rest))
    return Score(probability, _reference_evidence(hashes, weights, n_evidence))


def _message(
    rng: np.random.Generator, size: int, classes: np.ndarray, repeats: bool
) -> tuple[np.ndarray, np.ndarray]:
    """Counts as in mail: many unknown tokens, a heavy tail, optionally repeated rows (ties)."""
    counts = np.minimum(rng.zipf(1.5, size=(size, 2)) - 1, classes).astype(np.int64)
    counts[rng.random(size) < 0.35] = 0
    counts[rng.random((size, 2)) < 0.3] = 0
    if repeats and size > 1:
        counts[rng.random(size) < 0.4] = counts[rng.integers(0, size)]
    hashes = rng.integers(-(2**63), 2**63 - 1, size, dtype=np.int64)
    return hashes, counts


def _assert_same_everywhere(
    model: RobinsonFisher,
    hashes: np.ndarray,
    counts: np.ndarray,
    classes: np.ndarray,
    n_evidence: int,
) -> None:
    expected = _reference_score(model, hashes, counts, classes, n_evidence)
    assert model.score(hashes, counts, classes, VOCABULARY, n_evidence) == expected
    assert model.spam_probability(counts, classes, VOCABULARY) == expected.spam_probability
    if (classes > 0).all():
        f = _reference_f(model, counts, classes)
        np.testing.assert_array_equal(model.token_probability(counts, classes), f)
        probability, weights = model.probability_and_weights(counts, classes, VOCABULARY)
        assert probability == expected.spam_probability
        np.testing.assert_array_equal(weights, model.token_weights(counts, classes, VOCABULARY))
        assert _reference_evidence(hashes, weights, n_evidence) == expected.evidence
        jll = model.joint_log_likelihood(counts, classes, VOCABULARY)
        assert posterior_spam(jll) == expected.spam_probability


_MODELS = st.builds(
    RobinsonFisher,
    strength=st.sampled_from([0.1, 1.0, 0.3, 3.0, 1e-3]),
    assumed=st.sampled_from([0.5, 0.4, 0.6, 0.2]),
    min_deviation=st.sampled_from([0.0, 0.0, 0.1, 0.35, 0.5]),
    max_tokens=st.sampled_from([25, None, 1, 5, 40]),
)


@settings(max_examples=300, deadline=None)
@given(
    model=_MODELS,
    seed=st.integers(0, 2**32 - 1),
    size=st.integers(0, 300),
    n_evidence=st.integers(0, 8),
    repeats=st.booleans(),
)
def test_fisher_fast_path_equals_reference(
    model: RobinsonFisher, seed: int, size: int, n_evidence: int, repeats: bool
) -> None:
    rng = np.random.default_rng(seed)
    classes = rng.integers(1, 10_000, 2)
    hashes, counts = _message(rng, size, classes, repeats)
    _assert_same_everywhere(model, hashes, counts, classes, n_evidence)


@settings(max_examples=60, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), cap=st.sampled_from([1, 25, 100]))
def test_fisher_partial_sort_of_many_tokens_equals_reference(seed: int, cap: int) -> None:
    # Beyond a few hundred usable tokens the cap is found by a partial sort; ties at the
    # bound (repeated rows) must still keep index order.
    rng = np.random.default_rng(seed)
    classes = np.array([5000, 4000])
    hashes, counts = _message(rng, 2000, classes, repeats=True)
    _assert_same_everywhere(RobinsonFisher(max_tokens=cap), hashes, counts, classes, 8)


@pytest.mark.parametrize("bits", [40, 52, 53, 60, 61])
def test_fisher_huge_counts_equal_reference(bits: int) -> None:
    # From 2**52 the counts stay integers (their float sums would round); f may round to 1.
    rng = np.random.default_rng(bits)
    classes = np.array([2**bits, 2**bits - 12345])
    counts = np.stack([rng.integers(0, classes[c], 50) for c in (HAM, SPAM)], axis=1)
    counts[:5] = [[0, classes[SPAM]], [classes[HAM], 0], [1, classes[SPAM]], [0, 0], [7, 7]]
    hashes = np.arange(50, dtype=np.int64)
    for model in (RobinsonFisher(), RobinsonFisher(strength=1.0, max_tokens=None)):
        try:
            _reference_score(model, hashes, counts, classes, 4)
        except ValueError:
            with pytest.raises(ValueError, match="strictly between 0 and 1"):
                model.score(hashes, counts, classes, VOCABULARY, 4)
            continue
        _assert_same_everywhere(model, hashes, counts, classes, 4)


def test_fisher_one_sided_counts_that_round_f_to_one_are_refused() -> None:
    # f = (0.05 + 2**60) / (0.1 + 2**60) rounds to 1.0: ln(1 - f) would be -inf.
    classes = np.array([2**60, 2**60])
    counts = np.array([[3, 5], [0, 2**60]])
    assert _reference_f(RobinsonFisher(), counts, classes)[1] == 1.0
    with pytest.raises(ValueError, match="strictly between 0 and 1"):
        RobinsonFisher().score(np.arange(2), counts, classes, VOCABULARY, 4)


def test_fisher_no_usable_token_is_one_half_without_evidence() -> None:
    # Every f is exactly 0.5: equal rates (3/10 and 5/10 each way) and, at x = 0.5, unknown
    # tokens; with another x only an empty message has no usable token.
    counts = np.array([[3, 3], [0, 0], [5, 5]], dtype=np.int64)
    classes = np.array([10, 10])
    assert RobinsonFisher().score(np.arange(3), counts, classes, VOCABULARY, 8) == Score(0.5, ())
    _assert_same_everywhere(RobinsonFisher(), np.arange(3), counts, classes, 8)
    empty = np.zeros((0, 2), dtype=np.int64)
    score = RobinsonFisher(assumed=0.3).score(np.arange(0), empty, classes, VOCABULARY, 8)
    assert score == Score(0.5, ())


def test_fisher_min_deviation_above_every_token_is_one_half() -> None:
    counts = np.array([[1, 9], [8, 2]], dtype=np.int64)
    model = RobinsonFisher(min_deviation=0.5)
    assert model.score(np.arange(2), counts, np.array([10, 10]), VOCABULARY, 8) == Score(0.5, ())


@pytest.mark.parametrize("class_count", [(0, 0), (0, 7), (7, 0)])
def test_fisher_untrained_model_answers_one_half(class_count: tuple[int, int]) -> None:
    counts = np.array([[0, 0], [0, 3]], dtype=np.int64)
    classes = np.array(class_count)
    counts = np.minimum(counts, classes)
    assert RobinsonFisher().score(np.arange(2), counts, classes, VOCABULARY) == Score(0.5, ())


def test_fisher_cap_inside_a_tie_keeps_index_order_and_evidence_orders_by_hash() -> None:
    # Six tokens with the same counts tie in |f - 0.5|; a cap of 4 keeps the first four by
    # index, and the evidence lists them by hash (ascending) within the tie.
    counts = np.array([[0, 6]] * 6 + [[0, 9]], dtype=np.int64)
    hashes = np.array([50, -3, 40, 7, -90, 1, 99], dtype=np.int64)
    classes = np.array([10, 10])
    model = RobinsonFisher(max_tokens=5)
    score = model.score(hashes, counts, classes, VOCABULARY, 8)
    assert [e.token_hash for e in score.evidence] == [99, -3, 7, 40, 50]
    _assert_same_everywhere(model, hashes, counts, classes, 8)


def test_fisher_other_integer_types_and_lists_equal_reference() -> None:
    counts = [[0, 6], [4, 1], [0, 0], [2, 9]]
    classes = [10, 12]
    hashes = [5, 6, 7, 8]
    model = RobinsonFisher()
    expected = _reference_score(model, np.array(hashes), np.array(counts), np.array(classes), 3)
    assert model.score(hashes, counts, classes, VOCABULARY, 3) == expected
    narrow = np.array(counts, dtype=np.uint16)
    assert model.score(np.array(hashes), narrow, np.array(classes, np.int32), VOCABULARY, 3) == (
        expected
    )


@pytest.mark.parametrize(
    ("counts", "classes", "message"),
    [
        ([[1, -1]], [5, 5], "token_count must be non-negative"),
        ([[6, 1]], [5, 5], "more messages than were trained"),
        ([[-1, 9]], [5, 5], "token_count must be non-negative"),  # both bounds: first named
        ([[1, 1]], [-5, 5], "class_count must be non-negative"),
        ([[1.0, 1.0]], [5, 5], "must hold integers"),
        ([1, 1], [5, 5], "shape"),
    ],
)
def test_fisher_score_refuses_bad_counts_as_before(
    counts: list[list[float]], classes: list[int], message: str
) -> None:
    with pytest.raises(ValueError, match=message):
        RobinsonFisher().score(
            np.arange(len(counts)), np.array(counts), np.array(classes), VOCABULARY
        )


def test_fisher_score_refuses_bad_hashes_and_n_evidence() -> None:
    counts, classes = np.array([[1, 4]]), np.array([5, 5])
    with pytest.raises(ValueError, match="token_hashes must have shape"):
        RobinsonFisher().score(np.arange(2), counts, classes, VOCABULARY)
    with pytest.raises(ValueError, match="n_evidence"):
        RobinsonFisher().score(np.arange(1), counts, classes, VOCABULARY, -1)


@settings(max_examples=200, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), size=st.integers(0, 200), n_evidence=st.integers(0, 9))
def test_strongest_evidence_few_and_many_equal_reference(
    seed: int, size: int, n_evidence: int
) -> None:
    # Up to 64 weights are ranked in Python, more with numpy: both as the reference ranks.
    rng = np.random.default_rng(seed)
    weights = rng.choice([-2.0, -0.5, 0.0, 0.5, 2.0], size) * rng.integers(1, 3, size)
    weights[rng.random(size) < 0.3] = rng.standard_normal()
    hashes = rng.integers(-5, 5, size) * 2**60
    expected = _reference_evidence(hashes, weights, n_evidence)
    assert strongest_evidence(hashes, weights, n_evidence) == expected


@settings(max_examples=200, deadline=None)
@given(
    statistics=st.lists(st.floats(0.0, 5e4), min_size=1, max_size=3),
    terms=st.integers(1, 3000),
)
def test_chi2_log_survival_batch_equals_one_at_a_time(statistics: list[float], terms: int) -> None:
    # H and S are computed in one call; each must equal the reference alone.
    found = _log_survivals_even(statistics, 2 * terms)
    for got, statistic in zip(found, statistics, strict=True):
        _assert_same_log_survival(got, statistic, 2 * terms)


def _assert_same_log_survival(got: float, statistic: float, dof: int) -> None:
    """Below m = 700 the product sums the terms as the reference does: the same float.  From
    m = 700 it sums them pairwise in numpy where the reference takes math.fsum (correctly
    rounded), so the two may part in the last place or two (hypothesis found statistic
    7632.678087237001, dof 1030: -2275.7553063384403 against ...407, one ulp)."""
    want = _reference_log_survival(statistic, dof)
    if statistic / 2.0 < 700.0:
        assert got == want
    else:
        assert abs(got - want) <= 4 * math.ulp(want), (got, want)


def test_chi2_reference_matches_scipy() -> None:
    # The reference itself, against scipy.stats.chi2.logsf (test-only oracle).
    # Both ways of summing: m = x / 2 below 700 (directly) and above (in log space).
    for statistic, dof in [
        (3.0, 4),
        (40.0, 50),
        (0.5, 2),
        (900.0, 400),
        (1000.0, 3000),
        (3000.0, 2000),
    ]:
        assert _reference_log_survival(statistic, dof) == pytest.approx(
            chi2.logsf(statistic, dof), rel=1e-9
        )


@settings(max_examples=300, deadline=None)
@given(
    half=st.one_of(st.integers(0, 50_000).map(float), st.floats(0.0, 50_000.0)),
    terms=st.integers(1, 64),
)
def test_chi2_log_survival_few_terms_equals_reference(half: float, terms: int) -> None:
    # The capped path's sizes, whole and fractional m, summed directly below m = 700 and in
    # log space above (whole m put two equal terms at the peak, m^m / m! = m^(m-1) / (m-1)!).
    _assert_same_log_survival(chi2_log_survival_even(2.0 * half, 2 * terms), 2.0 * half, 2 * terms)


@settings(max_examples=300, deadline=None)
@given(
    weights=st.lists(
        st.sampled_from([-2.0, -0.5, -0.0, 0.0, 0.5, 2.0, math.inf, -math.inf, math.nan]),
        max_size=200,  # beyond 64 weights: the numpy path
    ),
    n_evidence=st.integers(0, 9),
)
def test_strongest_evidence_of_special_weights_equals_reference(
    weights: list[float], n_evidence: int
) -> None:
    # Signed zeros are never listed, infinities are the strongest, NaN is never listed and
    # must not disturb the ranking of the others; ties (many here) go by hash.
    values = np.array(weights)
    hashes = (np.arange(len(weights), dtype=np.int64) * 7919 % 13 - 6) * 2**59
    expected = _reference_evidence(hashes, values, n_evidence)
    assert strongest_evidence(hashes, values, n_evidence) == expected


def test_logaddexp_equals_numpy() -> None:
    # The posterior's logaddexp in math-module operations must give numpy's floats exactly.
    rng = np.random.default_rng(3)
    spam = np.concatenate(
        [rng.uniform(0, 1, 20_000), np.exp(rng.uniform(-700, 0, 5_000)), [0.5, 1e-300]]
    )
    spam = np.concatenate([spam, 1.0 - spam[spam < 0.5]])
    for value in spam[(spam > 0) & (spam < 1)].tolist():
        log_ham, log_spam = math.log1p(-value), math.log(value)
        assert _logaddexp(log_ham, log_spam) == float(np.logaddexp(log_ham, log_spam))
        assert _logaddexp(log_spam, log_ham) == float(np.logaddexp(log_spam, log_ham))


@pytest.mark.parametrize("count", [1, 2, 25, 64, 1500])
@pytest.mark.parametrize("mean_half", [1.0, 27.9, 699.0, 700.0, 701.0, 2000.0])
def test_fisher_combined_around_the_log_space_switch_equals_reference(
    count: int, mean_half: float
) -> None:
    # `_combined` sums H's Poisson terms inline while m < 700 and in log space from there,
    # where with many tokens the direct terms would overflow; S's m stays below.  Exact sums
    # (m = 700 itself) and sums a little either side.
    rng = np.random.default_rng(count)
    jitters = [np.ones(count)] + [rng.uniform(0.999, 1.001, count) for _ in range(3)]
    for jitter in jitters:
        log_f = np.full(count, -mean_half / count) * jitter
        log_rest = np.full(count, -0.3) * rng.uniform(0.5, 1.5, count)
        logs = np.stack([log_f, log_rest])
        assert _combined(logs) == _reference_indicator(log_f, log_rest)
        assert _combined(logs[::-1].copy()) == _reference_indicator(log_rest, log_f)
