"""Hypothesis properties: training arithmetic is exact and order-free.

The model in the database must not depend on how the training arrived: one batch, one
message at a time, or with detours through untraining all leave identical rows, and
untraining is the exact inverse of training (the same contract scikit-learn's naive Bayes
tests hold ``fit`` and ``partial_fit`` to).
"""

from __future__ import annotations

import uuid
from collections.abc import Callable

import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from sqlalchemy import text
from store_helpers import dump_model, empty_model, vocabulary_parts

from mailweir.model.types import Vocabulary
from mailweir.store import ModelStore, TrainResult

# Small hash alphabet so messages share tokens; extremes of int64 included.
token = st.sampled_from([-(2**63), -5, -1, 0, 1, 2, 3, 4, 5, 6, 7, 8, 2**40, 2**63 - 1])
message = st.tuples(st.lists(token, max_size=8), st.sampled_from([0, 1]))
messages = st.lists(message, max_size=12)

fixture_settings = settings(
    max_examples=20,
    deadline=None,
    suppress_health_check=[HealthCheck.function_scoped_fixture],
)


def as_items(drawn: list[tuple[list[int], int]]) -> list[tuple[np.ndarray, int, bytes, str]]:
    """Distinct digests per example: a run never meets an earlier example's ledger rows."""
    return [
        (np.unique(np.array(tokens, dtype=np.int64)), label, uuid.uuid4().bytes, "prop")
        for tokens, label in drawn
    ]


def full_vocabulary(store: ModelStore) -> Vocabulary:
    with store.engine.connect() as conn:
        rows = conn.execute(text("SELECT ham, spam FROM weir_token")).all()
    return Vocabulary.from_token_counts(np.array(rows, dtype=np.int64).reshape(-1, 2))


@fixture_settings
@given(before=messages, extra=messages)
def test_property_untrain_inverts_train(
    open_store: Callable[..., ModelStore],
    before: list[tuple[list[int], int]],
    extra: list[tuple[list[int], int]],
) -> None:
    store = open_store(staleness_seconds=0.0)
    empty_model(store)
    store.train_many(as_items(before))
    state = dump_model(store)
    vocabulary = vocabulary_parts(store.vocabulary())
    items = as_items(extra)
    for hashes, label, digest, source in items:
        assert store.train(hashes, label, digest=digest, source=source) is TrainResult.TRAINED
    for hashes, _, digest, _ in reversed(items):
        assert store.untrain(hashes, digest=digest) is TrainResult.UNTRAINED
    assert dump_model(store) == state
    assert vocabulary_parts(store.vocabulary()) == vocabulary


@fixture_settings
@given(drawn=messages, detour=st.lists(st.integers(min_value=0, max_value=11), max_size=6))
def test_property_batch_equals_single_equals_detour(
    open_store: Callable[..., ModelStore],
    drawn: list[tuple[list[int], int]],
    detour: list[int],
) -> None:
    items = as_items(drawn)
    store = open_store(staleness_seconds=0.0)

    empty_model(store)
    store.train_many(items)
    batch = dump_model(store)

    empty_model(store)
    for hashes, label, digest, source in items:
        store.train(hashes, label, digest=digest, source=source)
    assert dump_model(store) == batch

    # Train, untrain some, retrain them (some first into the other class, then moved back).
    empty_model(store)
    store.train_many(items)
    chosen = sorted({i for i in detour if i < len(items)})
    for i in chosen:
        hashes, label, digest, source = items[i]
        assert store.untrain(hashes, digest=digest) is TrainResult.UNTRAINED
        store.train(hashes, 1 - label, digest=digest, source=source)
        assert store.train(hashes, label, digest=digest, source=source) is TrainResult.MOVED
    assert dump_model(store) == batch


@fixture_settings
@given(drawn=messages, forget=st.lists(st.integers(min_value=0, max_value=11), max_size=6))
def test_property_vocabulary_matches_full_table(
    open_store: Callable[..., ModelStore],
    drawn: list[tuple[list[int], int]],
    forget: list[int],
) -> None:
    store = open_store(staleness_seconds=3600.0)
    empty_model(store)
    store = open_store(staleness_seconds=3600.0)  # fresh memory after the wipe
    store.vocabulary()  # loaded first, then maintained incrementally
    items = as_items(drawn)
    store.train_many(items)
    for i in sorted({i for i in forget if i < len(items)}):
        hashes, _, digest, _ = items[i]
        store.untrain(hashes, digest=digest)
    store.prune(max_count=1, unseen_days=0, today=10**6)
    assert vocabulary_parts(store.vocabulary()) == vocabulary_parts(full_vocabulary(store))
    all_hashes = np.array(sorted({int(h) for hashes, *_ in items for h in hashes}), dtype=np.int64)
    with store.engine.connect() as conn:
        rows = dict(
            (h, (ham, spam))
            for h, ham, spam in conn.execute(text("SELECT hash, ham, spam FROM weir_token"))
        )
    expected = [list(rows.get(int(h), (0, 0))) for h in all_hashes]
    assert store.lookup(all_hashes).tolist() == expected
