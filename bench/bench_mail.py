"""Generated Harbour Lane mail for the speed benchmarks, and a large trained model built from it.

Messages mix the practice's own words with an invented vocabulary: word ``i`` spells ``i`` in
base 80 with four consonant-vowel syllables, so 700,000 distinct words that no tokenizer rule
merges.  Ham leans on the lower half of the invented ids and spam on the upper half, so the
model learns both and a benchmark message gets a real score and evidence.

The model is built once per set of parameters and kept under ``bench_dir()`` (reruns copy it).
``build_model(..., bigrams=True)`` builds one stamped for adjacent word pairs beside the words
(``mailweir train --bigrams``), so the daemon tokenizes and scores mail as a bigram model's.
"""

from __future__ import annotations

import concurrent.futures
import os
import random
import shutil
import tempfile
import time
from itertools import repeat
from pathlib import Path

from mailweir.daemon import scenario
from mailweir.model.hashing import message_digest
from mailweir.model.tokenize import DEFAULT_OPTIONS, TokenizerOptions, tokenize
from mailweir.model.types import HAM, SPAM

_SYLLABLES = [c + v for c in "bdfgklmnprstvz" for v in "aeiou"] + [
    c + "y" for c in "bdfgklmnprs"
]  # 81; the first 80 are used
INVENTED = 700_000

_HAM_TEXT = (
    "appointment booster vaccination kennel cough surgery dental invoice payment reminder "
    "reception please call tomorrow morning afternoon puppy kitten rabbit worming flea "
    "prescription collect results blood test weight diet food order delivery stock gloves "
    "syringes bandage consultation insurance claim form thank regards wishes recovery stitches "
    "anaesthetic discharge notes referral lab sample dispatch pallet sutures clinic rota"
)
_SPAM_TEXT = (
    "winner prize claim urgent verify account password parcel customs fee unlock bonus crypto "
    "returns guaranteed offer cheap pills discount limited click link suspended wallet bitcoin "
    "lottery million transfer beneficiary confirm identity immediately expire reward gift card"
)
_HAM_WORDS = _HAM_TEXT.split()
_SPAM_WORDS = _SPAM_TEXT.split()


def invented_word(index: int) -> str:
    """Four syllables spelling ``index`` in base 80 (index < 80**4)."""
    parts = []
    for _ in range(4):
        index, digit = divmod(index, 80)
        parts.append(_SYLLABLES[digit])
    return "".join(parts)


def _body(rng: random.Random, size: int, spam: bool, rare_share: float) -> str:
    common = _SPAM_WORDS if spam else _HAM_WORDS
    low, high = (INVENTED // 3, INVENTED) if spam else (0, 2 * INVENTED // 3)
    lines: list[str] = []
    length = 0
    while length < size:
        words = [
            invented_word(rng.randrange(low, high))
            if rng.random() < rare_share
            else rng.choice(common)
            for _ in range(11)
        ]
        line = " ".join(words).capitalize() + "."
        lines.append(line)
        length += len(line) + 2
    return "\r\n".join(lines)


def message(index: int, size: int, *, seed: int = 0, rare_share: float = 0.3) -> bytes:
    """One CRLF message of about ``size`` bytes; every 4th is junk, the rest practice mail."""
    rng = random.Random(seed * 1_000_003 + index)
    spam = index % 4 == 3
    staff_name, staff_local = rng.choice(scenario.STAFF)
    if spam:
        sender_name, sender = rng.choice(scenario.JUNK_SENDERS)
        subject = f"Action needed on your account {rng.randint(100, 999)}"
    else:
        sender_name, sender = rng.choice(scenario.SUPPLIERS + scenario.CLIENTS)
        pet = rng.choice(scenario.PETS)
        subject = f"{rng.choice(scenario.TREATMENTS).capitalize()} for {pet}"
    head = (
        "Received: from mail.mail.example (mail.mail.example [198.51.100.7])\r\n"
        f"\tby mx.{scenario.PRACTICE}; Tue, 1 Dec 2026 09:{index % 60:02d}:00 +0000\r\n"
        f"From: {sender_name} <{sender}>\r\n"
        f"To: {staff_name} <{staff_local}@{scenario.PRACTICE}>\r\n"
        f"Subject: {subject}\r\n"
        "Date: Tue, 1 Dec 2026 09:00:00 +0000\r\n"
        f"Message-ID: <bench-{seed}-{index}@mail.example>\r\n"
        "MIME-Version: 1.0\r\n"
        "Content-Type: text/plain; charset=utf-8\r\n"
        "Content-Transfer-Encoding: 8bit\r\n"
    )
    body = _body(rng, max(0, size - len(head) - 2), spam, rare_share)
    return (head + "\r\n" + body + "\r\n").encode("utf-8")


def with_new_words(raw: bytes, index: int, count: int, salt: int) -> bytes:
    """``raw`` with a last body line of ``count`` invented words no model or cache has seen.

    Real mail brings words its reader never met (about 6 of 110 tokens per message on the
    development corpus after 4,000 messages), so every message needs a look at the database;
    these come from past the range ``message`` draws from, a new stretch for each ``salt``.
    """
    start = INVENTED + (salt * 100_000 + index) * count
    words = " ".join(invented_word(start + n) for n in range(count))
    return raw[:-2] + b"\r\n" + words.encode("ascii") + b"\r\n" if count else raw


def bench_dir() -> Path:
    """Where built models are kept between runs ($MAILWEIR_BENCH_DIR or the temp folder)."""
    folder = Path(os.environ.get("MAILWEIR_BENCH_DIR") or Path(tempfile.gettempdir()))
    path = folder / "mailweir-bench"
    path.mkdir(parents=True, exist_ok=True)
    return path


BIGRAM_OPTIONS = TokenizerOptions(bigrams=True)


def _hashes(index: int, options: TokenizerOptions) -> tuple[int, object]:
    raw = message(index, 4096, seed=1, rare_share=0.7)
    return index, tokenize(raw, options)


def build_model(
    min_tokens: int, *, batch: int | None = None, workers: int = 2, bigrams: bool = False
) -> Path:
    """A SQLite model of at least ``min_tokens`` tokens, built once and kept; returns its path.

    ``bigrams``: a model stamped (as ``open_model`` stamps) for adjacent word pairs.
    """
    from mailweir.daemon.learning import META_TOKENIZER, options_to_json
    from mailweir.store import ModelStore

    options = BIGRAM_OPTIONS if bigrams else DEFAULT_OPTIONS
    # A message brings about 5 times the new tokens with its pairs: smaller steps keep the
    # model near min_tokens (and within the default count cache of 1,000,000).
    batch = batch or (400 if bigrams else 2000)
    kind = "-bigrams" if bigrams else ""
    path = bench_dir() / f"model-{min_tokens}{kind}.sqlite3"
    if path.exists():
        return path
    partial = path.with_suffix(".partial")
    for stale in bench_dir().glob(partial.name + "*"):
        stale.unlink()
    store = ModelStore.open(str(partial), cache_tokens=0)
    if bigrams:  # a model without a stamp is stamped with the default (words) when opened
        store.set_meta(META_TOKENIZER, options_to_json(options))
    started = time.perf_counter()
    trained = 0
    try:
        with concurrent.futures.ProcessPoolExecutor(workers) as pool:
            while store.stats().tokens < min_tokens:
                indexes = range(trained, trained + batch)
                found = pool.map(_hashes, indexes, repeat(options), chunksize=50)
                items = [
                    (h, SPAM if i % 4 == 3 else HAM, message_digest(h), "bench") for i, h in found
                ]
                store.train_many(items)
                trained += batch
    finally:
        tokens = store.stats().tokens
        store.close()
    shutil.move(partial, path)
    seconds = time.perf_counter() - started
    print(f"built model: {trained} messages, {tokens} tokens in {seconds:.0f} s -> {path}")
    return path
