"""The whole daemon (daemon/service.py) with feedback configured: mail to the wanted-mail
address and POST /feedback reach one intake, and /metrics shows the correction.

The metrics text is read with prometheus_client's own parser.
"""

from __future__ import annotations

import dataclasses
import re
from pathlib import Path
from typing import Any

import aiohttp
from prometheus_client.parser import text_string_to_metric_families
from smtp_helpers import LOCAL, NextHop, daemon_settings, send
from test_feedback_smtp import SUPPLIER, TOBIAS, _train
from test_forwarded import as_attachment

from mailweir.daemon import scenario
from mailweir.daemon.feedback import hashes_of
from mailweir.daemon.service import Service
from mailweir.daemon.settings import (
    FeedbackSettings,
    HostPort,
    HttpSettings,
    ModelSettings,
    Settings,
)
from mailweir.model.hashing import message_digest
from mailweir.model.tokenize import DEFAULT_OPTIONS
from mailweir.model.types import SPAM, TokenHashes
from mailweir.store import ModelStore

TOKEN = "aGFyYm91cmxhbmUtc2VydmljZQ"


def _sample(text: str, name: str, **labels: str) -> float:
    for family in text_string_to_metric_families(text):
        for sample in family.samples:
            if sample.name == name and sample.labels == labels:
                return float(sample.value)
    raise AssertionError(f"no sample {name}{labels}")


def reminder_taken_for_spam(
    tmp_path: Path, next_hop: NextHop, token: str, **policy: Any
) -> tuple[Settings, bytes, TokenHashes]:
    """Settings of a whole daemon with feedback and HTTP on, whose model (in ``tmp_path``)
    takes the overdue reminder, wanted mail, for spam; with the reminder and its hashes."""
    database = tmp_path / "model.sqlite3"
    reminder = scenario.overdue_reminder().raw
    hashes = hashes_of(reminder, DEFAULT_OPTIONS)
    store = ModelStore.open(str(database))
    _train(store)
    store.train(hashes, SPAM, digest=message_digest(hashes), source="import")
    store.close()
    base = daemon_settings(next_hop.address, min_trained=5, spam_threshold=0.9, **policy)
    settings = dataclasses.replace(
        base,
        state_dir=tmp_path,
        model=ModelSettings(database=str(database), scoring_workers=1),
        http=HttpSettings(listen=HostPort(LOCAL, 0), token=token),
        feedback=FeedbackSettings(
            spam_address=scenario.FEEDBACK_SPAM, ham_address=scenario.FEEDBACK_HAM
        ),
    )
    return settings, reminder, hashes


async def test_feedback_service_mail_and_http_share_one_intake(
    tmp_path: Path, next_hop: NextHop
) -> None:
    settings, reminder, hashes = reminder_taken_for_spam(tmp_path, next_hop, TOKEN)
    service = Service(settings)
    await service.startup()
    try:
        port = service.smtp_address.port
        await send(port, reminder, [TOBIAS], SUPPLIER)
        delivered = next_hop.deliveries[-1].content
        match = re.search(rb"Mailweir-Id: (\S+)\r\n", delivered)
        assert match is not None and b"Mailweir-Verdict: spam" in delivered
        tracking = match.group(1).decode()
        before = service.store.lookup(hashes).copy()

        sent = await send(port, as_attachment(delivered), [scenario.FEEDBACK_HAM], TOBIAS)
        assert sent.data is not None and sent.data[0] == 250, sent
        assert b"1 moved" in sent.data[1]
        assert (service.store.lookup(hashes) - before).tolist() == [[1, -1]] * len(hashes)
        assert len(next_hop.deliveries) == 1  # the feedback was consumed, not relayed

        url = f"http://{service.http_address}"
        auth = {"Authorization": f"Bearer {TOKEN}"}
        async with aiohttp.ClientSession(headers=auth) as http:
            body = {"tracking_id": tracking, "kind": "ham"}
            async with http.post(f"{url}/feedback", json=body) as response:
                assert response.status == 200
                assert (await response.json())["status"] == "already_known"
            async with http.get(f"{url}/metrics") as response:
                text = await response.text()
        assert _sample(text, "mailweir_feedback_total", kind="false_positive") == 1
    finally:
        await service.shutdown(grace=5)
