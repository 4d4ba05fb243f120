"""The judge: bands at the cut-offs, the cold-start guard, failures, evidence, a free loop."""

from __future__ import annotations

import asyncio
import concurrent.futures
import dataclasses
import os
import threading
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from mailweir.daemon import judge as judge_module
from mailweir.daemon.judge import Judge, band_for, make_executor, new_tracking_id
from mailweir.daemon.learning import META_TOKENIZER, options_to_json
from mailweir.daemon.settings import ModelSettings, PolicySettings, Settings
from mailweir.model.hashing import message_digest
from mailweir.model.tokenize import DEFAULT_OPTIONS, tokenize
from mailweir.model.types import HAM, SPAM, Vocabulary

try:
    from mailweir.store import ModelStore
    from mailweir.store.errors import StoreBusy
except ImportError:  # the store lands in parallel; these tests wait for it
    ModelStore = None  # type: ignore[assignment,misc]
    StoreBusy = RuntimeError  # type: ignore[assignment,misc]

needs_store = pytest.mark.skipif(ModelStore is None, reason="mailweir.store.ModelStore missing")


def message(sender: str, subject: str, body: str) -> bytes:
    head = (
        f"From: {sender}\r\nTo: Priya Raman <priya.raman@harbourlane.example>\r\n"
        f"Subject: {subject}\r\nMIME-Version: 1.0\r\n"
        "Content-Type: text/plain; charset=utf-8\r\n\r\n"
    )
    return (head + body.replace("\n", "\r\n") + "\r\n").encode("utf-8")


HAM_MAIL = [
    message(
        "Alma Fitzgerald <alma.fitz@mail.example>",
        "Biscuit's vaccination booster",
        "Hello Priya, could we move Biscuit's booster appointment to Thursday afternoon?\n"
        "Thanks, Alma",
    ),
    message(
        "VetSupply Orders <orders@vetsupply.example>",
        "Delivery note for order 5521",
        "Your order of surgical gloves and suture kits will be delivered to the practice "
        "on Tuesday morning. Delivery note attached.",
    ),
    message(
        "Tobias Lindqvist <tobias.lindqvist@harbourlane.example>",
        "Reception rota next week",
        "Priya, the reception rota for next week is on the shared drive. Dr. Okafor is in "
        "surgery on Wednesday, so please keep her appointments light.",
    ),
    message(
        "Northgate Diagnostics Lab <results@northgate-lab.example>",
        "Blood test results for Mango",
        "The blood test results for Mango (patient 3381) are ready for Dr. Maren Okafor. "
        "All values within the normal range.",
    ),
]
SPAM_MAIL = [
    message(
        "Lottery Claims Office <claims@prize-winners.example.com>",
        "You are a WINNER claim your prize now",
        "Congratulations winner! Claim your cash prize now, send your bank details today. "
        "Guaranteed prize, act now!",
    ),
    message(
        "Pharmacy Deals <offers@cheap-meds.example.org>",
        "Cheap pills discount guaranteed",
        "Cheap pills with no prescription, discount guaranteed, act now and claim your "
        "exclusive offer today!",
    ),
    message(
        "Account Security <security@verify-login.example.com>",
        "Verify your account password now",
        "Your account will be closed. Verify your password now at our secure login page, "
        "act now to claim continued access!",
    ),
    message(
        "Crypto Growth Fund <advisor@fast-returns.example.net>",
        "Guaranteed returns claim your bonus",
        "Guaranteed crypto returns, claim your bonus today, send your bank details now!",
    ),
]
NEW_SPAM = message(
    "Prize Desk <desk@prize-winners.example.com>",
    "WINNER: claim your guaranteed cash prize now",
    "Winner! Claim your guaranteed cash prize now, send bank details today, act now!",
)
NEW_HAM = message(
    "Greta Holm <greta.holm@mail.example>",
    "Appointment for Pepper on Thursday",
    "Hello Priya, Pepper needs a dental check. Is Thursday afternoon free at the practice?",
)


def settings(**policy: Any) -> Settings:
    base = {"min_trained": 4, "suspect_threshold": 0.5, "spam_threshold": 0.99}
    return Settings(policy=PolicySettings(**{**base, **policy}))


@pytest.fixture
def store(tmp_path: Path) -> Iterator[Any]:
    if ModelStore is None:
        pytest.skip("mailweir.store.ModelStore missing")
    opened = ModelStore.open(str(tmp_path / "model.sqlite3"))
    batch = []
    for label, mails in ((HAM, HAM_MAIL), (SPAM, SPAM_MAIL)):
        for raw in mails:
            hashes = tokenize(raw)
            batch.append((hashes, label, message_digest(hashes), "test"))
    opened.train_many(batch)
    yield opened
    opened.close()


class FakeStore:
    """A model with fixed counts: every token seen once as ham, nothing as spam."""

    def __init__(self, class_count: tuple[int, int] = (10, 10), fail: Exception | None = None):
        self._class_count = np.array(class_count, dtype=np.int64)
        self.fail = fail
        self.lookup_threads: set[int] = set()
        self.meta: dict[str, str] = {}

    def get_meta(self, key: str) -> str | None:
        return self.meta.get(key)

    def class_count(self) -> np.ndarray:
        return self._class_count

    def lookup(self, hashes: np.ndarray) -> np.ndarray:
        self.lookup_threads.add(threading.get_ident())
        if self.fail is not None:
            raise self.fail
        return np.tile(np.array([[1, 0]], dtype=np.int64), (len(hashes), 1))

    in_memory = False  # whether cached_counts answers (as ModelStore's does once cached)

    def cached_counts(
        self, hashes: np.ndarray, *, local_read: bool = False
    ) -> tuple[np.ndarray, np.ndarray] | None:
        if not self.in_memory:
            return None
        return self._class_count, np.tile(np.array([[1, 0]], dtype=np.int64), (len(hashes), 1))

    def vocabulary(self) -> Vocabulary:
        self.vocabulary_reads = getattr(self, "vocabulary_reads", 0) + 1
        return Vocabulary.from_token_counts(np.array([[1, 0], [0, 1]], dtype=np.int64))


@pytest.mark.parametrize(
    ("probability", "band"),
    [(0.0, "ham"), (0.4999, "ham"), (0.5, "suspect"), (0.98, "suspect"), (0.99, "spam")],
)
def test_judge_band_for_cutoffs(probability: float, band: str) -> None:
    assert band_for(probability, PolicySettings(suspect_threshold=0.5, spam_threshold=0.99)) == band


def test_judge_tracking_ids_unique_and_time_ordered() -> None:
    ids = [new_tracking_id() for _ in range(200)]
    assert len(set(ids)) == 200
    assert all(len(i) == 16 and i.isalnum() for i in ids)
    assert new_tracking_id()[:9] >= ids[0][:9]  # the millisecond prefix never goes back


@needs_store
async def test_judge_spam_and_ham_scored_apart(store: Any) -> None:
    judge = Judge(store, settings())
    spam, ham = await judge.judge(NEW_SPAM), await judge.judge(NEW_HAM)
    assert spam.score is not None and ham.score is not None
    assert spam.score > 0.5 > ham.score
    assert ham.band == "ham"
    assert spam.token_hashes is not None and len(spam.token_hashes) > 10


@needs_store
async def test_judge_bands_at_cutoffs_after_reload(store: Any) -> None:
    judge = Judge(store, settings())
    score = (await judge.judge(NEW_SPAM)).score
    assert score is not None
    judge.reload(settings(suspect_threshold=0.0, spam_threshold=score))
    assert (await judge.judge(NEW_SPAM)).band == "spam"  # equal to the cut-off: above it
    judge.reload(settings(suspect_threshold=score, spam_threshold=min(1.0, score + 1e-9)))
    assert (await judge.judge(NEW_SPAM)).band == "suspect"
    judge.reload(settings(suspect_threshold=min(1.0, score + 1e-9), spam_threshold=1.0))
    assert (await judge.judge(NEW_SPAM)).band == "ham"


@needs_store
async def test_judge_unjudged_below_min_trained(store: Any) -> None:
    judge = Judge(store, settings(min_trained=5))  # four of each class were trained
    judgement = await judge.judge(NEW_SPAM)
    assert judgement.band == "unjudged"
    assert judgement.score is None and judgement.evidence == ()
    assert judgement.token_hashes is not None  # kept so feedback can train on it later


async def test_judge_unjudged_when_a_class_is_empty_even_without_guard() -> None:
    judge = Judge(FakeStore((0, 30)), settings(min_trained=0))
    assert (await judge.judge(NEW_HAM)).band == "unjudged"


@needs_store
async def test_judge_evidence_names_tokens(store: Any) -> None:
    judgement = await Judge(store, settings()).judge(NEW_SPAM)
    texts = [text for text, _ in judgement.evidence]
    weights = [weight for _, weight in judgement.evidence]
    assert 0 < len(texts) <= 2 * judge_module.N_EVIDENCE
    assert not any(text.startswith("#") for text in texts)  # every hash found its text
    assert any("prize" in text.lower() or "claim" in text.lower() for text in texts)
    assert weights == sorted(weights, key=abs, reverse=True)
    assert max(weights) > 0


@needs_store
async def test_judge_uses_method_stamped_in_store(store: Any) -> None:
    store.set_meta("method", "bernoulli")
    judge = Judge(store, settings())
    assert judge.scorer.name == "bernoulli"


@pytest.mark.parametrize("error", [StoreBusy("database is locked"), RuntimeError("bug")])
async def test_judge_failed_when_store_raises(
    error: Exception, caplog: pytest.LogCaptureFixture
) -> None:
    judge = Judge(FakeStore(fail=error), settings())
    judgement = await judge.judge(NEW_HAM)
    assert judgement.band == "failed"
    assert judgement.score is None and judgement.token_hashes is None
    assert judge.counts["failed"] == 1
    assert judgement.tracking_id in caplog.text
    assert "Traceback" in caplog.text


async def test_judge_failed_when_scorer_raises(monkeypatch: pytest.MonkeyPatch) -> None:
    def broken(*_: Any) -> None:
        raise ValueError("counts of the wrong shape")

    monkeypatch.setattr(judge_module, "score_step", broken)
    judgement = await Judge(FakeStore(), settings()).judge(NEW_HAM)
    assert judgement.band == "failed"


async def test_judge_scores_with_fake_counts() -> None:
    judgement = await Judge(FakeStore(), settings()).judge(NEW_HAM)
    assert judgement.band == "ham"  # every token was only ever seen in ham
    assert judgement.score is not None and judgement.score < 0.5


def tokenizer_threads(monkeypatch: pytest.MonkeyPatch) -> set[int]:
    """The threads the judge tokenizes in, from now on."""
    seen: set[int] = set()
    real_tokens = judge_module.tokens_and_hashes

    def watched(raw: bytes, options: Any) -> Any:
        seen.add(threading.get_ident())
        return real_tokens(raw, options)

    monkeypatch.setattr(judge_module, "tokens_and_hashes", watched)
    return seen


async def test_judge_small_message_with_counts_in_memory_stays_on_the_loop(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    # Handing a few hundred microseconds of work to a thread cost more than the work (the
    # thread still needs the GIL the loop holds): with nothing to wait for, it runs here.
    seen = tokenizer_threads(monkeypatch)
    store = FakeStore()
    store.in_memory = True
    judge = Judge(store, settings(), on_loop_below=judge_module.ON_LOOP_BELOW)
    judgement = await judge.judge(NEW_HAM)
    assert seen == {threading.get_ident()}
    assert not store.lookup_threads  # memory answered; the database was never asked
    assert judgement.band == "ham"


async def test_judge_lookup_the_store_declines_goes_to_a_thread(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    seen = tokenizer_threads(monkeypatch)
    store = FakeStore()  # cached_counts declines: the counts need a lookup that may wait
    judge = Judge(store, settings(), on_loop_below=judge_module.ON_LOOP_BELOW)
    judgement = await judge.judge(NEW_HAM)
    assert seen == {threading.get_ident()}  # small: tokenized on the loop
    assert store.lookup_threads and threading.get_ident() not in store.lookup_threads
    assert judgement.band == "ham"


async def test_judge_large_message_tokenized_off_the_loop(monkeypatch: pytest.MonkeyPatch) -> None:
    seen = tokenizer_threads(monkeypatch)
    store = FakeStore()
    store.in_memory = True
    judge = Judge(store, settings(), on_loop_below=judge_module.ON_LOOP_BELOW)
    padding = b"Pepper is doing well after the dental check.\r\n" * 400
    large = NEW_HAM + padding
    assert len(large) >= judge_module.ON_LOOP_BELOW
    assert (await judge.judge(large)).band == "ham"
    assert seen and threading.get_ident() not in seen


async def test_judge_cpu_and_database_work_leave_the_loop_free(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    # Without on_loop_below (as for messages of ON_LOOP_BELOW bytes and more) nothing runs
    # on the loop.
    # The tokenizer is held until the event loop itself releases it: if tokenizing ran on the
    # loop, the loop could never reach release.set() and the wait would time out.
    release = threading.Event()
    seen: dict[str, Any] = {}
    real_tokens = judge_module.tokens_and_hashes

    def held_tokens(raw: bytes, options: Any) -> Any:
        seen["thread"] = threading.get_ident()
        seen["released"] = release.wait(10)
        return real_tokens(raw, options)

    monkeypatch.setattr(judge_module, "tokens_and_hashes", held_tokens)
    store = FakeStore()
    task = asyncio.create_task(Judge(store, settings()).judge(NEW_HAM))
    for _ in range(1000):
        if "thread" in seen:
            break
        await asyncio.sleep(0.005)
    release.set()
    judgement = await task
    assert seen["released"], "the tokenizer ran on the event loop"
    assert seen["thread"] != threading.get_ident()
    assert threading.get_ident() not in store.lookup_threads
    assert judgement.band == "ham"


async def test_judge_concurrency_capped_by_semaphore(monkeypatch: pytest.MonkeyPatch) -> None:
    gate = threading.Event()
    lock = threading.Lock()
    state = {"now": 0, "most": 0}
    real_tokens = judge_module.tokens_and_hashes

    def counting_tokens(raw: bytes, options: Any) -> Any:
        with lock:
            state["now"] += 1
            state["most"] = max(state["most"], state["now"])
        gate.wait(10)
        with lock:
            state["now"] -= 1
        return real_tokens(raw, options)

    monkeypatch.setattr(judge_module, "tokens_and_hashes", counting_tokens)
    capped = dataclasses.replace(settings(), model=ModelSettings(max_concurrent_scoring=2))
    with concurrent.futures.ThreadPoolExecutor(8) as pool:
        judge = Judge(FakeStore(), capped, pool)
        tasks = [asyncio.create_task(judge.judge(NEW_HAM)) for _ in range(6)]
        for _ in range(1000):
            if state["now"] == 2:
                break
            await asyncio.sleep(0.005)
        for _ in range(20):
            await asyncio.sleep(0)  # room for a third to slip in, were the cap broken
        gate.set()
        bands = [j.band for j in await asyncio.gather(*tasks)]
    assert state["most"] == 2
    assert bands == ["ham"] * 6


@pytest.mark.slow
async def test_judge_runs_in_a_process_pool() -> None:
    with judge_module.make_executor(2, "process") as pool:
        judgement = await Judge(FakeStore(), settings(), pool).judge(NEW_HAM)
    assert judgement.band == "ham"
    assert any(text for text, _ in judgement.evidence)


def digest_cache_capacity() -> int:
    from mailweir.model import hashing

    return hashing.digest_cache_capacity()


@pytest.mark.slow
def test_process_pool_workers_keep_a_small_digest_cache() -> None:
    # The workers see only large messages; their digest caches were most of their memory.
    from mailweir.model.digest_cache import DigestCache
    from mailweir.model.hashing import DIGEST_CACHE_ENTRIES

    small = DigestCache(judge_module.WORKER_DIGEST_CACHE).capacity
    with judge_module.make_executor(1, "process") as pool:
        assert pool.submit(digest_cache_capacity).result(60) == small
    # the daemon's own process keeps its size
    assert digest_cache_capacity() == DigestCache(DIGEST_CACHE_ENTRIES).capacity > small


def crash_worker() -> None:
    os._exit(3)  # a worker dying the hard way (out of memory, a crash in C code)


async def test_judge_starts_its_pool_with_the_first_message_that_needs_it() -> None:
    """Small mail never uses the process pool; making it at start cost a site whose mail is
    all small a resource-tracker process for nothing."""
    made: list[concurrent.futures.Executor] = []

    def factory() -> concurrent.futures.Executor:
        made.append(concurrent.futures.ThreadPoolExecutor(1))
        return made[-1]

    judge = Judge(
        FakeStore(), settings(), executor_factory=factory, inline_below=4096, on_loop_below=1024
    )
    large = NEW_HAM + b"\r\n" + b"Pepper is doing well after the check.\r\n" * 120
    assert len(NEW_HAM) < 1024 and len(large) >= 4096
    for raw in (NEW_HAM, NEW_HAM[:-2] + b" " * 2000 + b"\r\n"):  # on the loop; in a thread
        assert (await judge.judge(raw)).band == "ham"
    assert made == [] and judge.executor is None
    assert (await judge.judge(large)).band == "ham"
    assert made == [judge.executor]
    assert (await judge.judge(large)).band == "ham"
    assert len(made) == 1  # made once, then kept
    judge.close()
    assert judge.executor is None


@pytest.mark.slow
async def test_judge_replaces_a_broken_process_pool() -> None:
    judge = Judge(FakeStore(), settings(), executor_factory=lambda: make_executor(1, "process"))
    assert (await judge.judge(NEW_HAM)).band == "ham"
    first = judge.executor
    assert first is not None
    with pytest.raises(concurrent.futures.process.BrokenProcessPool):
        await asyncio.get_running_loop().run_in_executor(first, crash_worker)
    assert (await judge.judge(NEW_HAM)).band == "failed"  # the message caught in the break
    assert judge.executor is not first
    assert (await judge.judge(NEW_HAM)).band == "ham"  # a fresh pool serves the next one
    judge.close()
    assert judge.executor is None


async def test_judge_never_lets_cancellation_pass_as_failure() -> None:
    # Shutdown cancels judgements; that must stay a cancellation, not a "failed" verdict.
    started = asyncio.Event()

    class SlowStore(FakeStore):
        def class_count(self) -> np.ndarray:
            started_loop.call_soon_threadsafe(started.set)
            threading.Event().wait(0.2)
            return super().class_count()

    started_loop = asyncio.get_running_loop()
    judge = Judge(SlowStore(), settings())
    task = asyncio.create_task(judge.judge(NEW_HAM))
    await started.wait()
    task.cancel()
    with pytest.raises(asyncio.CancelledError):
        await task
    assert judge.counts["failed"] == 0


def test_judge_scores_a_bigram_model_with_every_token_and_words_with_the_cap() -> None:
    # bench/ACCURACY.md: capped at 25 tokens a bigram model did far worse than words alone;
    # the daemon must score as `mailweir train`/`replay` do (learning.scorer_for).
    words_store, bigram_store = FakeStore(), FakeStore()
    bigram_options = dataclasses.replace(DEFAULT_OPTIONS, bigrams=True)
    bigram_store.meta[META_TOKENIZER] = options_to_json(bigram_options)
    words = Judge(words_store, settings())
    bigrams = Judge(bigram_store, settings())
    assert getattr(words.scorer, "max_tokens", None) == 25
    assert bigrams.options.bigrams and getattr(bigrams.scorer, "max_tokens", 0) is None
    words.close()
    bigrams.close()


@pytest.mark.parametrize(("method", "reads"), [("fisher", 0), ("multinomial", 1)])
async def test_judge_reads_the_vocabulary_only_for_a_scorer_that_uses_it(
    method: str, reads: int
) -> None:
    store = FakeStore()
    judge = Judge(store, dataclasses.replace(settings(), model=ModelSettings(method=method)))
    try:
        judgement = await judge.judge(NEW_HAM)
    finally:
        judge.close()
    assert judgement.band == "ham"
    assert getattr(store, "vocabulary_reads", 0) == reads


def test_fisher_score_is_the_same_without_the_vocabulary_summary() -> None:
    # What the judge relies on when it passes Fisher an empty summary (uses_vocabulary False).
    rng = np.random.default_rng(7)
    counts = rng.integers(0, 40, size=(300, 2))
    hashes = np.arange(300, dtype=np.int64)
    classes = np.array([700, 500], dtype=np.int64)
    full = Vocabulary.from_token_counts(rng.integers(0, 40, size=(5000, 2)))
    empty = Vocabulary.from_token_counts(np.zeros((0, 2), dtype=np.int64))
    judge = Judge(FakeStore(), settings())
    fisher = judge.scorer
    judge.close()
    assert not fisher.uses_vocabulary
    with_summary = fisher.score(hashes, counts, classes, full, 4)
    without = fisher.score(hashes, counts, classes, empty, 4)
    assert with_summary.spam_probability == without.spam_probability
    assert with_summary.evidence == without.evidence


def test_evidence_named_by_token_text_strongest_first() -> None:
    from mailweir.model.nb_base import Evidence, Score

    hashes = np.array([-9, -2, 5, 40], dtype=np.int64)  # sorted, as tokenize_step gives them
    texts = ["kennel", "booster", "wallet", "lottery"]
    evidence = (Evidence(40, 2.5), Evidence(5, 1.0), Evidence(-9, -2.5), Evidence(77, -0.5))
    named = judge_module._evidence_text(Score(0.9, evidence), hashes, texts)
    # Strongest first across both directions; a tie in strength goes to the lower hash; a
    # hash the message does not hold (never from the scorer) is shown by its value.
    assert named == (
        ("kennel", -2.5),
        ("lottery", 2.5),
        ("wallet", 1.0),
        ("#000000000000004d", -0.5),
    )
    assert judge_module._evidence_text(Score(0.5, ()), hashes, texts) == ()
    assert judge_module._evidence_text(Score(0.5, evidence[:1]), hashes[:0], []) == (
        ("#0000000000000028", 2.5),
    )
