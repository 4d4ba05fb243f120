"""Token hashes and message digests.

The pinned values below were computed once with this code (Python 3.11, hashlib's BLAKE2b)
and written down; they pin stability across processes, machines and releases, since stored
counts are keyed by these numbers.  Python's own ``hash()`` of a str changes per process
(PYTHONHASHSEED), so a subprocess check guards against ever using it.
"""

from __future__ import annotations

import hashlib
import subprocess
import sys
import threading

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from mailweir.model import digest_cache, hashing
from mailweir.model.digest_cache import DigestCache
from mailweir.model.hashing import hash_tokens, message_digest, token_hash, token_hashes


def test_token_hash_pinned_values() -> None:
    # Computed once (see module docstring).
    assert token_hash("vaccine") == 8657396018883398748
    assert token_hash("subj:invoice") == -7675822136739558604
    assert token_hash("") == -5426141060434712860


def test_token_hash_matches_blake2b_definition() -> None:
    # Oracle: hashlib directly, as the API documents (8-byte BLAKE2b, little-endian, signed).
    for token in ["kennel", "url:shop.vetsupply.example", "café", "日本"]:
        digest = hashlib.blake2b(token.encode("utf-8"), digest_size=8).digest()
        assert token_hash(token) == int.from_bytes(digest, "little", signed=True)


def _hashlib_oracle(token: str) -> int:
    digest = hashlib.blake2b(token.encode("utf-8", "surrogatepass"), digest_size=8).digest()
    return int.from_bytes(digest, "little", signed=True)


@given(st.lists(st.text(st.characters(), max_size=30), max_size=40))
def test_token_hashes_match_hashlib_for_any_text(tokens: list[str]) -> None:
    # Oracle: hashlib's BLAKE2b made afresh for each token.  The cached path copies a blank
    # state instead of constructing one; lone surrogates (st.characters draws them) must hash
    # as their surrogatepass bytes, and the blank state must stay blank after every use.
    expected = [_hashlib_oracle(token) for token in tokens]
    assert [token_hash(token) for token in tokens] == expected
    assert token_hashes(tokens).tolist() == expected  # misses, then staged or cached hits
    assert token_hashes(tokens).tolist() == expected
    assert hashing._BLANK_STATE.digest() == hashlib.blake2b(b"", digest_size=8).digest()


def test_token_hash_same_in_another_process() -> None:
    code = "from mailweir.model.hashing import token_hash; print(token_hash('vaccine'))"
    for seed in ("1", "2"):
        out = subprocess.run(
            [sys.executable, "-c", code],
            capture_output=True,
            text=True,
            check=True,
            env={"PYTHONHASHSEED": seed},
        )
        assert int(out.stdout) == token_hash("vaccine")


@given(st.text(max_size=50))
def test_token_hash_signed_int64_range(token: str) -> None:
    value = token_hash(token)
    assert -(2**63) <= value < 2**63


@given(st.lists(st.text(max_size=12), max_size=60))
def test_hash_tokens_unique_sorted_int64(tokens: list[str]) -> None:
    hashes = hash_tokens(tokens)
    assert hashes.dtype == np.int64
    assert hashes.ndim == 1
    assert np.all(hashes[1:] > hashes[:-1])  # np.diff could overflow int64
    assert set(hashes.tolist()) == {token_hash(t) for t in tokens}


def test_hash_tokens_empty() -> None:
    hashes = hash_tokens([])
    assert hashes.shape == (0,)
    assert hashes.dtype == np.int64


def test_hash_tokens_accepts_generator_and_duplicates() -> None:
    hashes = hash_tokens(t for t in ["puppy", "kitten", "puppy"])
    assert len(hashes) == 2


@given(st.lists(st.text(max_size=8), max_size=40), st.randoms())
def test_message_digest_order_insensitive(tokens: list[str], rng) -> None:  # type: ignore[no-untyped-def]
    hashes = hash_tokens(tokens)
    shuffled = np.array(hashes.tolist() + hashes.tolist()[:3], dtype=np.int64)
    rng.shuffle(shuffled)
    assert message_digest(shuffled) == message_digest(hashes)
    assert len(message_digest(hashes)) == 16


def test_message_digest_is_blake2b_of_sorted_bytes() -> None:
    hashes = hash_tokens(["appointment", "reminder", "friday"])
    expected = hashlib.blake2b(np.sort(hashes).astype("<i8").tobytes(), digest_size=16).digest()
    assert message_digest(hashes[::-1]) == expected


def test_message_digest_differs_for_different_tokens() -> None:
    assert message_digest(hash_tokens(["ham"])) != message_digest(hash_tokens(["spam"]))


# Cached and uncached words, pairs (mixed from their words' hashes), repeats, a malformed pair
# text (hashed as a plain token) and the empty token.
MIXED = [
    "kennel",
    "osb:0:kennel cough",
    "booster",
    "kennel",
    "osb:2:annual booster",
    "osb:x:not a pair",
    "",
    "osb:0:kennel cough",
    "café",
]


@pytest.fixture(params=["compiled fill", "staged in Python"])
def fill_path(request: pytest.FixtureRequest, monkeypatch: pytest.MonkeyPatch) -> str:
    """Run a test with new words hashed by ``_digest_probe.fill`` (where built) and again
    the Python way: hashlib, the staging dict and a whole-array put."""
    if request.param == "staged in Python":
        monkeypatch.setattr(digest_cache, "compiled_fill", None)
    elif digest_cache.compiled_fill is None:
        pytest.skip("the C extension was not built")
    return str(request.param)


def test_pinned_values_through_the_cache(fill_path: str) -> None:
    # The same pinned numbers as above, for cold words hashed on the path under test.
    hashing.limit_digest_cache(1000)
    words = ["vaccine", "subj:invoice", ""]
    pinned = [8657396018883398748, -7675822136739558604, -5426141060434712860]
    assert token_hashes(words).tolist() == pinned
    assert token_hashes(words).tolist() == pinned  # and held


def test_token_hashes_one_for_one_through_the_cache(fill_path: str) -> None:
    # Oracle: token_hash of each token, which bypasses the cache.
    size = hashing.DIGEST_CACHE_ENTRIES
    hashing.limit_digest_cache(size)  # the table and the staged digests, both emptied
    cold = token_hashes(MIXED).tolist()
    warm = token_hashes(MIXED).tolist()
    hashing.limit_digest_cache(size)
    token_hashes(MIXED[:3])
    hashing._flush_staged()
    partly = token_hashes(MIXED).tolist()  # misses among hits
    assert cold == warm == partly == [token_hash(token) for token in MIXED]


def test_token_hashes_right_when_the_cache_overflows(
    monkeypatch: pytest.MonkeyPatch, fill_path: str
) -> None:
    monkeypatch.setattr(hashing, "_digest_cache", DigestCache(16))  # 128 slots
    monkeypatch.setattr(hashing, "_staged", {})
    monkeypatch.setattr(hashing, "_STAGED_LIMIT", 100)
    words = [f"word{i}" for i in range(2000)]
    for start in range(0, 2000, 250):
        chunk = words[start : start + 250]
        assert token_hashes(chunk).tolist() == [token_hash(w) for w in chunk]
    assert len(hashing._digest_cache) <= hashing._digest_cache.capacity == 128
    assert token_hashes(words).tolist() == [token_hash(w) for w in words]


def test_limit_digest_cache_resizes_and_empties(
    monkeypatch: pytest.MonkeyPatch, fill_path: str
) -> None:
    monkeypatch.setattr(hashing, "_digest_cache", DigestCache(200_000))
    monkeypatch.setattr(hashing, "_staged", {})
    token_hashes(["kennel", "booster", "collar"])
    # In Python new hashes wait to go into the table together; fill puts them in at once.
    assert len(hashing._staged) == (3 if fill_path == "staged in Python" else 0)
    hashing._flush_staged()
    assert len(hashing._digest_cache) == 3 and not hashing._staged
    hashing.limit_digest_cache(20_000)
    assert len(hashing._digest_cache) == 0
    assert 20_000 <= hashing.digest_cache_capacity() < 2 * 20_000


def test_token_hashes_from_threads_sharing_a_small_cache(
    monkeypatch: pytest.MonkeyPatch, fill_path: str
) -> None:
    """Both arrays change under one lock: a key read beside another entry's hash would give
    a word the wrong hash.  Two threads, a cache far too small, every answer checked."""
    monkeypatch.setattr(hashing, "_digest_cache", DigestCache(64))
    monkeypatch.setattr(hashing, "_staged", {})
    monkeypatch.setattr(hashing, "_STAGED_LIMIT", 50)
    wrong: list[str] = []

    def work(prefix: str) -> None:
        words = [f"{prefix}{i % 300}" for i in range(300)]
        truth = [token_hash(w) for w in words]
        for _ in range(60):
            if token_hashes(words).tolist() != truth:
                wrong.append(prefix)

    threads = [threading.Thread(target=work, args=(p,)) for p in ("hay", "oats")]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert wrong == []
