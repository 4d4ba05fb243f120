"""Handing memory freed after a peak back to the operating system, and keeping threads from
each growing a heap of their own."""

from __future__ import annotations

import ctypes
import functools
import os
from collections.abc import Callable

M_ARENA_MAX = -8  # glibc's mallopt parameter numbers (malloc.h)
M_MMAP_THRESHOLD = -3
DAEMON_ARENAS = 2
DAEMON_MMAP_THRESHOLD = 64 * 1024


@functools.cache
def _glibc(name: str) -> Callable[..., int] | None:
    """glibc's function ``name`` (None elsewhere: nothing to call)."""
    try:  # the symbols the process already has: glibc's, on Linux
        return getattr(ctypes.CDLL(None), name)  # type: ignore[no-any-return]
    except (OSError, AttributeError):
        return None


def release_free_memory() -> None:
    """glibc keeps the heap a bulk load grew (numpy's temporary arrays, the driver's rows)
    for later use, so the process stays as large as at its peak; ``malloc_trim(0)`` returns
    the free part.  Elsewhere this does nothing."""
    trim = _glibc("malloc_trim")
    if trim is not None:
        trim(0)


def limit_malloc_arenas(arenas: int = DAEMON_ARENAS) -> bool:
    """Cap glibc's heaps ("arenas") at ``arenas``; call before the first thread starts.

    glibc gives threads that allocate at the same time heaps of their own, up to eight per
    core, and each keeps what a peak left in it: the daemon's event loop, judging threads and
    database threads grew 10-14 MB more PSS for it (bench/bench_relay.py, 4 KB and 100 KB
    mail, the same CPU either way).  An administrator's own ``MALLOC_ARENA_MAX`` wins.
    Returns whether the cap was set (False: not glibc, or left to the environment).
    """
    return _mallopt("MALLOC_ARENA_MAX", M_ARENA_MAX, arenas)


def map_large_blocks(threshold: int = DAEMON_MMAP_THRESHOLD) -> bool:
    """Give every block of ``threshold`` bytes or more its own mapping, returned when freed.

    glibc starts at 128 KiB and raises the threshold each time such a block is freed, so after
    the first few, a large message's buffers (its bytes, the copy relayed, the text tokenized)
    come from the heap, and the heap keeps what 32 connections of 100 KB mail left in it.  A
    fixed threshold stops that: mailweir held 8-10 MB less PSS under 100 KB load
    (bench/bench_relay.py).  An administrator's own ``MALLOC_MMAP_THRESHOLD_`` wins.
    """
    return _mallopt("MALLOC_MMAP_THRESHOLD_", M_MMAP_THRESHOLD, threshold)


def _mallopt(variable: str, parameter: int, value: int) -> bool:
    """glibc's ``mallopt``, unless the environment already sets ``variable`` (False then, or
    when this is not glibc)."""
    mallopt = _glibc("mallopt")
    if os.environ.get(variable) or mallopt is None:
        return False
    return bool(mallopt(parameter, value))
