"""What the scoring path sends to the database, seen through a ``before_cursor_execute`` tracer."""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

import numpy as np
import pytest
from sqlalchemy import event
from store_helpers import digest_of

from mailweir.model.types import SPAM
from mailweir.store import ModelStore
from mailweir.store.lookup import CountReader


@contextmanager
def traced(store: ModelStore) -> Iterator[list[str]]:
    statements: list[str] = []

    def tracer(_conn: Any, _cursor: Any, statement: str, *_args: Any) -> None:
        statements.append(statement)

    event.listen(store.engine, "before_cursor_execute", tracer)
    try:
        yield statements
    finally:
        event.remove(store.engine, "before_cursor_execute", tracer)


def selects(statements: list[str]) -> list[str]:
    return [s for s in statements if s.lstrip().upper().startswith("SELECT")]


def message_hashes(n: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    return np.unique(rng.integers(-(2**63), 2**63 - 1, n, dtype=np.int64))


def test_lookup_300_hashes_is_one_select(store: ModelStore) -> None:
    hashes = message_hashes(300, seed=1)
    store.train(hashes[:200], SPAM, digest=digest_of("a"), source="t")
    fresh = ModelStore.open(store.engine.url.render_as_string(hide_password=False))
    try:
        with traced(fresh) as statements:
            counts = fresh.lookup(hashes)
        assert len(selects(statements)) == 1, statements
        assert len(statements) == 1, statements  # nothing else goes through the engine
        assert counts[:, 1].sum() == 200
    finally:
        fresh.close()


def test_lookup_all_cached_issues_no_query(store: ModelStore) -> None:
    hashes = message_hashes(300, seed=2)
    store.lookup(hashes)
    with traced(store) as statements:
        store.lookup(hashes)
        store.lookup(hashes[::2])
    assert statements == []


def test_lookup_partly_cached_queries_only_the_rest(store: ModelStore) -> None:
    hashes = message_hashes(300, seed=3)
    store.lookup(hashes[:150])
    with traced(store) as statements:
        store.lookup(hashes)
    assert len(selects(statements)) == 1


def test_lookup_beyond_parameter_limit_is_chunked_and_exact(store: ModelStore) -> None:
    reader = CountReader(store.engine.dialect.name)
    n = reader.limit + 500 if not reader.postgres else 40_000
    hashes = message_hashes(n, seed=4)
    trained = hashes[::7]
    store.train(trained, SPAM, digest=digest_of("big"), source="t")
    fresh = ModelStore.open(store.engine.url.render_as_string(hide_password=False))
    try:
        with traced(fresh) as statements:
            counts = fresh.lookup(hashes)
        assert len(selects(statements)) == reader.statements(len(hashes))
        assert np.flatnonzero(counts[:, 1]).tolist() == list(range(0, len(hashes), 7))
    finally:
        fresh.close()


@pytest.mark.parametrize("n", [1, 15, 16, 17, 300, 1000])
def test_lookup_sqlite_padding_keeps_alignment(store: ModelStore, n: int) -> None:
    hashes = message_hashes(n, seed=n)
    store.train(hashes[1::2], SPAM, digest=digest_of("p"), source="t")
    fresh = ModelStore.open(store.engine.url.render_as_string(hide_password=False))
    try:
        shuffled = np.random.default_rng(0).permutation(hashes)
        counts = fresh.lookup(shuffled)
        expected = np.isin(shuffled, hashes[1::2]).astype(np.int64)
        assert counts[:, 1].tolist() == expected.tolist()
        assert not counts[:, 0].any()
    finally:
        fresh.close()
