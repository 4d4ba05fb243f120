"""Token hashes of the words met lately, so most words of a message cost no BLAKE2b.

A set-associative table in two numpy arrays of shape (sets, 8): row ``k & (sets - 1)`` holds
up to eight keys and, beside them, their token hashes.  The key of a token is Python's own
``hash()`` of its text: a str computes it once and keeps it, and the tokenizer has already
asked for it (every token passes through a dict), so keying costs nothing per word.  That
hash is salted per process, which suits a cache that never leaves one.  Two different texts
with the same 64-bit key would share a token hash; among the 10**5-10**6 keys held that has a
chance near 10**-8 per process lifetime (the birthday bound), far below the chance that two
of the model's own tokens share a BLAKE2b hash (``hashing.py``).

A slot costs 16 bytes, about 20-40 per entry with the slack of a set-associative table,
against about 140 for a dict of token text to digest (measured: 80 bytes for the entry and its
8-byte digest, 61 for the text it keeps alive).  A lookup is a fixed handful of whole-array
steps (``get``), or, for a message's tokens, one loop in C where it was built (``probe``,
``_digest_probe.c``).  There, too, the words a lookup missed are hashed (BLAKE2b written in
C from RFC 7693, checked against hashlib) and put in at once (``fill``), without a hashlib
object and a staging dict per new word.  A full set replaces one of its entries (the way
picked by other bits of the key), so nothing is ever emptied at once.  Key -1 marks an
empty slot: ``hash()`` never gives -1 (CPython keeps it for errors), so the keys need no
remapping.

One lock guards both arrays: threads tokenize too (mid-sized messages, feedback), and a key
read with another entry's hash would give a token the wrong hash.
"""

from __future__ import annotations

import threading
from hashlib import blake2b

import numpy as np
import numpy.typing as npt

from .aligned import line_aligned
from .pairs import PAIR_PREFIX

try:  # the compiled lookup and fill, where the build made them (setup.py: optional)
    from ._digest_probe import fill as compiled_fill
    from ._digest_probe import probe as compiled_probe
except ImportError:  # depends on the build: a C compiler and Python's headers
    compiled_probe = compiled_fill = None

WAYS = 8  # ``get`` reads a set's match flags as one 8-byte word
_EMPTY = -1  # never a str's hash()
_MIN_SETS = 16

_Keys = npt.NDArray[np.int64]


class DigestCache:
    """Python ``hash()`` of a token's text -> the token's 64-bit hash, about ``entries`` held."""

    def __init__(self, entries: int) -> None:
        self._lock = threading.Lock()
        self.resize(entries)

    @property
    def capacity(self) -> int:
        return int(self._keys.size)

    def __len__(self) -> int:
        return int(np.count_nonzero(self._keys != _EMPTY))

    def resize(self, entries: int) -> None:
        """Empty the cache and give it room for at least *entries* (a power of two of sets)."""
        sets = _MIN_SETS
        while sets * WAYS < entries:
            sets *= 2
        with self._lock:
            # A set's 8 keys on one cache line, not two (aligned.py).
            self._keys = line_aligned((sets, WAYS), np.int64, _EMPTY)
            self._values = line_aligned((sets, WAYS), np.int64)
            self._mask = np.int64(sets - 1)

    def clear(self) -> None:
        with self._lock:
            self._keys[:] = _EMPTY

    def get(self, keys: _Keys) -> tuple[_Keys, npt.NDArray[np.bool_]]:
        """Token hashes for *keys* (0 where not held) and a mask of which were held."""
        rows = keys & self._mask
        # ``take`` gathers rows in a third of the time of indexing with an array (2 against
        # 6 µs for a message's 280 words), and the slot numbers are made in place.
        with self._lock:
            match = self._keys.take(rows, axis=0) == keys[:, None]
            rows *= WAYS
            rows += match.argmax(axis=1)
            values = self._values.take(rows)  # flat slot numbers: take reads the array as 1-D
        found = _any_way(match)
        values *= found
        return values, found

    def probe(self, tokens: list[str]) -> tuple[_Keys, _Keys, list[int]]:
        """For *tokens*: their keys, their token hashes (0 where not held), and the positions
        of those not held.  One pass in C where ``_digest_probe`` was built, else ``keys_of``
        and ``get`` (``python_probe``, the specification the tests hold the C to)."""
        if compiled_probe is None:
            return self.python_probe(tokens)
        keys = np.empty(len(tokens), dtype=np.int64)
        values = np.empty(len(tokens), dtype=np.int64)
        with self._lock:
            missing = compiled_probe(
                tokens, self._keys, self._values, int(self._mask), keys, values
            )
        return keys, values, missing

    def python_probe(self, tokens: list[str]) -> tuple[_Keys, _Keys, list[int]]:
        keys = keys_of(tokens)
        values, found = self.get(keys)
        return keys, values, (~found).nonzero()[0].tolist()

    def fill(self, tokens: list[str], keys: _Keys, values: _Keys, missing: list[int]) -> list[int]:
        """Hash the words among the ``missing`` positions of a ``probe`` and hold them: each
        one's ``values`` slot gets its BLAKE2b token hash, put in the table at once.  Returns
        the positions left to the caller: ``osb:`` pairs (mixed from word hashes, pairs.py),
        text with a lone surrogate, and, where ``_digest_probe`` was not built, all of them
        (hashing.py then hashes them with hashlib and puts them a few hundred at a time).
        ``python_fill`` is the specification the tests hold the C to."""
        if compiled_fill is None:
            return missing
        with self._lock:
            return compiled_fill(
                tokens, missing, self._keys, self._values, int(self._mask), keys, values
            )

    def python_fill(
        self, tokens: list[str], keys: _Keys, values: _Keys, missing: list[int]
    ) -> list[int]:
        left: list[int] = []
        for at in missing:
            token = tokens[at]
            try:
                data = token.encode("utf-8")
            except UnicodeEncodeError:
                data = None
            if token.startswith(PAIR_PREFIX) or data is None:
                left.append(at)
                continue
            digest = int.from_bytes(blake2b(data, digest_size=8).digest(), "little", signed=True)
            values[at] = digest
            self.put(keys[at : at + 1], values[at : at + 1])
        return left

    def put(self, keys: _Keys, values: _Keys) -> None:
        """Hold these entries: in the way already holding the key, else an empty way of its
        set, else one picked by bits 32-34 of the key.  Of repeats in one call, one is kept."""
        rows = keys & self._mask
        with self._lock:
            # As in ``get``: rows gathered with ``take``, a row's 8 flags read as one word,
            # and the slots written through flat numbers (a third of the time of indexing
            # with pairs of arrays, for the hundreds a flush puts).
            held = self._keys.take(rows, axis=0)
            same, empty = held == keys[:, None], held == _EMPTY
            way = np.where(_any_way(empty), empty.argmax(axis=1), (keys >> 32) & (WAYS - 1))
            way = np.where(_any_way(same), same.argmax(axis=1), way)
            rows *= WAYS
            rows += way
            self._keys.reshape(-1)[rows] = keys
            self._values.reshape(-1)[rows] = values


def _any_way(flags: npt.NDArray[np.bool_]) -> npt.NDArray[np.bool_]:
    """Per row of shape (n, WAYS): whether any flag is set, its 8 bytes read as one word."""
    found: npt.NDArray[np.bool_] = flags.view(np.uint64).reshape(-1) != 0
    return found


def keys_of(tokens: list[str]) -> _Keys:
    """The cache keys of *tokens*: their Python hashes."""
    return np.fromiter(map(hash, tokens), dtype=np.int64, count=len(tokens))
