"""Bigram (OSB) hashes mixed from word hashes: the mixer, determinism, collisions, agreement.

The pinned pair values were computed once with this code and written down (as in
test_hashing.py): stored bigram counts are keyed by them.
"""

from __future__ import annotations

import subprocess
import sys

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from mailweir.model.hashing import hash_tokens, token_hash, token_hashes
from mailweir.model.pairs import (
    GOLDEN,
    first_occurrences,
    mix64,
    mix64_int,
    osb_pair_hashes,
    pair_hash_int,
    pair_hashes,
    split_pair,
)
from mailweir.model.tokenize import (
    TokenizerOptions,
    tokenize,
    tokens,
    tokens_and_hashes,
)
from mailweir.model.words import osb_pairs

INT64 = st.integers(min_value=-(2**63), max_value=2**63 - 1)
HEAD = (
    "From: Priya Raman <priya@harbourlane.example>\r\n"
    "To: orders@vetsupply.example\r\nSubject: Order\r\n"
    "Content-Type: text/plain; charset=utf-8\r\n\r\n"
)


def test_mix64_matches_splitmix64_first_outputs() -> None:
    # splitmix64 from seed 0 returns mix(state) with state advanced by GOLDEN each call; its
    # first outputs 0xe220a8397b1dcdaf, 0x6e789e6aa1b965f4 (from memory, Vigna's
    # splitmix64.c).
    assert mix64_int(GOLDEN) == 0xE220A8397B1DCDAF
    assert mix64_int(2 * GOLDEN % 2**64) == 0x6E789E6AA1B965F4
    states = np.array([GOLDEN, 2 * GOLDEN % 2**64], dtype=np.uint64)
    assert mix64(states).tolist() == [0xE220A8397B1DCDAF, 0x6E789E6AA1B965F4]


def test_pair_hash_pinned_values() -> None:
    # Computed once (see module docstring).
    assert token_hash("osb:0:kennel cough") == -7046398171032676647
    assert token_hash("osb:3:kennel cough") == 7233348003545783526


@given(INT64, INT64, st.integers(min_value=0, max_value=14))
def test_pair_hashes_numpy_equals_python_integers(a: int, b: int, k: int) -> None:
    vectorised = pair_hashes(np.array([a]), np.array([b]), np.array([k]))
    assert vectorised.dtype == np.int64
    assert int(vectorised[0]) == pair_hash_int(a, b, k)
    assert int(pair_hashes(np.array([a]), np.array([b]), np.array([k]))[0]) == int(vectorised[0])


@settings(max_examples=50)
@given(
    st.lists(
        st.tuples(INT64, INT64, st.integers(min_value=0, max_value=14)),
        min_size=2,
        max_size=300,
        unique=True,
    )
)
def test_pair_hashes_distinct_triples_distinct_hashes(triples: list[tuple[int, int, int]]) -> None:
    # Collisions have probability about 2**-64 per pair: none may show up in any sample.
    first, second, distance = (np.array(column) for column in zip(*triples, strict=True))
    assert len(np.unique(pair_hashes(first, second, distance))) == len(triples)


def test_pair_hashes_order_and_distance_matter() -> None:
    a, b = token_hash("kennel"), token_hash("cough")
    assert len({pair_hash_int(a, b, 0), pair_hash_int(b, a, 0), pair_hash_int(a, b, 1)}) == 3
    assert pair_hash_int(a, a, 0) != a


def test_pair_hashes_neighbouring_words_no_collision() -> None:
    # Many pairs over a small vocabulary, as in real text: all distinct triples stay distinct.
    words = np.array([token_hash(f"word{i}") for i in range(60)])
    earlier, later = np.meshgrid(words, words, indexing="ij")
    distance = np.repeat(np.arange(4), earlier.size)
    hashes = pair_hashes(np.tile(earlier.ravel(), 4), np.tile(later.ravel(), 4), distance)
    assert len(np.unique(hashes)) == 4 * 60 * 60


def test_pair_token_hash_same_in_another_process() -> None:
    code = "from mailweir.model.hashing import token_hash; print(token_hash('osb:1:buy pills'))"
    for seed in ("1", "2"):
        out = subprocess.run(
            [sys.executable, "-c", code],
            env={"PYTHONHASHSEED": seed},
            capture_output=True,
            text=True,
            check=True,
        )
        assert int(out.stdout) == token_hash("osb:1:buy pills")


def test_token_hash_of_pair_text_is_the_mixed_pair() -> None:
    mixed = pair_hash_int(token_hash("buy"), token_hash("pills"), 1)
    assert token_hash("osb:1:buy pills") == mixed


def test_split_pair_only_well_formed_pairs() -> None:
    assert split_pair("osb:2:kennel cough") == (2, "kennel", "cough")
    for text in ("osb:x:kennel cough", "osb:1:kennel", "osb:1: cough", "subj:osb", "osb:1:a b c"):
        assert split_pair(text) is None
    # A malformed "osb:" string is hashed as any other text: BLAKE2b (test_hashing.py).
    assert token_hash("osb:1:a b c") != 0


def test_osb_pair_hashes_follow_osb_pairs_order() -> None:
    words = ["please", "order", "forty", "doses", "of", "kennel", "cough", "vaccine", "please"]
    for window in (2, 3, 5):
        expected = [token_hash(pair) for pair in osb_pairs(words, window)]
        word_hashes = np.array([token_hash(w) for w in words])
        assert osb_pair_hashes(word_hashes, window).tolist() == expected
    for window in (2, 5):  # window 2 takes its own path (slices, no index arrays)
        assert len(osb_pair_hashes(np.array([token_hash("alone")]), window)) == 0
        assert len(osb_pair_hashes(np.zeros(0, dtype=np.int64), window)) == 0


@settings(max_examples=300, deadline=None)
@given(st.lists(st.integers(-3, 3) | INT64, max_size=60))
def test_first_occurrences_equals_numpy_unique(values: list[int]) -> None:
    # Reference: numpy's own np.unique(..., return_index=True), sorted (registry library).
    array = np.array(values, dtype=np.int64)
    expected = np.sort(np.unique(array, return_index=True)[1])
    found = first_occurrences(array)
    assert found.tolist() == expected.tolist()
    assert found.dtype == np.intp


def test_tokenize_bigrams_equals_hashing_token_texts() -> None:
    # tokenize() never builds pair strings; the texts from tokens() must hash the same.
    body = (
        "Please order forty doses of kennel cough vaccine for Tuesday. Dr. Maren Okafor "
        "asks for the kennel cough vaccine in single doses, and forty syringes.\r\n"
    )
    raw = (HEAD + body * 3).encode()
    for options in (
        TokenizerOptions(bigrams=True),
        TokenizerOptions(bigrams=True, bigram_window=3),
        TokenizerOptions(bigrams=True, max_tokens=30),  # bigrams cut at the token limit
        TokenizerOptions(bigrams=True, max_tokens=5),  # no room left for any pair
    ):
        assert np.array_equal(tokenize(raw, options), hash_tokens(tokens(raw, options)))
        assert len(tokenize(raw, options)) <= options.max_tokens


def test_tokenize_bigrams_deterministic() -> None:
    raw = (HEAD + "Kennel cough vaccine, forty doses, for Tuesday's clinic.\r\n").encode()
    options = TokenizerOptions(bigrams=True)
    assert np.array_equal(tokenize(raw, options), tokenize(raw, options))


def test_tokens_and_hashes_equal_hashing_the_texts() -> None:
    body = "Tobias Lindqvist orders kennel cough vaccine; Priya Raman books the kennel visit.\r\n"
    raw = (HEAD + body * 4).encode()
    for options in (
        TokenizerOptions(),
        TokenizerOptions(bigrams=True),
        TokenizerOptions(bigrams=True, max_tokens=25),
        TokenizerOptions(bigrams=True, bigram_window=2),
    ):
        texts, hashes = tokens_and_hashes(raw, options)
        assert list(texts) == tokens(raw, options)
        assert hashes.tolist() == [token_hash(text) for text in texts]
        assert np.array_equal(token_hashes(texts), hashes)
