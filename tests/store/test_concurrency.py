"""Several processes training at once lose no count (PostgreSQL; SQLite as a cross-check).

Four processes train the same shared messages (so they race on the ledger for every digest)
and their own messages, all drawn from a small token alphabet (so they race on the same token
rows).  Afterwards every count must equal the presence count computed here from the
distinct messages, and each shared digest must have been TRAINED by exactly one process
(the others see ALREADY_KNOWN).
"""

from __future__ import annotations

import hashlib
import multiprocessing
from collections import Counter
from typing import Any

import numpy as np
import pytest

from mailweir.store import ModelStore, TrainResult

WORKERS = 4
SHARED = 30
OWN = 30
ALPHABET = 60


def _messages(seed: int, count: int, prefix: str) -> list[tuple[np.ndarray, int, bytes, str]]:
    rng = np.random.default_rng(seed)
    items = []
    for i in range(count):
        hashes = np.unique(rng.integers(0, ALPHABET, 25)).astype(np.int64) * 1_000_003 - 2**40
        digest = hashlib.blake2b(f"{prefix}-{i}".encode(), digest_size=16).digest()
        items.append((hashes, i % 2, digest, prefix))
    return items


def _worker(url: str, index: int, start: Any, results: Any) -> None:
    store = ModelStore.open(url, cache_tokens=0)
    shared = _messages(1, SHARED, "shared")
    own = _messages(100 + index, OWN, f"own{index}")
    order = np.random.default_rng(index).permutation(len(shared) + len(own))
    items = [(shared + own)[i] for i in order]
    start.wait()
    outcome: Counter[str] = Counter()
    if index % 2:
        for hashes, label, digest, source in items:
            outcome[store.train(hashes, label, digest=digest, source=source).name] += 1
    else:
        for begin in range(0, len(items), 7):
            for result, n in store.train_many(items[begin : begin + 7]).items():
                outcome[result.name] += n
    store.close()
    results.put(dict(outcome))


@pytest.mark.slow
def test_concurrent_training_loses_no_count(store_url: str) -> None:
    ModelStore.open(store_url).close()  # migrate once before the race
    context = multiprocessing.get_context("spawn")
    start = context.Event()
    results = context.Queue()
    workers = [
        context.Process(target=_worker, args=(store_url, i, start, results)) for i in range(WORKERS)
    ]
    for process in workers:
        process.start()
    start.set()
    outcomes = [results.get(timeout=240) for _ in workers]
    for process in workers:
        process.join(timeout=60)
        assert process.exitcode == 0

    distinct = _messages(1, SHARED, "shared")
    for i in range(WORKERS):
        distinct += _messages(100 + i, OWN, f"own{i}")
    expected: dict[int, list[int]] = {}
    totals = [0, 0]
    for hashes, label, _, _ in distinct:
        totals[label] += 1
        for h in hashes.tolist():
            expected.setdefault(h, [0, 0])[label] += 1

    store = ModelStore.open(store_url)
    try:
        keys = np.array(sorted(expected), dtype=np.int64)
        assert store.lookup(keys).tolist() == [expected[k] for k in keys.tolist()]
        assert store.class_count().tolist() == totals
        assert store.stats().ledger_rows == len(distinct)
        assert store.stats().tokens == len(expected)
    finally:
        store.close()
    merged: Counter[str] = Counter()
    for outcome in outcomes:
        merged.update(outcome)
    assert merged == {
        TrainResult.TRAINED.name: SHARED + OWN * WORKERS,
        TrainResult.ALREADY_KNOWN.name: SHARED * (WORKERS - 1),
    }
