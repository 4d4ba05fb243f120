"""The compiled digest-cache lookup gives exactly what its Python steps give.

``DigestCache.python_probe`` is ``keys_of`` (Python's ``hash()``) and ``get`` (numpy);
``_digest_probe.probe`` (C) must give the same keys, hashes and missing positions for any
tokens and any content of the table.  CI builds the extension and sets
``MAILWEIR_REQUIRE_COMPILED=1``, so these checks cannot pass there by being skipped.
"""

from __future__ import annotations

import os
from collections.abc import Callable

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from mailweir.model import digest_cache
from mailweir.model.digest_cache import DigestCache, keys_of
from mailweir.model.hashing import token_hash, token_hashes

HeapGrowth = Callable[[Callable[[], object]], int]  # tests/conftest.py's heap_growth
compiled = digest_cache.compiled_probe
needs_compiled = pytest.mark.skipif(compiled is None, reason="the C extension was not built")

WORDS = st.text(st.sampled_from(list("abcdeé日\U0001d400 ")), min_size=1, max_size=6)


def test_the_extension_is_built_where_required() -> None:
    if os.environ.get("MAILWEIR_REQUIRE_COMPILED") == "1":
        assert compiled is not None, "model/_digest_probe.c was not built"


def _filled(entries: int, tokens: list[object]) -> DigestCache:
    # One put a token: the keys of one put that share a set land in the same empty way, so
    # only one put at a time fills a set's several ways.
    cache = DigestCache(entries)
    for token in tokens:
        keys = keys_of([token])  # type: ignore[list-item]
        cache.put(keys, keys * 3 + 1)
    return cache


def _both(cache: DigestCache, tokens: list[object]) -> None:
    keys, values, missing = cache.probe(tokens)  # type: ignore[arg-type]
    want_keys, want_values, want_missing = cache.python_probe(tokens)  # type: ignore[arg-type]
    assert keys.tolist() == want_keys.tolist()
    assert values.tolist() == want_values.tolist()
    assert missing == want_missing


@needs_compiled
@settings(max_examples=400, deadline=None)
@given(st.lists(WORDS, max_size=60), st.lists(WORDS, max_size=60), st.integers(1, 400))
def test_compiled_probe_equals_the_python_steps(
    held: list[str], asked: list[str], entries: int
) -> None:
    _both(_filled(entries, list(held)), asked + held[:10])


@needs_compiled
@settings(max_examples=300, deadline=None)
@given(st.lists(st.integers(0, 4000), max_size=80), st.lists(st.integers(0, 4000), max_size=80))
def test_compiled_probe_in_crowded_sets(held: list[int], asked: list[int]) -> None:
    # Small ints hash to themselves: with the least table (16 sets) every set overflows,
    # so ways are replaced and many asked keys share a set with held ones.
    cache = _filled(1, list(held))
    _both(cache, list(asked))
    if len(set(held)) > 16:  # then some set holds a key past its first way
        assert cache.python_probe(list(held))[1].any()


@needs_compiled
def test_compiled_probe_reads_every_way() -> None:
    held = list(range(0, 16 * 8, 16))  # eight keys of set 0, one put each: ways 0-7
    cache = _filled(1, held)
    _, values, missing = cache.probe(held)  # type: ignore[arg-type]
    assert missing == [] and values.tolist() == [k * 3 + 1 for k in held]


@needs_compiled
def test_token_hashes_through_the_compiled_probe() -> None:
    words = ["booster", "kennel", "booster", "ärzte", "日本", ""] + [f"w{n}" for n in range(600)]
    for _ in range(3):  # cold, then from the staged dict, then from the table
        assert token_hashes(words).tolist() == [token_hash(w) for w in words]


@needs_compiled
def test_compiled_probe_refuses_wrong_arrays() -> None:
    assert compiled is not None
    keys = np.full((16, 8), -1, dtype=np.int64)
    values = np.zeros((16, 8), dtype=np.int64)
    out = np.empty(2, dtype=np.int64)
    tokens = ["kennel", "flea"]
    assert compiled(tokens, keys, values, 15, out, out.copy()) == [0, 1]
    with pytest.raises(TypeError):
        compiled(tokens, keys.astype(np.int32), values, 15, out, out.copy())
    with pytest.raises(TypeError):
        compiled(tuple(tokens), keys, values, 15, out, out.copy())
    with pytest.raises(ValueError):
        compiled(tokens, keys, values, 16, out, out.copy())  # a mask past the sets
    with pytest.raises(ValueError):
        compiled(tokens, keys, values[:8], 7, out, out.copy())  # tables of unequal size
    with pytest.raises(ValueError):
        compiled(tokens, keys, values, 15, out[:1], out.copy())  # no room for the keys
    with pytest.raises((ValueError, TypeError)):
        compiled(tokens, keys, values, 15, out, out.copy()[::2])  # not contiguous
    readonly = out.copy()
    readonly.flags.writeable = False
    with pytest.raises((ValueError, TypeError, BufferError)):
        compiled(tokens, keys, values, 15, readonly, out.copy())
    with pytest.raises(TypeError):
        compiled([["unhashable"]], keys, values, 15, out, out.copy())


@needs_compiled
def test_compiled_probe_leaks_nothing(heap_growth: HeapGrowth) -> None:
    cache = _filled(1000, [f"w{n}" for n in range(300)])
    tokens = [f"w{n}" for n in range(0, 600, 2)]
    assert heap_growth(lambda: cache.probe(tokens)) < 2000
