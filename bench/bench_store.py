"""Store speed and size on synthetic mail: bulk training, lookups, bytes per token.

Messages are 300 distinct tokens drawn with Zipf-like reuse (a few tokens are in most
messages, most tokens are rare), hashed to signed 64-bit values as the tokenizer's are.

    python bench/bench_store.py                      # SQLite file in a temporary folder
    python bench/bench_store.py --url postgresql+psycopg://mailweir@127.0.0.1:54329/bench
"""

from __future__ import annotations

import argparse
import hashlib
import tempfile
import time
from pathlib import Path

import numpy as np
from sqlalchemy import text

from mailweir.store import ModelStore
from mailweir.store.engine import NO_BEGIN

TOKENS_PER_MESSAGE = 300
_MIX = np.uint64(0x9E3779B97F4A7C15)


def synthetic_messages(count: int, seed: int = 1) -> list[np.ndarray]:
    rng = np.random.default_rng(seed)
    messages = []
    for _ in range(count):
        ids = np.unique(np.minimum(rng.zipf(1.3, 3 * TOKENS_PER_MESSAGE), 2**40))
        ids = rng.permutation(ids)[:TOKENS_PER_MESSAGE].astype(np.uint64)
        messages.append(np.unique((ids * _MIX).view(np.int64)))
    return messages


def digest(hashes: np.ndarray) -> bytes:
    return hashlib.blake2b(hashes.tobytes(), digest_size=16).digest()


def wipe(url: str) -> None:
    store = ModelStore.open(url)
    with store.engine.begin() as conn:
        for table in ("weir_token", "weir_ledger", "weir_verdict", "weir_feedback"):
            conn.execute(text(f"DELETE FROM {table}"))
        conn.execute(text("UPDATE weir_class_total SET messages = 0, revision = revision + 2"))
    store.close()


def bench_training(url: str, messages: list[np.ndarray]) -> None:
    store = ModelStore.open(url)
    items = [(h, i % 2, digest(h), "bench") for i, h in enumerate(messages)]
    started = time.perf_counter()
    store.train_many(items)
    elapsed = time.perf_counter() - started
    print(f"bulk training:      {len(items) / elapsed:9.0f} msgs/s  ({len(items)} messages)")
    single = synthetic_messages(200, seed=2)
    started = time.perf_counter()
    for i, h in enumerate(single):
        store.train(h, i % 2, digest=digest(h), source="bench")
    per = (time.perf_counter() - started) / len(single)
    print(f"single train():     {per * 1e3:9.2f} ms per message")
    if store.engine.dialect.name == "sqlite":
        with store.engine.connect().execution_options(**{NO_BEGIN: True}) as conn:
            conn.exec_driver_sql("PRAGMA wal_checkpoint(TRUNCATE)")
    stats = store.stats()
    print(
        f"database size:      {stats.database_bytes / stats.tokens:9.1f} bytes per token "
        f"({stats.tokens} tokens, {stats.database_bytes / 2**20:.1f} MiB, "
        f"{stats.ledger_rows} ledger rows)"
    )
    store.close()


def bench_lookup(url: str, messages: list[np.ndarray], rounds: int = 300) -> None:
    cold = ModelStore.open(url, cache_tokens=0)  # every lookup goes to the database
    sample = messages[:rounds]
    started = time.perf_counter()
    for h in sample:
        cold.lookup(h)
    print(f"lookup, cold cache: {(time.perf_counter() - started) / rounds * 1e6:9.0f} µs per 300")
    cold.close()
    warm = ModelStore.open(url)
    for h in sample:
        warm.lookup(h)
    started = time.perf_counter()
    for h in sample:
        warm.lookup(h)
    print(f"lookup, warm cache: {(time.perf_counter() - started) / rounds * 1e6:9.0f} µs per 300")
    started = time.perf_counter()
    warm.vocabulary()
    print(f"vocabulary() load:  {(time.perf_counter() - started) * 1e3:9.1f} ms (one GROUP BY)")
    warm.close()


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--url", help="database URL or SQLite path (default: temporary file)")
    parser.add_argument("--messages", type=int, default=20_000)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as folder:
        url = args.url or str(Path(folder) / "bench.db")
        wipe(url)
        messages = synthetic_messages(args.messages)
        print(f"backend: {url.split(':', 1)[0] if '://' in url else 'sqlite file'}")
        bench_training(url, messages)
        bench_lookup(url, messages)
        if args.url:
            wipe(url)


if __name__ == "__main__":
    main()
