"""How long a random read from memory takes right now: the machine's other tenants show here.

mailweir's judging gathers a message's rows from tables of several to tens of MB (the count
cache, the token digest cache) with numpy's ``take``, and callgrind's cache simulation put
most of its last-level misses there (``bench_instructions.py --cache-sim``).  When other
tenants of the shared processor hold its last-level cache, those reads slow down while the
bare relay's work barely moves, and the CPU ratio of ``bench_relay.py`` rises with no change
in the code.  The CPU that other processes use shows in /proc; other virtual machines' use of
the cache does not, so this probe measures it the same way the daemon meets it: random 8-byte
reads by ``take`` from a 32 MB array, in nanoseconds a read (reads overlap, so this is less
than one read's latency).
"""

from __future__ import annotations

import time

import numpy as np

_TABLE_BYTES = 32 * 2**20
_READS = 1_000_000


def random_read_ns(rounds: int = 3) -> float:
    """The least over *rounds* of the mean time of a random read from a 32 MB array (ns)."""
    table = np.arange(_TABLE_BYTES // 8, dtype=np.int64)
    places = np.random.default_rng(0).integers(0, len(table), _READS)
    best = float("inf")
    for _ in range(rounds):
        started = time.perf_counter()
        table.take(places)
        best = min(best, time.perf_counter() - started)
    return best / _READS * 1e9
