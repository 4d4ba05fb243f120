"""The compiled digest-cache lookup and fill give exactly what their Python steps give.

``DigestCache.python_probe`` is ``keys_of`` (Python's ``hash()``) and ``get`` (numpy);
``_digest_probe.probe`` (C) must give the same keys, hashes and missing positions for any
tokens and any content of the table.  ``_digest_probe.fill`` hashes the words a probe missed
and puts them in the table: the same hashes as hashlib's BLAKE2b (the reference for
``blake64``, the C BLAKE2b written from RFC 7693) and the same table as
``DigestCache.python_fill``, which puts them one at a time with ``put``.  CI builds the
extension and sets ``MAILWEIR_REQUIRE_COMPILED=1``, so these checks cannot pass there by
being skipped.
"""

from __future__ import annotations

import hashlib
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
compiled_fill = digest_cache.compiled_fill
needs_compiled = pytest.mark.skipif(compiled is None, reason="the C extension was not built")

WORDS = st.text(st.sampled_from(list("abcdeé日\U0001d400 ")), min_size=1, max_size=6)


def test_the_extension_is_built_where_required() -> None:
    if os.environ.get("MAILWEIR_REQUIRE_COMPILED") == "1":
        assert compiled is not None, "model/_digest_probe.c was not built"
        assert compiled_fill is not None


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
    for _ in range(3):  # cold (hashed and put by fill), then from the table
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


def _blake_reference(data: bytes) -> int:
    # hashlib's BLAKE2b (CPython's, from the reference implementation), 8-byte digest.
    return int.from_bytes(hashlib.blake2b(data, digest_size=8).digest(), "little", signed=True)


@needs_compiled
@settings(max_examples=500, deadline=None)
@given(st.binary(max_size=700))
def test_compiled_blake2b_equals_hashlib(data: bytes) -> None:
    from mailweir.model._digest_probe import blake64

    assert blake64(data) == _blake_reference(data)


@needs_compiled
def test_compiled_blake2b_at_block_edges_and_rfc_7693_example() -> None:
    from mailweir.model._digest_probe import blake64

    # Every size around the 128-byte block, where the last block and the counter change.
    for size in [0, 1, 7, 8, 9, 111, 127, 128, 129, 255, 256, 257, 383, 384, 385, 4096]:
        data = bytes((7 * n + 3) % 256 for n in range(size))
        assert blake64(data) == _blake_reference(data), size
    # RFC 7693 appendix A hashes "abc" with a 64-byte digest (BA 80 A5 3F ...); the digest
    # size is part of the parameter block, so the 8-byte digest differs: hashlib is the oracle.
    assert blake64(b"abc") == _blake_reference(b"abc")
    assert hashlib.blake2b(b"abc").hexdigest().startswith("ba80a53f981c4d0d")  # the RFC's


def _fill_both(held: list[str], asked: list[str], entries: int) -> None:
    caches = [_filled(entries, list(held)), _filled(entries, list(held))]
    found = []
    for cache, fill in zip(caches, [DigestCache.fill, DigestCache.python_fill], strict=True):
        keys, values, missing = cache.python_probe(asked)
        left = fill(cache, asked, keys, values, list(missing))
        found.append((values.tolist(), left))
    assert found[0] == found[1]
    assert caches[0]._keys.tolist() == caches[1]._keys.tolist()
    assert caches[0]._values.tolist() == caches[1]._values.tolist()


PAIRS_AND_ODD = st.sampled_from(["osb:0:kennel cough", "osb:", "osb:x:y z", "ok\ud800", "\ud800"])


@needs_compiled
@settings(max_examples=400, deadline=None)
@given(
    st.lists(WORDS, max_size=40),
    st.lists(WORDS | PAIRS_AND_ODD, max_size=60),
    st.integers(1, 300),
)
def test_compiled_fill_equals_the_python_fill(
    held: list[str], asked: list[str], entries: int
) -> None:
    # Pairs and text with a lone surrogate are left to the caller; repeats, crowded sets
    # (entries down to one set's worth) and words already held all as put() would do them.
    _fill_both(held, asked + held[:5] + asked[:5], entries)


@needs_compiled
@pytest.mark.parametrize("seed", range(5))
def test_compiled_fill_replaces_ways_of_full_sets_as_put_does(seed: int) -> None:
    # The least table (16 sets of 8) with 150 words held and 300 more asked: every set is
    # full, so each new word replaces the way that bits 32-34 of its key pick.
    held = [f"held{seed}-{n}" for n in range(150)]
    asked = [f"asked{seed}-{n}" for n in range(300)]
    _fill_both(held, asked, 1)


@needs_compiled
def test_fill_hashes_are_token_hashes_and_probe_finds_them() -> None:
    cache = DigestCache(1000)
    words = ["booster", "kennel", "ärzte", "日本", "", "osb:0:kennel cough", "x\ud800"]
    keys, values, missing = cache.probe(words)
    assert cache.fill(words, keys, values, missing) == [5, 6]
    assert values[:5].tolist() == [token_hash(w) for w in words[:5]]
    _, again, still = cache.probe(words)
    assert still == [5, 6] and again[:5].tolist() == values[:5].tolist()


@needs_compiled
def test_compiled_fill_refuses_wrong_arguments(heap_growth: HeapGrowth) -> None:
    assert compiled_fill is not None
    keys = np.full((16, 8), -1, dtype=np.int64)
    values = np.zeros((16, 8), dtype=np.int64)
    token_keys = keys_of(["kennel", "flea"])
    out = np.zeros(2, dtype=np.int64)
    assert compiled_fill(["kennel", "flea"], [1], keys, values, 15, token_keys, out) == []
    assert out.tolist() == [0, token_hash("flea")]
    with pytest.raises(IndexError):
        compiled_fill(["kennel"], [1], keys, values, 15, token_keys, out)
    with pytest.raises(TypeError):
        compiled_fill([b"kennel"], [0], keys, values, 15, token_keys, out)
    with pytest.raises(ValueError):
        compiled_fill(["kennel"], [0], keys, values, 16, token_keys, out)
    with pytest.raises((ValueError, TypeError, BufferError)):
        readonly = keys.copy()
        readonly.flags.writeable = False
        compiled_fill(["kennel"], [0], readonly, values, 15, token_keys, out)
    tokens = [f"w{n}" for n in range(300)] + ["osb:0:a b"]
    token_keys = keys_of(tokens)
    out = np.zeros(len(tokens), dtype=np.int64)
    table = np.full((64, 8), -1, dtype=np.int64), np.zeros((64, 8), dtype=np.int64)
    positions = list(range(len(tokens)))
    growth = heap_growth(lambda: compiled_fill(tokens, positions, *table, 63, token_keys, out))
    assert growth < 2000
