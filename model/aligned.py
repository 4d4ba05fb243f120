"""Arrays whose first byte starts a cache line, for tables read a row at a time.

numpy hands out large arrays 16 bytes past a 64-byte boundary (glibc's allocation header on
x86-64 Linux, measured), so a 64-byte row of a hash table straddles two cache lines and a
128-byte row three.  The count and digest caches gather one row per token from tables far
larger than the processor's caches, so every line a row spans is a likely miss; starting
the array on a line boundary makes each row the fewest lines it can be.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

CACHE_LINE = 64  # bytes, on x86-64 and most ARM64 parts


def line_aligned(shape: tuple[int, ...], dtype: npt.DTypeLike, fill: int = 0) -> npt.NDArray:
    """A new array of *shape* and *dtype*, every element *fill*, starting on a cache line.

    The array is a view into a slightly larger buffer, which it keeps alive (``.base``).
    """
    dtype = np.dtype(dtype)
    size = int(np.prod(shape, dtype=np.int64)) * dtype.itemsize
    raw = np.empty(size + CACHE_LINE, dtype=np.uint8)
    start = -raw.ctypes.data % CACHE_LINE
    array = raw[start : start + size].view(dtype).reshape(shape)
    array.fill(fill)
    return array
