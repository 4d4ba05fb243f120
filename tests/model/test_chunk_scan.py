"""The compiled chunk scan gives exactly what its Python spelling gives.

``words.python_scan`` is built from CPython's own ``str.split()``, ``dict.fromkeys`` and
``str.isalpha()``; ``_chunk_scan.scan`` (C) must agree with it on every str, whatever its
storage kind (one, two or four bytes a character), and ``split_words`` must make the same
tokens with either.  ``_chunk_scan.ascii_words`` (the word sequence bigrams pair up) must
give what ``words.python_ascii_words`` finds with the regular expression ``_WORD_ASCII``.
CI builds the extension and sets ``MAILWEIR_REQUIRE_COMPILED=1``, so these checks cannot
pass there by being skipped.
"""

from __future__ import annotations

import os
from collections.abc import Callable

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from mailweir.daemon.scenario import generate, incoming, training_set
from mailweir.model import words
from mailweir.model.tokenize import DEFAULT_OPTIONS, TokenizerOptions, tokens
from mailweir.model.words import MAX_WORD, MIN_WORD, python_ascii_words, python_scan

HeapGrowth = Callable[[Callable[[], object]], int]  # tests/conftest.py's heap_growth
compiled = words.compiled_scan
compiled_words = words.compiled_ascii_words
needs_compiled = pytest.mark.skipif(compiled is None, reason="the C extension was not built")

# Every kind of whitespace str.split() knows, ASCII and beyond (the separators \x1c-\x1f,
# NEL, no-break space, the Unicode spaces, line and paragraph separators), letters of
# Latin-1 that ASCII lacks (ª µ º ß ÿ), and characters that make a str two or four bytes a
# character.
SPACES = list(" \t\n\r\x0b\x0c\x1c\x1d\x1e\x1f\x85\xa0\u1680\u2000\u2009\u2028\u2029\u3000")
CHARACTERS = [*SPACES, *"abcxyz'’09.,$-_é", "ª", "µ", "º", "ß", "ÿ", "×", "日", "ж", "\U0001d400"]
CHUNKY = st.lists(
    st.sampled_from([*CHARACTERS, "kennel", "booster", "a", "b", "x" * 25, "été"]), max_size=60
).map("".join)


def test_the_extension_is_built_where_required() -> None:
    if os.environ.get("MAILWEIR_REQUIRE_COMPILED") == "1":
        assert compiled is not None, "model/_chunk_scan.c was not built"
        assert compiled_words is not None
    assert words.scan_chunks is (compiled or python_scan)
    assert words.ascii_words is (compiled_words or python_ascii_words)


@needs_compiled
@settings(max_examples=3000, deadline=None)
@given(CHUNKY | st.text(max_size=80))
def test_compiled_scan_equals_the_python_scan(text: str) -> None:
    assert compiled is not None
    assert compiled(text, MIN_WORD, MAX_WORD) == python_scan(text, MIN_WORD, MAX_WORD)
    # Dict order is part of the answer: tokens keep the order of first appearance.  Other
    # word lengths too, down to single letters as words.
    for least, most in ((2, 5), (1, 1), (1, 3), (1, 0)):
        assert compiled(text, least, most) == python_scan(text, least, most)
        assert list(compiled(text, least, most)[0]) == list(python_scan(text, least, most)[0])


@needs_compiled
@pytest.mark.parametrize(
    "text",
    [
        "",
        "   \t\n ",
        "kennel",
        "kennel kennel  kennel\n",
        "b c d 4 a i f r e e",
        "ª µ º ßß ÿÿÿ ×× été",  # Latin-1 letters (and × is not one)
        "vaccine\x85booster\xa0kennel\x1cflea\x1fworm",  # Latin-1 and ASCII separators
        "日本語 テスト ж жж жжж \U0001d400\U0001d400\U0001d400",  # two and four bytes a character
        "booster\u3000kennel\u2028flea",
        "x" * 21 + " " + "y" * 20,  # one longer than MAX_WORD, one at it
    ],
)
def test_compiled_scan_on_chosen_text(text: str) -> None:
    assert compiled is not None
    assert compiled(text, MIN_WORD, MAX_WORD) == python_scan(text, MIN_WORD, MAX_WORD)


@needs_compiled
def test_chunks_alike_at_both_ends_stay_apart() -> None:
    # The C table hashes a chunk's first and last eight bytes and its size; chunks that
    # differ only in the middle must still be told apart (by comparing them whole).
    middle = [f"{'a' * 8}{letter}{'b' * 8}" for letter in "klmnop"]
    text = " ".join(middle * 3)
    assert compiled is not None
    plain, others, singles, too_long = compiled(text, MIN_WORD, MAX_WORD)
    assert list(plain) == middle
    assert (others, singles, too_long) == ([], [], False)


@needs_compiled
def test_many_distinct_chunks_grow_the_table() -> None:
    # Past the C table's first 512 slots it grows; nothing may be lost or repeated.
    chunks = [f"w{n:05d}" for n in range(5000)]
    text = " ".join(chunks + chunks[::-1])
    assert compiled is not None
    assert compiled(text, MIN_WORD, MAX_WORD) == python_scan(text, MIN_WORD, MAX_WORD)
    assert len(compiled(text, MIN_WORD, MAX_WORD)[1]) == 5000  # not all letters: digits


@needs_compiled
def test_compiled_scan_refuses_what_is_not_text() -> None:
    assert compiled is not None
    with pytest.raises(TypeError):
        compiled(b"kennel", MIN_WORD, MAX_WORD)  # type: ignore[arg-type]
    with pytest.raises(TypeError):
        compiled("kennel", MIN_WORD)  # type: ignore[call-arg]
    with pytest.raises(TypeError):
        compiled("kennel", "3", MAX_WORD)  # type: ignore[arg-type]


@needs_compiled
def test_compiled_scan_leaks_nothing(heap_growth: HeapGrowth) -> None:
    # Every str, list and dict the scan makes (and the table it frees) is traced.
    text = "kennel booster kennel 250 x été " * 20
    assert compiled is not None
    assert heap_growth(lambda: compiled(text, MIN_WORD, MAX_WORD)) < 2000


# Letters, the apostrophes the pattern knows and one it does not (’), digits, underscores and
# other word-breaking characters: every way a match can start, stop or take its one
# apostrophe group ("don't", "a'b'c", "x'", "'x", "''").
WORDY = st.lists(
    st.sampled_from([*"abzAZ'’ _-.0\n\t\x7f", "kennel", "don't", "o'", "'s", "x" * 21]),
    max_size=60,
).map("".join)


@needs_compiled
@settings(max_examples=3000, deadline=None)
@given(WORDY | st.text(st.characters(max_codepoint=127), max_size=80))
def test_compiled_ascii_words_equal_the_pattern(text: str) -> None:
    assert compiled_words is not None
    for least, most in ((MIN_WORD, MAX_WORD), (1, 1), (1, 4), (3, 2), (1, 100)):
        assert compiled_words(text, least, most) == python_ascii_words(text, least, most)


@needs_compiled
@pytest.mark.parametrize(
    ("text", "expected"),
    [
        ("", []),
        ("kennel cough, kennel!", ["kennel", "cough", "kennel"]),
        ("don't o' 'tis a'b'c", ["don't", "o", "tis", "a'b", "c"]),  # one apostrophe group
        ("it’s", ["it"]),  # the typographic apostrophe is not ASCII: not split here
        ("k9 x_y 3rd", ["k", "x", "y", "rd"]),  # digits and _ break words
    ],
)
def test_ascii_words_on_chosen_text(text: str, expected: list[str]) -> None:
    # The Python spelling is the regular expression itself; the expected lists are the
    # pattern's matches worked out by hand.  Lengths 1 to MAX_WORD here.
    found = words.ascii_words(text, 1, MAX_WORD)
    if not text.isascii():
        assert found is None
        return
    assert found == expected
    assert python_ascii_words(text, 1, MAX_WORD) == expected


@needs_compiled
def test_ascii_words_repeats_are_one_object_and_the_table_grows() -> None:
    # A repeated word is the same str (the probe then hashes it once); past the table's
    # first 512 slots nothing may be lost or repeated.
    assert compiled_words is not None
    distinct = ["w" + "".join(chr(97 + int(digit)) for digit in f"{n:04d}") for n in range(3000)]
    found = compiled_words(" ".join(distinct + distinct), MIN_WORD, MAX_WORD)
    assert found == distinct + distinct
    assert all(a is b for a, b in zip(found[:3000], found[3000:], strict=True))


@needs_compiled
def test_ascii_words_refuses_what_is_not_text_and_leaks_nothing(heap_growth: HeapGrowth) -> None:
    assert compiled_words is not None
    with pytest.raises(TypeError):
        compiled_words(b"kennel", MIN_WORD, MAX_WORD)  # type: ignore[arg-type]
    with pytest.raises(TypeError):
        compiled_words("kennel", MIN_WORD)  # type: ignore[call-arg]
    text = "kennel booster kennel 250 don't " * 20
    assert heap_growth(lambda: compiled_words(text, MIN_WORD, MAX_WORD)) < 2000


def _split_both(text: str) -> tuple[words.TextTokens, words.TextTokens]:
    with pytest.MonkeyPatch.context() as patch:
        first = words.split_words(text, sequence=True)
        patch.setattr(words, "scan_chunks", python_scan)
        patch.setattr(words, "ascii_words", python_ascii_words)
        return first, words.split_words(text, sequence=True)


@needs_compiled
@settings(max_examples=1500, deadline=None)
@given(CHUNKY)
def test_split_words_the_same_with_either_scan(text: str) -> None:
    first, second = _split_both(text)
    assert first == second


@needs_compiled
@pytest.mark.parametrize("options", [DEFAULT_OPTIONS, TokenizerOptions(bigrams=True)])
def test_tokens_the_same_on_the_scenario_mail(
    options: TokenizerOptions, monkeypatch: pytest.MonkeyPatch
) -> None:
    mail = [*training_set(40), *incoming(), *generate(40, "spam", seed=11)]
    compiled_tokens = [tokens(message.raw, options) for message in mail]
    monkeypatch.setattr(words, "scan_chunks", python_scan)
    monkeypatch.setattr(words, "ascii_words", python_ascii_words)
    assert [tokens(message.raw, options) for message in mail] == compiled_tokens
