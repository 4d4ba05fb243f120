"""Hashes of orthogonal sparse bigrams, mixed from the hashes of their two words.

A message has several times more word pairs than words, and most pairs were never seen
before, so a BLAKE2b per pair string (about a microsecond each, plus building the string) was
most of the tokenizing cost with bigrams.  A pair's hash is instead mixed from the two words'
64-bit hashes and the distance with integer arithmetic, vectorised in numpy; the same mix in
plain Python integers gives ``token_hash`` of a pair's text (``"osb:<k>:<earlier> <later>"``),
so a verdict can still be explained token by token.

The mixing function is the output step of Vigna's splitmix64 generator (public domain, 2015):
an invertible map of 64-bit words in which every input bit reaches every output bit.
"""

from __future__ import annotations

from typing import Final

import numpy as np
import numpy.typing as npt

from .types import TokenHashes

try:  # the compiled pair scan, where the build made it (setup.py: optional)
    from ._pair_hashes import first_pairs as compiled_first_pairs
except ImportError:  # depends on the build: a C compiler and Python's headers
    compiled_first_pairs = None

_Index = npt.NDArray[np.intp]

PAIR_PREFIX: Final = "osb:"
_MASK: Final = (1 << 64) - 1
# splitmix64's increment and multipliers (constants from memory; tests/model/test_pairs.py
# checks them against the generator's first output from seed 0).
GOLDEN: Final = 0x9E3779B97F4A7C15
_MIX1: Final = 0xBF58476D1CE4E5B9
_MIX2: Final = 0x94D049BB133111EB


_SHIFT1: Final = np.uint64(30)
_SHIFT2: Final = np.uint64(27)
_SHIFT3: Final = np.uint64(31)
_MULTIPLIER1: Final = np.uint64(_MIX1)
_MULTIPLIER2: Final = np.uint64(_MIX2)
_GOLDEN: Final = np.uint64(GOLDEN)


def mix64(values: npt.NDArray[np.uint64]) -> npt.NDArray[np.uint64]:
    """splitmix64's output function, elementwise (a bijection of 64-bit words).

    Parameters
    ----------
    values : ndarray of uint64, shape (n,)

    Returns
    -------
    ndarray of uint64, shape (n,)
        A new array; arithmetic wraps modulo 2**64.
    """
    # In place, in one result and one scratch array: a message's few hundred pairs make each
    # step's call and allocation cost more than its arithmetic.
    z = np.right_shift(values, _SHIFT1)
    z ^= values
    z *= _MULTIPLIER1
    scratch = np.right_shift(z, _SHIFT2)
    z ^= scratch
    z *= _MULTIPLIER2
    np.right_shift(z, _SHIFT3, out=scratch)
    z ^= scratch
    return z


def mix64_int(value: int) -> int:
    """`mix64` of one unsigned 64-bit value, in plain Python integers."""
    z = value & _MASK
    z = ((z ^ (z >> 30)) * _MIX1) & _MASK
    z = ((z ^ (z >> 27)) * _MIX2) & _MASK
    return z ^ (z >> 31)


def pair_hashes(
    earlier: TokenHashes, later: TokenHashes, distance: npt.NDArray[np.int64]
) -> TokenHashes:
    """Hashes of ordered word pairs with ``distance`` words between them.

    ``mix64(mix64(earlier + (distance + 1) * GOLDEN) ^ later)`` on the words' hashes read as
    unsigned.  For one (earlier, distance) the later word goes through a bijection, so pairs
    differing only in the later word never collide; any other two pairs collide with
    probability about 2**-64.  The order of the words matters.

    Parameters
    ----------
    earlier, later : TokenHashes, shape (n,)
        ``token_hash`` of each pair's two words (signed int64).
    distance : ndarray of int64, shape (n,)
        Words between them, k >= 0.

    Returns
    -------
    TokenHashes, shape (n,)
        Signed int64, in the order given (not sorted, repeats kept).
    """
    steps = (np.asarray(distance, dtype=np.int64) + 1).view(np.uint64)
    return _mixed(earlier, later, steps * _GOLDEN)


def _mixed(earlier: TokenHashes, later: TokenHashes, offsets: npt.ArrayLike) -> TokenHashes:
    """`pair_hashes` with ``(distance + 1) * GOLDEN`` given (an array, or one uint64 for all)."""
    first = np.asarray(earlier, dtype=np.int64).view(np.uint64)
    second = np.asarray(later, dtype=np.int64).view(np.uint64)
    inner = mix64(first + offsets)
    inner ^= second
    return mix64(inner).view(np.int64)


def pair_hash_int(earlier: int, later: int, distance: int) -> int:
    """`pair_hashes` of one pair in plain Python integers; signed result."""
    inner = mix64_int((earlier & _MASK) + (distance + 1) * GOLDEN)
    value = mix64_int(inner ^ (later & _MASK))
    return value - (1 << 64) if value >> 63 else value


def split_pair(token: str) -> tuple[int, str, str] | None:
    """``(k, earlier, later)`` of an ``"osb:<k>:<earlier> <later>"`` token, else None."""
    if not token.startswith(PAIR_PREFIX):
        return None
    distance, colon, words = token[len(PAIR_PREFIX) :].partition(":")
    earlier, space, later = words.partition(" ")
    if not (colon and space and distance.isdigit() and earlier and later) or " " in later:
        return None
    return int(distance), earlier, later


def osb_pair_hashes(word_hashes: TokenHashes, window: int) -> TokenHashes:
    """Pair hashes of a word sequence, in the order of ``words.osb_pairs``.

    Parameters
    ----------
    word_hashes : TokenHashes, shape (L,)
        ``token_hash`` of each word in text order, repeats kept.
    window : int
        OSB window N >= 2; each word pairs with the N - 1 words before it.

    Returns
    -------
    TokenHashes, shape (<= L * (N - 1),)
        By later word, nearest earlier word first; repeats kept.
    """
    hashes = np.asarray(word_hashes, dtype=np.int64)
    if window == 2:  # the default: each word with the one before it, by slicing alone
        return _mixed(hashes[:-1], hashes[1:], _GOLDEN)
    span = np.arange(window - 1)
    earlier_at = np.arange(len(hashes))[:, None] - 1 - span[None, :]  # (L, N-1)
    valid = earlier_at >= 0
    rows, cols = np.nonzero(valid)  # row-major: by later word, then distance
    return pair_hashes(hashes[earlier_at[rows, cols]], hashes[rows], span[cols])


def first_pairs(
    parts: list[TokenHashes], window: int, room: int, per_part: int
) -> tuple[TokenHashes, _Index, _Index]:
    """The first ``room`` distinct pairs of a message's text parts, in order of first occurrence.

    Parameters
    ----------
    parts : list of TokenHashes
        Each text part's word hashes in text order (int64, repeats kept).
    window : int
        OSB window N >= 2.
    room : int
        Most pairs returned.
    per_part : int
        Pairs read from each part, its first ones (``osb_pair_hashes`` order).

    Returns
    -------
    hashes : TokenHashes, shape (p,), p <= room
        Distinct pair hashes, in the order the parts' pairs first give them.
    part, at : ndarray of intp, shape (p,)
        Each one's part (index into ``parts``) and place among that part's pairs.

    One loop in C where ``_pair_hashes`` was built, else ``python_first_pairs`` (the
    specification the tests hold the C to): about twenty whole-array calls for a message's
    few hundred pairs cost three times the loop.
    """
    if compiled_first_pairs is None:
        return python_first_pairs(parts, window, room, per_part)
    room = max(0, room)
    hashes = np.empty(room, dtype=np.int64)
    part = np.empty(room, dtype=np.intp)
    at = np.empty(room, dtype=np.intp)
    count = compiled_first_pairs(parts, window, room, per_part, hashes, part, at)
    return hashes[:count], part[:count], at[:count]


def python_first_pairs(
    parts: list[TokenHashes], window: int, room: int, per_part: int
) -> tuple[TokenHashes, _Index, _Index]:
    made = [osb_pair_hashes(words, window)[:per_part] for words in parts]
    pairs = np.concatenate(made) if made else np.zeros(0, dtype=np.int64)
    sizes = np.array([len(each) for each in made], dtype=np.intp)
    chosen = first_occurrences(pairs)[: max(0, room)]
    ends = np.cumsum(sizes)
    part = np.searchsorted(ends, chosen, side="right")  # the part each chosen pair is from
    at = chosen - (ends - sizes)[part]  # and its place among that part's pairs
    return pairs[chosen], part, at


def first_occurrences(values: TokenHashes) -> _Index:
    """Ascending positions of each distinct value's first occurrence (``np.unique``'s
    ``return_index``, sorted, without its general layer)."""
    if len(values) < 2:
        return np.arange(len(values), dtype=np.intp)
    # The least position in each run of equal values; numpy's quicksort of int64 is far
    # cheaper than its stable sort (a timsort), and the runs need no order within them.
    order = values.argsort()
    ordered = values[order]
    starts = np.empty(len(values), dtype=np.bool_)
    starts[0] = True
    np.not_equal(ordered[1:], ordered[:-1], out=starts[1:])
    first = np.minimum.reduceat(order, starts.nonzero()[0])
    first.sort()
    return first
