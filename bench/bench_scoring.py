"""The scoring path alone, bulk training, memory per token and database bytes per token.

Scoring path: what the daemon does for one message under 16 KiB (daemon/judge.py): parse and
tokenize, hash, look up the counts (warm cache), score with Fisher and name the evidence, on
generated 4 KB Harbour Lane messages against a model of at least 500,000 tokens
(bench/bench_mail.py builds and keeps it).  Figures are CPU seconds of this process
(``time.process_time``), so other load on a shared machine moves them less than wall time.

    python bench/bench_scoring.py                  # 2,000 messages, the kept 500k-token model
    python bench/bench_scoring.py --messages 5000 --min-tokens 1000000
    python bench/bench_scoring.py --bigrams        # a bigram model, tokens and scoring

The generated messages are a hard case for hashing: their invented words are drawn evenly from
700,000, so about half of a message's tokens were never seen by the process before and miss
the token digest cache (a BLAKE2b each).  On real mail that share is about 5 % (the
Enron-Spam development corpus: 6 of 110 tokens per message new after 4,000 messages), so when
that corpus is beside the repository the same path is also measured on it: a model trained on
its first 5,000 messages scores the next 2,000 as they come (median 740 bytes), then the later
messages of 3-6 KB (mean 4 KB), each slice first as a daemon meets it and then again.  Bulk
training is measured on 3,000 generated messages and, with the corpus, on its first 5,000.

Targets (issue 6): scoring path >= 1,500 msg/s per core, bulk training >= 1,000 msg/s,
resident memory <= 100 MB + 40 B per token held, <= 32 database bytes per token.
"""

from __future__ import annotations

import argparse
import os
import shutil
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path
from typing import Literal, get_args

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))

import bench_mail
import proc_cpu

from mailweir.daemon.judge import N_EVIDENCE, _evidence_text, tokenize_step
from mailweir.daemon.learning import scorer_for
from mailweir.daemon.sources import read_corpus
from mailweir.model.hashing import message_digest
from mailweir.model.nb import NaiveBayes
from mailweir.model.tokenize import DEFAULT_OPTIONS, TokenizerOptions, tokens
from mailweir.model.types import HAM, SPAM, UNREAD_VOCABULARY
from mailweir.store import ModelStore

DEV_CORPUS = Path(__file__).resolve().parents[2] / "shared/corpora/dev/enron-spam-dev.tar.gz"


def _per_message(step: Callable[[bytes], object], messages: list[bytes], rounds: int) -> float:
    """CPU seconds per message of ``step``, the best of ``rounds`` passes: other load on a
    shared machine only ever adds time, so the least is the closest to the step's own cost."""
    best = float("inf")
    for _ in range(rounds):
        started = time.process_time()
        for raw in messages:
            step(raw)
        best = min(best, (time.process_time() - started) / len(messages))
    return best


def _whole_path(
    store: ModelStore,
    scorer: NaiveBayes,
    raw: bytes,
    options: TokenizerOptions = DEFAULT_OPTIONS,
) -> None:
    """What the judge does for a message under 16 KiB (daemon/judge.py ``_judge_on_loop``):
    counts from memory, the few it lacks read from the SQLite file on the spot; ``lookup``
    (the worker-thread path) only when that read declines."""
    hashes, texts = tokenize_step(raw, options)
    cached = None if scorer.uses_vocabulary else store.cached_counts(hashes, local_read=True)
    if cached is None:
        totals, counts = np.asarray(store.class_count(), dtype=np.int64), store.lookup(hashes)
    else:
        totals, counts = cached
    # The judge makes no vocabulary summary for a method that never reads it (Fisher).
    vocabulary = store.vocabulary() if scorer.uses_vocabulary else UNREAD_VOCABULARY
    score = scorer.score(hashes, counts, totals, vocabulary, N_EVIDENCE)
    _evidence_text(score, hashes, texts)


def bench_path(
    store: ModelStore, messages: list[bytes], rounds: int, options: TokenizerOptions
) -> None:
    scorer = scorer_for("fisher", options)
    tokenized = [tokenize_step(raw, options) for raw in messages]  # warms the cache too
    for hashes, _ in tokenized:
        store.lookup(hashes)

    def whole(raw: bytes) -> None:
        _whole_path(store, scorer, raw, options)

    for raw in messages[:50]:
        whole(raw)  # the first call loads the vocabulary summary (one GROUP BY)
    seconds = _per_message(whole, messages, rounds)
    # The words' parse and tokens alone: ``tokens`` with bigrams would also make every pair's
    # text, which the judge never does (``tokenize_step`` mixes pair hashes from word hashes).
    parse = _per_message(lambda raw: tokens(raw, DEFAULT_OPTIONS), messages, rounds)
    tokenize = _per_message(lambda raw: tokenize_step(raw, options), messages, rounds)
    by_hashes = {id(raw): h for raw, (h, _) in zip(messages, tokenized, strict=True)}
    lookup = _per_message(lambda raw: store.lookup(by_hashes[id(raw)]), messages, rounds)
    counts = {key: store.lookup(h) for key, h in by_hashes.items()}
    totals, vocabulary = store.class_count(), store.vocabulary()
    score = _per_message(
        lambda raw: scorer.score(by_hashes[id(raw)], counts[id(raw)], totals, vocabulary, 4),
        messages,
        rounds,
    )
    n_tokens = np.mean([len(h) for h, _ in tokenized])
    print(
        f"scoring path, 4 KB:  {1 / seconds:7.0f} msg/s per core "
        f"({seconds * 1e3:.3f} ms CPU per message, {n_tokens:.0f} tokens each)"
    )
    print(
        f"  parse+tokenize words {parse * 1e3:.3f} ms, "
        f"+{'pairs and ' if options.bigrams else ''}hash {(tokenize - parse) * 1e3:.3f} ms, "
        f"lookup {lookup * 1e3:.3f} ms, score {score * 1e3:.3f} ms"
    )


Memory = Literal["preloaded", "read as needed", "larger than memory"]


def bench_corpus_path(
    corpus: Path, path: Path, rounds: int, options: TokenizerOptions, memory: Memory = "preloaded"
) -> None:
    """The whole scoring path on real mail, a model trained on the corpus's first 5,000.

    "first sight" is one pass over messages this process has not seen, as a running daemon
    meets them: their new words miss the digest cache, and with *memory* "preloaded" (the
    daemon's default) the complete count cache answers them without a read; "read as needed"
    reads them from the file as the judge does, into a cache warm with the model's earlier
    mail; "larger than memory" gives the count cache room for half the model's tokens, so
    ``preload`` builds the presence filter instead, and only tokens it cannot rule out are
    read (store/presence.py).
    "again" is the best of ``rounds`` more passes, every word cached.  Two slices: the next
    2,000 messages as they come (median 740 bytes), and the messages of 3-6 KB after those
    (mean 4 KB, the size the target names).
    """
    corpus_messages = read_corpus(str(corpus))
    messages = [m.raw for m in corpus_messages]
    labels = [m.label for m in corpus_messages[:5000]]
    store = ModelStore.open(str(path))
    items = []
    for raw, label in zip(messages[:5000], labels, strict=True):
        hashes, _ = tokenize_step(raw, options)
        items.append((hashes, label, message_digest(hashes), "bench"))
    store.train_many(items)
    if memory == "larger than memory":
        size = store.stats().tokens
        store.close()
        store = ModelStore.open(str(path), cache_tokens=size // 2)
        assert not store.preload() and store.presence_known, "no presence filter"
    if memory == "preloaded":  # the daemon's default (model.preload): new words cost no read
        assert store.preload(), "the model did not fit in the count cache"
    else:
        for hashes, *_ in items:
            store.lookup(hashes)  # the count cache a daemon has after judging that mail
    scorer = scorer_for("fisher", options)
    slices = {
        "as they come": messages[5000:7000],
        "of 3-6 KB": [raw for raw in messages[7000:] if 3 * 1024 <= len(raw) < 6 * 1024],
    }
    tokens = store.stats().tokens
    print(f"scoring path, real mail ({corpus.name}, model of {tokens} tokens, {memory}):")
    for name, scored in slices.items():
        first = _per_message(lambda raw: _whole_path(store, scorer, raw, options), scored, 1)
        again = _per_message(lambda raw: _whole_path(store, scorer, raw, options), scored, rounds)
        kilobytes = np.mean([len(raw) for raw in scored]) / 1024
        print(
            f"  {len(scored):5d} messages {name:12s} (mean {kilobytes:.1f} KB): "
            f"first sight {1 / first:5.0f} msg/s per core ({first * 1e3:.3f} ms), "
            f"again {1 / again:5.0f} msg/s ({again * 1e3:.3f} ms)"
        )
    store.close()


def bench_training(count: int, options: TokenizerOptions) -> None:
    messages = [bench_mail.message(i, 4096, seed=11, rare_share=0.5) for i in range(count)]
    with tempfile.TemporaryDirectory() as folder:
        store = ModelStore.open(str(Path(folder) / "train.sqlite3"))
        started = time.perf_counter()
        items = []
        for i, raw in enumerate(messages):
            hashes, _ = tokenize_step(raw, options)
            items.append((hashes, SPAM if i % 4 == 3 else HAM, message_digest(hashes), "bench"))
        tokenized = time.perf_counter()
        store.train_many(items)
        done = time.perf_counter()
        store.close()
    print(
        f"bulk training:       {count / (done - started):7.0f} msg/s with tokenizing, "
        f"{count / (done - tokenized):.0f} msg/s counting alone ({count} messages, one process)"
    )


def bench_corpus_training(corpus: Path, options: TokenizerOptions) -> None:
    """Bulk training on real mail: the corpus's first 5,000 messages, tokenizing included."""
    corpus_messages = read_corpus(str(corpus))[:5000]
    with tempfile.TemporaryDirectory() as folder:
        store = ModelStore.open(str(Path(folder) / "train.sqlite3"))
        started = time.perf_counter()
        items = []
        for message in corpus_messages:
            hashes, _ = tokenize_step(message.raw, options)
            items.append((hashes, message.label, message_digest(hashes), "bench"))
        tokenized = time.perf_counter()
        store.train_many(items)
        done = time.perf_counter()
        store.close()
    count = len(corpus_messages)
    print(
        f"bulk training, real: {count / (done - started):7.0f} msg/s with tokenizing, "
        f"{count / (done - tokenized):.0f} msg/s counting alone ({count} messages of "
        f"{corpus.name}, one process)"
    )


def bench_train_command(count: int, options: TokenizerOptions) -> None:
    """``mailweir train``'s path (learning.train_from): the ham folder, then the spam folder,
    in one process and with tokenizing processes, with the margin and for every message."""
    from mailweir.daemon import learning

    messages = [bench_mail.message(i, 4096, seed=11, rare_share=0.5) for i in range(count)]
    with tempfile.TemporaryDirectory() as folder:
        for i, raw in enumerate(messages):
            kind = Path(folder) / ("spam" if i % 4 == 3 else "ham")
            kind.mkdir(exist_ok=True)
            (kind / f"{i:06d}.eml").write_bytes(raw)
        for margin in (learning.STAMPED, None):
            for workers in (1, learning.default_workers()):
                target = str(Path(folder) / f"train-{workers}-{margin is None}.sqlite3")
                model = learning.open_model(target, margin=margin, bigrams=options.bigrams)
                quiet = learning.Progress("trained", enabled=False)
                started = time.perf_counter()
                for label, kind in ((HAM, "ham"), (SPAM, "spam")):
                    learning.train_from(
                        model,
                        [str(Path(folder) / kind)],
                        label,
                        source="bench",
                        progress=quiet,
                        workers=workers,
                    )
                seconds = time.perf_counter() - started
                model.close()
                regime = "every message" if margin is None else f"margin {model.margin:g}"
                print(
                    f"  train_from, {regime:13s} {workers} process(es) tokenizing: "
                    f"{count / seconds:5.0f} msg/s"
                )


def bench_memory(path: Path) -> None:
    """Resident memory once every token of the model is held in the count cache, preloaded
    as the daemon does (``ModelStore.preload``)."""
    before = proc_cpu.rss_bytes(os.getpid())
    reset_peak = _reset_peak_rss()
    store = ModelStore.open(str(path))
    if not store.preload():
        raise SystemExit("the model did not fit in the count cache")
    after = proc_cpu.rss_bytes(os.getpid())
    peak = proc_cpu.peak_rss_bytes(os.getpid()) if reset_peak else None
    stats = store.stats()
    store.close()
    tokens_held = stats.tokens
    budget = 100 * 2**20 + 40 * tokens_held
    print(
        f"resident memory:     {after / 2**20:7.1f} MB with {tokens_held} tokens held "
        f"(budget {budget / 2**20:.1f} MB); opening and preloading added "
        f"{(after - before) / tokens_held:.1f} B per token"
    )
    if peak is not None:
        print(f"peak while preloading: {peak / 2**20:7.1f} MB resident")
    print(
        f"database size:       {stats.database_bytes / stats.tokens:7.1f} bytes per token "
        f"({stats.tokens} tokens, {stats.database_bytes / 2**20:.1f} MiB)"
    )


def _reset_peak_rss() -> bool:
    """Start this process's peak resident size afresh (Linux: ``5`` to ``clear_refs``)."""
    try:
        Path("/proc/self/clear_refs").write_text("5")
    except OSError:
        return False
    return True


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--messages", type=int, default=2000, help="4 KB messages scored")
    parser.add_argument("--train", type=int, default=3000, help="messages trained (0: skip)")
    parser.add_argument("--no-memory", action="store_true", help="skip the memory figure")
    parser.add_argument("--min-tokens", type=int, default=500_000, help="model size")
    parser.add_argument("--rounds", type=int, default=3, help="passes per figure (the best)")
    parser.add_argument("--corpus", type=Path, default=DEV_CORPUS, help="real mail (if present)")
    parser.add_argument(
        "--bigrams", action="store_true", help="a model of words and adjacent word pairs"
    )
    args = parser.parse_args()
    options = bench_mail.BIGRAM_OPTIONS if args.bigrams else DEFAULT_OPTIONS
    if args.bigrams:
        print("bigram model: words and adjacent word pairs, Fisher uncapped")
    model = bench_mail.build_model(args.min_tokens, bigrams=args.bigrams)
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "model.sqlite3"
        shutil.copyfile(model, path)
        if not args.no_memory:
            bench_memory(path)
        store = ModelStore.open(str(path))
        messages = [bench_mail.message(i, 4096, seed=7) for i in range(args.messages)]
        bench_path(store, messages, max(1, args.rounds), options)
        store.close()
        if args.corpus.is_file():
            for n, memory in enumerate(get_args(Memory)):
                target = Path(folder) / f"corpus-{n}.sqlite3"
                bench_corpus_path(args.corpus, target, max(1, args.rounds), options, memory)
    if args.train:
        bench_training(args.train, options)
        if args.corpus.is_file():
            bench_corpus_training(args.corpus, options)
        bench_train_command(args.train, options)


if __name__ == "__main__":
    main()
