"""What pruning costs: accuracy lost by forgetting rare tokens, and the time `prune` takes.

Accuracy (default): the online replay of bench_accuracy.py (same corpus, order and counts in
memory); before message ``--at`` the counts lose every token seen in at most N messages, as
``mailweir prune --max-count N`` does to tokens not seen lately; figures cover the messages
from ``--at`` on, against the same replay without pruning.  ``--every K`` prunes every K
messages instead of once.

    python bench/bench_prune.py [--bigrams] [--variant fisher:max_tokens=none]
        [--margin 10 | --every-message] [--at 5000] [--max-count 1 --max-count 2]

Time (``--sqlite DIR``): trains the corpus into a SQLite model (every message), optionally
pads it with ``--pad`` synthetic rare tokens, then times ``ModelStore.prune`` (what
``mailweir prune`` runs) removing every token seen in at most one message.

Corpus: Enron-Spam (Metsis et al., CEAS 2006).  Prints figures only.
"""

from __future__ import annotations

import argparse
import dataclasses
import sys
import time
from pathlib import Path

import numpy as np
from bench_accuracy import DEFAULT_CORPUS, TARGET_FPR, parse_variant, tokenized

from mailweir.daemon.learning import DEFAULT_METHOD, open_model
from mailweir.daemon.margin import DEFAULT_TRAIN_MARGIN
from mailweir.daemon.replay import ReplayPlan, replay_hashes
from mailweir.daemon.replay_counts import MemoryCounts
from mailweir.daemon.sources import read_corpus
from mailweir.model import evaluate
from mailweir.model.hashing import message_digest
from mailweir.model.tokenize import DEFAULT_OPTIONS
from mailweir.store.counts import day_number


class Pruner:
    """Prunes the replay's counts at message ``at`` (or every ``every`` messages)."""

    def __init__(self, max_count: int, at: int, every: int) -> None:
        self.max_count, self.at, self.every = max_count, at, every
        self.first = 0
        self.removed = 0

    def __call__(self, i: int, counts: MemoryCounts) -> None:
        due = i % self.every == 0 and i > 0 if self.every else i == self.at
        if self.max_count and due:
            self.first = self.first or counts.tokens
            self.removed += counts.prune(self.max_count)


def accuracy(args: argparse.Namespace, hashes: list[np.ndarray], labels: np.ndarray) -> None:
    names = [str(i) for i in range(len(labels))]
    plan = ReplayPlan(methods=(), train_margin=args.margin)
    variant = args.variant or DEFAULT_METHOD
    print(
        f"trainer {variant}, margin {args.margin}, bigrams {args.bigrams}; figures from {args.at}"
    )
    for max_count in [0, *(args.max_count or [1, 2, 3])]:
        pruner = Pruner(max_count, args.at, args.every)
        started = time.process_time()
        result = replay_hashes(
            hashes, labels.tolist(), names, plan, [parse_variant(variant)], before_each=pruner
        )
        kept, scores = labels[args.at :], result.results[0].scores[args.at :]
        caught = evaluate.spam_caught_at_false_positive_rate(kept, scores, TARGET_FPR)
        print(
            f"prune <= {max_count}: (1-AUC)% {evaluate.one_minus_auc_percent(kept, scores):.4f}"
            f"  caught@0.1% {caught:.1%}  tokens at first prune {pruner.first or result.tokens:,}"
            f"  removed {pruner.removed:,}  tokens at end {result.tokens:,}"
            f"  trained {result.trained}  ({time.process_time() - started:.0f} s CPU)"
        )
        sys.stdout.flush()


def prune_time(args: argparse.Namespace, hashes: list[np.ndarray], labels: np.ndarray) -> None:
    path = args.sqlite / f"prune-{'osb' if args.bigrams else 'words'}.sqlite3"
    path.unlink(missing_ok=True)
    model = open_model(str(path), bigrams=args.bigrams, margin=None)
    try:
        started = time.monotonic()
        items = [
            (h, int(y), message_digest(h), "bench") for h, y in zip(hashes, labels, strict=True)
        ]
        model.store.train_many(items)
        print(f"trained {len(items)} messages in {time.monotonic() - started:.0f} s")
        if args.pad:
            pad(model.store, args.pad)
        rows = model.store.stats().tokens
        size = path.stat().st_size
        print(f"{rows:,} rows, {size / 1e6:.0f} MB ({size / rows:.1f} B/row)")
        started = time.monotonic()
        cpu = time.process_time()
        removed = model.store.prune(max_count=1, unseen_days=0, today=day_number() + 1)
        print(
            f"prune <= 1: removed {removed:,} of {rows:,} rows in "
            f"{time.monotonic() - started:.1f} s wall, {time.process_time() - cpu:.1f} s CPU"
        )
    finally:
        model.close()


def pad(store: object, count: int) -> None:
    """Add ``count`` rows seen in one message each (random hashes), as a long tail would."""
    rng = np.random.default_rng(1)
    started = time.monotonic()
    with store.engine.begin() as conn:  # type: ignore[attr-defined]
        for start in range(0, count, 500_000):
            n = min(500_000, count - start)
            values = rng.integers(-(2**63), 2**63 - 1, size=n, dtype=np.int64)
            spam = rng.random(n) < 0.4
            rows = zip(
                values.tolist(),
                (~spam).astype(int).tolist(),
                spam.astype(int).tolist(),
                strict=True,
            )
            conn.exec_driver_sql(
                "INSERT OR IGNORE INTO weir_token (hash, ham, spam, last_seen) VALUES (?, ?, ?, ?)",
                [(h, a, b, day_number()) for h, a, b in rows],
            )
    print(f"padded {count:,} rare rows in {time.monotonic() - started:.0f} s")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("corpus", nargs="?", default=str(DEFAULT_CORPUS))
    parser.add_argument("--bigrams", action="store_true")
    parser.add_argument("--variant", help="the trainer's scorer, as in bench_accuracy.py")
    regime = parser.add_mutually_exclusive_group()
    regime.add_argument("--margin", type=float, default=DEFAULT_TRAIN_MARGIN)
    regime.add_argument("--every-message", dest="margin", action="store_const", const=None)
    parser.add_argument("--at", type=int, default=5000)
    parser.add_argument("--every", type=int, default=0, help="prune every K messages")
    parser.add_argument("--max-count", type=int, action="append")
    parser.add_argument("--sqlite", type=Path, help="time prune on a SQLite model in this folder")
    parser.add_argument("--pad", type=int, default=0, help="synthetic rare rows to add")
    parser.add_argument("--cache", type=Path, default=Path("/tmp/mailweir-bench-tokens"))
    args = parser.parse_args()
    if not Path(args.corpus).exists():
        print(f"corpus not found at {args.corpus}: nothing to measure (skipped)")
        return
    corpus = read_corpus(args.corpus)
    labels = np.array([m.label for m in corpus], dtype=np.int64)
    options = dataclasses.replace(DEFAULT_OPTIONS, bigrams=args.bigrams)
    hashes, _ = tokenized(corpus, options, args.cache)
    if args.sqlite:
        prune_time(args, hashes, labels)
    else:
        accuracy(args, hashes, labels)


if __name__ == "__main__":
    main()
