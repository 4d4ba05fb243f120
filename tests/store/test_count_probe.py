"""The compiled count-cache lookup gives exactly what its Python steps give.

``CountCache.python_get`` (numpy rows, then the onward search past spilled buckets in
Python) is the specification; ``_count_probe.get`` (C) must give the same counts and found
flags for any table.  test_cache.py checks ``get`` (so the C, where built) against a dict;
this file holds the two spellings to each other.  CI builds the extension and sets
``MAILWEIR_REQUIRE_COMPILED=1``, so these checks cannot pass there by being skipped.
"""

from __future__ import annotations

import os
from collections.abc import Callable

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from mailweir.store import cache as cache_module
from mailweir.store.cache import CountCache

HeapGrowth = Callable[[Callable[[], object]], int]  # tests/conftest.py's heap_growth
compiled = cache_module.compiled_get
needs_compiled = pytest.mark.skipif(compiled is None, reason="the C extension was not built")

KEY = st.integers(min_value=-(2**63), max_value=2**63 - 1)
COUNT = st.integers(min_value=0, max_value=2**31 - 1)


def test_the_extension_is_built_where_required() -> None:
    if os.environ.get("MAILWEIR_REQUIRE_COMPILED") == "1":
        assert compiled is not None, "store/_count_probe.c was not built"


def _homed_in(bucket: int, count: int) -> list[int]:
    """Keys whose home is *bucket* of the smallest table (64 buckets)."""
    empty = CountCache(1)
    keys = np.random.default_rng(bucket).integers(-(2**63), 2**63 - 1, 400 * count, np.int64)
    chosen = keys[empty._home(keys) == bucket][:count].tolist()
    assert len(chosen) == count
    return chosen


def _both(cache: CountCache, asked: list[int]) -> None:
    hashes = np.array(asked, dtype=np.int64)
    counts, found = cache.get(hashes)
    want_counts, want_found = cache.python_get(hashes)
    assert counts.dtype == want_counts.dtype and counts.shape == want_counts.shape
    assert counts.tolist() == want_counts.tolist()
    assert found.tolist() == want_found.tolist()


@needs_compiled
@settings(max_examples=300, deadline=None)
@given(
    st.lists(st.tuples(KEY, COUNT, COUNT), max_size=120),
    st.lists(KEY, max_size=60),
    st.integers(1, 2000),
)
def test_compiled_get_equals_the_python_steps(
    held: list[tuple[int, int, int]], asked: list[int], limit: int
) -> None:
    cache = CountCache(limit)
    if held:
        keys = np.array([k for k, _, _ in held], dtype=np.int64)
        cache.put(keys, np.array([[ham, spam] for _, ham, spam in held], dtype=np.int64))
    _both(cache, asked + [k for k, _, _ in held])


@needs_compiled
@settings(max_examples=100, deadline=None)
@given(st.integers(0, 63), st.integers(1, 40), st.integers(0, 40))
def test_compiled_get_follows_spills(bucket: int, held: int, extra: int) -> None:
    # Up to forty keys of one home bucket (eight slots): they spill into the buckets after
    # it, round the end of the table for the last ones; the rest of the keys are not held.
    keys = _homed_in(bucket, held + extra)
    cache = CountCache(1000)
    for key in keys[:held]:  # one at a time, as a daemon's puts come
        cache.put(np.array([key], dtype=np.int64), np.array([[key % 97, 2**31 - 1]]))
    _both(cache, keys)
    assert cache.get(np.array(keys[:held], dtype=np.int64))[1].all()


@needs_compiled
def test_compiled_get_on_a_grown_table_and_empty_markers() -> None:
    cache = CountCache(200_000)
    rng = np.random.default_rng(3)
    keys = rng.integers(-(2**63), 2**63 - 1, 50_000, dtype=np.int64)
    cache.put(keys, np.column_stack([np.arange(50_000), np.arange(50_000)[::-1]]))
    markers = np.unique(cache._table[cache._fill < 8, 7])  # empty slots' keys
    _both(cache, [*keys[:3000].tolist(), *markers[:500].tolist(), 0, -1, 2**63 - 1])


@needs_compiled
def test_compiled_get_refuses_wrong_arrays() -> None:
    assert compiled is not None
    cache = CountCache(100)
    hashes = np.array([5, 6], dtype=np.int64)
    counts, found = np.empty((2, 2), dtype=np.int64), np.empty(2, dtype=np.bool_)
    compiled(hashes, cache._table, cache._spilled, counts, found)
    assert found.tolist() == [False, False]
    with pytest.raises(TypeError):
        compiled(hashes.astype(np.int32), cache._table, cache._spilled, counts, found)
    with pytest.raises(TypeError):
        compiled(hashes, cache._table, cache._spilled.astype(np.uint16), counts, found)
    with pytest.raises(ValueError):
        compiled(hashes, cache._table[:-1], cache._spilled, counts, found)  # buckets disagree
    with pytest.raises(ValueError):
        compiled(hashes, cache._table, cache._spilled, counts[:1], found)  # no room
    with pytest.raises((ValueError, TypeError, BufferError)):
        compiled(hashes, cache._table, cache._spilled, counts, found[::2])  # not contiguous
    with pytest.raises(TypeError):
        compiled(hashes, cache._table, cache._spilled, counts)  # type: ignore[call-arg]


@needs_compiled
def test_compiled_get_leaks_nothing(heap_growth: HeapGrowth) -> None:
    cache = CountCache(10_000)
    keys = np.arange(0, 3000, 3, dtype=np.int64)
    cache.put(keys, np.ones((len(keys), 2), dtype=np.int64))
    asked = np.arange(0, 600, dtype=np.int64)
    assert heap_growth(lambda: cache.get(asked)) < 2000
