"""The judge's tokenize step: the tokenizer's hashes, each named by its own token text."""

from __future__ import annotations

import numpy as np
import pytest

from mailweir.daemon import judge
from mailweir.daemon.judge import tokenize_step
from mailweir.model.hashing import token_hash
from mailweir.model.tokenize import DEFAULT_OPTIONS, tokenize

MESSAGE = (
    b"From: Greta Holm <greta.holm@mail.example>\r\n"
    b"To: Priya Raman <priya.raman@harbourlane.example>\r\n"
    b"Subject: Otis needs his booster\r\n\r\n"
    b"Hello Priya, Otis is due his booster; Otis can come on Friday. Greta\r\n"
)


def test_tokenize_step_matches_tokenize_and_names_each_hash() -> None:
    hashes, texts = tokenize_step(MESSAGE, DEFAULT_OPTIONS)
    assert hashes.tolist() == tokenize(MESSAGE, DEFAULT_OPTIONS).tolist()
    assert [token_hash(text) for text in texts] == hashes.tolist()


def test_tokenize_step_empty_message() -> None:
    hashes, texts = tokenize_step(b"", DEFAULT_OPTIONS)
    assert len(hashes) == len(texts)
    assert [token_hash(text) for text in texts] == hashes.tolist()


def test_tokenize_step_names_a_repeated_hash_by_its_first_text(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    # Two texts sharing a hash (a BLAKE2b collision, simulated): the hash is kept once, named
    # by the text the tokenizer met first, wherever the sort puts the two.
    texts = ["zeta", "alpha", "beta", "gamma", "delta", "omega"]
    aligned = np.array([7, 3, 9, 3, 1, 3], dtype=np.int64)

    class Texts(list[str]):
        def take(self, indices: np.ndarray) -> list[str]:
            return [self[i] for i in indices.tolist()]

    monkeypatch.setattr(judge, "tokens_and_hashes", lambda raw, options: (Texts(texts), aligned))
    hashes, named = tokenize_step(b"", DEFAULT_OPTIONS)
    assert hashes.tolist() == [1, 3, 7, 9]
    assert named == ["delta", "alpha", "zeta", "beta"]
