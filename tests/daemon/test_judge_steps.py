"""The judge's tokenize step: the tokenizer's hashes, each named by its own token text."""

from __future__ import annotations

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
