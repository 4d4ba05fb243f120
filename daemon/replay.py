"""Replay a labelled corpus through a model and measure it.

Two protocols:

- ``online`` (TREC spam track): messages in order; each is scored with the counts learned so far,
  then trained on its true label, by default only when misjudged or judged with less than the
  training margin (``margin.py``), as ``mailweir train`` does; ``train_margin=None`` trains
  every message.
- ``split``: the first ``train_fraction`` of the order trains, the rest is scored without learning.

Several scoring methods can be replayed at once: they read the same counts, so one pass gives a
like-for-like comparison.
"""

from __future__ import annotations

import dataclasses
import tempfile
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from mailweir.daemon.charts import Series, line_chart
from mailweir.daemon.learning import OpenModel, Progress, open_model, scorer_for
from mailweir.daemon.margin import (
    DEFAULT_TRAIN_MARGIN,
    MARGIN_WARMUP,
    outside_margin,
    should_train,
)
from mailweir.daemon.replay_counts import MemoryCounts
from mailweir.daemon.sources import LabelledMessage
from mailweir.model import evaluate
from mailweir.model.hashing import message_digest
from mailweir.model.nb import NaiveBayes
from mailweir.model.tokenize import DEFAULT_OPTIONS, tokenize
from mailweir.model.types import (
    HAM,
    LABELS,
    SPAM,
    ClassCounts,
    TokenCounts,
    TokenHashes,
    Vocabulary,
)


@dataclass(frozen=True)
class ReplayPlan:
    methods: Sequence[str]
    protocol: str = "online"
    train_fraction: float = 0.5
    bigrams: bool = False
    ignore_headers: tuple[str, ...] = ()
    database: str | None = None  # None: a throw-away SQLite file
    # Log-odds margin as in `mailweir train` (None: train every message).
    train_margin: float | None = DEFAULT_TRAIN_MARGIN
    in_memory: bool = False  # counts in numpy arrays, no database (see MemoryCounts)


@dataclass
class MethodResult:
    method: str
    scores: np.ndarray
    labels: np.ndarray
    names: list[str]
    warmup: int = 0

    def figures(self, cutoffs: Sequence[float], target_fpr: float) -> dict[str, object]:
        labels, scores = self.labels[self.warmup :], self.scores[self.warmup :]
        rates = {
            f"{cutoff:g}": dataclass_dict(evaluate.error_rates(labels, scores, cutoff))
            for cutoff in cutoffs
        }
        return {
            "method": self.method,
            "messages": len(labels),
            "spam": int(labels.sum()),
            "ham": int(len(labels) - labels.sum()),
            "roc_auc": evaluate.roc_auc(labels, scores),
            "one_minus_auc_percent": evaluate.one_minus_auc_percent(labels, scores),
            "at_cutoffs": rates,
            "target_false_positive_rate": target_fpr,
            "cutoff_for_target": evaluate.cutoff_for_false_positive_rate(
                labels, scores, target_fpr
            ),
            "spam_caught_at_target": evaluate.spam_caught_at_false_positive_rate(
                labels, scores, target_fpr
            ),
        }


def dataclass_dict(value: object) -> dict[str, object]:
    return {k: (float(v) if isinstance(v, np.floating) else v) for k, v in vars(value).items()}


@dataclass
class ReplayResult:
    results: list[MethodResult]
    trained: int = 0
    seconds: float = 0.0
    database_bytes: int = 0
    tokens: int = 0
    extra: dict[str, object] = field(default_factory=dict)


def replay(
    corpus: Sequence[LabelledMessage], plan: ReplayPlan, *, progress: Progress
) -> ReplayResult:
    """Run the plan over the corpus and collect every method's scores in corpus order.

    With ``plan.in_memory`` the counts live in numpy arrays (:class:`MemoryCounts`) instead of a
    model database: the same figures, much faster, but no database size to report.
    """
    if plan.in_memory:
        options = dataclasses.replace(
            DEFAULT_OPTIONS, bigrams=plan.bigrams, ignore_headers=plan.ignore_headers
        )
        hashes = [tokenize(m.raw, options) for m in corpus]
        return replay_hashes(hashes, [m.label for m in corpus], [m.name for m in corpus], plan)
    with tempfile.TemporaryDirectory(prefix="mailweir-replay-") as scratch:
        target = plan.database or str(Path(scratch) / "replay.sqlite3")
        model = open_model(
            target,
            bigrams=plan.bigrams,
            method=plan.methods[0],
            ignore_headers=plan.ignore_headers,
            margin=plan.train_margin,
        )
        try:
            return _run(model, corpus, plan, progress)
        finally:
            model.close()


def replay_hashes(
    messages: Sequence[TokenHashes],
    labels: Sequence[int],
    names: Sequence[str],
    plan: ReplayPlan,
    scorers: Sequence[NaiveBayes] | None = None,
    *,
    log_odds: bool = False,
    before_each: Callable[[int, MemoryCounts], object] | None = None,
) -> ReplayResult:
    """The replay of already tokenized messages, counts in memory (for benchmarks and sweeps).

    ``scorers`` (default: ``plan.methods`` with default parameters) may carry parameters; with
    a training margin the first one decides what is trained.  With ``log_odds`` the scores are
    ``jll[spam] - jll[ham]`` instead of probabilities: the same order, but without the ties a
    probability rounded to 1.0 makes among the most certain messages.  ``before_each(i, counts)``
    runs before message ``i`` is scored (e.g. to prune the counts, as upkeep would).
    """
    options = dataclasses.replace(DEFAULT_OPTIONS, bigrams=plan.bigrams)
    chosen = list(scorers) if scorers else [scorer_for(m, options) for m in plan.methods]
    counts = MemoryCounts(messages)
    started = time.monotonic()
    n_train = int(len(messages) * plan.train_fraction) if plan.protocol == "split" else 0
    ledger: set[bytes] = set()  # as the store's ledger: an exact copy is not counted twice

    def learn(i: int) -> None:
        digest = message_digest(messages[i])
        if digest not in ledger:
            ledger.add(digest)
            counts.train(i, labels[i])

    for i in range(n_train):
        learn(i)
    scores = np.zeros((len(chosen), len(messages) - n_train))
    for i in range(n_train, len(messages)):
        if before_each is not None:
            before_each(i, counts)
        found, classes, vocabulary = counts.lookup(i), counts.class_count(), counts.vocabulary()
        for m, scorer in enumerate(chosen):
            scores[m, i - n_train] = _score(scorer, found, classes, vocabulary, log_odds)
        first = scores[0, i - n_train]
        known = int(classes[labels[i]])
        if plan.protocol == "online" and (
            _logit_should_train(first, labels[i], plan, known)
            if log_odds
            else _should_train(first, labels[i], plan, known)
        ):
            learn(i)
    label_array = np.asarray(labels[n_train:], dtype=np.int64)
    kept = list(names[n_train:])
    return ReplayResult(
        [MethodResult(_describe(s), scores[m], label_array, kept) for m, s in enumerate(chosen)],
        trained=len(ledger),
        seconds=time.monotonic() - started,
        tokens=counts.tokens,
    )


def _score(
    scorer: NaiveBayes,
    found: TokenCounts,
    classes: ClassCounts,
    vocabulary: Vocabulary,
    log_odds: bool,
) -> float:
    if not log_odds:
        return scorer.spam_probability(found, classes, vocabulary)
    if not (classes > 0).all():
        return 0.0
    with np.errstate(divide="ignore"):
        jll = scorer.joint_log_likelihood(found, classes, vocabulary)
    return float(np.clip(jll[SPAM] - jll[HAM], -1e300, 1e300))


def _describe(scorer: NaiveBayes) -> str:
    """``name`` or ``name(param=value, ...)`` for parameters away from their defaults."""
    default = type(scorer)()
    changed = [
        f"{f.name}={getattr(scorer, f.name)}"
        for f in dataclasses.fields(scorer)  # type: ignore[arg-type]
        if getattr(scorer, f.name) != getattr(default, f.name)
    ]
    return f"{scorer.name}({', '.join(changed)})" if changed else scorer.name


def _run(
    model: OpenModel, corpus: Sequence[LabelledMessage], plan: ReplayPlan, progress: Progress
) -> ReplayResult:
    scorers = [scorer_for(name, model.options) for name in plan.methods]
    n_train = int(len(corpus) * plan.train_fraction) if plan.protocol == "split" else 0
    scored = corpus[n_train:] if plan.protocol == "split" else corpus
    scores = np.zeros((len(plan.methods), len(scored)))
    trained = 0
    if n_train:
        batch = []
        for message in corpus[:n_train]:
            hashes = tokenize(message.raw, model.options)
            batch.append((hashes, message.label, message_digest(hashes), "replay"))
        model.store.train_many(batch)
        trained += n_train
        progress.tick(n_train)
    for i, message in enumerate(scored):
        hashes = tokenize(message.raw, model.options)
        counts = model.store.lookup(hashes)
        classes, vocabulary = model.store.class_count(), model.store.vocabulary()
        for m, scorer in enumerate(scorers):
            scores[m, i] = scorer.spam_probability(counts, classes, vocabulary)
        known = int(classes[message.label])
        if plan.protocol == "online" and _should_train(scores[0, i], message.label, plan, known):
            model.store.train(hashes, message.label, digest=message_digest(hashes), source="replay")
            trained += 1
        progress.tick()
    seconds = progress.done()
    labels = np.array([m.label for m in scored], dtype=np.int64)
    names = [m.name for m in scored]
    stats = model.store.stats()
    return ReplayResult(
        [MethodResult(name, scores[m], labels, names) for m, name in enumerate(plan.methods)],
        trained=trained,
        seconds=seconds,
        database_bytes=stats.database_bytes,
        tokens=stats.tokens,
    )


def _should_train(probability: float, label: int, plan: ReplayPlan, class_trained: int) -> bool:
    """Train on every message, or only on errors and near-misses (the product's own rule)."""
    return should_train(probability, label, plan.train_margin, class_trained)


def _logit_should_train(logit: float, label: int, plan: ReplayPlan, class_trained: int) -> bool:
    if plan.train_margin is None or class_trained < MARGIN_WARMUP:
        return True
    signed = logit if label == 1 else -logit  # > 0: judged the right way
    return outside_margin(signed, plan.train_margin)


def write_scores(path: Path, result: MethodResult, cutoff: float) -> None:
    """One tab-separated line per message in replay order: file, true label, score, verdict."""
    with path.open("w", encoding="utf-8") as out:
        out.write("file\tlabel\tscore\tverdict\n")
        for name, label, score in zip(result.names, result.labels, result.scores, strict=True):
            verdict = "spam" if score >= cutoff else "ham"
            out.write(f"{name}\t{LABELS[int(label)]}\t{score:.6f}\t{verdict}\n")


def write_roc(path: Path, results: Sequence[MethodResult]) -> None:
    """The ROC curve of every method as an SVG image."""
    series = []
    for result in results:
        labels, scores = result.labels[result.warmup :], result.scores[result.warmup :]
        fpr, tpr, _ = evaluate.roc_curve(labels, scores)
        auc = evaluate.one_minus_auc_percent(labels, scores)
        series.append(Series(f"{result.method} (1-AUC)% = {auc:.3f}", fpr, tpr))
    svg = line_chart(
        series,
        title="ROC curve",
        x_label="false-positive rate (ham judged spam)",
        y_label="spam caught",
        diagonal=True,
    )
    path.write_text(svg, encoding="utf-8")
