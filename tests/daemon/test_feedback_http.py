"""Feedback by HTTP through the real intake: POST /feedback by tracking id and by message.

The HTTP side (daemon/http_side.py) and the mail channel share one core, so the same
exactness holds: the store's counts of the judged token hashes move by exactly one.
"""

from __future__ import annotations

from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
from pathlib import Path

import aiohttp
from smtp_helpers import NextHop, send
from test_feedback_smtp import TOBIAS, Daemon, _deliver_reminder, feedback_daemon
from test_forwarded import as_attachment

from mailweir.daemon import scenario
from mailweir.daemon.feedback import hashes_of
from mailweir.daemon.http_side import HttpSide
from mailweir.model.tokenize import DEFAULT_OPTIONS

TOKEN = "aGFyYm91cmxhbmUtZmVlZGJhY2s"


@asynccontextmanager
async def http_side(daemon: Daemon) -> AsyncIterator[tuple[str, aiohttp.ClientSession]]:
    async def page() -> str:
        return "<!doctype html><title>status</title>"

    async def ready() -> bool:
        return True

    side = HttpSide(
        daemon.metrics,
        token=TOKEN,
        feedback=daemon.intake,
        page=page,
        ready_checks={"store": ready},
    )
    await side.start("127.0.0.1", 0)
    headers = {"Authorization": f"Bearer {TOKEN}"}
    try:
        async with aiohttp.ClientSession(headers=headers) as session:
            yield f"http://127.0.0.1:{side.port}", session
    finally:
        await side.stop()


async def test_feedback_http_by_tracking_id_moves_exactly_once(
    tmp_path: Path, next_hop: NextHop
) -> None:
    async with feedback_daemon(tmp_path, next_hop) as daemon, http_side(daemon) as (url, http):
        _, tracking = await _deliver_reminder(daemon)
        hashes = hashes_of(scenario.overdue_reminder().raw, DEFAULT_OPTIONS)
        before = daemon.counts(hashes)
        body = {"tracking_id": tracking, "kind": "ham"}
        async with http.post(f"{url}/feedback", json=body) as response:
            assert response.status == 200
            answer = await response.json()
        assert answer["status"] == "moved"
        assert answer["kind"] == "false_positive"
        assert answer["tracking_id"] == tracking
        assert (daemon.counts(hashes) - before).tolist() == [[1, -1]] * len(hashes)
        assert daemon.feedback_rows() == [(tracking, "false_positive", "http")]

        async with http.post(f"{url}/feedback", json=body) as response:
            assert response.status == 200
            assert (await response.json())["status"] == "already_known"
        assert (daemon.counts(hashes) - before).tolist() == [[1, -1]] * len(hashes)
        assert daemon.sample("mailweir_feedback_total", kind="false_positive") == 1


async def test_feedback_http_raw_message_uses_its_id(tmp_path: Path, next_hop: NextHop) -> None:
    async with feedback_daemon(tmp_path, next_hop) as daemon, http_side(daemon) as (url, http):
        delivered, tracking = await _deliver_reminder(daemon)
        hashes = hashes_of(scenario.overdue_reminder().raw, DEFAULT_OPTIONS)
        before = daemon.counts(hashes)
        headers = {"Content-Type": "message/rfc822"}
        async with http.post(
            f"{url}/feedback?kind=ham", data=delivered, headers=headers
        ) as response:
            assert response.status == 200
            answer = await response.json()
        assert (answer["status"], answer["tracking_id"]) == ("moved", tracking)
        assert (daemon.counts(hashes) - before).tolist() == [[1, -1]] * len(hashes)


async def test_feedback_http_raw_message_without_id(tmp_path: Path, next_hop: NextHop) -> None:
    junk = scenario.generate(1, "spam", 21)[0].raw
    async with feedback_daemon(tmp_path, next_hop) as daemon, http_side(daemon) as (url, http):
        hashes = hashes_of(junk, DEFAULT_OPTIONS)
        before = daemon.counts(hashes)
        headers = {"Content-Type": "message/rfc822"}
        async with http.post(f"{url}/feedback?kind=spam", data=junk, headers=headers) as response:
            assert response.status == 200
            answer = await response.json()
        assert (answer["status"], answer["kind"], answer["tracking_id"]) == (
            "trained",
            "confirmation",
            None,
        )
        assert (daemon.counts(hashes) - before).tolist() == [[0, 1]] * len(hashes)


async def test_feedback_http_unknown_id_is_404(tmp_path: Path, next_hop: NextHop) -> None:
    async with feedback_daemon(tmp_path, next_hop) as daemon, http_side(daemon) as (url, http):
        totals = daemon.store.class_count()
        body = {"tracking_id": "0000000000000000", "kind": "spam"}
        async with http.post(f"{url}/feedback", json=body) as response:
            assert response.status == 404
            assert (await response.json())["status"] == "no_original"
        assert (daemon.store.class_count() == totals).all()
        assert daemon.sample("mailweir_feedback_refused_total", reason="no_original") == 1


async def test_feedback_http_and_mail_share_the_ledger(tmp_path: Path, next_hop: NextHop) -> None:
    # A correction by mail after the same one by HTTP is already known: one core, one ledger.
    async with feedback_daemon(tmp_path, next_hop) as daemon, http_side(daemon) as (url, http):
        delivered, tracking = await _deliver_reminder(daemon)
        body = {"tracking_id": tracking, "kind": "ham"}
        async with http.post(f"{url}/feedback", json=body) as response:
            assert (await response.json())["status"] == "moved"
        sent = await send(daemon.port, as_attachment(delivered), [scenario.FEEDBACK_HAM], TOBIAS)
        assert sent.data is not None and b"1 already known" in sent.data[1]
        assert len(daemon.feedback_rows()) == 1
