"""The compiled pair scan gives exactly what its Python spelling gives.

``pairs.python_first_pairs`` is built from ``osb_pair_hashes`` (held to ``words.osb_pairs``
and ``token_hash`` in test_pairs.py) and ``first_occurrences`` (held to numpy's
``np.unique``); ``_pair_hashes.first_pairs`` (C) must give the same hashes, parts and places
for any parts, window, room and per-part limit.  CI builds the extension and sets
``MAILWEIR_REQUIRE_COMPILED=1``, so these checks cannot pass there by being skipped.
"""

from __future__ import annotations

import os
from collections.abc import Callable

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from mailweir.model import pairs
from mailweir.model.hashing import token_hash
from mailweir.model.pairs import first_pairs, python_first_pairs
from mailweir.model.words import osb_pairs

HeapGrowth = Callable[[Callable[[], object]], int]  # tests/conftest.py's heap_growth
compiled = pairs.compiled_first_pairs
needs_compiled = pytest.mark.skipif(compiled is None, reason="the C extension was not built")

# Few distinct words, so pairs repeat within and across parts; and any int64 at all.
WORD = st.integers(-3, 3) | st.integers(min_value=-(2**63), max_value=2**63 - 1)
PARTS = st.lists(st.lists(WORD, max_size=40), max_size=4)


def _arrays(parts: list[list[int]]) -> list[np.ndarray]:
    return [np.array(part, dtype=np.int64) for part in parts]


def _both(
    parts: list[np.ndarray], window: int, room: int, per_part: int
) -> tuple[tuple[list[int], ...], tuple[list[int], ...]]:
    assert compiled is not None
    hashes = np.empty(max(room, 0), dtype=np.int64)
    part = np.empty(max(room, 0), dtype=np.intp)
    at = np.empty(max(room, 0), dtype=np.intp)
    count = compiled(parts, window, room, per_part, hashes, part, at)
    made = (hashes[:count].tolist(), part[:count].tolist(), at[:count].tolist())
    spelled = python_first_pairs(parts, window, room, per_part)
    return made, tuple(each.tolist() for each in spelled)


def test_the_extension_is_built_where_required() -> None:
    if os.environ.get("MAILWEIR_REQUIRE_COMPILED") == "1":
        assert compiled is not None, "model/_pair_hashes.c was not built"


@needs_compiled
@settings(max_examples=2000, deadline=None)
@given(
    PARTS,
    st.integers(2, 16) | st.just(2),
    st.integers(0, 120),
    st.integers(0, 200),
)
def test_compiled_first_pairs_equal_the_python_spelling(
    parts: list[list[int]], window: int, room: int, per_part: int
) -> None:
    made, spelled = _both(_arrays(parts), window, room, per_part)
    assert made == spelled


@needs_compiled
def test_compiled_first_pairs_edges() -> None:
    empty = np.zeros(0, dtype=np.int64)
    one = np.array([7], dtype=np.int64)
    for parts in ([], [empty], [one], [empty, one, empty]):
        made, spelled = _both(parts, 2, 10, 10)
        assert made == spelled == ([], [], [])
    many = [np.arange(3000, dtype=np.int64) % 97 for _ in range(3)]  # 97 distinct pairs
    for room, per_part in ((0, 8000), (1, 8000), (50, 8000), (4000, 8000), (4000, 10)):
        made, spelled = _both(many, 2, room, per_part)
        assert made == spelled


@needs_compiled
def test_compiled_first_pairs_refuses_bad_arguments() -> None:
    assert compiled is not None
    words = [np.arange(5, dtype=np.int64)]
    out = np.empty(4, dtype=np.int64)
    with pytest.raises(ValueError, match="window"):
        compiled(words, 1, 4, 10, out, out.copy(), out.copy())
    with pytest.raises(ValueError, match="shorter than room"):
        compiled(words, 2, 5, 10, out, out.copy(), out.copy())
    with pytest.raises(TypeError, match="int64"):
        compiled([np.arange(5, dtype=np.int32)], 2, 4, 10, out, out.copy(), out.copy())
    with pytest.raises(TypeError):
        compiled(tuple(words), 2, 4, 10, out, out.copy(), out.copy())


@needs_compiled
def test_compiled_first_pairs_leaks_nothing(heap_growth: HeapGrowth) -> None:
    # New arrays each call: a buffer never released would keep them, and the set, alive.
    def call() -> object:
        words = [np.arange(200, dtype=np.int64) % 31, np.arange(50, dtype=np.int64)]
        return first_pairs(words, 3, 300, 400)

    def refused() -> object:
        # The second part is refused after the first was opened.  (Not pytest.raises: its
        # record of each exception would be counted as growth.)
        words = [np.arange(20, dtype=np.int64), np.arange(5, dtype=np.int32)]
        out = np.empty(9, dtype=np.int64)
        assert compiled is not None
        try:
            compiled(words, 2, 9, 10, out, out.copy(), out.copy())
        except TypeError:
            return None
        raise AssertionError("an int32 part was taken")

    assert heap_growth(call) < 2000
    assert heap_growth(refused) < 2000


def test_first_pairs_names_the_pairs_of_the_words() -> None:
    # Whichever spelling runs: the hashes are those of the pair texts words.osb_pairs makes,
    # first occurrences only, and part and place find each one's text.
    texts = [
        ["order", "forty", "doses", "order", "forty", "doses"],
        ["kennel", "cough", "order", "forty"],
    ]
    parts = [np.array([token_hash(w) for w in words], dtype=np.int64) for words in texts]
    for window in (2, 3):
        hashes, part, at = first_pairs(parts, window, 100, 100)
        named = [osb_pairs(texts[p], window)[a] for p, a in zip(part, at, strict=True)]
        expected = list(dict.fromkeys(pair for words in texts for pair in osb_pairs(words, window)))
        assert named == expected
        assert hashes.tolist() == [token_hash(pair) for pair in expected]
