"""Accuracy on a labelled corpus: mailweir's variants against scikit-learn baselines, one order.

The protocol is the TREC spam track's online one: messages in corpus order (index.tsv), each
scored with what was learned from the earlier messages only, then trained on its true label.
Every system below sees the same messages in the same order; the first ``--warmup`` messages
count for learning but not for the figures.

- mailweir: ``daemon.replay.replay_hashes`` (counts in memory, the same arithmetic as the
  daemon's store), one pass per tokenizer setting and training regime; every ``--variant``
  of a pass reads the same counts, and the first one decides what is trained.  By default the
  regime is the product's: a message is trained only when misjudged or judged with less than
  ``mailweir train``'s default margin (``--margin M`` to change it, ``--every-message`` to train
  all); the row for the default method, words and that margin is named "mailweir default".
- ``sk-mnb-words``: scikit-learn MultinomialNB (alpha 0.01, the best of 1 and 0.01 in
  bench/ACCURACY.md) on hashed word counts, scored over the features seen in training so far.
- ``sk-sgd-char4``: scikit-learn SGDClassifier(loss="log_loss", constant step 5.0, alpha 1e-7,
  the best of a small sweep in bench/ACCURACY.md) on hashed, binary, l2-normalised character
  4-grams of the whole message, the kind of online logistic regression that led the TREC 2007
  spam track (G. V. Cormack, "University of Waterloo participation in the TREC 2007 spam
  track", 2007).

The baselines are trained in mini-batches (``--mnb-batch`` 10 by default, as MultinomialNB's
``partial_fit`` re-derives all 2**20 log-probabilities; ``--sgd-batch`` 1): a message is always
scored before its batch is learned, so scores use earlier messages only.

    python bench/bench_accuracy.py [CORPUS] [--variant fisher --variant 'fisher:strength=0.5']
        [--bigrams] [--margin 10 | --every-message] [--no-baselines] [--warmup 1000]
        [--json out.json]

Corpus: Enron-Spam (V. Metsis, I. Androutsopoulos, G. Paliouras, "Spam Filtering with Naive
Bayes - Which Naive Bayes?", CEAS 2006).  Prints figures only; asserts nothing.
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import sys
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from hashlib import blake2b
from pathlib import Path
from typing import Any, ClassVar

import numpy as np

from mailweir.daemon.learning import DEFAULT_METHOD, scorer_for
from mailweir.daemon.margin import DEFAULT_TRAIN_MARGIN
from mailweir.daemon.replay import ReplayPlan, replay_hashes
from mailweir.daemon.settings import PolicySettings
from mailweir.daemon.sources import LabelledMessage, read_corpus
from mailweir.model import evaluate
from mailweir.model.nb import NaiveBayes, make_scorer
from mailweir.model.tokenize import DEFAULT_OPTIONS, TokenizerOptions, tokenize
from mailweir.model.types import Vocabulary

DEFAULT_CORPUS = Path(__file__).resolve().parents[2] / "shared/corpora/dev/enron-spam-dev.tar.gz"
TARGET_FPR = 0.001
LogOdds = Callable[[Any, Any], np.ndarray]


@dataclass(frozen=True)
class ComplementNB(NaiveBayes):
    """Complement naive Bayes on Boolean counts, optionally weight-normalised (experiment only).

    Rennie, Shih, Teevan and Karger, "Tackling the Poor Assumptions of Naive Bayes Text
    Classifiers", ICML 2003: class c is scored by ``-sum_i log theta(~c, i)`` with theta
    estimated from the other class's counts, ``(n + alpha) / (T + alpha V)``, no prior.  With
    ``normalize`` each class's weights are divided by ``sum_k |log theta(~c, k)|`` over the
    vocabulary, which the count histogram gives exactly:
    ``V log(T + alpha V) - sum_k hist[k] log(k + alpha)``.  With two classes and no
    normalisation this is multinomial NB without its prior.
    """

    name: ClassVar[str] = "complement"
    alpha: float = 1.0
    normalize: float = 0.0

    def _weights(self, counts: np.ndarray, vocabulary: Vocabulary) -> np.ndarray:
        total = np.asarray(vocabulary.token_total, dtype=np.float64)
        log_denominator = np.log(total + self.alpha * vocabulary.size)
        log_theta = np.log(counts + self.alpha) - log_denominator  # (n, 2), per class column
        if self.normalize:
            hist = np.asarray(vocabulary.count_histogram)
            ks = np.arange(hist.shape[1])
            mass = vocabulary.size * log_denominator - hist @ np.log(ks + self.alpha)
            log_theta = log_theta / mass
        return -log_theta[:, ::-1]  # class c scored by the complement's (other column's) theta

    def joint_log_likelihood(
        self, token_count, class_count, vocabulary, frequency=None
    ) -> np.ndarray:  # type: ignore[no-untyped-def]
        counts = np.asarray(token_count)
        known = (counts > 0).any(axis=1)
        return self._weights(counts[known], vocabulary).sum(axis=0)

    def token_weights(self, token_count, class_count, vocabulary) -> np.ndarray:  # type: ignore[no-untyped-def]
        weights = self._weights(np.asarray(token_count), vocabulary)
        return weights[:, 1] - weights[:, 0]


EXPERIMENTAL: dict[str, type[NaiveBayes]] = {"complement": ComplementNB}


def parse_variant(spec: str) -> NaiveBayes:
    """``fisher`` or ``fisher:strength=0.5,max_tokens=150`` (or ``=none``) -> a scorer."""
    name, _, rest = spec.partition(":")
    params: dict[str, float | None] = {}
    for item in filter(None, rest.split(",")):
        key, _, value = item.partition("=")
        params[key.strip()] = None if value.strip().lower() == "none" else float(value)
    if name.strip() in EXPERIMENTAL:
        return EXPERIMENTAL[name.strip()](**params)
    return make_scorer(name.strip(), **params)


def tokenized(
    corpus: Sequence[LabelledMessage], options: TokenizerOptions, cache: Path | None
) -> tuple[list[np.ndarray], float]:
    """Every message's token hashes (from the cache when it holds them) and seconds spent."""
    names = blake2b("\n".join(m.name for m in corpus).encode(), digest_size=6).hexdigest()
    key = f"{options.fingerprint()}-{len(corpus)}-{names}"
    path = cache / f"{key}.npz" if cache else None
    if path and path.exists():
        stored = np.load(path)
        return np.split(stored["hashes"], np.cumsum(stored["lengths"])[:-1]), float(
            stored["seconds"]
        )
    started = time.process_time()
    hashes = [tokenize(m.raw, options) for m in corpus]
    seconds = time.process_time() - started
    if path:
        path.parent.mkdir(parents=True, exist_ok=True)
        lengths = np.array([len(h) for h in hashes])
        np.savez(path, hashes=np.concatenate(hashes), lengths=lengths, seconds=seconds)
    return hashes, seconds


def figures(name: str, labels: np.ndarray, scores: np.ndarray, cutoff: float) -> dict[str, object]:
    rates = evaluate.error_rates(labels, scores, cutoff)
    return {
        "system": name,
        "one_minus_auc_percent": evaluate.one_minus_auc_percent(labels, scores),
        "spam_caught_at_0.1%_fpr": evaluate.spam_caught_at_false_positive_rate(
            labels, scores, TARGET_FPR
        ),
        "fpr_at_cutoff": rates.false_positive_rate,
        "fnr_at_cutoff": rates.false_negative_rate,
    }


def texts(corpus: Sequence[LabelledMessage]) -> list[str]:
    # Latin-1 maps every byte to one character, so no message is lost to decoding errors.
    return [m.raw.decode("latin-1") for m in corpus]


def online_sklearn(
    make: Callable[[], Any],
    x: Any,
    labels: np.ndarray,
    batch: int,
    log_odds: LogOdds,
    seen_vocabulary: bool = False,
) -> np.ndarray:
    """Log-odds of each row from the model fitted on earlier rows, then learn it (mini-batches).

    Log-odds, not probabilities: a probability rounded to 0 or 1 ties the surest messages and
    spoils the ranking at low false-positive rates.  With ``seen_vocabulary`` features never
    seen in training are dropped before scoring (multinomial NB over the seen vocabulary;
    otherwise each unseen word penalises the class with more text).
    """
    model = make()
    out = np.zeros(len(labels))
    seen: set[int] = set()
    known = np.zeros(x.shape[1], dtype=bool)
    for start in range(0, len(labels), batch):
        rows = slice(start, start + batch)
        if len(seen) == 2:
            batch_x = x[rows].multiply(known).tocsr() if seen_vocabulary else x[rows]
            out[rows] = log_odds(model, batch_x)
        model.partial_fit(x[rows], labels[rows], classes=[0, 1])  # type: ignore[attr-defined]
        known[x[rows].indices] = True
        seen.update(labels[rows].tolist())
    return out


def _nb_log_odds(model: Any, x: Any) -> np.ndarray:
    jll = model.predict_joint_log_proba(x)
    return np.asarray(jll[:, 1] - jll[:, 0])


def baselines(
    corpus: Sequence[LabelledMessage],
    labels: np.ndarray,
    mnb_batch: int,
    sgd_batch: int,
    which: Sequence[str] = ("mnb", "sgd"),
    mnb_binary: bool = False,
    mnb_alpha: float = 1.0,
) -> dict[str, tuple[np.ndarray, float]]:
    from sklearn.feature_extraction.text import HashingVectorizer
    from sklearn.linear_model import SGDClassifier
    from sklearn.naive_bayes import MultinomialNB

    documents = texts(corpus)
    found: dict[str, tuple[np.ndarray, float]] = {}
    started = time.process_time()
    words = HashingVectorizer(n_features=2**20, alternate_sign=False, norm=None, binary=mnb_binary)
    if "mnb" in which:
        found["sk-mnb-words"] = (
            online_sklearn(
                lambda: MultinomialNB(alpha=mnb_alpha),
                words.transform(documents).tocsr(),
                labels,
                mnb_batch,
                _nb_log_odds,
                seen_vocabulary=True,
            ),
            time.process_time() - started,
        )
    if "sgd" not in which:
        return found
    started = time.process_time()
    char4 = HashingVectorizer(
        analyzer="char",
        ngram_range=(4, 4),
        lowercase=False,
        binary=True,
        alternate_sign=False,
        n_features=2**20,
    )
    found["sk-sgd-char4"] = (
        online_sklearn(
            lambda: SGDClassifier(
                loss="log_loss", alpha=1e-7, learning_rate="constant", eta0=5.0, random_state=0
            ),
            char4.transform(documents).tocsr(),
            labels,
            sgd_batch,
            lambda model, x: model.decision_function(x),
        ),
        time.process_time() - started,
    )
    return found


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("corpus", nargs="?", default=str(DEFAULT_CORPUS))
    parser.add_argument("--variant", action="append", help="method[:param=value,...]")
    parser.add_argument("--bigrams", action="store_true", help="orthogonal sparse bigrams")
    parser.add_argument("--bigram-window", type=int, default=DEFAULT_OPTIONS.bigram_window)
    regime = parser.add_mutually_exclusive_group()
    regime.add_argument(
        "--margin",
        type=float,
        default=DEFAULT_TRAIN_MARGIN,
        help="train only messages misjudged or within this log-odds margin (default: the "
        "product's)",
    )
    regime.add_argument(
        "--every-message", dest="margin", action="store_const", const=None, help="train all"
    )
    parser.add_argument("--no-baselines", action="store_true")
    parser.add_argument(
        "--baseline", action="append", choices=("mnb", "sgd"), help="only these baselines"
    )
    parser.add_argument(
        "--log-odds", action="store_true", help="rank mailweir by log-odds, not probability"
    )
    parser.add_argument("--mnb-batch", type=int, default=10)
    parser.add_argument("--mnb-binary", action="store_true", help="word presence, not counts")
    parser.add_argument("--mnb-alpha", type=float, default=0.01)
    parser.add_argument("--sgd-batch", type=int, default=1)
    parser.add_argument("--warmup", type=int, default=1000)
    parser.add_argument("--limit", type=int, default=0)
    parser.add_argument(
        "--order-seed",
        type=int,
        help="replay in this seeded shuffle of the corpus order, not index.tsv's: how much of "
        "a difference between settings one order alone gives",
    )
    parser.add_argument("--cutoff", type=float, default=PolicySettings().spam_threshold)
    parser.add_argument("--cache", type=Path, default=Path("/tmp/mailweir-bench-tokens"))
    parser.add_argument("--json", type=Path, help="also write the figures here")
    parser.add_argument("--scores", type=Path, help="write every system's scores (.npz)")
    args = parser.parse_args(argv)

    if not Path(args.corpus).exists():
        print(f"corpus not found at {args.corpus}: nothing to measure (skipped)")
        return 0
    corpus = read_corpus(args.corpus)
    corpus = corpus[: args.limit] if args.limit else corpus
    labels = np.array([m.label for m in corpus], dtype=np.int64)
    options = dataclasses.replace(
        DEFAULT_OPTIONS, bigrams=args.bigrams, bigram_window=args.bigram_window
    )
    hashes, tokenize_seconds = tokenized(corpus, options, args.cache)
    if args.order_seed is not None:  # after tokenizing: the token cache is kept in corpus order
        order = np.random.default_rng(args.order_seed).permutation(len(corpus))
        corpus, hashes = [corpus[i] for i in order], [hashes[i] for i in order]
        labels = labels[order]
    plan = ReplayPlan(methods=(), train_margin=args.margin)
    # Without --variant, the scorer the product gives a model with these options.
    scorers = (
        [parse_variant(v) for v in args.variant]
        if args.variant
        else [scorer_for(DEFAULT_METHOD, options)]
    )
    result = replay_hashes(
        hashes, labels.tolist(), [m.name for m in corpus], plan, scorers, log_odds=args.log_odds
    )
    w = args.warmup
    regime = f"{'osb' + str(args.bigram_window) if args.bigrams else 'words'}" + (
        f", margin {args.margin:g}" if args.margin is not None else ", every message"
    )
    if args.order_seed is not None:
        regime += f", order {args.order_seed}"
    product = options == DEFAULT_OPTIONS and args.margin == DEFAULT_TRAIN_MARGIN
    cutoff = args.cutoff
    if args.log_odds:  # the cut-off is a probability; compare log-odds with its logit
        cutoff = float(np.log(args.cutoff) - np.log1p(-args.cutoff))
        regime += ", log-odds"
    product = product and not args.log_odds
    rows = []
    for m, r in enumerate(result.results):
        # Only the first variant trains the counts, so only it can be the product's regime.
        name = "default" if product and m == 0 and r.method == DEFAULT_METHOD else r.method
        rows.append(figures(f"mailweir {name} [{regime}]", labels[w:], r.scores[w:], cutoff))
    if not args.no_baselines:
        chosen = args.baseline or ("mnb", "sgd")
        found = baselines(
            corpus,
            labels,
            args.mnb_batch,
            args.sgd_batch,
            chosen,
            mnb_binary=args.mnb_binary,
            mnb_alpha=args.mnb_alpha,
        )
        for name, (scores, _) in found.items():
            logit = float(np.log(args.cutoff) - np.log1p(-args.cutoff))
            rows.append(figures(name, labels[w:], scores[w:], logit))
    header = (
        f"{len(corpus)} messages, warm-up {w}; mailweir [{regime}]: {result.tokens} tokens, "
        f"{result.trained} trained, tokenizing {1000 * tokenize_seconds / len(corpus):.2f} "
        f"ms/msg CPU, replay {result.seconds:.0f} s"
    )
    print(header)
    print(f"{'system':<58} {'(1-AUC)%':>9} {'caught@0.1%':>11} {'FPR@cut':>8} {'FNR@cut':>8}")
    for row in rows:
        print(
            f"{row['system']:<58} {row['one_minus_auc_percent']:>9.4f} "
            f"{row['spam_caught_at_0.1%_fpr']:>11.1%} {row['fpr_at_cutoff']:>8.3%} "
            f"{row['fnr_at_cutoff']:>8.2%}"
        )
    print(f"(cut-off {args.cutoff:g}; caught@0.1% = spam caught at 0.1% false positives)")
    if args.scores:
        named = {r.method: r.scores for r in result.results}
        np.savez(args.scores, labels=labels, **named)
    if args.json:
        report = {"header": header, "tokens": result.tokens, "trained": result.trained}
        args.json.write_text(json.dumps({**report, "rows": rows}, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())
