"""CountCache against a plain dict as the oracle."""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from mailweir.store.cache import CountCache


def _homed_in_last_buckets(count: int, buckets: int) -> list[int]:
    """Keys that a new (smallest) cache puts in its last *buckets* buckets: enough of them
    overflow those buckets and spill round the end of the table to its start."""
    empty = CountCache(1)
    keys = np.random.default_rng(11).integers(-(2**63), 2**63 - 1, 200 * count, dtype=np.int64)
    home = empty._home(keys)
    chosen = keys[home >= home.max() - (buckets - 1)][:count].tolist()
    assert len(chosen) == count
    return chosen


key = st.integers(min_value=-(2**63), max_value=2**63 - 1)
small_key = st.integers(min_value=-50, max_value=50)
crowded_key = st.sampled_from(_homed_in_last_buckets(60, 2))
operation = st.tuples(
    st.sampled_from(["put", "add", "get"]),
    st.lists(st.one_of(small_key, key, crowded_key), max_size=40),
    st.integers(min_value=-3, max_value=3),
)


@settings(max_examples=150, deadline=None)
@given(ops=st.lists(operation, max_size=30), limit=st.integers(min_value=0, max_value=400))
def test_cache_matches_dict_oracle(ops: list[tuple[str, list[int], int]], limit: int) -> None:
    cache = CountCache(limit)
    oracle: dict[int, tuple[int, int]] = {}
    for op, keys, value in ops:
        hashes = np.array(keys, dtype=np.int64)
        if op == "put":
            counts = np.column_stack([np.abs(hashes) % 7, np.full(len(hashes), abs(value))])
            cache.put(hashes, counts)
            first: dict[int, tuple[int, int]] = {}
            for k, c in zip(keys, counts.tolist(), strict=True):
                first.setdefault(k, tuple(c))  # the first of repeated keys wins
            if len(oracle) + len(first.keys() - oracle.keys()) > limit:
                # Overflow empties the cache, then keeps the lowest keys of this put.
                oracle = {k: first[k] for k in sorted(first)[:limit]}
            else:
                oracle.update(first)
        elif op == "add":
            delta = np.full((len(hashes), 2), value)
            cache.add(hashes, delta)
            for k in set(keys):  # a repeated key gets its delta once
                if k in oracle:
                    oracle[k] = tuple(max(0, c + value) for c in oracle[k])
        counts, found = cache.get(hashes)
        assert found.tolist() == [k in oracle for k in keys]
        assert counts.tolist() == [list(oracle.get(k, (0, 0))) for k in keys]
        assert len(cache) <= max(limit, 0)


def test_cache_many_puts_grow_the_table_and_stay_exact() -> None:
    rng = np.random.default_rng(7)
    keys = np.unique(rng.integers(-(2**63), 2**63 - 1, 30_000, dtype=np.int64))
    rng.shuffle(keys)
    cache = CountCache(1_000_000)
    for start in range(0, len(keys), 300):
        part = keys[start : start + 300]
        cache.put(part, np.column_stack([part % 5, part % 3]))
    assert len(cache) == len(keys)
    counts, found = cache.get(keys)
    assert found.all()
    assert counts.tolist() == np.column_stack([keys % 5, keys % 3]).tolist()
    cache.add(keys[:10], np.ones((10, 2), dtype=np.int64))
    assert (
        cache.get(keys[:10])[0].tolist()
        == (np.column_stack([keys[:10] % 5, keys[:10] % 3]) + 1).tolist()
    )


def test_cache_reserve_makes_room_so_filling_it_never_rehashes() -> None:
    keys = np.unique(np.random.default_rng(5).integers(-(2**63), 2**63 - 1, 20_000))
    cache = CountCache(1_000_000)
    cache.reserve(len(keys))
    buckets = len(cache._fill)
    assert cache.roomy(len(keys))
    for start in range(0, len(keys), 3_000):  # as a preload fills it, chunk by chunk
        part = keys[start : start + 3_000]
        cache.put(part, np.column_stack([part % 7, part % 2]))
    assert len(cache._fill) == buckets and len(cache) == len(keys)
    counts, found = cache.get(keys)
    assert found.all() and counts.tolist() == np.column_stack([keys % 7, keys % 2]).tolist()
    cache.reserve(100)  # less than it holds: nothing changes
    assert len(cache._fill) == buckets and len(cache) == len(keys)
    small = CountCache(50)
    small.reserve(10**6)  # never past the token limit
    assert small.roomy(50) and len(small._fill) * 8 < 1_000


def test_cache_overflow_empties_then_refills() -> None:
    cache = CountCache(4)
    cache.put(np.array([1, 2, 3], dtype=np.int64), np.ones((3, 2), dtype=np.int64))
    cache.put(np.array([4, 5], dtype=np.int64), np.zeros((2, 2), dtype=np.int64))
    assert len(cache) == 2
    assert cache.get(np.array([1, 4, 5], dtype=np.int64))[1].tolist() == [False, True, True]


def test_cache_roomy_until_a_put_would_rehash_or_empty() -> None:
    cache = CountCache(1_000_000)
    room = 0
    while cache.roomy(room + 1):
        room += 1
    capacity = len(cache._fill) * 8  # buckets of eight keys
    assert 0 < room < capacity  # some room, short of a full table
    keys = np.arange(room, dtype=np.int64)
    cache.put(keys, np.zeros((room, 2), dtype=np.int64))
    assert len(cache._fill) * 8 == capacity  # filled to the brim of roomy: no rehash
    assert not cache.roomy(1)
    cache.put(np.array([room], dtype=np.int64), np.zeros((1, 2), dtype=np.int64))
    assert len(cache._fill) * 8 > capacity and cache.roomy(1)  # that put grew the table
    small = CountCache(3)
    assert small.roomy(3) and not small.roomy(4)  # past the limit a put empties the cache


def test_cache_spill_round_the_end_of_the_table_is_found() -> None:
    crowded = np.array(_homed_in_last_buckets(40, 1), dtype=np.int64)  # 40 keys, 8 slots
    cache = CountCache(1000)
    cache.put(crowded[:30], np.column_stack([np.arange(30), np.arange(30) + 1]))
    counts, found = cache.get(crowded)
    assert found.tolist() == [True] * 30 + [False] * 10
    assert counts[:30].tolist() == np.column_stack([np.arange(30), np.arange(30) + 1]).tolist()
    cache.add(crowded[25:35], np.full((10, 2), -27))
    counts, found = cache.get(crowded[24:36])
    assert counts.tolist() == [[24, 25], [0, 0], [0, 0], [0, 1], [1, 2], [2, 3]] + [[0, 0]] * 6
    assert found.tolist() == [True] * 6 + [False] * 6


def test_cache_empty_slot_markers_are_ordinary_keys() -> None:
    # The values that fill empty slots must read as absent until they are put (every int64
    # is a possible token hash), and then read back like any other key.
    cache = CountCache(1000)
    markers = np.unique(cache._table[:, 0])
    assert not cache.get(markers)[1].any()
    cache.put(markers[::2], np.ones((len(markers[::2]), 2), dtype=np.int64))
    counts, found = cache.get(markers)
    assert found.tolist() == [i % 2 == 0 for i in range(len(markers))]
    assert counts[:, 0].tolist() == [int(i % 2 == 0) for i in range(len(markers))]


def test_cache_small_keys_spread_over_buckets() -> None:
    # Consecutive small keys (the adversarial case for slot = key mod size) must spread like
    # random ones: a quarter of a table's buckets holding them all would mean long probes.
    cache = CountCache(100_000)
    keys = np.arange(-5000, 5000, dtype=np.int64)
    cache.put(keys, np.column_stack([keys % 7, keys % 5]))
    counts, found = cache.get(keys)
    assert found.all()
    assert counts.tolist() == np.column_stack([keys % 7, keys % 5]).tolist()
    assert np.count_nonzero(cache._fill) > 0.9 * len(cache._fill)


def test_cache_put_first_of_repeated_hashes_wins_small_and_large() -> None:
    # A put of a few goes one at a time, a larger one as whole arrays; both keep the first.
    for extra in (0, 40):
        cache = CountCache(1000)
        keys = np.array([5, 9, 5, *range(100, 100 + extra)], dtype=np.int64)
        counts = np.array([[1, 1], [2, 2], [3, 3], *([[0, 0]] * extra)], dtype=np.int64)
        cache.put(keys, counts)
        got, found = cache.get(np.array([5, 9], dtype=np.int64))
        assert found.all()
        assert got.tolist() == [[1, 1], [2, 2]]
        cache.put(np.array([9], dtype=np.int64), np.array([[7, 8]], dtype=np.int64))
        assert cache.get(np.array([9], dtype=np.int64))[0].tolist() == [[7, 8]]
        assert len(cache) == 2 + extra
