"""Handing memory freed after a peak back to the operating system."""

from __future__ import annotations

import ctypes
import functools
from collections.abc import Callable


@functools.cache
def _malloc_trim() -> Callable[[int], int] | None:
    try:  # the symbols the process already has: glibc's, on Linux
        return ctypes.CDLL(None).malloc_trim  # type: ignore[no-any-return]
    except (OSError, AttributeError):  # not glibc: nothing to call
        return None


def release_free_memory() -> None:
    """glibc keeps the heap a bulk load grew (numpy's temporary arrays, the driver's rows)
    for later use, so the process stays as large as at its peak; ``malloc_trim(0)`` returns
    the free part.  Elsewhere this does nothing."""
    trim = _malloc_trim()
    if trim is not None:
        trim(0)
