"""Fast paths give exactly what the plain kernels give (they exist only for speed)."""

from __future__ import annotations

import re

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from mailweir.model import html_text, words
from mailweir.model.fisher import RobinsonFisher
from mailweir.model.hashing import hash_tokens, token_hash, token_hashes
from mailweir.model.nb_base import NaiveBayes, posterior_spam
from mailweir.model.normalize import _INVISIBLE_CHARS, _INVISIBLE_RANGES, LEET_NEIGHBOUR
from mailweir.model.normalize import _LEET_CHARS as LEET_CHARS
from mailweir.model.types import Vocabulary
from mailweir.model.words import money_tokens


@pytest.mark.parametrize(
    "scorer",
    [RobinsonFisher(), RobinsonFisher(strength=1.0, max_tokens=None), RobinsonFisher(0.3, 0.4)],
)
def test_fisher_probability_and_weights_equal_the_kernels(scorer: RobinsonFisher) -> None:
    rng = np.random.default_rng(5)
    classes = np.array([400, 150], dtype=np.int64)
    for size in (0, 1, 7, 300):
        counts = np.stack([rng.integers(0, 400, size), rng.integers(0, 150, size)], axis=1)
        counts[rng.random(size) < 0.3] = 0  # unknown tokens
        vocabulary = Vocabulary.from_token_counts(counts)
        probability, weights = scorer.probability_and_weights(counts, classes, vocabulary)
        jll = scorer.joint_log_likelihood(counts, classes, vocabulary)
        assert probability == posterior_spam(jll)
        plain = NaiveBayes.probability_and_weights(scorer, counts, classes, vocabulary)
        assert probability == plain[0]
        np.testing.assert_array_equal(weights, scorer.token_weights(counts, classes, vocabulary))


def test_token_hashes_aligned_with_token_hash() -> None:
    words = ["booster", "kennel", "booster", "ärzte", ""]
    assert token_hashes(words).tolist() == [token_hash(w) for w in words]
    np.testing.assert_array_equal(hash_tokens(words), np.unique(token_hashes(words)))


# Text as split_words meets it (case-folded), rich in what money and its gate look at.
MONEY_TEXT = st.lists(
    st.sampled_from(
        [
            *["$", "€", "£", "¥", "usd", "eur", "gbp", "eureka", "amateur", "5", "250", "1.200,00"],
            *[" ", "\u00a0", "\t", ".", ",", "-", "kennel", "fee", "a", "99usd", "_", "x"],
        ]
    ),
    max_size=14,
).map("".join)


@settings(max_examples=400, deadline=None)
@given(MONEY_TEXT)
def test_money_gate_never_hides_an_amount(text: str) -> None:
    # The gate looks only at the non-word chunks and the chunk set; money_tokens at the text.
    chunks = dict.fromkeys(text.split())
    rest = " ".join(sorted(chunks.keys() - set(filter(str.isalpha, chunks))))
    currency_word = not chunks.keys().isdisjoint({"usd", "eur", "gbp"})
    if money_tokens(text):
        assert words._may_hold_money(rest, currency_word)


# The two hints in their plain form, as first written: the fast forms must agree with them.
PLAIN_LEET = re.compile(
    r"[^\W\d_][" + re.escape(LEET_CHARS) + r"]|[" + re.escape(LEET_CHARS) + r"][^\W\d_]"
)
PLAIN_SEPARATED = re.compile(r"\b\w[-._*+~·•]\w[-._*+~·•]\w[-._*+~·•]\w\b")
HINT_TEXT = st.text(st.sampled_from(list("ab1 0_.-!|é·5xZ\u00a0ß3@€~*\n")), max_size=16)


@settings(max_examples=3000, deadline=None)
@given(HINT_TEXT)
def test_obfuscation_hints_find_what_their_plain_forms_find(text: str) -> None:
    assert bool(LEET_NEIGHBOUR.search(text)) == bool(PLAIN_LEET.search(text))
    assert bool(words._SEPARATED_HINT.search(text)) == bool(PLAIN_SEPARATED.search(text))


# ASCII letters and every kind of character next to them, with a few beyond ASCII.
WORD_TEXT = st.text(
    st.sampled_from(list("aZq'’_09 -.\t\n\x7f\x00é日ß") + [chr(c) for c in range(32, 127)]),
    max_size=40,
)


@settings(max_examples=3000, deadline=None)
@given(WORD_TEXT)
def test_ascii_word_pattern_finds_what_the_unicode_one_finds(text: str) -> None:
    # The ASCII pattern runs only on ASCII text; over any text it must agree there.
    assert words._words_in(text) == words._WORD.findall(text)
    if text.isascii():
        assert words._WORD_ASCII.findall(text) == words._WORD.findall(text)


# Amount-shaped pieces and what sits around them, ASCII and not (whitespace of every kind
# that \s matches, separators, signs, currency words, digits of other scripts).
MONEY_PIECES = [
    *["$", "€", "£", "¥", "usd", "eur", "gbp", "usda", "5", "250", "1.200,00", "12,5", "0"],
    *[" ", "  ", "\t", "\n", "\x1c", "\u00a0", ".", ",", "-", "_", "a", "x9", "٣", "fee"],
    *["?", "\u2009", "—", "١٢", "€5", "5\u00a0usd", "٣,٥"],
]


@settings(max_examples=3000, deadline=None)
@given(
    st.lists(st.sampled_from(MONEY_PIECES), max_size=16).map("".join)
    | st.text(st.sampled_from(list("$€£9 1.,u sdeg_x\t\x1fa?٣\u00a0—")), max_size=30)
    # ASCII only, where places are found from the signs and currency words walking back.
    | st.lists(
        st.sampled_from(
            ["$", "usd", "eur", "gbp", "9", "12", ".", ",", " ", "\t", "\x1c", "\n", "x"]
        ),
        max_size=20,
    ).map("".join)
)
def test_money_matches_are_what_findall_finds(text: str) -> None:
    # Oracle: the plain scan of the pattern that _money_matches replaces.
    assert words._money_matches(text) == words._MONEY.findall(text)


def test_invisible_character_set_is_exactly_the_ranges() -> None:
    # Every code point once: the regular-expression set clean_text deletes with must delete
    # what a translation table of the listed ranges deletes, and nothing else.
    every = "".join(map(chr, range(0x110000)))
    table = {cp: None for lo, hi in _INVISIBLE_RANGES for cp in range(lo, hi + 1)}
    assert _INVISIBLE_CHARS.sub("", every) == every.translate(table)


# Markup made of tags (inline names and near misses, in every case), inline styles that hide
# text or nearly do, and filler, with characters beyond ASCII that case-blind matching treats
# as letters of these words ("ſ" is an "s", the Kelvin sign a "k").
TAG_NAMES = ["a", "A", "abbr", "ab", "b", "big", "bi", "em", "FONT", "i", "small", "Span"]
TAG_NAMES += ["strong", "sub", "SUP", "subx", "s", "u", "wbr", "ſpan", "div", "img"]
TAG = st.tuples(
    st.sampled_from(["<", "</"]),
    st.sampled_from(TAG_NAMES),
    st.sampled_from(["", " ", " x=1", "x", "-"]),
    st.sampled_from([">", "", "<"]),
).map("".join)
STYLE = st.tuples(
    st.sampled_from(["display", "DISPLAY", "Diſplay", "font-size", "Font-Size", "FONT-SİZE"]),
    st.sampled_from(["", " ", "\t"]),
    st.sampled_from([":", "", "="]),
    st.sampled_from(["", " "]),
    st.sampled_from(["none", "NONE", "nonE", "0", "1", "2", "0.5", "1px", "0PT", "05", "0x", "1,"]),
).map("".join)
FILLER = st.sampled_from([" ", "x", "é", "\n", ";", "\u212a"])
MARKUP = st.lists(st.one_of(TAG, STYLE, FILLER), max_size=8).map("".join)

# The inline-tag pattern as first written, names one by one (html_text.py factors them).
PLAIN_INLINE_TAG = re.compile(
    r"(?i)</?(?:a|abbr|b|big|em|font|i|small|span|strong|sub|sup|u|wbr)\b[^<>]*>"
)


@settings(max_examples=3000, deadline=None)
@given(MARKUP)
def test_html_fast_searches_find_what_their_plain_forms_find(markup: str) -> None:
    assert html_text._INLINE_TAG.sub("", markup) == PLAIN_INLINE_TAG.sub("", markup)
    assert html_text._hides_text(markup) == bool(html_text._HIDDEN_STYLE.search(markup))
