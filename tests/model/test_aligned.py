"""Cache-line-aligned tables (model/aligned.py): the count and digest caches' rows start on a
line, so a gathered row spans as few cache lines as it can."""

from __future__ import annotations

import gc

import numpy as np
import pytest

from mailweir.model.aligned import CACHE_LINE, line_aligned
from mailweir.model.digest_cache import DigestCache
from mailweir.store.cache import CountCache


@pytest.mark.parametrize("shape", [(0,), (1,), (7, 3), (40_000, 16), (3, 5, 2)])
@pytest.mark.parametrize(("dtype", "fill"), [(np.int64, 0), (np.int64, -1), (np.uint8, 7)])
def test_line_aligned_is_a_filled_array_starting_on_a_line(
    shape: tuple[int, ...], dtype: type, fill: int
) -> None:
    array = line_aligned(shape, dtype, fill)
    assert array.shape == shape and array.dtype == np.dtype(dtype)
    assert array.flags.c_contiguous and array.flags.writeable
    assert (array == fill).all()
    if array.size:
        assert array.ctypes.data % CACHE_LINE == 0


def test_line_aligned_keeps_its_buffer_alive() -> None:
    array = line_aligned((1000, 8), np.int64, 5)
    gc.collect()
    array[-1, -1] = 9  # the last element lies inside the buffer it views
    assert array.base is not None and array.sum() == 5 * 7999 + 9


def test_count_cache_buckets_start_on_lines_also_after_growing() -> None:
    cache = CountCache(200_000)
    assert cache._table.ctypes.data % CACHE_LINE == 0
    keys = np.arange(1, 100_001, dtype=np.int64) * 7919
    cache.put(keys, np.ones((len(keys), 2), dtype=np.int64))  # grows the table
    assert len(cache._fill) > 64
    assert cache._table.ctypes.data % CACHE_LINE == 0
    counts, found = cache.get(keys[:5])
    assert found.all() and (counts == 1).all()


def test_digest_cache_sets_start_on_lines() -> None:
    cache = DigestCache(100_000)
    assert cache._keys.ctypes.data % CACHE_LINE == 0
    assert cache._values.ctypes.data % CACHE_LINE == 0
