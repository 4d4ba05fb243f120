"""Fixtures shared by every test folder."""

from __future__ import annotations

import tracemalloc
from collections.abc import Callable

import pytest

HeapGrowth = Callable[[Callable[[], object]], int]


@pytest.fixture
def heap_growth() -> HeapGrowth:
    """``heap_growth(call)``: bytes still held by Python's allocators after 2,000 calls of
    *call* (after one unmeasured call).  tracemalloc sees every object a C module makes, so a
    reference kept once too often leaves tens of bytes or more behind each call."""

    def measure(call: Callable[[], object]) -> int:
        call()
        tracemalloc.start()
        try:
            first = tracemalloc.get_traced_memory()[0]
            for _ in range(2000):
                call()
            return tracemalloc.get_traced_memory()[0] - first
        finally:
            tracemalloc.stop()

    return measure
