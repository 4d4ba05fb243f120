"""Robinson-Fisher: chi-square survival against scipy and exact arithmetic, combining rules."""

from __future__ import annotations

import math
from decimal import Decimal, localcontext

import numpy as np
import pytest
from scipy.stats import chi2, combine_pvalues

from mailweir.model.nb import RobinsonFisher, chi2_log_survival_even, chi2_survival_even
from mailweir.model.types import HAM, SPAM, Vocabulary

GRID_DOF = [2, 4, 6, 10, 20, 50, 100, 400, 1000, 4000, 10000]
GRID_STATISTIC = [0.0, 1e-8, 0.01, 0.5, 1.0, 3.0, 10.0, 50.0, 200.0, 1000.0, 5000.0, 2e4]


def _exact_log_survival(statistic: float, dof: int) -> float:
    """log Q(x; 2n) = log(exp(-m) sum_{i<n} m^i / i!) in 60-digit decimal arithmetic.

    The Poisson-sum identity for even degrees of freedom is textbook (e.g. Abramowitz &
    Stegun 26.4.21, from memory); summed directly here, without our log-space rearrangement.
    """
    with localcontext() as context:
        context.prec = 60
        context.Emax, context.Emin = 10**9, -(10**9)
        half = Decimal(statistic) / 2
        term, total = Decimal(1), Decimal(1)
        for i in range(1, dof // 2):
            term = term * half / i
            total += term
        return float((total * (-half).exp()).ln())


@pytest.mark.parametrize("dof", GRID_DOF)
def test_chi2_survival_matches_scipy_where_representable(dof: int) -> None:
    # Oracle: scipy.stats.chi2.sf (test-only), on the grid where its value is a normal float.
    for statistic in GRID_STATISTIC:
        expected = chi2.sf(statistic, dof)
        if expected < 1e-300:
            continue
        assert chi2_survival_even(statistic, dof) == pytest.approx(expected, rel=1e-9)


@pytest.mark.parametrize("dof", GRID_DOF)
def test_chi2_log_survival_matches_scipy_logsf_where_finite(dof: int) -> None:
    # Oracle: scipy.stats.chi2.logsf; it underflows to -inf far in the tail, which we skip.
    for statistic in GRID_STATISTIC:
        expected = chi2.logsf(statistic, dof)
        if not np.isfinite(expected) or chi2.sf(statistic, dof) < 1e-300:
            continue
        # Near Q = 1 the absolute error of log Q is Q's relative error: m * eps, ~1e-13.
        ours = chi2_log_survival_even(statistic, dof)
        assert ours == pytest.approx(expected, rel=1e-9, abs=1e-12)


@pytest.mark.parametrize(
    ("statistic", "dof"),
    [(1e4, 2), (2e4, 10), (1e5, 4000), (6e4, 10000), (3e3, 10000), (1e-6, 10000), (2e5, 2000)],
)
def test_chi2_log_survival_extreme_values_match_exact_series(statistic: float, dof: int) -> None:
    # Far beyond float range for Q itself (e.g. Q = exp(-5000)): log space must stay exact.
    expected = _exact_log_survival(statistic, dof)
    assert chi2_log_survival_even(statistic, dof) == pytest.approx(expected, rel=1e-11, abs=1e-14)


def test_chi2_log_survival_two_dof_is_exponential_tail() -> None:
    # Chi-square with 2 degrees of freedom is exponential with mean 2: Q(x; 2) = exp(-x/2).
    for statistic in [0.0, 0.3, 7.0, 1e3, 1e6]:
        assert chi2_log_survival_even(statistic, 2) == pytest.approx(-statistic / 2, rel=1e-15)


@pytest.mark.parametrize(("statistic", "dof"), [(1.0, 3), (1.0, 0), (-1.0, 4), (math.nan, 4)])
def test_chi2_log_survival_rejects_bad_arguments(statistic: float, dof: int) -> None:
    with pytest.raises(ValueError):
        chi2_log_survival_even(statistic, dof)


def test_fisher_indicator_matches_scipy_fisher_combining() -> None:
    # Oracle: scipy.stats.combine_pvalues(method="fisher") gives Q(-2 sum ln p, 2k), i.e.
    # Robinson's H for p = f and S for p = 1 - f; I = (1 + H - S) / 2 (Robinson 2003).
    rng = np.random.default_rng(11)
    for size in [1, 2, 5, 30, 200]:
        f = rng.uniform(0.02, 0.98, size)
        h = combine_pvalues(f, method="fisher").pvalue
        s = combine_pvalues(1 - f, method="fisher").pvalue
        assert RobinsonFisher().indicator(f) == pytest.approx((1 + h - s) / 2, rel=1e-9, abs=1e-15)


def test_fisher_token_probability_follows_robinson_formula() -> None:
    # Robinson 2003 (from memory): p(w) = (n_ws/N_s) / (n_ws/N_s + n_wh/N_h),
    # f(w) = (s x + n p(w)) / (s + n).  Here p = (6/20) / (6/20 + 2/10) = 0.6, n = 8.
    counts = np.array([[2, 6], [0, 0], [10, 0]], dtype=np.int64)
    class_count = np.array([10, 20])
    f = RobinsonFisher(strength=1.0, assumed=0.5).token_probability(counts, class_count)
    assert f[0] == pytest.approx((1.0 * 0.5 + 8 * 0.6) / (1 + 8))
    assert f[1] == 0.5  # no data: the assumed probability
    assert f[2] == pytest.approx((0.5 + 10 * 0.0) / 11)
    f3 = RobinsonFisher(strength=3.0, assumed=0.4).token_probability(counts, class_count)
    assert f3[0] == pytest.approx((3.0 * 0.4 + 8 * 0.6) / (3 + 8))


def test_fisher_evidence_weights_are_log_odds_of_f() -> None:
    counts = np.array([[2, 6], [9, 1], [0, 0]], dtype=np.int64)
    class_count = np.array([10, 20])
    model = RobinsonFisher()
    f = model.token_probability(counts, class_count)
    weights = model.token_weights(counts, class_count, Vocabulary.from_token_counts(counts))
    np.testing.assert_allclose(weights[:2], np.log(f[:2] / (1 - f[:2])), rtol=1e-12)
    assert weights[2] == 0.0


def _spam_probability(model: RobinsonFisher, counts: np.ndarray, class_count: np.ndarray) -> float:
    return model.spam_probability(counts, class_count, Vocabulary.from_token_counts(counts))


def test_fisher_neutral_and_unknown_tokens_change_nothing() -> None:
    counts = np.array([[1, 9], [8, 2], [3, 3]], dtype=np.int64)  # the last has f = 0.5
    class_count = np.array([10, 10])
    model = RobinsonFisher()
    base = _spam_probability(model, counts[:2], class_count)
    assert _spam_probability(model, counts, class_count) == base
    padded = np.vstack([counts[:2], np.zeros((5, 2), dtype=np.int64)])
    assert _spam_probability(model, padded, class_count) == base


def test_fisher_no_usable_token_is_one_half() -> None:
    counts = np.array([[3, 3], [0, 0]], dtype=np.int64)
    assert _spam_probability(RobinsonFisher(), counts, np.array([10, 10])) == 0.5


def test_fisher_min_deviation_drops_weak_tokens() -> None:
    counts = np.array([[0, 10], [6, 4]], dtype=np.int64)  # one strong, one weak token
    class_count = np.array([10, 10])
    strong_only = _spam_probability(RobinsonFisher(), counts[:1], class_count)
    both = _spam_probability(RobinsonFisher(), counts, class_count)
    filtered = _spam_probability(RobinsonFisher(min_deviation=0.2), counts, class_count)
    assert filtered == strong_only != both


def test_fisher_max_tokens_keeps_most_extreme() -> None:
    counts = np.array([[6, 4], [0, 10], [7, 3]], dtype=np.int64)
    class_count = np.array([10, 10])
    capped = _spam_probability(RobinsonFisher(max_tokens=1), counts, class_count)
    assert capped == _spam_probability(RobinsonFisher(), counts[1:2], class_count)
    assert RobinsonFisher(max_tokens=2.0).max_tokens == 2  # type: ignore[arg-type]


def test_fisher_assumed_probability_counts_unknown_tokens() -> None:
    # With x != 0.5 a token without data is Robinson's assumed probability, not neutral.
    unknown = np.zeros((4, 2), dtype=np.int64)
    class_count = np.array([10, 10])
    assert _spam_probability(RobinsonFisher(assumed=0.4), unknown, class_count) < 0.5
    assert _spam_probability(RobinsonFisher(assumed=0.6), unknown, class_count) > 0.5


def test_fisher_joint_log_likelihood_is_log_indicator() -> None:
    counts = np.array([[1, 9], [8, 2], [0, 7]], dtype=np.int64)
    class_count = np.array([10, 10])
    model = RobinsonFisher()
    f = model.token_probability(counts, class_count)
    indicator = model.indicator(f)
    jll = model.joint_log_likelihood(counts, class_count, Vocabulary.from_token_counts(counts))
    assert jll[SPAM] == pytest.approx(math.log(indicator))
    assert jll[HAM] == pytest.approx(math.log1p(-indicator))


def test_fisher_thousands_of_one_sided_tokens_saturate_without_nan() -> None:
    class_count = np.array([1000, 1000])
    spammy = np.tile([[0, 1000]], (5000, 1)).astype(np.int64)
    vocabulary = Vocabulary.from_token_counts(spammy)
    model = RobinsonFisher()
    assert model.spam_probability(spammy, class_count, vocabulary) == pytest.approx(1.0)
    hammy = spammy[:, ::-1].copy()
    assert model.spam_probability(hammy, class_count, vocabulary) == pytest.approx(0.0, abs=1e-12)
    jll = model.joint_log_likelihood(hammy, class_count, vocabulary)
    assert jll[HAM] == pytest.approx(0.0) and not np.isnan(jll).any()


@pytest.mark.parametrize(
    "params",
    [
        {"strength": 0.0},
        {"assumed": 0.0},
        {"assumed": 1.0},
        {"min_deviation": 0.6},
        {"max_tokens": 0},
        {"max_tokens": 2.5},
    ],
)
def test_fisher_rejects_bad_parameters(params: dict[str, float]) -> None:
    with pytest.raises(ValueError, match="fisher: "):
        RobinsonFisher(**params)  # type: ignore[arg-type]


def test_fisher_rejects_count_above_class_count() -> None:
    with pytest.raises(ValueError, match="more messages than were trained"):
        RobinsonFisher().token_probability(np.array([[0, 5]]), np.array([3, 3]))


@pytest.mark.parametrize("f", [[0.5, 1.0], [0.0], [math.nan]])
def test_fisher_indicator_rejects_probabilities_outside_open_interval(f: list[float]) -> None:
    with pytest.raises(ValueError, match="strictly between 0 and 1"):
        RobinsonFisher().indicator(np.array(f))


def test_fisher_log_factorials_do_not_depend_on_table_size() -> None:
    # The survival function must not change when a larger cached table is already built.
    small = chi2_log_survival_even(30.0, 20)
    chi2_log_survival_even(30.0, 20000)
    assert chi2_log_survival_even(30.0, 20) == small == pytest.approx(chi2.logsf(30.0, 20))
