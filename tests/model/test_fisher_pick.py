"""The compiled f and choice of tokens give exactly what their Python spelling gives.

``RobinsonFisher.python_pick`` is ``_checked_f`` then ``_selected``, held to a plain reference
of Robinson's f and a stable sort in test_fisher_fast_path.py; ``_fisher_pick.pick`` (C) must
give the same f, bit for bit, and the same tokens in the same order, for any counts, class
totals and settings, and refuse the same counts.  CI builds the extension and sets
``MAILWEIR_REQUIRE_COMPILED=1``, so these checks cannot pass there by being skipped.
"""

from __future__ import annotations

import os
from collections.abc import Callable

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from mailweir.model import fisher
from mailweir.model.fisher import RobinsonFisher

HeapGrowth = Callable[[Callable[[], object]], int]  # tests/conftest.py's heap_growth
compiled = fisher.compiled_pick
needs_compiled = pytest.mark.skipif(compiled is None, reason="the C extension was not built")

# Small counts tie often (equal f, so the stable order decides); any count up to the totals.
COUNT = st.integers(0, 6) | st.integers(0, 10**6)
SCORERS = st.builds(
    RobinsonFisher,
    strength=st.sampled_from([0.1, 1.0, 0.3, 1e-6, 1e6]),
    assumed=st.sampled_from([0.5, 0.4, 0.6, 1e-9]),
    min_deviation=st.sampled_from([0.0, 0.0, 0.1, 0.45, 0.5]),
    max_tokens=st.sampled_from([None, 1, 2, 25, 150]),
)


def test_required_build_has_the_extension() -> None:
    if os.environ.get("MAILWEIR_REQUIRE_COMPILED") == "1":
        assert compiled is not None


def _compiled(
    scorer: RobinsonFisher, counts: np.ndarray, totals: list[int]
) -> tuple[np.ndarray, np.ndarray] | None:
    assert compiled is not None
    f = np.full(len(counts), np.nan)
    chosen = np.full(len(counts), -1, dtype=np.intp)
    cap = -1 if scorer.max_tokens is None else scorer.max_tokens
    args = (scorer.strength, scorer.assumed, scorer.min_deviation, cap)
    kept = compiled(counts, totals[0], totals[1], *args, f, chosen)
    return None if kept < 0 else (f, chosen[:kept])


def _assert_same(
    got: tuple[np.ndarray, np.ndarray] | None, want: tuple[np.ndarray, np.ndarray] | None
) -> None:
    assert (got is None) == (want is None)
    if got is not None and want is not None:
        assert got[0].view(np.int64).tolist() == want[0].view(np.int64).tolist()  # bit for bit
        assert got[1].tolist() == want[1].tolist()


@needs_compiled
@settings(max_examples=400, deadline=None)
@given(
    scorer=SCORERS,
    ham_total=st.integers(1, 10**6) | st.integers(1, 2**52 - 1),
    spam_total=st.integers(1, 10**6) | st.integers(1, 2**52 - 1),
    rows=st.lists(st.tuples(COUNT, COUNT), max_size=300),
)
def test_compiled_pick_equals_python_pick(
    scorer: RobinsonFisher, ham_total: int, spam_total: int, rows: list[tuple[int, int]]
) -> None:
    # Counts above their totals included: both refuse them.
    counts = np.array(rows, dtype=np.int64).reshape(-1, 2)
    totals = [ham_total, spam_total]
    _assert_same(_compiled(scorer, counts, totals), scorer.python_pick(counts, totals))


@needs_compiled
@pytest.mark.parametrize(
    "bad", [[-1, 0], [0, -1], [11, 0], [0, 8], [-(2**63), 0], [2**63 - 1, 2**63 - 1]]
)
def test_compiled_pick_refuses_what_python_pick_refuses(bad: list[int]) -> None:
    scorer = RobinsonFisher()
    counts = np.array([[1, 2], bad, [3, 4]], dtype=np.int64)
    assert scorer.python_pick(counts, [10, 7]) is None
    assert _compiled(scorer, counts, [10, 7]) is None


@needs_compiled
def test_compiled_pick_caps_a_tie_in_index_order() -> None:
    # Ten tokens of one f: a cap of 4 keeps the first four, the stronger token first.
    scorer = RobinsonFisher(max_tokens=4)
    counts = np.array([[0, 3]] * 5 + [[0, 9]] + [[0, 3]] * 5, dtype=np.int64)
    picked = _compiled(scorer, counts, [10, 10])
    assert picked is not None and picked[1].tolist() == [5, 0, 1, 2]
    _assert_same(picked, scorer.python_pick(counts, [10, 10]))


def test_pick_routes_what_the_loop_does_not_take_to_python(monkeypatch: pytest.MonkeyPatch) -> None:
    # Totals from 2**52 (f's rates then need the exact path) and counts that are not one
    # C-contiguous (n, 2) block go to python_pick; the answers agree either way.
    scorer = RobinsonFisher()
    calls: list[int] = []
    original = RobinsonFisher.python_pick

    def spy(self: RobinsonFisher, counts: np.ndarray, totals: list[int]) -> object:
        calls.append(len(counts))
        return original(self, counts, totals)

    monkeypatch.setattr(RobinsonFisher, "python_pick", spy)
    wide = np.array([[1, 0, 2, 9], [0, 3, 5, 9]], dtype=np.int64)
    strided = wide[:, ::2]
    assert not strided.flags.c_contiguous
    _assert_same(scorer.pick(strided, [4, 4]), original(scorer, strided, [4, 4]))
    huge = [2**52, 2**53]
    _assert_same(scorer.pick(np.ascontiguousarray(strided), huge), original(scorer, strided, huge))
    assert calls == [2, 2]
    calls.clear()
    scorer.pick(np.ascontiguousarray(strided), [4, 4])
    assert calls == ([] if compiled is not None else [2])


@needs_compiled
def test_compiled_pick_refuses_bad_arguments() -> None:
    assert compiled is not None
    counts = np.zeros((3, 2), dtype=np.int64)
    f, chosen = np.empty(3), np.empty(3, dtype=np.intp)
    with pytest.raises(TypeError):
        compiled(counts.astype(np.int32), 1, 1, 0.1, 0.5, 0.0, 25, f, chosen)
    with pytest.raises(TypeError):
        compiled(counts, 1, 1, 0.1, 0.5, 0.0, 25, f.astype(np.float32), chosen)
    with pytest.raises(ValueError):
        compiled(counts, 0, 1, 0.1, 0.5, 0.0, 25, f, chosen)
    with pytest.raises(ValueError):
        compiled(counts, 1, 1, 0.1, 0.5, 0.0, 25, f[:2], chosen)
    with pytest.raises(ValueError):
        compiled(counts.reshape(-1)[:5], 1, 1, 0.1, 0.5, 0.0, 25, f, chosen)


@needs_compiled
def test_compiled_pick_leaks_nothing(heap_growth: HeapGrowth) -> None:
    # New arrays each call: a buffer never released would keep them, and the keys, alive.
    scorer = RobinsonFisher()

    def call() -> object:
        counts = np.arange(600, dtype=np.int64).reshape(-1, 2) % 97
        return scorer.pick(counts, [100, 100])

    def refused() -> object:
        # The second output is refused after the first was opened.  (Not pytest.raises: its
        # record of each exception would be counted as growth.)
        counts = np.zeros((40, 2), dtype=np.int64)
        assert compiled is not None
        try:
            compiled(counts, 1, 1, 0.1, 0.5, 0.0, 25, np.empty(40), np.empty(40, np.int32))
        except TypeError:
            return None
        raise AssertionError("accepted an int32 output")

    assert heap_growth(call) < 2000
    assert heap_growth(refused) < 2000
