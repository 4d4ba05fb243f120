"""glibc allocator knobs (store/memory.py), checked in child processes: each holds for the whole
process, so each case gets a fresh interpreter."""

from __future__ import annotations

import ctypes
import os
import subprocess
import sys

import pytest

try:
    ctypes.CDLL(None).malloc_info  # noqa: B018 - glibc only
    GLIBC = True
except (OSError, AttributeError):
    GLIBC = False

pytestmark = [pytest.mark.slow, pytest.mark.skipif(not GLIBC, reason="glibc's malloc only")]

# glibc's own report of its heaps and mappings (malloc_info, XML), read in the child.
MALLOC_REPORT = """
import ctypes, os, sys, tempfile
def malloc_report():
    libc = ctypes.CDLL(None)
    libc.fopen.restype = ctypes.c_void_p
    fd, path = tempfile.mkstemp()
    stream = ctypes.c_void_p(libc.fopen(path.encode(), b"w"))
    libc.malloc_info(0, stream)
    libc.fclose(stream)
    with open(path) as report:
        text = report.read()
    os.unlink(path)
    return text
"""

# Eight threads allocate at once, then the report counts glibc's heaps.
CHILD = (
    MALLOC_REPORT
    + """
import threading
from mailweir.store.memory import limit_malloc_arenas
print(limit_malloc_arenas() if sys.argv[1] == "cap" else "-")
ready, done = threading.Barrier(9), threading.Event()
def allocate():
    ready.wait()
    held = [bytes(1000) + b"x" * i for i in range(20000)]
    ready.wait()
    done.wait()
threads = [threading.Thread(target=allocate) for _ in range(8)]
for thread in threads:
    thread.start()
ready.wait()
ready.wait()
print(malloc_report().count("<heap nr="))
done.set()
"""
)


def _child(script: str, mode: str, variable: str, **env: str) -> tuple[str, int]:
    """Run ``script`` in a fresh interpreter without the environment's own ``variable``
    (plus ``env``); it prints what the knob returned, then a count."""
    environment = {k: v for k, v in os.environ.items() if k != variable} | env
    out = subprocess.run(
        [sys.executable, "-c", script, mode],
        capture_output=True,
        text=True,
        timeout=60,
        env=environment,
        check=True,
    ).stdout.split()
    return out[0], int(out[1])


def _heaps(mode: str, **env: str) -> tuple[str, int]:
    return _child(CHILD, mode, "MALLOC_ARENA_MAX", **env)


def test_limit_malloc_arenas_caps_the_heaps_threads_grow() -> None:
    uncapped = _heaps("none")[1]
    answer, capped = _heaps("cap")
    assert answer == "True"
    assert capped <= 2 < uncapped  # without the cap, threads that allocate at once get heaps


def test_limit_malloc_arenas_leaves_an_administrators_setting_alone() -> None:
    answer, heaps = _heaps("cap", MALLOC_ARENA_MAX="4")
    assert answer == "False"
    assert 2 < heaps <= 4


# Forty 100 KB blocks held at once, then the report gives how many blocks are mappings.
MAPPED_CHILD = (
    MALLOC_REPORT
    + """
from mailweir.store.memory import map_large_blocks
print(map_large_blocks() if sys.argv[1] == "map" else "-")
held = [bytearray(100 * 1024) for _ in range(40)]
print(malloc_report().split('<total type="mmap" count="')[1].split('"')[0])
"""
)


def _mapped(mode: str, **env: str) -> tuple[str, int]:
    return _child(MAPPED_CHILD, mode, "MALLOC_MMAP_THRESHOLD_", **env)


def test_map_large_blocks_gives_a_large_message_buffer_its_own_mapping() -> None:
    # glibc's default threshold (128 KiB, from memory) keeps 100 KB blocks in the heap,
    # which keeps their pages after they are freed; mapped ones go back when freed.  glibc
    # still serves a large block from free heap space when it has some, so not every one is.
    unmapped = _mapped("none")[1]
    answer, mapped = _mapped("map")
    assert answer == "True"
    assert unmapped < 10 < 30 <= mapped


def test_map_large_blocks_leaves_an_administrators_setting_alone() -> None:
    answer, mapped = _mapped("map", MALLOC_MMAP_THRESHOLD_="1048576")
    assert answer == "False"
    assert mapped < 10


# 4,000 blocks of 8 KB from the heap, every fiftieth kept: the rest are freed beneath blocks
# still in use, so glibc keeps their pages.  The child prints its resident KiB then and after
# ``release_free_memory``.
TRIM_CHILD = """
import resource, sys
from mailweir.store.memory import release_free_memory
def resident_kib():
    with open("/proc/self/statm") as statm:
        return int(statm.read().split()[1]) * resource.getpagesize() // 1024
blocks = [bytes(8000) + bytes([i % 251]) for i in range(4000)]
kept = blocks[::50]
del blocks
before = resident_kib()
release_free_memory()
print(before, resident_kib())
"""


def test_release_free_memory_returns_pages_freed_beneath_blocks_in_use() -> None:
    # The daemon's periodic return (daemon/memory_return.py) rests on this: without it a
    # burst of large mail leaves the heap as large as at its peak.
    out = subprocess.run(
        [sys.executable, "-c", TRIM_CHILD],
        capture_output=True,
        text=True,
        timeout=60,
        check=True,
    ).stdout.split()
    before, after = int(out[0]), int(out[1])
    assert before - after > 20_000  # of about 31 MB freed, most goes back
