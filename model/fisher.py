"""Robinson's smoothed token probability combined with Fisher's method."""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache
from typing import ClassVar

import numpy as np
import numpy.typing as npt

from mailweir.model.nb_base import (
    UNTRAINED_PROBABILITY,
    Evidence,
    FloatArray,
    NaiveBayes,
    Score,
    check_counts,
    check_frequency,
    check_score_inputs,
    count_arrays,
    is_trained,
    require_trained,
    strongest_evidence,
)
from mailweir.model.types import HAM, SPAM, ClassCounts, TokenCounts, TokenHashes, Vocabulary

try:
    from ._fisher_pick import pick as compiled_pick
except ImportError:  # depends on the build: a C compiler and Python's headers
    compiled_pick = None

# The least positive double: stands in for a zero denominator (see _checked_f).
_LEAST_DOUBLE = 5e-324
# Counts below this convert to float exactly, and so does the sum of two (below 2**53).
_EXACT_COUNTS = 2**52
# e^700 is below the largest double (about e^709.78), so below this m every Poisson term fits.
_DIRECT_BELOW = 700.0
# Compared with a dtype, not the type np.int64, which each comparison would convert.
_INT64 = np.dtype(np.int64)
# From this many usable tokens a partial sort finds the capped selection faster than a full
# one (measured: equal near 400, 10x faster at 5,000).
_PARTIAL_SORT_FROM = 400


def chi2_log_survival_even(statistic: float, dof: int) -> float:
    """log P(X >= statistic) for X chi-square with an even number of degrees of freedom.

    For ``dof = 2n`` the survival function is a finite Poisson sum,

        Q(x; 2n) = exp(-m) sum_{i=0}^{n-1} m^i / i!,   m = x / 2,

    returned as log Q = log(sum) - m, so Q itself never underflows.  The sum is taken
    directly while every term fits a double (m below 700) and term by term in log space
    (log-sum-exp) beyond, so it neither overflows nor underflows for thousands of degrees of
    freedom or huge statistics.

    Parameters
    ----------
    statistic : float
        x >= 0.
    dof : int
        Even, >= 2.

    Returns
    -------
    float
        log Q in (-inf, 0].
    """
    if dof < 2 or dof % 2:
        raise ValueError(f"dof must be an even integer >= 2, got {dof}")
    if not statistic >= 0 or math.isinf(statistic):
        raise ValueError(f"statistic must be finite and >= 0, got {statistic}")
    return _log_survivals_even([statistic], dof)[0]


def _log_survivals_even(statistics: list[float], dof: int) -> list[float]:
    """`chi2_log_survival_even` of several checked statistics with one ``dof``, one row each.

    With m = x / 2 below ``_DIRECT_BELOW`` every term m^i / i! is at most e^m, far from
    overflow, so the terms come directly, t_i = t_(i-1) m / i: one division, one running
    product and one sum for all the rows (Robinson's H and S together), and no exp, against
    the log-sum-exp of every term that is kept for larger m (only without a cap on the
    tokens).  Each row's operations and summation order are those of a single statistic,
    so results do not depend on the batching.
    """
    return _log_survivals_of_halves([statistic / 2.0 for statistic in statistics], dof // 2)


def _log_survivals_of_halves(halves: list[float], terms: int) -> list[float]:
    """`_log_survivals_even` of m = x / 2 and n = dof / 2."""
    if max(halves) < _DIRECT_BELOW:  # the usual case, without a test per row
        heads = _poisson_heads(halves, terms)
        return [min(0.0, math.log(head) - half) for half, head in zip(halves, heads, strict=True)]
    heads = _poisson_heads([half if half < _DIRECT_BELOW else 0.0 for half in halves], terms)
    return [
        min(0.0, math.log(head) - half) if half < _DIRECT_BELOW else _log_survival_far(half, terms)
        for half, head in zip(halves, heads, strict=True)
    ]


def _poisson_heads(halves: list[float], terms: int) -> list[float]:
    """sum_{i < terms} m^i / i! for each m (below ``_DIRECT_BELOW``): 1 + t_1 + ... as rows
    of running products of m / i (``ufunc.reduce`` and ``accumulate`` are the array
    methods without their Python layer; a row sums in the order of a 1-D sum)."""
    if terms == 1:
        return [1.0] * len(halves)
    steps = np.divide.outer(halves, _indices(terms))
    np.multiply.accumulate(steps, axis=1, out=steps)
    return [1.0 + total for total in np.add.reduce(steps, axis=1).tolist()]


@lru_cache(maxsize=64)
def _indices(terms: int) -> FloatArray:
    """Shape (terms - 1,): 1.0, 2.0, ..., terms - 1."""
    indices = np.arange(1, terms, dtype=np.float64)
    indices.flags.writeable = False
    return indices


@lru_cache(maxsize=8)
def _class_limits(ham: int, spam: int) -> FloatArray:
    """Shape (2, 1): the class counts as floats, the divisors of the count rows (cached: the
    class counts change only with training, and making the array costs more than a look-up)."""
    limits = np.array([[ham], [spam]], dtype=np.float64)
    limits.flags.writeable = False
    return limits


@lru_cache(maxsize=64)
def _negated_indices(terms: int) -> FloatArray:
    """Shape (terms - 1,): -1.0, -2.0, ..., 1.0 - terms."""
    indices = -_indices(terms)
    indices.flags.writeable = False
    return indices


def _log_survival_far(half: float, terms: int) -> float:
    """log Q for m of ``_DIRECT_BELOW`` or more: log-sum-exp of ln(m^i / i!), i < terms.

    In numpy, summed pairwise (``np.add.reduce``): an uncapped bigram message reaches here
    with hundreds of terms, most of them far below the largest, where a Python loop and
    ``math.fsum`` took about 430 against 9 µs for 600 terms (the sum's relative error stays
    within a few ulps, and every term is at most 1, the largest exactly 1).
    """
    log_terms = np.arange(terms, dtype=np.float64) * math.log(half)
    log_terms -= _log_factorials(terms)
    top = float(np.maximum.reduce(log_terms))
    log_terms -= top
    total = float(np.add.reduce(np.exp(log_terms, out=log_terms)))
    return min(0.0, top + math.log(total) - half)


def _log_factorials(terms: int) -> FloatArray:
    """Shape (terms,): ln(i!) = lgamma(i + 1) for i < terms, from a table that grows by
    doubling (a message's token count varies, so a table per count would rarely be reused)."""
    return _log_factorial_table(max(64, 1 << (terms - 1).bit_length()))[:terms]


@lru_cache(maxsize=4)
def _log_factorial_table(size: int) -> FloatArray:
    table = np.array([math.lgamma(i + 1.0) for i in range(size)])
    table.flags.writeable = False
    return table


def chi2_survival_even(statistic: float, dof: int) -> float:
    """P(X >= statistic) for X chi-square with even ``dof``; see `chi2_log_survival_even`."""
    return math.exp(chi2_log_survival_even(statistic, dof))


@dataclass(frozen=True)
class RobinsonFisher(NaiveBayes):
    """Robinson's token probabilities combined by Fisher's chi-square method.

    Per token, with ``n_ws``, ``n_wh`` the spam and ham messages containing w and ``N_s``,
    ``N_h`` the trained messages:

        p(w) = (n_ws / N_s) / (n_ws / N_s + n_wh / N_h),
        f(w) = (s x + n p(w)) / (s + n),   n = n_ws + n_wh,

    so a token with little data stays near the assumed probability x.  Tokens with
    ``|f - 0.5| >= min_deviation`` and ``f != 0.5`` are used (at most ``max_tokens`` of them,
    the most extreme first).  With n of them,

        H = Q(-2 sum ln f, 2n),  S = Q(-2 sum ln(1 - f), 2n),  I = (1 + H - S) / 2,

    where Q is the chi-square survival function; I is the spam probability (Robinson's
    indicator).  No token used gives I = 0.5.

    Unknown tokens have n = 0 and f = x; with the default x = 0.5 they are neutral and
    dropped, like every method's unknown tokens.  With another x they count as x, which is
    what Robinson's assumed probability means.

    I is not a likelihood.  ``joint_log_likelihood`` returns ``log([1 - I, I])`` so that the
    shared posterior step returns I unchanged.

    Parameters
    ----------
    strength : float
        s > 0, the weight of the assumed probability, in messages (Robinson suggests 1; 0.1
        measured better here).
    assumed : float
        x in (0, 1), the probability of a token with no data.
    min_deviation : float
        Tokens with ``|f - 0.5|`` below this are ignored; 0.0 keeps every non-neutral token.
    max_tokens : int or None
        Use at most this many tokens, the largest ``|f - 0.5|`` first; None for no cap.  A cap
        keeps the chi-square combining from being swamped by many weak, correlated tokens.

    References
    ----------
    G. Robinson, "A statistical approach to the spam problem", Linux Journal 107, 2003.
    R. A. Fisher, *Statistical Methods for Research Workers*, 4th ed., 1932, section 21.1
    (edition and section from memory).
    """

    name: ClassVar[str] = "fisher"
    uses_vocabulary: ClassVar[bool] = False  # f(w) reads only the token and class counts
    # Defaults chosen by measured accuracy (bench/ACCURACY.md): on the Enron-Spam development
    # corpus a light prior and the 25 most extreme tokens gave (1-AUC)% 0.163 against 0.301
    # for Robinson's s = 1 with every token, and caught 80% of spam at 0.1% false positives.
    strength: float = 0.1
    assumed: float = 0.5
    min_deviation: float = 0.0
    max_tokens: int | None = 25

    def __post_init__(self) -> None:
        if not (self.strength > 0 and math.isfinite(self.strength)):
            raise ValueError(f"fisher: strength must be finite and > 0, got {self.strength}")
        if not 0 < self.assumed < 1:
            raise ValueError(f"fisher: assumed must be in (0, 1), got {self.assumed}")
        if not 0 <= self.min_deviation <= 0.5:
            raise ValueError(f"fisher: min_deviation must be in [0, 0.5], got {self.min_deviation}")
        if self.max_tokens is not None:
            cap = float(self.max_tokens)
            if not (cap.is_integer() and cap >= 1):
                raise ValueError(f"fisher: max_tokens must be a whole number >= 1, got {cap}")
            # make_scorer passes numbers from configuration as float.
            object.__setattr__(self, "max_tokens", int(cap))

    def token_probability(self, token_count: TokenCounts, class_count: ClassCounts) -> FloatArray:
        """Shape (n,): Robinson's smoothed spam probability f(w) of each token."""
        counts, classes = check_counts(token_count, class_count)
        require_trained(classes, self.name)
        return self._probability(counts, classes)

    def _probability(
        self, counts: npt.NDArray[np.int64], classes: npt.NDArray[np.int64]
    ) -> FloatArray:
        """`token_probability` of counts already checked (``check_counts``, trained)."""
        f = self._checked_f(counts, classes.tolist())
        if f is None:
            raise _counted_beyond(classes)
        return f

    def _picked(
        self, counts: npt.NDArray[np.int64], classes: npt.NDArray[np.int64]
    ) -> tuple[FloatArray, npt.NDArray[np.intp]]:
        """`pick` of counts already checked (``check_counts``, trained); a count out of range
        is an error, as in `_probability`."""
        picked = self.pick(counts, classes.tolist())
        if picked is None:
            raise _counted_beyond(classes)
        return picked

    def pick(
        self, counts: npt.NDArray[np.int64], totals: list[int]
    ) -> tuple[FloatArray, npt.NDArray[np.intp]] | None:
        """f of every token, shape (n,), and the indices of the tokens used (`_selected`);
        None when a count is negative or above its class count.  int64 counts of shape (n, 2)
        and positive class totals.

        One loop in C where ``_fisher_pick`` was built, else `python_pick` (the specification
        the tests hold the C to): its twenty-odd whole-array calls cost a 4 KB message about
        a third of its scoring."""
        if (
            compiled_pick is None
            or max(totals) >= _EXACT_COUNTS
            or not counts.flags.c_contiguous
            or counts.shape[1:] != (2,)
        ):
            return self.python_pick(counts, totals)
        f = np.empty(len(counts))
        chosen = np.empty(len(counts), dtype=np.intp)
        cap = -1 if self.max_tokens is None else self.max_tokens
        args = (self.strength, self.assumed, self.min_deviation, cap)
        kept = compiled_pick(counts, totals[HAM], totals[SPAM], *args, f, chosen)
        return None if kept < 0 else (f, chosen[:kept])

    def python_pick(
        self, counts: npt.NDArray[np.int64], totals: list[int]
    ) -> tuple[FloatArray, npt.NDArray[np.intp]] | None:
        """`pick` in numpy: `_checked_f`, then `_selected`."""
        f = self._checked_f(counts, totals)
        return None if f is None else (f, self._selected(f))

    def _checked_f(self, counts: npt.NDArray[np.int64], totals: list[int]) -> FloatArray | None:
        """Shape (n,): f of int64 counts, shape (n, 2), and positive class counts; None when
        a count is negative or above its class count."""
        limits = _class_limits(*totals)  # shape (2, 1)
        if max(totals) < _EXACT_COUNTS:
            # Valid counts are then below 2**52, exact as floats and so is the sum of two: f
            # is the one the integers give.  Read as unsigned, a negative count is above 2**63;
            # so it, like a count above its class count, gives a rate above 1.
            rows = counts.view(np.uint64).T.astype(np.float64, order="C")
            rates = rows / limits
            if len(counts) and np.maximum.reduce(rates, axis=None) > 1.0:
                return None
        else:
            unsigned = (
                np.maximum.reduce(counts.view(np.uint64), axis=0).tolist()
                if len(counts)
                else [0, 0]
            )
            if unsigned[HAM] > totals[HAM] or unsigned[SPAM] > totals[SPAM]:
                return None
            rows = np.ascontiguousarray(counts.T)
            rates = rows / limits
        # Rows, not the columns of (n, 2): contiguous operands are cheaper.
        rate_total = rates[HAM] + rates[SPAM]
        # p(w) is undefined for unknown tokens, whose n = 0 makes f = x regardless.  A nonzero
        # total is at least 1 / N > 1e-19, so raising zeros to the least double changes no
        # other quotient and gives p = 0 there, as a masked division would, more cheaply.
        np.maximum(rate_total, _LEAST_DOUBLE, out=rate_total)
        p = np.divide(rates[SPAM], rate_total, out=rate_total)
        n = rows[HAM] + rows[SPAM]
        # f = (s x + n p) / (s + n), in place (sums and products commute exactly).
        f: FloatArray = n * p
        f += self.strength * self.assumed
        f /= self.strength + n
        return f

    def _selected(
        self, f: FloatArray, present: npt.NDArray[np.bool_] | None = None
    ) -> npt.NDArray[np.intp]:
        """Indices of the tokens used (``present`` None: every token): most extreme first,
        ties in ``|f - 0.5|`` in index order; without a cap, all of them in index order (the
        order only decides which the cap keeps, and sorting a bigram message's hundreds of
        tokens cost more than combining them)."""
        # The sort key -|f - 0.5| in two calls: copysign negates the magnitude exactly.
        keys = np.subtract(f, 0.5)
        np.copysign(keys, -1.0, out=keys)
        if present is not None:
            keys = np.where(present, keys, 0.0)
        # |f - 0.5| >= d is -|f - 0.5| <= -d, and > 0 is < 0.  NaN never compares true, so it
        # is never usable.
        usable = keys <= -self.min_deviation if self.min_deviation > 0 else keys < 0.0
        candidates = usable.nonzero()[0]
        cap = self.max_tokens
        if cap is None:
            return candidates
        key = keys[candidates]
        if len(candidates) > max(cap, _PARTIAL_SORT_FROM):
            # The cap-th smallest key bounds the tokens kept; those at the bound keep index
            # order, so sorting the ones within it gives the full sort's first cap.
            within = (key <= np.partition(key, cap - 1)[cap - 1]).nonzero()[0]
            return candidates[within[key[within].argsort(kind="stable")[:cap]]]
        return candidates[key.argsort(kind="stable")[:cap]]

    def _used(
        self, f: FloatArray, chosen: npt.NDArray[np.intp]
    ) -> tuple[npt.NDArray[np.intp], FloatArray]:
        """The tokens used (*chosen*, `_selected`), and `_logs` of their f."""
        used = f.take(chosen)
        # Only a token at |f - 0.5| >= 0.5 can lie outside (0, 1), and with a cap the first
        # is the most extreme: one comparison usually clears them all.
        if self.max_tokens is None or (len(used) and not abs(used[0] - 0.5) < 0.5):
            _check_open_interval(used)
        return chosen, _logs(used)

    def indicator(self, f: FloatArray) -> float:
        """Robinson's I = (1 + H - S) / 2 for token probabilities f in (0, 1), shape (n,)."""
        f = np.asarray(f, dtype=np.float64)
        _check_open_interval(f)
        return _combined(_logs(f))

    def joint_log_likelihood(
        self,
        token_count: TokenCounts,
        class_count: ClassCounts,
        vocabulary: Vocabulary,
        frequency: npt.ArrayLike | None = None,
    ) -> FloatArray:
        """Shape (2,): ``log([1 - I, I])``, Robinson's indicator in the kernel's shape."""
        f = self.token_probability(token_count, class_count)
        present = None if frequency is None else check_frequency(frequency, len(f)) > 0
        return _as_jll(self.indicator(f[self._selected(f, present)]))

    def spam_probability(
        self,
        token_count: TokenCounts,
        class_count: ClassCounts,
        vocabulary: Vocabulary,
        frequency: npt.ArrayLike | None = None,
    ) -> float:
        """As the base class gives it, with the counts checked once (margin training)."""
        if frequency is not None:
            return super().spam_probability(token_count, class_count, vocabulary, frequency)
        counts, classes = check_counts(token_count, class_count)
        if not is_trained(classes):
            return UNTRAINED_PROBABILITY
        _, logs = self._used(*self._picked(counts, classes))
        return _posterior(_combined(logs))

    def probability_and_weights(
        self, token_count: TokenCounts, class_count: ClassCounts, vocabulary: Vocabulary
    ) -> tuple[float, FloatArray]:
        """As the two kernels give them, with f, the selection and the logarithms of the
        tokens used worked out once."""
        counts, classes = check_counts(token_count, class_count)
        require_trained(classes, self.name)
        chosen, logs = self._used(*self._picked(counts, classes))
        weights = np.zeros(len(counts))
        weights[chosen] = logs[0] - logs[1]
        return _posterior(_combined(logs)), weights

    def token_weights(
        self, token_count: TokenCounts, class_count: ClassCounts, vocabulary: Vocabulary
    ) -> FloatArray:
        """Shape (n,): log(f / (1 - f)) for the tokens used, 0 for the others."""
        f = self.token_probability(token_count, class_count)
        chosen = self._selected(f)
        weights = np.zeros(len(f))
        weights[chosen] = np.log(f[chosen]) - np.log1p(-f[chosen])
        return weights

    def score(
        self,
        token_hashes: TokenHashes,
        token_count: TokenCounts,
        class_count: ClassCounts,
        vocabulary: Vocabulary,
        n_evidence: int = 8,
    ) -> Score:
        """As the base class scores (the daemon's hot path), checking 0 <= count <= class
        count on the rates it needs anyway and ranking evidence among the tokens used alone."""
        counts, classes = count_arrays(token_count, class_count)
        totals = classes.tolist()
        picked = None
        if counts.dtype == _INT64 and classes.dtype == _INT64 and min(totals) > 0:
            picked = self.pick(counts, totals)
        if picked is None:
            # Untrained, another integer type or a bound broken: the base class answers, or
            # names the error, in its own order of checks.
            return super().score(token_hashes, token_count, class_count, vocabulary, n_evidence)
        hashes = check_score_inputs(token_hashes, len(counts), n_evidence)
        return self._scored(hashes, *picked, n_evidence)

    def _scored(
        self,
        token_hashes: TokenHashes,
        f: FloatArray,
        chosen: npt.NDArray[np.intp],
        n_evidence: int,
    ) -> Score:
        """Every other token's weight is 0 and never listed, so evidence is ranked among the
        tokens used alone."""
        chosen, logs = self._used(f, chosen)
        evidence: tuple[Evidence, ...] = ()
        if n_evidence and len(chosen):
            weights = np.subtract.reduce(logs, axis=0)  # ln f - ln(1 - f), in one call
            evidence = strongest_evidence(token_hashes[chosen], weights, n_evidence)
        return Score(_posterior(_combined(logs)), evidence)


def _counted_beyond(classes: npt.NDArray[np.int64]) -> ValueError:
    return ValueError(
        "fisher: a token is counted in more messages than were trained "
        f"(class_count={classes.tolist()})"
    )


def _check_open_interval(f: FloatArray) -> None:
    if not ((f > 0) & (f < 1)).all():
        raise ValueError("fisher: token probabilities must lie strictly between 0 and 1")


def _logs(f: FloatArray) -> FloatArray:
    """Shape (2, n): ln f and ln(1 - f) as rows, so one reduction sums both."""
    logs = np.empty((2, len(f)))
    np.log(f, logs[0])
    np.log1p(-f, logs[1])
    return logs


def _combined(logs: FloatArray) -> float:
    """Robinson's I from `_logs` of the tokens used, shape (2, n)."""
    count = logs.shape[1]
    if count == 0:
        return 0.5
    # The statistics are -2 sum ln f and -2 sum ln(1 - f), so their halves m are the negated
    # sums, exactly (doubling is exact, and so is halving what was doubled).
    sums = np.add.reduce(logs, axis=1, keepdims=True)  # shape (2, 1)
    (sum_f,), (sum_rest,) = sums.tolist()
    if min(sum_f, sum_rest) <= -_DIRECT_BELOW:
        log_h, log_s = _log_survivals_of_halves([-sum_f, -sum_rest], count)
    else:
        # `_poisson_heads` inlined on the sums: sum / -i is -(sum / i) = m / i exactly, and
        # log Q = log(head) - m = log(head) + sum.
        steps = np.divide(sums, _negated_indices(count))
        np.multiply.accumulate(steps, axis=1, out=steps)
        tail_f, tail_rest = np.add.reduce(steps, axis=1).tolist()
        log_h = min(0.0, math.log(1.0 + tail_f) + sum_f)
        log_s = min(0.0, math.log(1.0 + tail_rest) + sum_rest)
    h, s = math.exp(log_h), math.exp(log_s)
    return min(1.0, max(0.0, (1.0 + h - s) / 2.0))


def _as_jll(spam: float) -> FloatArray:
    """``log([1 - I, I])``: Robinson's indicator in the kernel's shape (-inf at 0 or 1)."""
    result = np.empty(2)
    with np.errstate(divide="ignore"):
        result[HAM] = np.log(1.0 - spam)
        result[SPAM] = np.log(spam)
    return result


def _posterior(spam: float) -> float:
    """``posterior_spam(_as_jll(I))``: the same operations on scalars, without the array."""
    if not 0.0 < spam < 1.0:
        return spam  # exactly what the log-space round trip gives at 0 and 1
    log_ham, log_spam = np.log(1.0 - spam), np.log(spam)
    return float(np.exp(log_spam - _logaddexp(log_ham, log_spam)))


def _logaddexp(x: float, y: float) -> float:
    """``np.logaddexp`` of two finite floats, in the operations of numpy's scalar loop
    (C's exp and log1p, as the math module calls them) without the cost of a ufunc call."""
    difference = x - y
    if difference > 0:
        return x + math.log1p(math.exp(-difference))
    return y + math.log1p(math.exp(difference))
