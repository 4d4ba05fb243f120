"""The whole daemon (daemon/service.py) with rerouting on: a wanted message sent back to the
wanted-mail feedback address is retrained and its held copy released in one step.

The metrics text is read with prometheus_client's own parser.
"""

from __future__ import annotations

from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
from dataclasses import dataclass
from pathlib import Path

import aiohttp
from smtp_helpers import NextHop, send
from test_feedback_service import _sample, reminder_taken_for_spam
from test_feedback_smtp import SUPPLIER, TOBIAS
from test_forwarded import as_attachment

from mailweir.daemon import scenario
from mailweir.daemon.service import Service

TOKEN = "aGFyYm91cmxhbmUtaGVsZC1tYWls"
QUARANTINE = "quarantine@harbourlane.example"


@dataclass
class Rerouted:
    service: Service
    port: int
    reminder: bytes
    quarantined: bytes  # what the quarantine mailbox got
    tracking_id: str


@asynccontextmanager
async def rerouted_reminder(tmp_path: Path, next_hop: NextHop) -> AsyncIterator[Rerouted]:
    """The daemon with rerouting on, after the reminder (wanted mail that the model takes
    for spam) went to the quarantine mailbox and its copy was held."""
    settings, reminder, _ = reminder_taken_for_spam(
        tmp_path, next_hop, TOKEN, spam_action="reroute", quarantine_mailbox=QUARANTINE
    )
    service = Service(settings)
    await service.startup()
    try:
        port = service.smtp_address.port
        sent = await send(port, reminder, [TOBIAS], SUPPLIER)
        assert sent.data is not None and sent.data[0] == 250, sent
        quarantined = next_hop.deliveries[-1]
        assert quarantined.rcpt_tos == [QUARANTINE]
        assert service.quarantine is not None
        (held,) = service.quarantine.store.envelopes()
        yield Rerouted(service, port, reminder, quarantined.content, held.tracking_id)
    finally:
        await service.shutdown(grace=5)


async def test_quarantine_service_feedback_retrains_and_releases_once(
    tmp_path: Path, next_hop: NextHop
) -> None:
    async with rerouted_reminder(tmp_path, next_hop) as done:
        service, port = done.service, done.port
        assert service.quarantine is not None
        assert service.quarantine.store.raw(done.tracking_id) == done.reminder

        # Whoever reads the quarantine mailbox forwards the copy to the wanted-mail address.
        forward = as_attachment(done.quarantined)
        sent = await send(port, forward, [scenario.FEEDBACK_HAM], TOBIAS)
        assert sent.data is not None and sent.data[0] == 250, sent
        assert b"1 moved" in sent.data[1] and b"held copy released to 1" in sent.data[1]
        released = next_hop.deliveries[-1]
        assert released.rcpt_tos == [TOBIAS] and released.mail_from == SUPPLIER
        assert released.content == done.reminder  # byte for byte as it first arrived

        sent = await send(port, forward, [scenario.FEEDBACK_HAM], TOBIAS)
        assert sent.data is not None and b"held copy released before" in sent.data[1]
        assert len(next_hop.deliveries) == 2  # the quarantine copy and one release

        url = f"http://{service.http_address}"
        async with aiohttp.ClientSession() as http, http.get(f"{url}/metrics") as response:
            text = await response.text()
        assert _sample(text, "mailweir_quarantine_released_total", way="feedback") == 1
        assert _sample(text, "mailweir_quarantine_held") == 0
        assert _sample(text, "mailweir_feedback_total", kind="false_positive") == 1


async def test_quarantine_service_says_so_when_the_held_copy_is_elsewhere(
    tmp_path: Path, next_hop: NextHop
) -> None:
    """Two daemons share a model but not their quarantine folders: a wanted-mail correction
    reaching the one that did not hold the message still retrains, and its reply says the
    copy is not here (here: the copy is gone from this daemon's folder)."""
    async with rerouted_reminder(tmp_path, next_hop) as done:
        assert done.service.quarantine is not None
        done.service.quarantine.store.forget(done.tracking_id)

        forward = as_attachment(done.quarantined)
        sent = await send(done.port, forward, [scenario.FEEDBACK_HAM], TOBIAS)
        assert sent.data is not None and sent.data[0] == 250, sent
        assert b"1 moved" in sent.data[1], sent
        assert b"held copy not on this filter" in sent.data[1], sent
        assert len(next_hop.deliveries) == 1  # nothing released
