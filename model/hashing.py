"""Token strings to the 64-bit hashes the model counts, and a message's ledger identity.

Hashes come from BLAKE2b, never Python's ``hash()``: that one is salted per process, and the
counts stored in the database must mean the same token in every process and on every host.
(``hash()`` only keys this process's cache of BLAKE2b results, ``digest_cache.py``.)
Orthogonal sparse bigrams (``osb:`` tokens) are hashed from their words' hashes instead
(``pairs.py``), far cheaper for the many pairs of a message.
"""

from __future__ import annotations

from collections.abc import Iterable
from hashlib import blake2b
from itertools import repeat

import numpy as np

from .digest_cache import DigestCache
from .pairs import PAIR_PREFIX, pair_hash_int, pair_hashes, split_pair
from .types import TokenHashes

# Constructing a blake2b object costs about a microsecond, several times more than the rest
# of tokenizing a common word; most words recur from message to message, so the hashes of the
# words met lately are kept (``digest_cache.py``).  The pool's tokenizer processes keep fewer.
DIGEST_CACHE_ENTRIES = 200_000
_digest_cache = DigestCache(DIGEST_CACHE_ENTRIES)
# Where ``_digest_probe`` was built, its ``fill`` hashes a message's new words and puts them
# in the table at once.  The rest (every new token without it; pairs and text with a lone
# surrogate with it) wait in a small dict and go into the table a few hundred at a time: a
# message brings a handful, and a whole-array put for them cost more than their lookup.
_STAGED_LIMIT = 512
_staged: dict[int, bytes] = {}  # cache key -> 8-byte digest (little-endian token hash)
_UNSET = bytes(8)
# Copying an empty BLAKE2b state costs less than making one: the constructor parses a dozen
# optional parameters and fills the parameter block each time (0.38 against 0.55 µs a word).
_BLANK_STATE = blake2b(digest_size=8)


def limit_digest_cache(entries: int) -> None:
    """Hold about *entries* token hashes in this process (the cache starts empty)."""
    _digest_cache.resize(entries)
    _staged.clear()


def digest_cache_capacity() -> int:
    return _digest_cache.capacity


def _digest8(token: str) -> bytes:
    pair = split_pair(token)
    if pair is not None:  # the tokenizer mixes these from word hashes (pairs.osb_pair_hashes)
        distance, earlier, later = pair
        mixed = pair_hash_int(_blake_int(earlier), _blake_int(later), distance)
        return mixed.to_bytes(8, "little", signed=True)
    return _blake8(token)


def _blake8(token: str) -> bytes:
    # Lone surrogates (never produced by the tokenizer) hash instead of raising.
    state = _BLANK_STATE.copy()
    state.update(token.encode("utf-8", "surrogatepass"))
    return state.digest()


def _blake_int(token: str) -> int:
    return int.from_bytes(_blake8(token), "little", signed=True)


def token_hash(token: str) -> int:
    """Return the signed 64-bit hash of one token.

    Parameters
    ----------
    token : str
        The token string.

    Returns
    -------
    int
        BLAKE2b (8-byte digest) of the token's UTF-8 bytes read as a little-endian signed
        integer, so it lies in [-2**63, 2**63) and fits SQL BIGINT.
    """
    return int.from_bytes(_digest8(token), "little", signed=True)


def hash_tokens(tokens: Iterable[str]) -> TokenHashes:
    """Hash tokens into a sorted array of unique signed 64-bit values.

    Parameters
    ----------
    tokens : iterable of str
        Token strings; duplicates are allowed.

    Returns
    -------
    TokenHashes, shape (n,)
        ``np.int64`` hashes (``token_hash`` of each token), unique and sorted ascending.
    """
    return sorted_unique(token_hashes(tokens))


def token_hashes(tokens: Iterable[str]) -> TokenHashes:
    """Hash tokens one for one, in their order (``token_hash`` of each, through the cache).

    Parameters
    ----------
    tokens : iterable of str
        Token strings.

    Returns
    -------
    TokenHashes, shape (n,)
        ``np.int64`` hash of each token, aligned with ``tokens`` (repeats kept, not sorted).
    """
    tokens = list(tokens)
    keys, values, missing = _digest_cache.probe(tokens)
    if missing:  # new words hashed and held at once, where _digest_probe was built
        missing = _digest_cache.fill(tokens, keys, values, missing)
    if not missing:
        return values
    # Digests are gathered as bytes and read into the array at once: converting each to an
    # int, or setting items one at a time, cost a fifth more on 100 KB mail.  A digest made
    # since the last flush waits in ``_staged``; the rest are made here.
    missing_keys = keys[missing].tolist()
    filled = list(map(_staged.get, missing_keys, repeat(b"")))  # b"": not staged
    deferred: list[tuple[int, int, str, str]] = []
    blank = _BLANK_STATE.copy
    for at, digest in enumerate(filled):
        if digest:
            continue
        index = missing[at]
        token = tokens[index]
        # Most misses are plain words: test the prefix before parsing a pair.
        if token.startswith(PAIR_PREFIX) and (pair := split_pair(token)) is not None:
            deferred.append((index, *pair))
            filled[at] = _UNSET  # mixed below
        else:
            # As _blake8 does, inline: a call per word costs more than the rest here.
            state = blank()
            state.update(token.encode("utf-8", "surrogatepass"))
            filled[at] = _staged[missing_keys[at]] = state.digest()
    values[missing] = np.frombuffer(b"".join(filled), dtype="<i8")
    if deferred:
        _mix_pairs(values, keys, deferred)
    if len(_staged) >= _STAGED_LIMIT:
        _flush_staged()
    return values


def _mix_pairs(
    values: TokenHashes, keys: TokenHashes, deferred: list[tuple[int, int, str, str]]
) -> None:
    """Fill in the hashes of pair texts the cache lacks, mixed in one numpy pass."""
    where, distance, earlier, later = zip(*deferred, strict=True)
    mixed = pair_hashes(token_hashes(earlier), token_hashes(later), np.array(distance))
    values[list(where)] = mixed
    packed = mixed.astype("<i8").tobytes()
    digests = [packed[8 * n : 8 * n + 8] for n in range(len(where))]
    _staged.update(zip(keys[list(where)].tolist(), digests, strict=True))


def _flush_staged() -> None:
    """Move the staged hashes into the table in one whole-array step."""
    batch = _staged.copy()  # another thread's entry staged meanwhile may be lost: a miss later
    _staged.clear()
    keys = np.fromiter(batch, np.int64, len(batch))
    _digest_cache.put(keys, np.frombuffer(b"".join(batch.values()), dtype="<i8").astype(np.int64))


def sorted_unique(values: TokenHashes) -> TokenHashes:
    """Sort in place and drop repeats; cheaper than np.unique for a message's few hundred."""
    values.sort()
    if len(values) > 1:
        keep = np.empty(len(values), dtype=bool)
        keep[0] = True
        np.not_equal(values[1:], values[:-1], out=keep[1:])
        values = values[keep]
    return values


def message_digest(hashes: TokenHashes) -> bytes:
    """Return the 16-byte identity of a message from its token hashes.

    Parameters
    ----------
    hashes : TokenHashes, shape (n,)
        The message's token hashes in any order; duplicates are allowed.

    Returns
    -------
    bytes
        BLAKE2b (16-byte digest) of the sorted unique hashes as little-endian int64 bytes.
        Sorting and de-duplicating first makes it independent of order; since the tokenizer
        never reads our own header fields, adding them does not change the identity.
    """
    canonical = sorted_unique(np.array(hashes, dtype=np.int64)).astype("<i8")
    return blake2b(canonical.tobytes(), digest_size=16).digest()
