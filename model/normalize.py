"""Unicode clean-up and undoing common word obfuscation.

Everything here works on whole strings with C-level calls (``str.translate``,
``unicodedata.normalize``, compiled regexes); Python loops run only over the few candidate
words that mix letters with digits or symbols, or over runs of spaced-apart letters.
"""

from __future__ import annotations

import re
import string
import unicodedata
from collections.abc import Iterable
from typing import Final

# Code points that render as nothing but split or disguise words: zero-width space/joiners,
# bidi marks and embeddings/isolates, word joiner and invisible operators, BOM, soft hyphen,
# combining grapheme joiner, Mongolian vowel separator, Hangul fillers, variation selectors.
_INVISIBLE_RANGES: Final = (
    (0x00AD, 0x00AD),
    (0x034F, 0x034F),
    (0x061C, 0x061C),
    (0x115F, 0x1160),
    (0x17B4, 0x17B5),
    (0x180B, 0x180F),
    (0x200B, 0x200F),
    (0x202A, 0x202E),
    (0x2060, 0x206F),
    (0x3164, 0x3164),
    (0xFE00, 0xFE0F),
    (0xFEFF, 0xFEFF),
    (0xFFA0, 0xFFA0),
    (0xE0000, 0xE007F),
)
# As a character set the engine scans for them in C, where ``str.translate`` with a dict of
# them looked every character up: ``clean_text`` of 4 KB of German text takes 57 µs against 278.
_INVISIBLE_CHARS: Final = re.compile(
    "[" + "".join(f"{chr(lo)}-{chr(hi)}" for lo, hi in _INVISIBLE_RANGES) + "]"
)

# Digits and symbols that stand in for letters ("v1agra", "fr€e", "$ave", "h@ppy"); from
# memory of common obfuscations, no source.
_LEET: Final = str.maketrans(
    {"0": "o", "1": "i", "3": "e", "4": "a", "5": "s", "7": "t", "@": "a", "$": "s", "€": "e"}
    | {"!": "i", "|": "l", "£": "l", "¡": "i"}
)
_SEPARATORS: Final = str.maketrans("", "", "-._*+~'`^·•")
_LEET_CHARS: Final = "01345 7@$€!|£¡".replace(" ", "")

_PLAIN_ALNUM: Final = re.compile(r"\d+[^\W\d_]+|[^\W\d_]+\d")
# A letter next to a leet character: the sign of a chunk worth de-obfuscating.  Written to
# start at the leet character, so the regular expression engine skips to those in C; the
# plain "letter then leet, or leet then letter" found the same (tests/model/
# test_fast_paths.py) fourteen times slower on a 4 KB message's chunks.
LEET_NEIGHBOUR: Final = re.compile(
    r"[" + re.escape(_LEET_CHARS) + r"](?:(?<=[^\W\d_].)|(?=[^\W\d_]))"
)
MAX_CHUNK: Final = 40
_EDGE_PUNCT: Final = "\"'()[]{}<>.,;:?!*«»“”‘’"

# Four or more single letters (or leet characters) separated by spaces or punctuation:
# "f r e e", "V-I-A-G-R-A", "v.1.a.g.r.a".  Each unit must stand alone (no letter either side).
_UNIT: Final = r"(?:[^\W_]|[" + re.escape("@$€!|") + r"])"
_SPACED: Final = re.compile(
    r"(?<![^\W_])" + _UNIT + r"(?:(?:[ \t.\-_*+~·•]{1,3})" + _UNIT + r"){3,40}(?![^\W_])"
)
# Every match holds its second unit between two separators.  This search starts at a separator
# (a few per word, where _SPACED tries every character), so it is about five times cheaper and
# rules out most texts before _SPACED runs: on the development corpus 27 % of texts pass it
# and 5 % hold a run.
_SPACED_HINT: Final = re.compile(
    r"[ \t.\-_*+~·•]" + _UNIT + r"[ \t.\-_*+~·•]{1,3}" + _UNIT + r"[ \t.\-_*+~·•]"
)
# For ASCII text, where [^\W_] is [A-Za-z0-9] and "€·•" cannot occur: the engine tests
# small character sets instead of Unicode classes (33 against 59 µs for 4 KB of mail).
_UNIT_ASCII_CHARS: Final = string.ascii_letters + string.digits + "@$!|"
_UNIT_ASCII: Final = "[" + re.escape(_UNIT_ASCII_CHARS) + "]"
_SPACED_ASCII: Final = re.compile(
    r"(?<![A-Za-z0-9])" + _UNIT_ASCII + r"(?:(?:[ \t.\-_*+~]{1,3})" + _UNIT_ASCII + r"){3,40}"
    r"(?![A-Za-z0-9])"
)


def coding_table(default: str, codes: dict[str, str]) -> bytes:
    """A ``bytes.translate`` table coding ASCII text a byte each: every character that is a
    key of *codes* to its value, every other byte to *default*.

    A search over text coded so can start from a literal, which the regular-expression
    engine skips to in C, where a character set of the text made it enter its matcher at
    every candidate character; positions stay those of the text.
    """
    table = bytearray(default.encode("ascii") * 256)
    for char, code in codes.items():
        table[ord(char)] = ord(code)
    return bytes(table)


# The hint for ASCII text, coded: separators as " ", units as "u", anything else as "x", where
# the hint is the literal run " u" + " "{1,3} + "u " (spaced_runs: 29 against 55 µs for the
# development corpus's 4 KB mail with the hint's character-set form).  Written " u " + " "{0,2}
# + "u ", the same runs, so that the engine's literal prefix is " u " (a lone unit) and not
# " u" (the start of every word), where each hit entered the matcher: for the development
# corpus's 4 KB mail, 69 against 158 thousand instructions.
_HINT_CODE: Final = coding_table(
    "x", dict.fromkeys(" \t.-_*+~", " ") | dict.fromkeys(_UNIT_ASCII_CHARS, "u")
)
_SPACED_HINT_CODED: Final = re.compile(rb" u  {0,2}u ")


def clean_text(text: str) -> tuple[str, bool]:
    """Drop invisible characters, apply NFKC and case folding.

    Parameters
    ----------
    text : str
        Decoded text.

    Returns
    -------
    text : str
        The cleaned, case-folded text.
    had_invisible : bool
        Whether invisible characters were removed (itself a useful signal).
    """
    if text.isascii():
        return text.lower(), False
    stripped = _INVISIBLE_CHARS.sub("", text)
    had_invisible = len(stripped) != len(text)
    return unicodedata.normalize("NFKC", stripped).casefold(), had_invisible


def deleet(word: str) -> str:
    """The letters a leet-spelled word stands for ("fr33" -> "free"), or "" if it is not one.

    A result counts only when it is at least three letters long and differs from the input
    with separators removed; words with digits that have no letter reading give "", and so do
    ordinary shapes: a number with a unit ("10am", "5kg") or a name with one trailing digit
    ("mp3").
    """
    core = word.translate(_SEPARATORS)
    if _PLAIN_ALNUM.fullmatch(core):
        return ""
    plain = core.translate(_LEET)
    if len(plain) < 3 or plain == core or not plain.isalpha():
        return ""
    letters = sum(1 for ch in core if ch.isalpha())
    return plain if letters >= 2 else ""


def mixed_chunks(chunks: Iterable[str]) -> list[tuple[str, str]]:
    """(raw, deobfuscated) pairs for chunks (of at most 40 characters) mixing letters and
    leet characters.

    ``raw`` is the chunk with surrounding punctuation stripped; ``deobfuscated`` is
    ``deleet(raw)`` and may be "" (e.g. "mp3", "10am" style words keep only their raw form).
    """
    pairs: list[tuple[str, str]] = []
    for chunk in chunks:
        if len(chunk) > MAX_CHUNK or not LEET_NEIGHBOUR.search(chunk):
            continue
        raw = chunk.strip(_EDGE_PUNCT)
        if len(raw) >= 3 and not raw.isalpha():
            pairs.append((raw, deleet(raw)))
    return pairs


def spaced_words(text: str) -> list[tuple[str, str]]:
    """(raw, joined) pairs for letters spaced apart ("f r e e" -> ("f r e e", "free")).

    ``raw`` has whitespace runs collapsed to one space.  Runs whose joined form is not a word
    of at least two letters (dates, phone numbers, list markers) are skipped.
    """
    pairs: list[tuple[str, str]] = []
    for match in spaced_runs(text):
        raw = " ".join(match.group(0).split())
        joined = "".join(ch for ch in raw if ch.isalnum() or ch in _LEET_CHARS)
        word = joined if joined.isalpha() else joined.translate(_LEET)
        if word.isalpha() and sum(1 for ch in joined if ch.isalpha()) >= 2:
            pairs.append((raw, word))
    return pairs


def spaced_runs(text: str) -> list[re.Match[str]]:
    """``list(_SPACED.finditer(text))``, found by trying ``_SPACED`` only where a run can start.

    ``finditer`` tries the pattern at every character, about 35 ns each: 0.15 ms for 4 KB,
    and in most long texts some pair of single letters passes the hint.  A run's hint match
    begins at the last separator before its second unit, 1-3 characters after the run's
    first unit; so a run can only start 1-3 characters before a hint match (hint matches may
    overlap, so each is searched from one past the last).  Trying those starts in order, from
    the end of the previous run, finds what ``finditer`` finds.
    """
    if text.isascii():
        hints, spaced = _SPACED_HINT_CODED, _SPACED_ASCII
        searched: str | bytes = text.encode("ascii").translate(_HINT_CODE)  # same positions
    else:
        hints, spaced, searched = _SPACED_HINT, _SPACED, text
    starts: set[int] = set()
    at = 0
    while (hint := hints.search(searched, at)) is not None:  # type: ignore[call-overload]
        at = hint.start() + 1
        starts.update(range(max(0, at - 4), at - 1))
    runs: list[re.Match[str]] = []
    done = 0
    for start in sorted(starts):
        if start >= done and (run := spaced.match(text, start)) is not None:
            runs.append(run)
            done = run.end()
    return runs
