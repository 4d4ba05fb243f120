"""The whole daemon (daemon/service.py) with rerouting on: a wanted message sent back to the
wanted-mail feedback address is retrained and its held copy released in one step.

The metrics text is read with prometheus_client's own parser.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import aiohttp
from smtp_helpers import LOCAL, NextHop, daemon_settings, send
from test_feedback_service import _sample
from test_feedback_smtp import SUPPLIER, TOBIAS, _train
from test_forwarded import as_attachment

from mailweir.daemon import scenario
from mailweir.daemon.feedback import hashes_of
from mailweir.daemon.service import Service
from mailweir.daemon.settings import FeedbackSettings, HostPort, HttpSettings, ModelSettings
from mailweir.model.hashing import message_digest
from mailweir.model.tokenize import DEFAULT_OPTIONS
from mailweir.model.types import SPAM
from mailweir.store import ModelStore

TOKEN = "aGFyYm91cmxhbmUtaGVsZC1tYWls"
QUARANTINE = "quarantine@harbourlane.example"


async def test_quarantine_service_feedback_retrains_and_releases_once(
    tmp_path: Path, next_hop: NextHop
) -> None:
    database = tmp_path / "model.sqlite3"
    reminder = scenario.overdue_reminder().raw  # wanted mail that the model takes for spam
    hashes = hashes_of(reminder, DEFAULT_OPTIONS)
    store = ModelStore.open(str(database))
    _train(store)
    store.train(hashes, SPAM, digest=message_digest(hashes), source="import")
    store.close()
    base = daemon_settings(
        next_hop.address,
        min_trained=5,
        spam_threshold=0.9,
        spam_action="reroute",
        quarantine_mailbox=QUARANTINE,
    )
    settings = dataclasses.replace(
        base,
        state_dir=tmp_path,
        model=ModelSettings(database=str(database), scoring_workers=1),
        http=HttpSettings(listen=HostPort(LOCAL, 0), token=TOKEN),
        feedback=FeedbackSettings(
            spam_address=scenario.FEEDBACK_SPAM, ham_address=scenario.FEEDBACK_HAM
        ),
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
        assert service.quarantine.store.raw(held.tracking_id) == reminder

        # Whoever reads the quarantine mailbox forwards the copy to the wanted-mail address.
        forward = as_attachment(quarantined.content)
        sent = await send(port, forward, [scenario.FEEDBACK_HAM], TOBIAS)
        assert sent.data is not None and sent.data[0] == 250, sent
        assert b"1 moved" in sent.data[1] and b"held copy released to 1" in sent.data[1]
        released = next_hop.deliveries[-1]
        assert released.rcpt_tos == [TOBIAS] and released.mail_from == SUPPLIER
        assert released.content == reminder  # byte for byte as it first arrived

        sent = await send(port, forward, [scenario.FEEDBACK_HAM], TOBIAS)
        assert sent.data is not None and b"held copy released before" in sent.data[1]
        assert len(next_hop.deliveries) == 2  # the quarantine copy and one release

        url = f"http://{service.http_address}"
        async with aiohttp.ClientSession() as http, http.get(f"{url}/metrics") as response:
            text = await response.text()
        assert _sample(text, "mailweir_quarantine_released_total", way="feedback") == 1
        assert _sample(text, "mailweir_quarantine_held") == 0
        assert _sample(text, "mailweir_feedback_total", kind="false_positive") == 1
    finally:
        await service.shutdown(grace=5)
