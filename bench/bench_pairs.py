"""Bigram hashing: pair hashes mixed from word hashes against a BLAKE2b per pair string.

Tokenizes the same synthetic messages (bench_tokenize's 4 KB and 100 KB ones) three ways in
one run: words only; bigrams as ``tokenize`` makes them now (pair hashes mixed in numpy from
the words' hashes, ``model/pairs.py``); bigrams the way tokenizer version 1 did (every pair
string built, then hashed by an 8-byte BLAKE2b through a cache of the same size); and the two
ways to get texts with their hashes, for naming evidence: ``tokens_and_hashes`` and
``token_hashes(tokens(...))`` (which parses each pair text back into its words).

    python bench/bench_pairs.py [--messages 200]

CPU time of this process per message; prints figures only.
"""

from __future__ import annotations

import argparse
import time
from collections.abc import Callable
from hashlib import blake2b

import numpy as np
from bench_tokenize import synthetic_message

from mailweir.model.hashing import token_hashes
from mailweir.model.tokenize import TokenizerOptions, tokenize, tokens, tokens_and_hashes

WORDS = TokenizerOptions()
BIGRAMS = TokenizerOptions(bigrams=True)
_old_cache: dict[str, bytes] = {}


def version1(raw: bytes) -> np.ndarray:
    """Bigram hashes as tokenizer version 1 made them: BLAKE2b of every token string."""
    found = tokens(raw, BIGRAMS)
    digests = []
    for token in found:
        digest = _old_cache.get(token)
        if digest is None:
            if len(_old_cache) > 200_000:
                _old_cache.clear()
            digest = _old_cache[token] = blake2b(token.encode(), digest_size=8).digest()
        digests.append(digest)
    return np.unique(np.frombuffer(b"".join(digests), dtype="<i8"))


def cpu_ms(messages: list[bytes], run: Callable[[bytes], object]) -> float:
    """Mean CPU milliseconds per message over one pass (after warming caches on 20)."""
    for raw in messages[:20]:
        run(raw)
    start = time.process_time()
    for raw in messages:
        run(raw)
    return 1000 * (time.process_time() - start) / len(messages)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--messages", type=int, default=200)
    args = parser.parse_args()
    for label, size, count in (("4 KB", 4096, args.messages), ("100 KB", 102400, 20)):
        messages = [synthetic_message(size, seed) for seed in range(count)]
        words = cpu_ms(messages, lambda raw: tokenize(raw, WORDS))
        mixed = cpu_ms(messages, lambda raw: tokenize(raw, BIGRAMS))
        old = cpu_ms(messages, version1)
        named = cpu_ms(messages, lambda raw: tokens_and_hashes(raw, BIGRAMS))
        texts = cpu_ms(messages, lambda raw: token_hashes(tokens(raw, BIGRAMS)))
        print(
            f"{label:>6}: words {words:7.3f} ms, bigrams mixed {mixed:7.3f} ms, "
            f"bigrams BLAKE2b per pair (version 1) {old:7.3f} ms per message CPU "
            f"({old / mixed:.1f}x); with texts for evidence: tokens_and_hashes {named:7.3f} ms, "
            f"token_hashes(tokens()) {texts:7.3f} ms"
        )


if __name__ == "__main__":
    main()
