"""Judging one message: tokenize, look up counts, score, and place the score in a band.

The pipeline is tokenize (CPU) -> ``store.lookup`` (database) -> ``scorer.score`` (CPU).  Nothing
that can wait (a lock, the network) runs on the event loop, and an ``asyncio.Semaphore`` caps how
many messages are in the pipeline at once (``model.max_concurrent_scoring``) so a burst queues
instead of piling up memory.  Where each step runs depends on the message's size (see "Hops"
and "On the loop"):

    below ON_LOOP_BELOW (16 KiB)   tokenize and score on the loop; counts from memory, or
                                   from the local SQLite file without waiting for a lock;
                                   a worker thread looks up whatever that declines
    below INLINE_BELOW (64 KiB)    everything in one worker thread
    larger                         the same (the default), or with model.tokenizer_processes
                                   tokenize in the process pool, look up and score in a thread

Large mail: threads by default, processes when ``model.tokenizer_processes`` is set.
``bench/bench_relay.py`` on the 2-core development machine, 100 KB messages, 500,000-token
model, two rounds each, 2026-12-02 15:40 UTC (mailweir against the bare relay of the same run):

                   clients  msg/s    p99 ms   CPU ms/msg  PSS MB (daemon and its processes)
    threads           1     97-107   14-15     7.1-7.7      107
                      8    119-137   80-88     7.3-8.5      109-112
    2 processes       1     71-74    16-18    10.9-11.6     156-164
                      8    137-141   75-79    10.1-10.4     158-164
    1 process         8    137-146   68-70     9.5-9.9      149-150

and mixed, 4 clients of 4 KB beside 4 of 100 KB: 4 KB mail p50 5.6-6.1 ms against 8.3-12.0
with processes, p99 40-48 against 31-36; the same wall time; daemon CPU 1.26-1.30 s against
1.49-1.59; 109-111 MB PSS against 158-166.  Pickling each message to a worker and back, the
pool's manager thread and the forkserver cost more than they save on a machine with few
cores, and the processes (two workers, the forkserver, the resource tracker) hold 45-55 MB.
What threads cost: the loop shares the interpreter lock while a large message is parsed, so
other connections wait a little more at the tail (the p99 above) and a pathological message's
parse (bounded by the tokenizer's limits) slows the loop rather than a worker.  On a machine
with spare cores and much large mail, the processes parse beside the loop.

The case for processes (``POOL_KIND``), measured earlier with ``bench/bench_pool.py`` on the
2-core development machine (Python 3.11, 2 workers, 8 messages in flight, a 10 ms ticker on the
loop; three alternating rounds each, ranges over the rounds; the machine is shared, so absolute
figures move between runs, the comparison did not):

    4 KB x 2,000    thread  185-253 msg/s, ticker late: median 2.1-2.8 ms, p99 15-19 ms
                    process 183-206 msg/s, ticker late: median 1.2-1.4 ms, p99 11-17 ms
    64 KB x 400     thread   75-99 msg/s,  ticker late: median 4.9-6.5 ms, p99 21-62 ms
                    process  76-93 msg/s,  ticker late: median 1.0-1.1 ms, p99  6-15 ms

Throughput is a wash (threads at most about 20 % ahead on small messages, and either is far
beyond what a small organisation receives), but a thread pool shares the GIL with the loop, so
every connection waits while a message is parsed: median lateness 2-6 times and p99 1.3-4 times
that of the process pool, growing with message size.  Worker processes also keep a
pathological message's CPU time off the loop entirely.  What the process pool costs: pickling
each message to a worker (a memory copy), about 30 MB resident per worker, and a dead worker
breaking the pool, which :class:`Judge` repairs by replacing it (``executor_factory``).  The
database lookups stay in threads of the daemon's own process.

Hops: every round trip to a pool costs the loop a submit and a wake-up, and a process pool
also pickling both ways and the pool's manager thread.  Three hops per message (tokenize in the
process pool, look up in a thread, score in the process pool) cost 12.3 ms of daemon CPU per
4 KB message in ``bench/bench_relay.py`` (8 clients, 500,000-token model); one thread hop
costs 5.0 ms.  So a message shorter than ``INLINE_BELOW`` is judged in one hop on the judge's
own threads (tokenize, look up, score, name the evidence), holding the GIL for about a
millisecond; a longer one is tokenized in the process pool, where its parse time stays off
the loop's GIL, and then looked up and scored in one thread hop.

On the loop: a thread does not keep the loop free while it computes.  It needs the GIL the loop
holds, and under load the two trade it at the interpreter's switch interval (5 ms), so the
other connections waited about as long as if the work ran on the loop, and the hand-over
itself cost more CPU than judging a small message.  ``bench/bench_relay.py`` (4 KB, 8 clients,
every count in memory, two pairs of runs): 3.1-3.5 ms of daemon CPU per message judged on the
loop against 4.2-4.4 ms in a thread, 30 % more throughput, 19-26 ms at p99 against 29-36 ms.
So a message below ``ON_LOOP_BELOW`` (at most a millisecond or two of tokenizing) is tokenized
and scored on the loop, with its counts from ``store.cached_counts``: memory, and on SQLite the
few tokens memory lacks (about six per message of real mail) read from the local file on a
connection that never waits for a lock.  That read cost about 0.1 ms; handing it to a thread
cost 1.5-2 ms of CPU per message in the same benchmark with six new words per message (daemon
CPU 3.5-4.3 ms against 4.6-4.8).  A busy SQLite file, PostgreSQL (a network round trip) or any
error sends the lookup to a worker thread, as before.

``Judge.judge`` never raises.  Any exception, a locked database included, becomes band
``"failed"``; the traceback is logged with the tracking id and the failure counted, and the SMTP
side then passes the message on untagged (or answers 4xx, by setting).
"""

from __future__ import annotations

import asyncio
import base64
import concurrent.futures
import functools
import logging
import multiprocessing
import os
import time
from collections import Counter
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np

from mailweir.daemon.log_setup import tag_message
from mailweir.daemon.settings import PolicySettings, Settings
from mailweir.model.hashing import limit_digest_cache
from mailweir.model.nb import NaiveBayes, Score
from mailweir.model.token_texts import TokenTexts
from mailweir.model.tokenize import DEFAULT_OPTIONS, TokenizerOptions, tokens_and_hashes
from mailweir.model.types import (
    UNREAD_VOCABULARY,
    ClassCounts,
    TokenCounts,
    TokenHashes,
    Vocabulary,
)

log = logging.getLogger("mailweir.judge")

JudgedBand = Literal["ham", "suspect", "spam", "unjudged", "failed"]
POOL_KIND: Literal["thread", "process"] = "process"  # see the module docstring
INLINE_BELOW = 64 * 1024  # bytes; smaller messages skip the process pool (module docstring)
ON_LOOP_BELOW = 16 * 1024  # bytes; smaller messages are judged on the loop unless I/O is needed
# Token digests each tokenizer process keeps (model/hashing.py; the daemon's own keeps 200,000).
# 150 generated 100 KB messages, each twice through two workers: 51 MB PSS per worker with
# 200,000 and 19 MB with 20,000, at 11.7-11.9 and 10.9-11.0 ms of worker CPU per message.
WORKER_DIGEST_CACHE = 20_000
N_EVIDENCE = 4  # tokens listed each way, for the header and the log
META_TOKENIZER = "tokenizer"
META_METHOD = "method"


@dataclass(frozen=True)
class Judgement:
    """What the daemon decided about one message.

    ``evidence`` holds (token text, signed log-odds weight) pairs, strongest first; a positive
    weight pushes toward spam.  ``score`` and ``token_hashes`` are None when nothing could be
    computed (``"failed"``); an ``"unjudged"`` message still carries its token hashes so that
    feedback on it can train the model later.
    """

    tracking_id: str
    band: JudgedBand
    score: float | None
    evidence: tuple[tuple[str, float], ...]
    token_hashes: TokenHashes | None


def new_tracking_id() -> str:
    """16 characters: 48 bits of milliseconds, then 32 random bits, in RFC 4648 base32hex.

    base32hex keeps byte order in character order, so ids sort by arrival time.
    """
    stamp = (time.time_ns() // 1_000_000).to_bytes(6, "big")
    return base64.b32hexencode(stamp + os.urandom(4)).decode("ascii").lower()


def band_for(probability: float, policy: PolicySettings) -> Literal["ham", "suspect", "spam"]:
    """Place a spam probability in its band; a score equal to a cut-off belongs above it."""
    if probability >= policy.spam_threshold:
        return "spam"
    if probability >= policy.suspect_threshold:
        return "suspect"
    return "ham"


# -- CPU steps: module-level functions, so a process pool can run them too ------------------


def tokenize_step(raw: bytes, options: TokenizerOptions) -> tuple[TokenHashes, TokenTexts]:
    """Return the message's unique sorted hashes and one token text per hash (same order)."""
    # Each word hashed once (through the digest cache); bigram hashes mixed from word hashes,
    # and a bigram's text made only if it is named as evidence.
    words, aligned = tokens_and_hashes(raw, options)
    # Distinct texts have distinct hashes but for a BLAKE2b collision, and distinct keys sort
    # the same way whatever the method: the plain sort serves, and the stable one (the first
    # text of a repeated hash keeps it) runs only when a hash repeats.  Sorting and checking a
    # 4 KB message's 216 hashes: 51 against 60 thousand instructions, 7 against 10 µs.
    order = aligned.argsort()
    ordered = aligned[order]
    if not (ordered[1:] == ordered[:-1]).any():
        return ordered, words.take(order)
    order = aligned.argsort(kind="stable")
    ordered = aligned[order]
    first = np.ones(len(ordered), dtype=np.bool_)
    np.not_equal(ordered[1:], ordered[:-1], out=first[1:])
    return ordered[first], words.take(order[first])


def score_step(
    scorer: NaiveBayes,
    hashes: TokenHashes,
    counts: TokenCounts,
    class_count: ClassCounts,
    vocabulary: Vocabulary,
) -> Score:
    return scorer.score(hashes, counts, class_count, vocabulary, N_EVIDENCE)


def make_executor(
    workers: int, kind: Literal["thread", "process"] = POOL_KIND
) -> concurrent.futures.Executor:
    """The pool for the CPU steps, of the kind chosen above."""
    if kind == "process":
        # forkserver, not fork: never fork a process that already runs threads and a loop.
        # Preloading the judge makes each new worker start with the tokenizer imported.
        context = multiprocessing.get_context("forkserver")
        context.set_forkserver_preload(["mailweir.daemon.judge"])
        return concurrent.futures.ProcessPoolExecutor(
            workers,
            mp_context=context,
            initializer=limit_digest_cache,
            initargs=(WORKER_DIGEST_CACHE,),
        )
    return concurrent.futures.ThreadPoolExecutor(workers, thread_name_prefix="mailweir-score")


@dataclass(frozen=True)
class _ModelView:
    class_count: ClassCounts
    counts: TokenCounts | None  # None when the cold-start guard holds
    vocabulary: Vocabulary | None


@dataclass(frozen=True)
class _Steps:
    hashes: TokenHashes
    score: Score | None  # None when the cold-start guard holds
    evidence: tuple[tuple[str, float], ...]
    parse_seconds: float
    score_seconds: float


class Judge:
    """Scores messages for the SMTP handler; safe to share across every connection."""

    def __init__(
        self,
        store: Any,
        settings: Settings,
        executor: concurrent.futures.Executor | None = None,
        *,
        executor_factory: Callable[[], concurrent.futures.Executor] | None = None,
        metrics: Any = None,
        inline_below: int = 0,
        on_loop_below: int = 0,
    ) -> None:
        """``executor`` runs the CPU steps (None: the judge's own threads).  With
        ``executor_factory`` the judge makes its own and replaces it when it breaks (a process
        pool whose worker died fails every later call otherwise).  Messages shorter than
        ``inline_below`` bytes skip a process pool (see ``INLINE_BELOW``); those shorter than
        ``on_loop_below`` are judged on the event loop unless their counts need the database
        (see ``ON_LOOP_BELOW``; the store must then offer ``cached_counts``)."""
        self._store = store
        self._inline_below = inline_below
        self._on_loop_below = on_loop_below
        self._metrics = metrics  # daemon.metrics.Metrics: parsing and scoring time
        # With a factory the pool is made when the first message that needs it comes
        # (``_executor_for``): a site whose mail is all small never starts its processes.
        self.executor = executor
        self._executor_factory = executor_factory
        # Beside a process pool the in-process steps get threads of their own, as many as
        # model.scoring_workers: the loop's default pool has up to six, and each thread that
        # looks up keeps its own database connection (about 35 MB more resident each,
        # measured with bench/bench_relay.py), while more threads than cores only contend
        # for the GIL.
        # Without a pool of its own they serve every message the loop does not judge, large
        # ones included (model.tokenizer_processes off).
        self._threads: concurrent.futures.ThreadPoolExecutor | None = None
        if executor is None or isinstance(executor, concurrent.futures.ProcessPoolExecutor):
            self._threads = concurrent.futures.ThreadPoolExecutor(
                settings.model.scoring_workers, thread_name_prefix="mailweir-judge"
            )
        self._semaphore = asyncio.Semaphore(settings.model.max_concurrent_scoring)
        self._policy = settings.policy
        self.options, self.scorer = _model_identity(store, settings)
        self.counts: Counter[str] = Counter()  # judgements by band, for metrics and tests

    @property
    def policy(self) -> PolicySettings:
        return self._policy

    def reload(self, settings: Settings) -> None:
        """Take new cut-offs and guard; judgements already running finish with the old ones."""
        self._policy = settings.policy

    async def judge(self, raw: bytes) -> Judgement:
        tracking_id = new_tracking_id()
        tag_message(tracking_id)  # this message's log lines (a scoring failure's too) carry it
        policy = self._policy  # one policy for the whole message, even across a reload
        executor = self._executor_for(len(raw))
        try:
            async with self._semaphore:
                judgement = await self._judge(tracking_id, raw, policy, executor)
        except Exception as exc:
            log.exception("scoring failed for message %s", tracking_id)
            judgement = Judgement(tracking_id, "failed", None, (), None)
            if isinstance(exc, concurrent.futures.BrokenExecutor):
                self._replace_executor(executor)
        self.counts[judgement.band] += 1
        return judgement

    def close(self) -> None:
        """Shut the executor down if the judge made it (waits for steps already running)."""
        if self._executor_factory is not None and self.executor is not None:
            self.executor.shutdown(wait=True, cancel_futures=True)
            self.executor = None
        if self._threads is not None:
            self._threads.shutdown(wait=True, cancel_futures=True)

    def _executor_for(self, size: int) -> concurrent.futures.Executor | None:
        """The pool for a message of *size* bytes.  A pool of the judge's own starts with the
        first message of ``inline_below`` bytes or more (the size that uses it); until then
        the judge's threads serve.  Starting a process pool starts multiprocessing's resource
        tracker too (7.8 MB PSS, measured with bench/bench_relay.py)."""
        if self.executor is None and self._executor_factory is not None:
            if size < self._inline_below:
                return self._threads
            self.executor = self._executor_factory()
        return self.executor if self.executor is not None else self._threads

    def _replace_executor(self, broken: concurrent.futures.Executor | None) -> None:
        if self._executor_factory is None or broken is None or self.executor is not broken:
            return  # not ours to replace, or another message already replaced it
        log.error("scoring pool broke (a worker died); starting a new one")
        self.executor = self._executor_factory()
        broken.shutdown(wait=False, cancel_futures=True)

    async def _judge(
        self,
        tracking_id: str,
        raw: bytes,
        policy: PolicySettings,
        executor: concurrent.futures.Executor | None,
    ) -> Judgement:
        loop = asyncio.get_running_loop()
        if len(raw) < self._on_loop_below:
            steps = await self._judge_on_loop(raw, policy.min_trained, executor)
            return self._judgement(tracking_id, steps, policy)
        work = functools.partial(self._judge_here, raw, policy.min_trained)
        if isinstance(executor, concurrent.futures.ProcessPoolExecutor):
            if len(raw) >= self._inline_below:
                started = time.perf_counter()
                hashes, texts = await loop.run_in_executor(
                    executor, tokenize_step, raw, self.options
                )
                parsing = time.perf_counter() - started
                work = functools.partial(
                    self._score_here, hashes, texts, policy.min_trained, parsing
                )
            executor = self._threads  # looking up and scoring stay in this process
        steps = await loop.run_in_executor(executor, work)
        return self._judgement(tracking_id, steps, policy)

    async def _judge_on_loop(
        self, raw: bytes, min_trained: int, executor: concurrent.futures.Executor | None
    ) -> _Steps:
        """Tokenize here; score here too when memory holds every count, else look up and score
        in a worker thread (the one step that may wait on the database)."""
        started = time.perf_counter()
        hashes, texts = tokenize_step(raw, self.options)
        parse_seconds = time.perf_counter() - started
        # A method that reads the vocabulary summary may need the database for it.
        cached = None
        started = time.perf_counter()
        if not self.scorer.uses_vocabulary:
            cached = self._store.cached_counts(hashes, local_read=True)
        if cached is not None:
            totals, counts = cached
            view = self._guarded(totals, lambda: counts, min_trained)
            return self._scored(hashes, texts, view, parse_seconds, started)
        if isinstance(executor, concurrent.futures.ProcessPoolExecutor):
            executor = self._threads
        work = functools.partial(self._score_here, hashes, texts, min_trained, parse_seconds)
        return await asyncio.get_running_loop().run_in_executor(executor, work)

    def _judgement(self, tracking_id: str, steps: _Steps, policy: PolicySettings) -> Judgement:
        if steps.score is None:
            return Judgement(tracking_id, "unjudged", None, (), steps.hashes)
        if self._metrics is not None:
            self._metrics.parsing_seconds.observe(steps.parse_seconds)
            self._metrics.scoring_seconds.observe(steps.score_seconds)
        probability = float(steps.score.spam_probability)
        band = band_for(probability, policy)
        return Judgement(tracking_id, band, probability, steps.evidence, steps.hashes)

    def _judge_here(self, raw: bytes, min_trained: int) -> _Steps:
        """Every step in the calling worker thread: one hop from the loop, nothing pickled."""
        started = time.perf_counter()
        hashes, texts = tokenize_step(raw, self.options)
        return self._score_here(hashes, texts, min_trained, time.perf_counter() - started)

    def _score_here(
        self, hashes: TokenHashes, texts: Sequence[str], min_trained: int, parse_seconds: float
    ) -> _Steps:
        """Look up and score in the calling worker thread (None score: the guard holds)."""
        started = time.perf_counter()
        view = self._read_model(hashes, min_trained)
        return self._scored(hashes, texts, view, parse_seconds, started)

    def _scored(
        self,
        hashes: TokenHashes,
        texts: Sequence[str],
        view: _ModelView,
        parse_seconds: float,
        started: float,
    ) -> _Steps:
        """Score what was read (CPU only; None score: the guard holds).  The scoring time
        runs from ``started``, before the counts were read (``mailweir_scoring_seconds``)."""
        if view.counts is None or view.vocabulary is None:
            return _Steps(hashes, None, (), parse_seconds, 0.0)
        score = score_step(self.scorer, hashes, view.counts, view.class_count, view.vocabulary)
        seconds = time.perf_counter() - started
        evidence = _evidence_text(score, hashes, texts)
        return _Steps(hashes, score, evidence, parse_seconds, seconds)

    def _guarded(
        self, class_count: ClassCounts, counts_of: Callable[[], TokenCounts], min_trained: int
    ) -> _ModelView:
        """The model view, its counts from ``counts_of``, or no counts (none read) while the
        cold-start guard holds."""
        # An empty class leaves no posterior at all, so the guard holds even with min_trained 0.
        # (A list's min: np.min of two numbers costs ten times as much, every message.)
        if min(class_count.tolist()) < max(min_trained, 1):
            return _ModelView(class_count, None, None)
        # Fisher reads only token and class counts: no vocabulary summary (its snapshot costs
        # time per message and, made once in a thread, memory the allocator keeps).
        vocabulary = self._store.vocabulary() if self.scorer.uses_vocabulary else UNREAD_VOCABULARY
        return _ModelView(class_count, counts_of(), vocabulary)

    def _read_model(self, hashes: TokenHashes, min_trained: int) -> _ModelView:
        """Database step (worker thread): class totals, and counts unless the guard holds."""
        class_count = np.asarray(self._store.class_count(), dtype=np.int64)
        return self._guarded(class_count, lambda: self._store.lookup(hashes), min_trained)


def _evidence_text(
    score: Score, hashes: TokenHashes, texts: Sequence[str]
) -> tuple[tuple[str, float], ...]:
    """Name each evidence hash by its token text, strongest first across both directions."""
    ranked = sorted(score.evidence, key=lambda e: (-abs(e.weight), e.token_hash))
    if not ranked or not len(hashes):
        return tuple((_unnamed(item.token_hash), float(item.weight)) for item in ranked)
    wanted = np.array([item.token_hash for item in ranked], dtype=np.int64)
    # One search for all of them: a call per item cost more than the rest of this step.
    at = np.minimum(hashes.searchsorted(wanted), len(hashes) - 1).tolist()
    held = hashes[at].tolist()
    # And the texts in one step: 8 indexings of a TokenTexts cost 61 thousand instructions.
    names = texts.texts_at(at) if isinstance(texts, TokenTexts) else [texts[i] for i in at]
    return tuple(
        (name if value == token_hash else _unnamed(token_hash), float(weight))
        for (token_hash, weight), name, value in zip(ranked, names, held, strict=True)
    )


def _unnamed(token_hash: int) -> str:
    return f"#{token_hash & 0xFFFFFFFFFFFFFFFF:016x}"


def _model_identity(store: Any, settings: Settings) -> tuple[TokenizerOptions, NaiveBayes]:
    """The tokenizer options and method the model was built with (store meta), else defaults.

    Hashes made with other tokenizer options would silently miss every stored count, so the
    store's stamp wins over the configuration.
    """
    from mailweir.daemon.learning import options_from_json, scorer_for

    options = DEFAULT_OPTIONS
    stamped = store.get_meta(META_TOKENIZER)
    if stamped:
        options = options_from_json(stamped)
    method = store.get_meta(META_METHOD) or settings.model.method
    if method != settings.model.method:
        log.info("model database was built for method %r; using it over model.method", method)
    return options, scorer_for(method, options)  # a bigram model: Fisher over every token
