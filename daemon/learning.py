"""Opening a model with the settings it was built with, and training it from message sources.

A model database remembers its tokenizer settings and scoring method (store meta keys
``tokenizer`` and ``method``): hashes made with other settings would silently miss, so every
command and the daemon read them back instead of trusting their own flags.
"""

from __future__ import annotations

import dataclasses
import json
import sys
import time
from collections import Counter
from collections.abc import Iterable, Iterator
from dataclasses import dataclass

from mailweir.daemon.sources import read_messages
from mailweir.model.hashing import hash_tokens, message_digest
from mailweir.model.nb import NaiveBayes, Score, make_scorer
from mailweir.model.tokenize import DEFAULT_OPTIONS, TokenizerOptions, tokenize, tokens
from mailweir.model.types import TokenHashes
from mailweir.store import ModelStore, TrainResult

DEFAULT_METHOD = "fisher"
META_TOKENIZER = "tokenizer"
META_METHOD = "method"


class ModelMismatch(Exception):
    """A flag asks for settings other than those the model database was built with."""


@dataclass
class OpenModel:
    store: ModelStore
    options: TokenizerOptions
    scorer: NaiveBayes

    def close(self) -> None:
        self.store.close()


def options_to_json(options: TokenizerOptions) -> str:
    return json.dumps(dataclasses.asdict(options), sort_keys=True)


def options_from_json(text: str) -> TokenizerOptions:
    values = json.loads(text)
    fields = {f.name for f in dataclasses.fields(TokenizerOptions)}
    known = {k: tuple(v) if isinstance(v, list) else v for k, v in values.items() if k in fields}
    return TokenizerOptions(**known)


def open_model(
    target: str,
    *,
    bigrams: bool | None = None,
    method: str | None = None,
    ignore_headers: tuple[str, ...] = (),
    **store_options: float,
) -> OpenModel:
    """Open (and on first use, stamp) a model database; flags must agree with its stamp."""
    store = ModelStore.open(target, **store_options)  # type: ignore[arg-type]
    try:
        options = _tokenizer_options(store, bigrams)
        if ignore_headers:
            options = dataclasses.replace(options, ignore_headers=ignore_headers)
        chosen = method or store.get_meta(META_METHOD) or DEFAULT_METHOD
        if store.get_meta(META_METHOD) is None:
            store.set_meta(META_METHOD, chosen)
        return OpenModel(store, options, make_scorer(chosen))
    except BaseException:
        store.close()
        raise


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


def message_hashes(model: OpenModel, raw: bytes) -> tuple[TokenHashes, list[str]]:
    words = tokens(raw, model.options)
    return hash_tokens(words), words


def score_message(model: OpenModel, raw: bytes, n_evidence: int = 8) -> tuple[Score, list[str]]:
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


def train_from(
    model: OpenModel, targets: Iterable[str], label: int, *, source: str, progress: Progress
) -> Counter[str]:
    """Train every message found at ``targets`` as ``label``; returns a summary by outcome."""
    summary: Counter[str] = Counter()
    failures: Counter[str] = Counter()
    batch: list[tuple[TokenHashes, int, bytes, str]] = []
    for _name, raw in iter_sources(targets, failures):
        hashes = tokenize(raw, model.options)
        batch.append((hashes, label, message_digest(hashes), source))
        if len(batch) >= BATCH:
            _flush(model, batch, summary, progress)
    _flush(model, batch, summary, progress)
    summary["unreadable"] += sum(failures.values())
    return summary


def _flush(
    model: OpenModel,
    batch: list[tuple[TokenHashes, int, bytes, str]],
    summary: Counter[str],
    progress: Progress,
) -> None:
    if not batch:
        return
    for outcome, n in model.store.train_many(batch).items():
        summary[outcome.name.lower()] += n
    progress.tick(len(batch))
    batch.clear()


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
    "train_from",
    "untrain_from",
]
