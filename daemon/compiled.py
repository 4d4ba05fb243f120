"""Which of mailweir's optional C modules this install has (setup.py builds them when a C
compiler and Python's headers are there).  Each has a Python spelling that gives the same
results, more slowly; the daemon reports the difference at start and in its metrics."""

from __future__ import annotations

from typing import Final

from mailweir.model.digest_cache import compiled_probe
from mailweir.model.fisher import compiled_pick
from mailweir.model.pairs import compiled_first_pairs
from mailweir.model.words import compiled_scan
from mailweir.store.cache import compiled_get

# name -> built: the chunk scan that starts split_words (model/_chunk_scan.c), the digest
# cache's lookup (model/_digest_probe.c), a message's word pairs (model/_pair_hashes.c),
# Robinson's f and Fisher's choice of tokens (model/_fisher_pick.c), the count cache's lookup
# (store/_count_probe.c)
COMPILED: Final = {
    "chunk_scan": compiled_scan is not None,
    "digest_probe": compiled_probe is not None,
    "pair_hashes": compiled_first_pairs is not None,
    "fisher_pick": compiled_pick is not None,
    "count_probe": compiled_get is not None,
}


def missing_parts() -> list[str]:
    """The C modules this install runs in Python instead."""
    return [name for name, built in COMPILED.items() if not built]
