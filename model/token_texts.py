"""A message's token texts, aligned with its hashes, with each bigram's text made only when read.

A judge names only the few tokens it lists as evidence, but a 4 KB message with bigrams has a
few hundred pairs: making every pair's text (and a dict to drop repeats) was about a fifth of
tokenizing it.  So single tokens are kept as texts, and each pair as where it lies: which
part's word sequence, and its place in that sequence's pairs (``words.osb_pairs`` order).
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from typing import overload

import numpy as np
import numpy.typing as npt

_Index = npt.NDArray[np.intp]


class TokenTexts(Sequence[str]):
    """Texts of a message's tokens: its single tokens, then its chosen pairs.

    Parameters
    ----------
    singles : list of str
        Single tokens, as ``tokenize.tokens`` lists them first.
    sequences : list of list of str
        Each text part's words in order (the words pairs are made of).
    window : int
        The OSB window the pairs were made with.
    pair_part, pair_at : ndarray of intp, shape (p,)
        For each pair, its part (index into ``sequences``) and its place among that part's
        pairs in ``words.osb_pairs`` order.
    """

    __slots__ = ("_at", "_order", "_part", "_sequences", "_singles", "_window")

    def __init__(
        self,
        singles: list[str],
        sequences: Sequence[Sequence[str]] = (),
        window: int = 2,
        pair_part: _Index | None = None,
        pair_at: _Index | None = None,
    ) -> None:
        self._singles = singles
        self._sequences = sequences
        self._window = window
        empty = np.zeros(0, dtype=np.intp)
        self._part = empty if pair_part is None else pair_part
        self._at = empty if pair_at is None else pair_at
        self._order: _Index | None = None

    def take(self, positions: npt.ArrayLike) -> TokenTexts:
        """The texts at ``positions``, in that order (a view: nothing is made)."""
        taken = np.asarray(positions, dtype=np.intp)
        view = TokenTexts(self._singles, self._sequences, self._window, self._part, self._at)
        view._order = taken if self._order is None else self._order[taken]
        return view

    def __len__(self) -> int:
        if self._order is not None:
            return len(self._order)
        return len(self._singles) + len(self._part)

    @overload
    def __getitem__(self, index: int) -> str: ...

    @overload
    def __getitem__(self, index: slice) -> list[str]: ...

    def __getitem__(self, index: int | slice) -> str | list[str]:
        if isinstance(index, slice):
            return self.texts_at(list(range(*index.indices(len(self)))))
        if not -len(self) <= index < len(self):
            raise IndexError("token index out of range")
        return self.texts_at([index % len(self)])[0]

    def texts_at(self, positions: list[int]) -> list[str]:
        """The texts at *positions* (each in range), in that order: the one place a view's
        order and a pair's text are resolved.

        One step for all of them: a judge naming its eight evidence tokens one index at a
        time spent 61 thousand instructions a message on the checks and lookups of each."""
        where = positions if self._order is None else self._order[positions].tolist()
        singles = self._singles
        count = len(singles)
        return [singles[at] if at < count else self._pair_text(at - count) for at in where]

    def _pair_text(self, pair: int) -> str:
        words = self._sequences[int(self._part[pair])]
        return pair_text(words, int(self._at[pair]), self._window)

    def __iter__(self) -> Iterator[str]:
        return iter(self.texts_at(list(range(len(self)))))

    def __eq__(self, other: object) -> bool:
        if isinstance(other, TokenTexts | list | tuple):
            return len(self) == len(other) and all(a == b for a, b in zip(self, other, strict=True))
        return NotImplemented

    __hash__ = None  # type: ignore[assignment]  # mutable-looking, as a list is

    def __repr__(self) -> str:
        return f"TokenTexts({list(self)!r})"


def pair_text(words: Sequence[str], at: int, window: int) -> str:
    """The ``at``-th pair of ``words.osb_pairs(words, window)``, made alone.

    That order takes each later word i in turn and pairs it with the min(N - 1, i) words
    before it, nearest first; so the first N - 1 words start min(N - 1, i) pairs each and
    every later one N - 1.
    """
    span = window - 1
    head = span * (span - 1) // 2  # pairs whose later word is among the first N - 1
    if at < head:
        later = 1
        while at >= later:  # at most N - 2 steps
            at -= later
            later += 1
        distance = at
    else:
        later, distance = divmod(at - head, span)
        later += span
    return f"osb:{distance}:{words[later - 1 - distance]} {words[later]}"
