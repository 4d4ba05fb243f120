"""Opening a model with the settings it was built with, and training it from message sources.

A model database remembers its tokenizer settings and scoring method (store meta keys
``tokenizer`` and ``method``): hashes made with other settings would silently miss, so every
command and the daemon read them back instead of trusting their own flags.  It also remembers
the training margin chosen when it was made (``train_margin``, see ``margin.py``), which bulk
training uses unless told otherwise.
"""

from __future__ import annotations

import concurrent.futures
import dataclasses
import enum
import itertools
import json
import logging
import multiprocessing
import os
import sys
import time
from collections import Counter
from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from typing import Final

import numpy as np

from mailweir.daemon.margin import (
    DEFAULT_TRAIN_MARGIN,
    META_MARGIN,
    PendingCounts,
    margin_text,
    parse_margin,
    should_train,
)
from mailweir.daemon.sources import read_messages
from mailweir.model.hashing import message_digest, sorted_unique
from mailweir.model.nb import NaiveBayes, Score, make_scorer
from mailweir.model.token_texts import TokenTexts
from mailweir.model.tokenize import (
    DEFAULT_OPTIONS,
    TOKENIZER_VERSION,
    TokenizerOptions,
    tokenize,
    tokens_and_hashes,
)
from mailweir.model.types import TokenHashes
from mailweir.store import ModelStore, TrainResult
from mailweir.store.training import TrainItem

log = logging.getLogger("mailweir.learning")

DEFAULT_METHOD = "fisher"
META_TOKENIZER = "tokenizer"
META_METHOD = "method"


class Stamped(enum.Enum):
    """``open_model(margin=STAMPED)``: use the model's own margin."""

    MARGIN = "the model's own margin"


STAMPED: Final = Stamped.MARGIN
VERSION_KEY = "tokenizer_version"  # in the tokenizer stamp
PAIR_HASHES_SINCE = 2  # bigram hashes mixed from word hashes (model/pairs.py)
LEGACY_BIGRAM_WINDOW = 5  # the default window until tokenizer version 3's models


class ModelMismatch(Exception):
    """A flag asks for settings other than those the model database was built with."""


@dataclass
class OpenModel:
    store: ModelStore
    options: TokenizerOptions
    scorer: NaiveBayes
    margin: float | None = DEFAULT_TRAIN_MARGIN  # None: train every message

    def close(self) -> None:
        self.store.close()


def options_to_json(options: TokenizerOptions) -> str:
    stamp = {**dataclasses.asdict(options), VERSION_KEY: TOKENIZER_VERSION}
    return json.dumps(stamp, sort_keys=True)


def options_from_json(text: str) -> TokenizerOptions:
    """The stamped options; refuses a bigram model whose pair hashes this version cannot make."""
    values = json.loads(text)
    fields = {f.name for f in dataclasses.fields(TokenizerOptions)}
    known = {k: tuple(v) if isinstance(v, list) else v for k, v in values.items() if k in fields}
    known.setdefault("bigram_window", LEGACY_BIGRAM_WINDOW)  # a stamp keeps its own window
    options = TokenizerOptions(**known)
    version = int(values.get(VERSION_KEY, 1))  # stamps before version 2 carried no version
    if options.bigrams and version < PAIR_HASHES_SINCE:
        raise ModelMismatch(
            f"this model's bigram counts were made by tokenizer version {version}, whose pair "
            f"hashes version {TOKENIZER_VERSION} no longer makes, so they would never be found; "
            "train a new database (mailweir train --bigrams --db NEW ...) from the same mail "
            "(models without bigrams are not affected)"
        )
    return options


def open_model(
    target: str,
    *,
    bigrams: bool | None = None,
    method: str | None = None,
    ignore_headers: tuple[str, ...] = (),
    margin: float | Stamped | None = STAMPED,
    **store_options: float,
) -> OpenModel:
    """Open (and on first use, stamp) a model database; flags must agree with its stamp.

    ``margin`` is this run's training margin (a number, or None for every message); the
    default ``STAMPED`` takes the model's own, stamped when the model is made.
    """
    store = ModelStore.open(target, **store_options)  # type: ignore[arg-type]
    try:
        chosen_margin = _training_margin(store, margin)
        options = _tokenizer_options(store, bigrams)
        if ignore_headers:
            options = dataclasses.replace(options, ignore_headers=ignore_headers)
        chosen = method or store.get_meta(META_METHOD) or DEFAULT_METHOD
        if store.get_meta(META_METHOD) is None:
            store.set_meta(META_METHOD, chosen)
        return OpenModel(store, options, scorer_for(chosen, options), chosen_margin)
    except BaseException:
        store.close()
        raise


def token_kinds(options: TokenizerOptions) -> str:
    """What a model's tokens are, in words ("words and header evidence", with any pairs)."""
    if not options.bigrams:
        return "words and header evidence"
    if options.bigram_window == 2:
        return "words, header evidence and adjacent word pairs"
    return (
        "words, header evidence and word pairs up to "
        f"{options.bigram_window - 2} words apart (window {options.bigram_window})"
    )


def scorer_for(method: str, options: TokenizerOptions) -> NaiveBayes:
    """The scorer for a model: with bigrams, Fisher combines every non-neutral token.

    The 25-token cap suits words; bigram evidence is spread over many weaker tokens, and with
    the cap a bigram model did far worse than words alone (bench/ACCURACY.md: 0.251 against
    0.077 uncapped, (1-AUC)%, margin 10).
    """
    if options.bigrams and method == "fisher":
        return make_scorer(method, max_tokens=None)  # type: ignore[arg-type]
    return make_scorer(method)


def _training_margin(store: ModelStore, wanted: float | Stamped | None) -> float | None:
    """This run's margin; a new model (no tokenizer stamp yet) records it as its own."""
    stamped = store.get_meta(META_MARGIN)
    # A model made before margins existed has no stamp: it trains as new models do.
    own = DEFAULT_TRAIN_MARGIN if stamped is None else parse_margin(stamped)
    chosen = own if isinstance(wanted, Stamped) else wanted
    if stamped is None and store.get_meta(META_TOKENIZER) is None:
        store.set_meta(META_MARGIN, margin_text(chosen))
    return chosen


def _tokenizer_options(store: ModelStore, bigrams: bool | None) -> TokenizerOptions:
    stamped = store.get_meta(META_TOKENIZER)
    if stamped is None:
        options = DEFAULT_OPTIONS
        if bigrams is not None:
            options = dataclasses.replace(options, bigrams=bigrams)
        store.set_meta(META_TOKENIZER, options_to_json(options))
        return options
    options = options_from_json(stamped)
    if bigrams is not None and bigrams != options.bigrams:
        raise ModelMismatch(
            f"this model was built with bigrams={'on' if options.bigrams else 'off'}; "
            "a model's tokenizer settings cannot change (start a new database)"
        )
    return options


def message_hashes(model: OpenModel, raw: bytes) -> tuple[TokenHashes, TokenTexts]:
    """The message's sorted unique hashes, and its token texts (to name evidence)."""
    words, aligned = tokens_and_hashes(raw, model.options)
    return sorted_unique(aligned), words


def score_message(model: OpenModel, raw: bytes, n_evidence: int = 8) -> tuple[Score, TokenTexts]:
    """Score one message with the stored counts; also return its token texts for explaining."""
    hashes, words = message_hashes(model, raw)
    counts = model.store.lookup(hashes)
    score = model.scorer.score(
        hashes, counts, model.store.class_count(), model.store.vocabulary(), n_evidence
    )
    return score, words


# -- bulk training ---------------------------------------------------------------------------


class Progress:
    """A one-line progress report on stderr, only when a person is watching."""

    def __init__(self, verb: str, enabled: bool | None = None) -> None:
        self.verb = verb
        self.enabled = sys.stderr.isatty() if enabled is None else enabled
        self.started = time.monotonic()
        self.shown = 0.0
        self.count = 0

    def tick(self, n: int = 1) -> None:
        self.count += n
        now = time.monotonic()
        if self.enabled and now - self.shown > 0.2:
            self.shown = now
            rate = self.count / max(now - self.started, 1e-9)
            print(f"\r{self.verb} {self.count} messages ({rate:,.0f}/s)", end="", file=sys.stderr)

    def done(self) -> float:
        elapsed = time.monotonic() - self.started
        if self.enabled:
            print(file=sys.stderr)
        return elapsed


def iter_sources(targets: Iterable[str], unreadable: Counter[str]) -> Iterator[tuple[str, bytes]]:
    """Messages from every target in turn; a target that cannot be read is counted, not fatal."""
    for target in targets:
        try:
            yield from read_messages(target)
        except OSError as exc:
            unreadable[f"{target}: {exc}"] += 1
            print(f"mailweir: cannot read {target}: {exc}", file=sys.stderr)


BATCH = 500
SKIPPED = "confident"  # summary key: not trained, the model was already sure and right


def train_from(
    model: OpenModel,
    targets: Iterable[str],
    label: int,
    *,
    source: str,
    progress: Progress,
    workers: int | None = None,
) -> Counter[str]:
    """Train the messages found at ``targets`` as ``label``; returns a summary by outcome.

    With ``model.margin`` set, a message is trained only when the model, as trained by the
    messages before it, misjudges it or gives its class less than the margin in log-odds;
    the others are counted under ``confident``.  ``workers`` processes tokenize (None: one per
    core, at most ``MAX_WORKERS``; 1: this process alone); the decisions and the writes stay
    here, in the order of the messages, so the result is the same for any number.
    """
    summary: Counter[str] = Counter()
    failures: Counter[str] = Counter()
    pending = PendingCounts(model.store) if model.margin is not None else None
    if pending is not None and not model.store.presence_known:
        # Deciding by the margin reads each batch's unseen tokens from the database; with
        # every count in memory (a model within the count cache's limit) it reads none, and
        # the store's own writes keep memory complete.  A model too big for it gets a filter
        # of the tokens it holds instead, and only those are read.
        model.store.preload()
    chunks = _batches(iter_sources(targets, failures))
    wanted = default_workers() if workers is None else workers
    for chunk, hashed in tokenized_batches(chunks, model.options, wanted):
        batch = [(hashes, label, message_digest(hashes), source) for hashes in hashed]
        if pending is not None:
            batch = _within_margin(model, pending, batch, summary)
        _flush(model, batch, summary)
        progress.tick(len(chunk))
        if pending is not None:
            pending.clear()
    summary["unreadable"] += sum(failures.values())
    return summary


MAX_WORKERS = 4


def default_workers() -> int:
    """Tokenizing processes for bulk training: one per core, at most ``MAX_WORKERS``."""
    return max(1, min(os.cpu_count() or 1, MAX_WORKERS))


def tokenized_batches(
    chunks: Iterator[list[bytes]], options: TokenizerOptions, workers: int
) -> Iterator[tuple[list[bytes], list[TokenHashes]]]:
    """Each chunk with its messages' token hashes, in order.

    With ``workers`` > 1 and a first chunk of a full ``BATCH`` (a small import is not worth
    starting processes for), a process pool tokenizes the next chunk while the caller decides
    and writes this one: tokenizing is about half of a bulk import's CPU time.  A pool that
    breaks (a worker killed) is dropped and the rest is tokenized here, so nothing is lost.
    """
    first = next(chunks, None)
    if first is None:
        return
    if workers <= 1 or len(first) < BATCH:
        yield from _tokenized_here(itertools.chain([first], chunks), options)
        return
    context = multiprocessing.get_context("forkserver")  # never fork a process with threads
    context.set_forkserver_preload(["mailweir.model.tokenize"])
    size = max(1, BATCH // (4 * workers))  # several tasks per worker, few round trips
    waiting: list[list[bytes]] = []  # chunks sent to the pool and not yet handed on
    with concurrent.futures.ProcessPoolExecutor(workers, mp_context=context) as pool:
        try:
            waiting.append(first)
            results = [pool.map(tokenize, first, itertools.repeat(options), chunksize=size)]
            for chunk in itertools.chain(chunks, [None]):
                if chunk is not None:  # the next chunk goes out before this one is used
                    waiting.append(chunk)
                    results.append(
                        pool.map(tokenize, chunk, itertools.repeat(options), chunksize=size)
                    )
                hashed = list(results.pop(0))
                yield waiting.pop(0), hashed
        except concurrent.futures.BrokenExecutor:
            log.error("tokenizing processes broke; tokenizing in this process from here on")
        else:
            return
    yield from _tokenized_here(itertools.chain(waiting, chunks), options)


def _tokenized_here(
    chunks: Iterable[list[bytes]], options: TokenizerOptions
) -> Iterator[tuple[list[bytes], list[TokenHashes]]]:
    for chunk in chunks:
        yield chunk, [tokenize(raw, options) for raw in chunk]


def _batches(messages: Iterable[tuple[str, bytes]]) -> Iterator[list[bytes]]:
    chunk: list[bytes] = []
    for _name, raw in messages:
        chunk.append(raw)
        if len(chunk) >= BATCH:
            yield chunk
            chunk = []
    if chunk:
        yield chunk


def _within_margin(
    model: OpenModel, pending: PendingCounts, batch: list[TrainItem], summary: Counter[str]
) -> list[TrainItem]:
    """The messages of ``batch`` the margin says to train, decided one after another."""
    # One query for the whole batch, instead of one per message.
    pending.prefetch(np.concatenate([item[0] for item in batch]))
    chosen = []
    for item in batch:
        hashes, label, digest, _source = item
        probability, counts = pending.probability(model.scorer, hashes)
        if should_train(probability, label, model.margin, int(pending.class_count()[label])):
            pending.add(hashes, counts, label, digest)
            chosen.append(item)
        else:
            summary[SKIPPED] += 1
    return chosen


def _flush(model: OpenModel, batch: list[TrainItem], summary: Counter[str]) -> None:
    if batch:
        for outcome, n in model.store.train_many(batch).items():
            summary[outcome.name.lower()] += n


def untrain_from(model: OpenModel, targets: Iterable[str], progress: Progress) -> Counter[str]:
    """Remove every message found at ``targets`` from the counts, if it was trained."""
    summary: Counter[str] = Counter()
    failures: Counter[str] = Counter()
    for _name, raw in iter_sources(targets, failures):
        hashes = tokenize(raw, model.options)
        outcome = model.store.untrain(hashes, digest=message_digest(hashes))
        summary[outcome.name.lower()] += 1
        progress.tick()
    summary["unreadable"] += sum(failures.values())
    return summary


__all__ = [
    "DEFAULT_METHOD",
    "ModelMismatch",
    "OpenModel",
    "Progress",
    "TrainResult",
    "open_model",
    "score_message",
    "token_kinds",
    "train_from",
    "untrain_from",
]
