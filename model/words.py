"""Splitting cleaned text into word tokens, bucketing numbers, money and long words, and
orthogonal sparse bigrams.

Body words carry no prefix; everything else this module makes has its own: "num:", "money:",
"long:", "obf:" (markers of obfuscation) and "osb:" (bigrams).
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Final

from .normalize import LEET_NEIGHBOUR, mixed_chunks, spaced_words

MIN_WORD: Final = 3
MAX_WORD: Final = 20
# Letters, with an inner apostrophe kept ("don't"); CJK scripts are handled apart because
# they are written without spaces.
_CJK: Final = "\u3040-\u30ff\u3400-\u4dbf\u4e00-\u9fff\uac00-\ud7af\uf900-\ufaff"
_WORD: Final = re.compile(r"[^\W\d_" + _CJK + r"]+(?:['’][^\W\d_" + _CJK + r"]+)?")
# The same for ASCII text, where [^\W\d_] is [A-Za-z] and "’" cannot occur: the engine tests a
# small character set instead of Unicode classes (86 against 143 µs for 4 KB of mail).
_WORD_ASCII: Final = re.compile(r"[A-Za-z]+(?:'[A-Za-z]+)?")
_CJK_RUN: Final = re.compile("[" + _CJK + "]{2,}")
_NUMBER: Final = re.compile(r"(?<![\w.,])\d+(?:[.,]\d+)*")
_CURRENCY: Final = {"$": "$", "€": "€", "£": "£", "¥": "¥", "usd": "$", "eur": "€", "gbp": "£"}
_MONEY: Final = re.compile(
    r"([$€£¥])\s?(\d{1,15}(?:[.,]\d{1,3})*)|(?<![\w.,])(\d{1,15}(?:[.,]\d{1,3})*)\s?"
    r"([$€£¥]|usd\b|eur\b|gbp\b)"
)
_SIGNS: Final = "$€£¥"
_CURRENCY_WORDS: Final = frozenset(word for word in _CURRENCY if word.isalpha())
_NUMBER_THEN_WORD: Final = re.compile(r"\d\s?(?:usd|eur|gbp)")
_MONEY_START: Final = re.compile(r"[$€£¥\d]\d*")  # a sign, or a run of digits from its first


# What ``_MONEY``'s amount branch allows between a run of digits and a currency word or sign:
# its digits and separators, then at most one ASCII whitespace character (``\\s`` in a str
# pattern takes those that ``str.isspace``).
_AMOUNT_CHARS: Final = frozenset("0123456789.,")
_ASCII_SPACE: Final = frozenset(chr(byte) for byte in range(128) if chr(byte).isspace())
_AMOUNT_ENDS: Final = ("$", *sorted(_CURRENCY_WORDS))  # the ASCII sign and the words
# Cheap tests that decide whether the slower obfuscation checks run at all.
_LEET_HINT: Final = LEET_NEIGHBOUR
# "\b\w[sep]\w[sep]\w[sep]\w\b", written to start at the first separator (skipped to in C)
# and look back for the word character before it: 2.4 times faster, the same matches.
_SEPARATED_HINT: Final = re.compile(r"[-._*+~·•](?<=\b\w[-._*+~·•])\w[-._*+~·•]\w[-._*+~·•]\w\b")
_CENTS: Final = re.compile(r"[.,]\d{1,2}$")
_DIGIT: Final = re.compile(r"\d")
_CJK_BIGRAMS_PER_RUN: Final = 64
# Single letters other than the English words "a" and "i" seldom stand alone in prose.
_RARE_SINGLE_LETTERS: Final = frozenset("bcdefghjklmnopqrstuvwxyz0123456789")


def magnitude(digits: int) -> str:
    """Power-of-ten bucket of a whole number with ``digits`` digits ("0-9", "100-999", ...)."""
    if digits >= 7:
        return "1000000+"
    low = 0 if digits <= 1 else 10 ** (digits - 1)
    return f"{low}-{10**digits - 1}"


def money_tokens(text: str) -> list[str]:
    """ "money:<symbol>:<magnitude>" for amounts such as "$250", "€ 1.200,00" or "99 usd"."""
    found: list[str] = []
    for symbol, amount, amount2, symbol2 in _money_matches(text):
        currency = _CURRENCY.get(symbol or symbol2, "?")
        whole = _CENTS.split(amount or amount2)[0]
        digits = sum(ch.isdigit() for ch in whole)
        found.append(f"money:{currency}:{magnitude(max(digits, 1))}")
    return found


def _money_matches(text: str) -> list[tuple[str, str, str, str]]:
    """``_MONEY.findall(text)``, found faster.

    ``_MONEY`` starts with a look-behind, so ``findall`` tries both branches at every
    character (about 0.3 µs each; "eur" inside "amateur" sent a fifth of the development
    corpus's messages through it).  A match starts at a sign, or at a digit whose run of
    digits, "." and "," is followed (after at most one space) by a sign or a currency word.
    In ASCII text (nearly all mail) ``match`` is tried only at those places
    (``_money_places``).  Other text is first tested for a sign or a digit followed by a
    currency word (without either there is no match), then tried at every sign and run of
    digits (``_money_scan``).  Places are tried in order, and scanning resumes after each
    match as ``findall`` does.
    """
    if not text.isascii():
        if not any(sign in text for sign in _SIGNS) and not _NUMBER_THEN_WORD.search(text):
            return []
        return _money_scan(text)
    found: list[tuple[str, str, str, str]] = []
    match = _MONEY.match
    at = 0
    for start in _money_places(text):
        if start < at:
            continue
        amount = match(text, start)
        if amount is not None:
            found.append(amount.groups(default=""))  # type: ignore[arg-type]
            at = amount.end()
    return found


def _money_places(text: str) -> list[int]:
    """Every place in ASCII *text* where ``_MONEY`` can match, in order (and a few where it
    cannot).

    A match starts at a sign, or at a digit of a run of digits, "." and "," that is followed
    (after at most one whitespace character) by a sign or a currency word.  So the places
    are found from the signs and currency words, which ``str.find`` skips to, walking back
    over the run before each.  For the development corpus's 4 KB mail that holds a sign,
    ``_money_matches`` costs 121 thousand instructions this way, against 263 thousand with a
    regular-expression search for such digits in the text coded a byte a character (every
    digit of the corpus's many numbers was tried there), which in turn took a third of the
    time of a ``match`` at every sign and run of digits (``_money_scan``).
    """
    places: set[int] = set()
    for end in _AMOUNT_ENDS:
        at = text.find(end)
        while at >= 0:
            if end == "$":
                places.add(at)
            places.update(_digits_before(text, at))
            at = text.find(end, at + 1)
    return sorted(places)


def _digits_before(text: str, end: int) -> list[int]:
    """The digits of the run of digits, "." and "," that ends at *end* or one whitespace
    character before it."""
    at = end - 1
    if at >= 0 and text[at] in _ASCII_SPACE:
        at -= 1
    digits: list[int] = []
    while at >= 0 and (char := text[at]) in _AMOUNT_CHARS:
        if char.isdigit():
            digits.append(at)
        at -= 1
    return digits


def _money_scan(text: str) -> list[tuple[str, str, str, str]]:
    """``_MONEY.findall(text)`` for any text: ``match`` at each sign and each run of digits."""
    found: list[tuple[str, str, str, str]] = []
    search, match = _MONEY_START.search, _MONEY.match
    at = 0
    while (start := search(text, at)) is not None:
        amount = match(text, start.start())
        if amount is None:
            at = start.end()
        else:
            found.append(amount.groups(default=""))  # type: ignore[arg-type]
            at = amount.end()
    return found


def number_tokens(text: str) -> list[str]:
    """ "num:len<d>" for free-standing numbers, d = digit count capped at "12+"."""
    found = set(_NUMBER.findall(text))
    joined = " ".join(found)
    if "." in joined or "," in joined:
        lengths = {len(match) - match.count(".") - match.count(",") for match in found}
    else:  # the common case: lengths in one C-level pass (92 against 127 thousand instructions)
        lengths = set(map(len, found))
    return [f"num:len{n}" if n < 12 else "num:len12+" for n in sorted(lengths)]


def long_token(length: int) -> str:
    """Bucket for a word longer than MAX_WORD: "long:<low>-<high>" in steps of 10."""
    low = length // 10 * 10
    return f"long:{low}-{low + 9}" if low < 60 else "long:60+"


@dataclass
class TextTokens:
    """Tokens of one cleaned text.

    Attributes
    ----------
    tokens : dict of str to None
        Unique tokens in order of first appearance (a dict, so a caller collecting tokens in
        one merges them in a single C-level step): plain words, long-word buckets, numbers,
        money, obfuscated words (both the decoded word and the raw form), CJK bigrams.
    sequence : list of str
        Plain words in text order, repeats kept (only when asked for; for bigrams).
    rest : str
        The distinct whitespace-separated chunks that are not plain words, sorted and joined
        by spaces: everything a URL, number or obfuscation can be in.
    """

    tokens: dict[str, None]
    sequence: list[str]
    rest: str


def split_words(text: str, prefix: str = "", sequence: bool = False) -> TextTokens:
    """Word tokens of cleaned (case-folded) text.

    Most whitespace-separated chunks of ordinary text are plain words; they are taken as
    they are, and the regular expressions run only over the distinct remaining chunks
    (punctuation, digits, symbols), which keeps the common case to a few C-level passes.

    Parameters
    ----------
    text : str
        Output of ``normalize.clean_text``.
    prefix : str
        Put before every token ("subj:" for the subject; "" for body text).
    sequence : bool
        Also return the words in order with repeats (costs one more pass).
    """
    out, others, singles, too_long = scan_chunks(text, MIN_WORD, MAX_WORD)
    currency_word = not out.keys().isdisjoint(_CURRENCY_WORDS)  # as a chunk of its own
    others.sort()  # the same order in every process
    rest = " ".join(others)
    if rest:
        for word in _words_in(rest):
            if (size := len(word)) >= MIN_WORD:
                out[word] = None
                if size > MAX_WORD:
                    too_long = True
    if too_long:
        out = dict.fromkeys([w if len(w) <= MAX_WORD else long_token(len(w)) for w in out])
    if _DIGIT.search(rest):
        out.update(dict.fromkeys(number_tokens(rest)))
    if _may_hold_money(rest, currency_word):
        out.update(dict.fromkeys(money_tokens(text)))
    if _LEET_HINT.search(rest):
        _add_obfuscated(others, out)
    if _SEPARATED_HINT.search(rest):  # "v-i-a-g-r-a"
        _add_spaced(rest, out)
    if len(_RARE_SINGLE_LETTERS.intersection(singles)) >= 2:  # "f r e e": letters as chunks
        _add_spaced(text, out)
    if not text.isascii():
        for run in _CJK_RUN.findall(text):
            run = run[: _CJK_BIGRAMS_PER_RUN + 1]
            out.update(dict.fromkeys(run[i : i + 2] for i in range(len(run) - 1)))
    out.pop("", None)
    found = {prefix + token: None for token in out} if prefix else out
    return TextTokens(found, word_sequence(text) if sequence else [], rest)


def word_sequence(text: str) -> list[str]:
    """The words of cleaned text in order, repeats kept, MIN_WORD to MAX_WORD long (what
    bigrams pair up): ``ascii_words`` for ASCII text, the Unicode pattern for the rest."""
    found = ascii_words(text, MIN_WORD, MAX_WORD)
    if found is None:
        found = [w for w in _WORD.findall(text) if MIN_WORD <= len(w) <= MAX_WORD]
    return found


def _words_in(text: str) -> list[str]:
    """``_WORD.findall(text)``; ``str.isascii`` costs nothing (CPython keeps the flag)."""
    return (_WORD_ASCII if text.isascii() else _WORD).findall(text)


def _may_hold_money(rest: str, currency_word: bool) -> bool:
    """Whether ``money_tokens(text)`` can find anything, looking only at the non-word chunks
    and whether a currency word stands as a chunk of its own (both far cheaper than the
    text).  An amount holds a digit, so its chunk is never all letters, and a sign is never a
    letter: both lie in ``rest``.  A currency word counts after a digit and before a word
    boundary: inside a chunk with that digit or the boundary's character (in ``rest``), or
    as a chunk of its own."""
    return currency_word or any(symbol in rest for symbol in _CURRENCY)


def python_scan(
    text: str, min_word: int, max_word: int
) -> tuple[dict[str, None], list[str], list[str], bool]:
    """The distinct chunks of ``text.split()``, in order of first appearance, sorted out.

    Returns the plain words (all letters, at least *min_word* long) as a dict to None, the
    chunks that are not all letters, the chunks of one character (letters or not), and
    whether a plain word is longer than *max_word*.  ``_chunk_scan.scan`` does the same in C,
    making str objects of the distinct chunks only (the tests hold the two to each other);
    this is the Python spelling, used where the extension was not built (``scan_chunks``
    is whichever of the two this process has).
    """
    # One plain loop over the distinct chunks: on Python 3.11 it beats the filter, set
    # difference and compress(map(len)) passes it replaced (38 against 50 µs for 4 KB).
    plain: dict[str, None] = {}
    others: list[str] = []
    singles: list[str] = []
    too_long = False
    for chunk in dict.fromkeys(text.split()):
        if not chunk.isalpha():
            others.append(chunk)
            if len(chunk) == 1:
                singles.append(chunk)
        elif (size := len(chunk)) >= min_word:
            plain[chunk] = None
            if size > max_word:
                too_long = True
            if size == 1:  # only where min_word is 1
                singles.append(chunk)
        elif size == 1:
            singles.append(chunk)
    return plain, others, singles, too_long


def python_ascii_words(text: str, min_word: int, max_word: int) -> list[str] | None:
    """The words of ASCII text in order, repeats kept: ``_WORD_ASCII``'s matches from
    *min_word* to *max_word* characters long; None when *text* is not ASCII.
    ``_chunk_scan.ascii_words`` does the same in C (the tests hold the two to each other)."""
    if not text.isascii():
        return None
    return [w for w in _WORD_ASCII.findall(text) if min_word <= len(w) <= max_word]


try:  # the compiled scan, where the build made it (setup.py: optional)
    from ._chunk_scan import ascii_words as compiled_ascii_words
    from ._chunk_scan import scan as compiled_scan
except ImportError:  # depends on the build: a C compiler and Python's headers
    compiled_scan = compiled_ascii_words = None
scan_chunks: Final = compiled_scan or python_scan
ascii_words: Final = compiled_ascii_words or python_ascii_words


def _add_obfuscated(chunks: list[str], out: dict[str, None]) -> None:
    for raw, word in mixed_chunks(chunks):
        if len(raw) <= MAX_WORD:
            out[raw] = None
        if word:
            out[word if len(word) <= MAX_WORD else long_token(len(word))] = None
            out["obf:leet"] = None


def _add_spaced(text: str, out: dict[str, None]) -> None:
    for raw, word in spaced_words(text):
        out[raw] = None
        out[word if len(word) <= MAX_WORD else long_token(len(word))] = None
        out["obf:spaced"] = None


def osb_pairs(sequence: Sequence[str], window: int) -> list[str]:
    """Orthogonal sparse bigrams of a word sequence.

    Every word is paired with each of the ``window - 1`` words before it; the token records
    how many words lie between them: ``"osb:<k>:<earlier> <later>"`` with k = 0 .. window-2
    (Siefkes et al., "Combining Winnow and Orthogonal Sparse Bigrams for Incremental Spam
    Filtering", PKDD 2004).  For "buy cheap pills now" and window 3 the pairs are
    "osb:0:buy cheap", "osb:0:cheap pills", "osb:1:buy pills", "osb:0:pills now",
    "osb:1:cheap now".

    Parameters
    ----------
    sequence : sequence of str, length L
        Words in text order.
    window : int
        Window size N >= 2 (counting both ends).

    Returns
    -------
    list of str, length <= L * (N - 1)
        Pairs in order of their later word, nearest earlier word first.
    """
    pairs: list[str] = []
    for i, later in enumerate(sequence):
        for k in range(min(window - 1, i)):
            pairs.append(f"osb:{k}:{sequence[i - 1 - k]} {later}")
    return pairs
