"""The compiled count-cache lookup gives exactly what its Python steps give.

``CountCache.python_get`` (numpy rows, then the onward search past spilled buckets in
Python) is the specification; ``_count_probe.get`` (C) must give the same counts and found
flags for any table.  ``CountCache.python_put_few`` (a Python walk of the buckets) is the
specification of ``_count_probe.put_few``: the same table, fill, spill marks and size after
any put of a few entries, repeats and crowded buckets included.  test_cache.py checks
``get`` (so the C, where built) against a dict; this file holds the two spellings to each
other.  CI builds the extension and sets
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
compiled_put = cache_module.compiled_put_few
needs_compiled = pytest.mark.skipif(compiled is None, reason="the C extension was not built")

KEY = st.integers(min_value=-(2**63), max_value=2**63 - 1)
COUNT = st.integers(min_value=0, max_value=2**31 - 1)


def test_the_extension_is_built_where_required() -> None:
    if os.environ.get("MAILWEIR_REQUIRE_COMPILED") == "1":
        assert compiled is not None, "store/_count_probe.c was not built"
        assert compiled_put is not None


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


def _state(cache: CountCache) -> tuple[list[list[int]], list[int], list[bool], int]:
    return cache._table.tolist(), cache._fill.tolist(), cache._spilled.tolist(), cache._size


def _put_both(held: list[tuple[int, int, int]], puts: list[list[tuple[int, int, int]]]) -> None:
    caches = [CountCache(2000), CountCache(2000)]
    for cache in caches:
        if held:
            keys = np.array([k for k, _, _ in held], dtype=np.int64)
            cache.put(keys, np.array([[h, s] for _, h, s in held], dtype=np.int64))
    for batch in puts:
        keys = np.array([k for k, _, _ in batch], dtype=np.int64)
        counts = np.array([[h, s] for _, h, s in batch], dtype=np.int64).reshape(-1, 2)
        taken = [caches[0]._put_few(keys, counts), caches[1].python_put_few(keys, counts)]
        assert taken[0] == taken[1]
        if not taken[0]:  # both leave it to the whole-array path
            for cache in caches:
                cache.put(keys, counts)
        assert _state(caches[0]) == _state(caches[1])


@needs_compiled
@settings(max_examples=300, deadline=None)
@given(
    st.lists(st.tuples(KEY, COUNT, COUNT), max_size=80),
    st.lists(st.lists(st.tuples(KEY, COUNT, COUNT), max_size=16), max_size=8),
)
def test_compiled_put_few_equals_the_python_walk(
    held: list[tuple[int, int, int]], puts: list[list[tuple[int, int, int]]]
) -> None:
    # Repeats within a put (the first wins) and keys already held (overwritten) as well.
    repeated = [batch + batch[:2] + [(k, 1, 2) for k, _, _ in held[:2]] for batch in puts]
    _put_both(held, repeated)


@needs_compiled
@pytest.mark.parametrize("bucket", [0, 31, 63])
def test_compiled_put_few_spills_and_wraps_as_python_does(bucket: int) -> None:
    # Forty keys of one home bucket, put a few at a time: they fill it, spill into the
    # buckets after it and wrap round the end of the table (64 buckets).
    keys = _homed_in(bucket, 40)
    puts = [[(k, k % 89, 7) for k in keys[at : at + 5]] for at in range(0, 40, 5)]
    _put_both([], puts)
    cache = CountCache(2000)
    for batch in puts:
        assert cache._put_few(
            np.array([k for k, _, _ in batch], dtype=np.int64),
            np.array([[h, s] for _, h, s in batch], dtype=np.int64),
        )
    counts, found = cache.get(np.array(keys, dtype=np.int64))
    assert found.all() and counts[:, 0].tolist() == [k % 89 for k in keys]


@needs_compiled
def test_compiled_put_few_refuses_past_its_room_and_wrong_arrays(heap_growth: HeapGrowth) -> None:
    assert compiled_put is not None
    cache = CountCache(2000)
    keys = np.array([5, 6, 5], dtype=np.int64)
    counts = np.array([[1, 2], [3, 4], [9, 9]], dtype=np.int64)
    args = (cache._table, cache._spilled, cache._fill)
    assert compiled_put(keys, counts, *args, 1) == -1  # two distinct keys, room for one
    assert cache._fill.sum() == 0  # nothing written
    assert compiled_put(keys, counts, *args, 2) == 2
    assert cache.python_get(np.array([5, 6]))[0].tolist() == [[1, 2], [3, 4]]  # the first 5
    with pytest.raises(ValueError):
        compiled_put(keys, counts[:2], *args, 2)  # counts not (n, 2)
    with pytest.raises(TypeError):
        compiled_put(keys, counts, cache._table, cache._spilled, cache._fill.astype(np.int8), 2)
    with pytest.raises(ValueError):
        compiled_put(keys, counts, cache._table, cache._spilled[:-1], cache._fill[:-1], 2)
    assert heap_growth(lambda: compiled_put(keys, counts, *args, 2)) < 2000
