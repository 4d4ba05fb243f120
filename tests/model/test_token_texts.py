"""Token texts made on demand (model/token_texts.py) equal the texts made all at once."""

from __future__ import annotations

import pickle

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from mailweir.daemon.judge import tokenize_step
from mailweir.model.hashing import token_hash
from mailweir.model.token_texts import TokenTexts, pair_text
from mailweir.model.tokenize import TokenizerOptions, tokens, tokens_and_hashes
from mailweir.model.words import osb_pairs

HEAD = (
    "From: Tobias Lindqvist <tobias@kennelsupply.example>\r\n"
    "To: Priya Raman <priya.raman@harbourlane.example>\r\n"
    "Subject: Kennel cough vaccine order\r\n"
    "Content-Type: text/plain; charset=utf-8\r\n\r\n"
)
WORDS = st.lists(st.sampled_from(["kennel", "cough", "vaccine", "otis", "booster", "friday"]))
# Words of the practice's mail, with punctuation, a currency amount, an accent and an apostrophe.
MAIL_WORDS = [
    "Otis", "booster", "kennel", "cough", "vaccine", "Friday", "doses", "forty", "clinic",
    "Dr.", "Okafor", "please", "order", "syringes", "£40", "sähkö", "don't",
]  # fmt: skip


@given(words=WORDS, window=st.integers(2, 16))
def test_pair_text_is_the_pair_osb_pairs_lists_there(words: list[str], window: int) -> None:
    listed = osb_pairs(words, window)
    assert [pair_text(words, at, window) for at in range(len(listed))] == listed


@settings(max_examples=60, deadline=None)
@given(
    lines=st.lists(st.lists(st.sampled_from(MAIL_WORDS), max_size=14), max_size=8),
    window=st.integers(2, 6),
    max_tokens=st.sampled_from([5, 25, 4000]),
)
def test_tokens_and_hashes_names_every_token_as_tokens_does(
    lines: list[list[str]], window: int, max_tokens: int
) -> None:
    raw = (HEAD + "\r\n".join(" ".join(line) for line in lines) + "\r\n").encode()
    options = TokenizerOptions(bigrams=True, bigram_window=window, max_tokens=max_tokens)
    texts, hashes = tokens_and_hashes(raw, options)
    assert list(texts) == tokens(raw, options)
    assert hashes.tolist() == [token_hash(text) for text in texts]


def test_tokenize_step_names_each_bigram_hash_by_its_own_text() -> None:
    body = "Please order forty doses of kennel cough vaccine; the kennel cough clinic is Friday."
    raw = (HEAD + body + "\r\n").encode()
    for window in (2, 3, 5):
        hashes, texts = tokenize_step(raw, TokenizerOptions(bigrams=True, bigram_window=window))
        assert any(text.startswith("osb:") for text in texts)
        assert [token_hash(text) for text in texts] == hashes.tolist()


def test_a_view_indexes_slices_and_pickles_like_a_list() -> None:
    sequences = [["kennel", "cough", "vaccine"]]
    texts = TokenTexts(["subj:kennel", "cough"], sequences, 2, np.array([0, 0]), np.array([1, 0]))
    whole = ["subj:kennel", "cough", "osb:0:cough vaccine", "osb:0:kennel cough"]
    assert list(texts) == whole and texts == whole and len(texts) == 4
    view = texts.take([3, 0, 2])
    assert list(view) == [whole[3], whole[0], whole[2]]
    assert view[-1] == whole[2] and view[0:2] == [whole[3], whole[0]]
    assert list(view.take([2, 0])) == [whole[2], whole[3]]
    assert list(pickle.loads(pickle.dumps(view))) == list(view)  # the process pool sends it
    with pytest.raises(IndexError):
        view[3]


@settings(max_examples=60, deadline=None)
@given(
    lines=st.lists(st.lists(st.sampled_from(MAIL_WORDS), max_size=14), min_size=1, max_size=6),
    bigrams=st.booleans(),
    picks=st.lists(st.integers(0, 10_000), max_size=12),
)
def test_texts_at_equals_indexing_one_at_a_time(
    lines: list[list[str]], bigrams: bool, picks: list[int]
) -> None:
    raw = (HEAD + "\r\n".join(" ".join(line) for line in lines) + "\r\n").encode()
    _, texts = tokenize_step(raw, TokenizerOptions(bigrams=bigrams, bigram_window=3))
    positions = [pick % len(texts) for pick in picks]
    assert texts.texts_at(positions) == [texts[at] for at in positions]  # a sorted view
    whole, _ = tokens_and_hashes(raw, TokenizerOptions(bigrams=bigrams, bigram_window=3))
    positions = [pick % len(whole) for pick in picks]
    assert whole.texts_at(positions) == [whole[at] for at in positions]  # no view order
