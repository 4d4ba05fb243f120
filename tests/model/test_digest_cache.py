"""The token-hash cache (model/digest_cache.py): never a wrong answer, recent entries kept.

Oracle: a dict of everything ever put.  A held key must give exactly what was last put for
it; a key may be missing (the table is lossy), never wrong.
"""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from mailweir.model.digest_cache import WAYS, DigestCache, keys_of

KEYS = st.integers(min_value=-(2**63), max_value=2**63 - 1).filter(lambda k: k != -1)  # no hash()


@settings(max_examples=150, deadline=None)
@given(st.lists(st.lists(st.tuples(KEYS, KEYS), max_size=40), max_size=30), st.integers(1, 300))
def test_held_keys_give_what_was_last_put(batches: list[list[tuple[int, int]]], size: int) -> None:
    cache = DigestCache(size)
    truth: dict[int, int] = {}
    for batch in batches:
        latest = dict(batch)  # of repeats in one put, the cache may keep either: put once
        if latest:
            keys = np.array(list(latest), dtype=np.int64)
            cache.put(keys, np.array(list(latest.values()), dtype=np.int64))
            truth.update(latest)
        asked = np.array(list(truth), dtype=np.int64)
        values, found = cache.get(asked)
        assert [truth[k] for k in asked[found].tolist()] == values[found].tolist()
        assert not values[~found].any()
        assert len(cache) <= cache.capacity


def test_a_set_keeps_its_last_puts_and_misses_the_rest() -> None:
    cache = DigestCache(1)  # the least: 16 sets of WAYS
    keys = np.arange(1, 40, dtype=np.int64) * 16  # every one in set 0
    for key in keys.tolist():
        cache.put(np.array([key]), np.array([key * 3]))
        values, found = cache.get(np.array([key]))
        assert found.all() and values.tolist() == [key * 3]  # just put: held
    values, found = cache.get(keys)
    assert found.sum() == WAYS
    assert (values[found] == keys[found] * 3).all()


def test_keys_are_python_hashes_and_never_the_empty_mark() -> None:
    words = ["kennel", "booster", "", "\x00", "-1"]
    keys = keys_of(words).tolist()
    assert keys == [hash(w) for w in words] and -1 not in keys
    assert hash(-1) == -2  # CPython never hashes to -1 (from memory; checked here)


def test_a_key_of_zero_is_held_like_any_other() -> None:
    cache = DigestCache(16)
    cache.put(np.array([0, 5], dtype=np.int64), np.array([70, 50], dtype=np.int64))
    values, found = cache.get(np.array([0, 5, 16], dtype=np.int64))
    assert found.tolist() == [True, True, False] and values.tolist() == [70, 50, 0]


def test_clear_and_resize_empty_it() -> None:
    cache = DigestCache(100)
    cache.put(np.array([5, 6], dtype=np.int64), np.array([50, 60], dtype=np.int64))
    assert len(cache) == 2
    cache.clear()
    assert not cache.get(np.array([5, 6], dtype=np.int64))[1].any()
    cache.put(np.array([5], dtype=np.int64), np.array([50], dtype=np.int64))
    cache.resize(1000)
    assert len(cache) == 0 and cache.capacity >= 1000
