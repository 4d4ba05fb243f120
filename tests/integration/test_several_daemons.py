"""Several daemons on one PostgreSQL database (issue 5): a correction learned through one
changes the score in another, concurrent corrections lose no count, and each process's cache
honours its ``model.staleness_seconds`` bound.

Every test gets a database of its own (CREATE DATABASE with a unique name on the server that
MAILWEIR_TEST_POSTGRES_URL points at, dropped afterwards), so nothing here collides with the
store tests that wipe the shared test database.

Oracles: the presence counts and class totals computed in the test from the distinct messages
and their final labels (DESIGN.md "Learning": counts are presence counts, a correction moves a
message between the classes); Mailweir-Score as relayed to each daemon's own next-hop sink.
No timed assertions: "seen after the bound" polls with a generous deadline, "not seen yet" is
checked right after the write, against a bound of an hour.
"""

from __future__ import annotations

import asyncio
import concurrent.futures
import dataclasses
import email
import email.policy
import multiprocessing
import os
import random
import re
import sys
import threading
import time
import types
import uuid
from collections import Counter
from collections.abc import AsyncIterator, Iterator
from contextlib import AsyncExitStack, asynccontextmanager
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from sqlalchemy import create_engine
from sqlalchemy.engine import make_url

from mailweir.daemon import scenario
from mailweir.daemon.feedback import FeedbackIntake, hashes_of
from mailweir.daemon.feedback_types import FeedbackRequest, FeedbackStatus
from mailweir.daemon.service import Service
from mailweir.daemon.settings import FeedbackSettings, HostPort, ModelSettings, Settings
from mailweir.model.hashing import message_digest
from mailweir.model.tokenize import DEFAULT_OPTIONS
from mailweir.model.types import HAM, SPAM
from mailweir.store import ModelStore
from mailweir.store import counts as store_counts

# The next-hop sink and the SMTP sender of the daemon tests (tests/daemon has no package).
sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "daemon"))
from smtp_helpers import NextHop, daemon_settings, send

pytestmark = [
    pytest.mark.slow,
    pytest.mark.postgres,
    pytest.mark.skipif(
        not os.environ.get("MAILWEIR_TEST_POSTGRES_URL"),
        reason="MAILWEIR_TEST_POSTGRES_URL is not set",
    ),
]

WAIT = 60.0  # seconds: upper bound for "eventually"; never a timing claim
STALENESS = 0.5  # the small bound of the daemons and stores that must catch up
TOBIAS = "tobias.lindqvist@harbourlane.example"
SUPPLIER = "accounts@coastal-linen.example"


@pytest.fixture
def database() -> Iterator[str]:
    """A fresh, empty database on the test server; its URL."""
    base = make_url(os.environ["MAILWEIR_TEST_POSTGRES_URL"])
    name = f"mailweir_several_{uuid.uuid4().hex[:12]}"
    admin = create_engine(base, isolation_level="AUTOCOMMIT")
    try:
        with admin.connect() as conn:
            conn.exec_driver_sql(f'CREATE DATABASE "{name}"')
        yield base.set(database=name).render_as_string(hide_password=False)
    finally:
        with admin.connect() as conn:
            conn.exec_driver_sql(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')
        admin.dispose()


def _item(raw: bytes, label: int, source: str = "import") -> tuple[Any, int, bytes, str]:
    hashes = hashes_of(raw, DEFAULT_OPTIONS)
    return hashes, label, message_digest(hashes), source


def _train_scenario(url: str) -> None:
    """The practice's sorted mail, and the supplier's reminder filed as junk."""
    store = ModelStore.open(url)
    try:
        items = [_item(m.raw, HAM if m.label == "ham" else SPAM) for m in scenario.training_set(30)]
        store.train_many([*items, _item(scenario.overdue_reminder().raw, SPAM)])
    finally:
        store.close()


# -- a correction through daemon A changes the score in daemon B ---------------------------------


@dataclasses.dataclass
class Daemon:
    service: Service
    sink: NextHop

    @property
    def port(self) -> int:
        return self.service.smtp_address.port

    async def score(self, raw: bytes) -> tuple[float, str]:
        """Send ``raw`` through this daemon; the score and id its next hop received (the copy
        itself is ``sink.deliveries[-1]``)."""
        sent = await send(self.port, raw, [TOBIAS], SUPPLIER)
        assert sent.data is not None and sent.data[0] == 250, sent
        delivered = self.sink.deliveries[-1].content
        score = re.search(rb"\r\nMailweir-Score: ([0-9.]+)\r\n", b"\r\n" + delivered)
        tracking = re.search(rb"\r\nMailweir-Id: (\S+)\r\n", b"\r\n" + delivered)
        assert score is not None and tracking is not None, delivered[:400]
        return float(score.group(1)), tracking.group(1).decode()


def _settings(sink: NextHop, url: str, staleness: float, state: Path) -> Settings:
    # Every band tagged, so each relayed copy carries its score.
    base = daemon_settings(sink.address, min_trained=5, spam_threshold=0.9, ham_action="tag")
    model = ModelSettings(database=url, staleness_seconds=staleness, scoring_workers=1)
    http = dataclasses.replace(base.http, listen=HostPort("127.0.0.1", 0))
    feedback = FeedbackSettings(
        spam_address=scenario.FEEDBACK_SPAM, ham_address=scenario.FEEDBACK_HAM
    )
    return dataclasses.replace(base, state_dir=state, model=model, http=http, feedback=feedback)


@asynccontextmanager
async def _daemons(url: str, tmp_path: Path, *bounds: float) -> AsyncIterator[list[Daemon]]:
    """One whole Service per staleness bound, each with its own ports and next hop."""
    async with AsyncExitStack() as stack:
        daemons = []
        for i, bound in enumerate(bounds):
            sink = NextHop()
            await sink.start()
            stack.push_async_callback(sink.stop)
            service = Service(_settings(sink, url, bound, tmp_path / f"state{i}"))
            await service.startup()
            stack.push_async_callback(service.shutdown, 5)
            daemons.append(Daemon(service, sink))
        yield daemons


def _forward(delivered: bytes, address: str) -> bytes:
    """Tobias's mail client forwarding the delivered copy as an attachment."""
    forward = email.message.EmailMessage()
    forward["From"] = f"Tobias Lindqvist <{TOBIAS}>"
    forward["To"] = address
    forward["Subject"] = "Fwd: misfiled"
    forward.set_content("Please learn from the attached message.\n")
    original = email.message_from_bytes(delivered, policy=email.policy.default)
    forward.add_attachment(original)  # message/rfc822 (RFC 2046 section 5.2.1)
    return forward.as_bytes(policy=email.policy.SMTP)


def _stored_as(sent: Any) -> str:
    """What a 250 reply to a correction says happened: trained, moved or already known."""
    assert sent.data is not None and sent.data[0] == 250, sent
    match = re.search(rb"stored: 1 ([a-z ]+) \(", sent.data[1])
    assert match is not None, sent.data
    return match.group(1).decode()


async def _correct_as_wanted(daemon: Daemon, delivered: bytes) -> str:
    """Tobias forwards the delivered copy as an attachment to the daemon's wanted-mail address
    over SMTP from 127.0.0.1 (in the default feedback.trusted_networks); the reply text."""
    forward = _forward(delivered, scenario.FEEDBACK_HAM)
    sent = await send(daemon.port, forward, [scenario.FEEDBACK_HAM], TOBIAS)
    assert sent.data is not None, sent
    code, text = sent.data
    assert code == 250 and b"1 moved" in text, sent.data
    return text.decode()


async def _eventually_other_than(daemon: Daemon, raw: bytes, old: float) -> float:
    deadline = time.monotonic() + WAIT
    while True:
        score, _ = await daemon.score(raw)
        if score != old or time.monotonic() >= deadline:
            return score
        await asyncio.sleep(0.1)


async def test_several_daemons_correction_through_one_changes_the_others_score(
    database: str, tmp_path: Path
) -> None:
    _train_scenario(database)
    reminder = scenario.overdue_reminder().raw
    async with _daemons(database, tmp_path, STALENESS, STALENESS, 3600.0) as (a, b, slow):
        before = [await d.score(reminder) for d in (a, b, slow)]
        scores = {score for score, _ in before}
        assert len(scores) == 1, before  # one model, one score
        (old,) = scores
        assert old >= 0.9  # filed as junk: the correction below is a false positive

        await _correct_as_wanted(a, a.sink.deliveries[-1].content)

        # A applied its own commit in memory; the hour-bound daemon still scores from its
        # cache, read before the correction.
        new, _ = await a.score(reminder)
        assert new < old
        assert (await slow.score(reminder))[0] == old
        # B sees the correction once its bound has passed (polled; never timed).
        assert await _eventually_other_than(b, reminder, old) == new


async def test_several_daemons_correction_through_another_daemon_than_the_judge(
    database: str, tmp_path: Path
) -> None:
    # Behind one mail server the user's forward may reach any daemon: B finds A's verdict in
    # the shared log and retrains exactly the tokens A judged on; A then scores it anew.
    _train_scenario(database)
    reminder = scenario.overdue_reminder().raw
    hashes = hashes_of(reminder, DEFAULT_OPTIONS)
    async with _daemons(database, tmp_path, STALENESS, STALENESS) as (a, b):
        old, tracking_id = await a.score(reminder)
        assert a.service.verdict_log is not None
        await a.service.verdict_log.flush()
        before = ModelStore.open(database)
        counts, totals = before.lookup(hashes), before.class_count()
        before.close()

        assert tracking_id in await _correct_as_wanted(b, a.sink.deliveries[-1].content)

        after = ModelStore.open(database)
        try:
            assert (after.lookup(hashes) - counts).tolist() == [[1, -1]] * len(hashes)
            assert (after.class_count() - totals).tolist() == [1, -1]
        finally:
            after.close()
        assert await _eventually_other_than(a, reminder, old) < old


async def test_several_daemons_same_forward_to_two_daemons_at_once_counts_once(
    database: str, tmp_path: Path
) -> None:
    # A user (or a mail server retrying) sends the same correction to two daemons at the same
    # moment: both answer 250, the ledger lets exactly one of them change the model.
    _train_scenario(database)
    wanted = scenario.generate(4, "ham", 77)
    async with _daemons(database, tmp_path, STALENESS, STALENESS) as (a, b):
        jobs = []  # (message as sent, its delivered copy, feedback address, change per token)
        for raw, address, change in [
            (scenario.overdue_reminder().raw, scenario.FEEDBACK_HAM, [1, -1]),
            *((m.raw, scenario.FEEDBACK_SPAM, [0, 1]) for m in wanted),
        ]:
            await a.score(raw)
            jobs.append((raw, a.sink.deliveries[-1].content, address, change))
        expected: dict[int, np.ndarray] = {}  # the tokens each message was judged on
        for raw, _, _, change in jobs:
            for h in hashes_of(raw, DEFAULT_OPTIONS).tolist():
                expected[h] = expected.get(h, np.zeros(2, np.int64)) + change
        keys = np.array(sorted(expected), dtype=np.int64)
        store = ModelStore.open(database)
        counts, totals = store.lookup(keys), store.class_count()
        store.close()

        replies = []
        for _, delivered, address, _ in jobs:
            forward = _forward(delivered, address)
            both = await asyncio.gather(*(send(d.port, forward, [address], TOBIAS) for d in (a, b)))
            replies.append(sorted(_stored_as(sent) for sent in both))

        assert replies == [["already known", "moved"]] + [["already known", "trained"]] * 4
        store = ModelStore.open(database)
        try:
            change = np.array([expected[k] for k in keys.tolist()])
            assert (store.lookup(keys) - counts).tolist() == change.tolist()
            assert (store.class_count() - totals).tolist() == [1, 3]
        finally:
            store.close()


# -- concurrent corrections through the feedback intake lose no count ----------------------------

WORKERS = 4


def _corrections() -> tuple[list[tuple[bytes, str]], list[list[tuple[bytes, str]]]]:
    """Shared corrections (every worker sends all of them) and each worker's own.

    Shared: the first six trained ham are reported as junk (moves) and six messages never
    trained are reported either way (new); own: five new messages per worker.
    """
    trained_ham = [m.raw for m in scenario.generate(12, "ham", 51)]
    shared = [(raw, "spam") for raw in trained_ham[:6]]
    fresh = scenario.generate(3, "ham", 52) + scenario.generate(3, "spam", 52)
    shared += [(m.raw, m.label) for m in fresh]
    own = [
        [(m.raw, m.label) for m in scenario.generate(5, ("ham", "spam")[i % 2], 60 + i)]
        for i in range(WORKERS)
    ]
    return shared, own


def _pretrained() -> list[tuple[bytes, int]]:
    return [(m.raw, HAM) for m in scenario.generate(12, "ham", 51)] + [
        (m.raw, SPAM) for m in scenario.generate(12, "spam", 51)
    ]


def _correcting_worker(url: str, index: int, start: Any, results: Any) -> None:
    """One daemon's feedback intake (its own process, store and cache) sending corrections."""

    async def run() -> dict[str, int]:
        store = ModelStore.open(url, staleness_seconds=STALENESS)
        intake = FeedbackIntake(store, FeedbackSettings(), DEFAULT_OPTIONS)
        shared, own = _corrections()
        items = shared + own[index]
        random.Random(index).shuffle(items)
        outcome: Counter[str] = Counter()
        start.wait()
        try:
            for raw, correction in items:
                request = FeedbackRequest(correction, "mail", raw=raw, client=f"worker{index}")
                outcome[(await intake(request)).status.value] += 1  # type: ignore[arg-type]
        finally:
            store.close()
        return dict(outcome)

    results.put(asyncio.run(run()))


def test_several_daemons_concurrent_corrections_lose_no_count(database: str) -> None:
    store = ModelStore.open(database)
    store.train_many([_item(raw, label) for raw, label in _pretrained()])
    store.close()
    context = multiprocessing.get_context("spawn")
    start, results = context.Event(), context.Queue()
    workers = [
        context.Process(target=_correcting_worker, args=(database, i, start, results))
        for i in range(WORKERS)
    ]
    for process in workers:
        process.start()
    start.set()
    outcomes = [results.get(timeout=240) for _ in workers]
    for process in workers:
        process.join(timeout=60)
        assert process.exitcode == 0

    # Each distinct message's final label, then its presence counts.
    shared, own = _corrections()
    final = {
        message_digest(hashes_of(raw, DEFAULT_OPTIONS)): (raw, label)
        for raw, label in _pretrained()
    }
    corrected = shared + [c for part in own for c in part]
    for raw, correction in corrected:
        final[message_digest(hashes_of(raw, DEFAULT_OPTIONS))] = (
            raw,
            HAM if correction == "ham" else SPAM,
        )
    assert len(final) == len(_pretrained()) + len(corrected) - 6  # six moves; all distinct
    expected: dict[int, list[int]] = {}
    totals = [0, 0]
    for raw, label in final.values():
        totals[label] += 1
        for h in hashes_of(raw, DEFAULT_OPTIONS).tolist():
            expected.setdefault(h, [0, 0])[label] += 1

    check = ModelStore.open(database)
    try:
        keys = np.array(sorted(expected), dtype=np.int64)
        assert check.lookup(keys).tolist() == [expected[k] for k in keys.tolist()]
        assert check.class_count().tolist() == totals
        stats = check.stats()
        assert (stats.tokens, stats.ledger_rows) == (len(expected), len(final))
        with check.engine.connect() as conn:
            logged = conn.exec_driver_sql("SELECT count(*) FROM weir_feedback").scalar_one()
    finally:
        check.close()
    # Exactly one worker changed the model for each correction; the others found it done.
    assert logged == len(corrected)
    merged: Counter[str] = Counter()
    for outcome in outcomes:
        merged.update(outcome)
    assert merged == {
        FeedbackStatus.MOVED.value: 6,
        FeedbackStatus.TRAINED.value: 6 + 5 * WORKERS,
        FeedbackStatus.ALREADY_KNOWN.value: len(shared) * (WORKERS - 1),
    }


# -- the cache honours the staleness bound -------------------------------------------------------

WORDS = np.array([-(2**50) + 7, 12_345, 2**51 + 3], dtype=np.int64)  # invented token hashes


def _train_in_another_process(url: str, label: int, digest: bytes) -> None:
    store = ModelStore.open(url)
    try:
        store.train(WORDS, label, digest=digest, source="other")
    finally:
        store.close()


def _other_process_trains(url: str, label: int, digest: bytes) -> None:
    context = multiprocessing.get_context("spawn")
    process = context.Process(target=_train_in_another_process, args=(url, label, digest))
    process.start()
    process.join(timeout=120)
    assert process.exitcode == 0


def _view(store: ModelStore) -> tuple[list[list[int]], list[int], int, list[int]]:
    vocabulary = store.vocabulary()
    return (
        store.lookup(WORDS).tolist(),
        store.class_count().tolist(),
        vocabulary.size,
        vocabulary.token_total.tolist(),
    )


def test_several_daemons_cache_sees_another_process_after_the_bound(database: str) -> None:
    store = ModelStore.open(database, staleness_seconds=STALENESS)
    try:
        store.train(WORDS, HAM, digest=b"first-message-16", source="here")
        assert _view(store) == ([[1, 0]] * 3, [1, 0], 3, [3, 0])  # now cached
        _other_process_trains(database, SPAM, b"other-message-16")
        after = ([[1, 1]] * 3, [1, 1], 3, [3, 3])
        deadline = time.monotonic() + WAIT
        while _view(store) != after and time.monotonic() < deadline:
            time.sleep(0.05)
        assert _view(store) == after
    finally:
        store.close()


def test_several_daemons_cache_keeps_counts_until_a_large_bound(
    database: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    store = ModelStore.open(database, staleness_seconds=3600.0)
    try:
        store.train(WORDS, HAM, digest=b"first-message-16", source="here")
        cached = _view(store)
        assert cached == ([[1, 0]] * 3, [1, 0], 3, [3, 0])
        _other_process_trains(database, SPAM, b"other-message-16")
        assert _view(store) == cached  # within the hour: memory as it was
        # An hour later (the store's clock moved on, the database did not change again).
        later = time.monotonic() + 3601.0
        clock = types.SimpleNamespace(monotonic=lambda: later, time=time.time)
        monkeypatch.setattr(store_counts, "time", clock)
        assert _view(store) == ([[1, 1]] * 3, [1, 1], 3, [3, 3])
    finally:
        store.close()


def test_several_daemons_cache_fills_while_the_verdict_log_writes(database: str) -> None:
    # A daemon's verdict log commits a batch every log.verdict_batch_seconds; a lookup that
    # overlaps such a write must still be cached (it changes no count), or the daemon reads
    # newer counts than its bound promises and pays a query for it.
    store = ModelStore.open(database, staleness_seconds=3600.0)
    try:
        store.train(WORDS, HAM, digest=b"first-message-16", source="here")
        # The log's transaction stays open (as record_verdicts holds it) while a lookup runs.
        with store.transaction(counts=False), concurrent.futures.ThreadPoolExecutor(1) as pool:
            assert pool.submit(store.lookup, WORDS).result().tolist() == [[1, 0]] * 3
        _other_process_trains(database, SPAM, b"other-message-16")
        assert store.lookup(WORDS).tolist() == [[1, 0]] * 3
    finally:
        store.close()


def test_several_daemons_freshness_check_racing_an_own_commit_keeps_the_commit(
    database: str,
) -> None:
    # A scoring thread reads the revision, this process commits a correction (memory moves
    # on to the new revision), then the scoring thread's check lands.  It must not put the
    # older revision and totals back: the correction would vanish from this daemon until
    # its next check, an hour here.
    store = ModelStore.open(database, staleness_seconds=3600.0)
    try:
        store.train(WORDS, HAM, digest=b"first-message-16", source="here")
        read = store._read_totals

        def read_then_commit(conn: Any) -> Any:
            found = read(conn)
            store.train(WORDS, SPAM, digest=b"other-message-16", source="here")
            return found

        store._read_totals = read_then_commit  # type: ignore[method-assign]
        store._check_fresh(force=True)
        store._read_totals = read  # type: ignore[method-assign]
        assert store.class_count().tolist() == [1, 1]  # before vocabulary() reloads anything
        assert _view(store) == ([[1, 1]] * 3, [1, 1], 3, [3, 3])
    finally:
        store.close()


def _restore_smaller_model(url: str) -> None:
    """What an admin's restore does: the tables recreated and refilled, the revision lower."""
    engine = create_engine(url)
    with engine.begin() as conn:
        conn.exec_driver_sql(
            "DROP TABLE weir_token, weir_class_total, weir_ledger, weir_meta, weir_schema, "
            "weir_verdict, weir_feedback"
        )
    engine.dispose()
    _train_in_another_process(url, SPAM, b"other-message-16")


def test_several_daemons_restored_database_with_a_lower_revision_is_read(database: str) -> None:
    store = ModelStore.open(database, staleness_seconds=3600.0)
    try:
        for i in range(3):
            store.train(WORDS[i:], HAM, digest=b"first-message-%d" % i, source="here")
        _restore_smaller_model(database)
        # The first vocabulary read after the restore, within the bound, must finish (it ran
        # in circles before: a daemon thread keeps that from hanging the test) and show the
        # restored model.
        read: list[Any] = []
        reader = threading.Thread(target=lambda: read.append(store.vocabulary()), daemon=True)
        reader.start()
        reader.join(timeout=WAIT)
        assert read, "vocabulary() did not return"
        assert (read[0].size, read[0].token_total.tolist()) == (3, [0, 3])
        assert store.class_count().tolist() == [0, 1]
    finally:
        store.close()
