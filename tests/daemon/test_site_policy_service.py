"""The whole daemon (real store, judge, verdict log) with a site policy: reload by SIGHUP,
a bad file keeping the old policy, and listed mail never trained."""

from __future__ import annotations

import asyncio
import email
import logging
import os
import re
import signal
from collections.abc import AsyncIterator, Callable
from email.message import EmailMessage
from pathlib import Path

import aiohttp
import pytest
from smtp_helpers import NextHop, message, send

from mailweir.daemon.config import ConfigSource
from mailweir.daemon.feedback_types import FeedbackRequest, FeedbackStatus
from mailweir.daemon.service import Service

pytestmark = [pytest.mark.timeout(120), pytest.mark.slow]

SUPPLIER = "orders@vetsupply.example"
MAREN = "maren.okafor@harbourlane.example"
TOKEN = "harbour-lane-reload-test"
REPORT_SPAM = "report-spam@harbourlane.example"


def write_config(path: Path, next_hop: NextHop, policy: str) -> None:
    path.write_text(
        '[smtp]\nlisten = "127.0.0.1:0"\nhostname = "filter.harbourlane.example"\n'
        f'[next_hop]\naddress = "{next_hop.address}"\n'
        f'[http]\nlisten = "127.0.0.1:0"\ntoken = "{TOKEN}"\n'
        f'[feedback]\nspam_address = "{REPORT_SPAM}"\n'
        '[policy]\nmode = "enforce"\nposition = "before-queue"\n' + policy,
        encoding="utf-8",
    )


@pytest.fixture
async def service(tmp_path: Path, next_hop: NextHop) -> AsyncIterator[Service]:
    path = tmp_path / "mailweir.toml"
    write_config(path, next_hop, f'allow_senders = ["{SUPPLIER}"]\n')
    source = ConfigSource(path, {"MAILWEIR_STATE_DIR": str(tmp_path / "state")}, {})
    running = Service(source.load(), source)
    await running.startup()
    running.install_signal_handlers()
    try:
        yield running
    finally:
        await running.shutdown(grace=5)


async def until(condition: Callable[[], bool]) -> None:
    for _ in range(1000):  # bounded: 10 s at most
        if condition():
            return
        await asyncio.sleep(0.01)
    raise AssertionError("condition not met within 10 s")


def reloads(service: Service, result: str) -> float:
    labels = {"result": result}
    value = service.metrics.registry.get_sample_value("mailweir_config_reloads_total", labels)
    return value or 0.0


async def test_sighup_swaps_lists_and_a_bad_file_keeps_the_old(
    service: Service, next_hop: NextHop, tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    port = service.smtp_address.port
    sent = await send(port, message(), [MAREN], SUPPLIER)
    assert sent.data is not None and sent.data[0] == 250
    assert next_hop.deliveries[0].content.startswith(b"Mailweir-Verdict: sender-allowed\r\n")

    path = tmp_path / "mailweir.toml"
    write_config(
        path, next_hop, 'block_senders = ["@vetsupply.example"]\nblock_action = "reject"\n'
    )
    os.kill(os.getpid(), signal.SIGHUP)
    await until(lambda: reloads(service, "applied") == 1)
    sent = await send(port, message(), [MAREN], SUPPLIER)
    assert sent.data is not None and sent.data[0] == 550  # the new block list
    assert len(next_hop.deliveries) == 1

    caplog.set_level(logging.ERROR, logger="mailweir")
    write_config(path, next_hop, 'block_senders = ["vetsupply.example"]\n')  # no "@"
    os.kill(os.getpid(), signal.SIGHUP)
    await until(lambda: reloads(service, "refused") == 1)
    assert "policy.block_senders" in caplog.text and "reload refused" in caplog.text
    sent = await send(port, message(), [MAREN], SUPPLIER)
    assert sent.data is not None and sent.data[0] == 550  # still the last good policy
    assert service.settings.policy.block_senders == ("@vetsupply.example",)


async def test_listed_mail_is_recorded_but_never_trained(
    service: Service, next_hop: NextHop
) -> None:
    await send(service.smtp_address.port, message(), [MAREN], SUPPLIER)
    found = re.search(rb"Mailweir-Id: ([0-9a-v]{16})", next_hop.deliveries[0].content)
    assert found is not None
    tracking_id = found.group(1).decode()
    assert service.verdict_log is not None and service.feedback is not None
    await service.verdict_log.flush()
    store = service.store
    record = await asyncio.to_thread(store.find_verdict, tracking_id)
    assert (record.band, record.action, record.sender_list) == ("listed", "tag", "allow")
    assert record.score is None and record.token_hashes is None
    before = await asyncio.to_thread(store.stats)

    # A user sends it back, by id and with the message itself: neither is trained.
    for request in (
        FeedbackRequest("spam", "http", tracking_id=tracking_id),
        FeedbackRequest("spam", "http", tracking_id=tracking_id, raw=message()),
    ):
        outcome = await service.feedback(request)
        assert outcome.status is FeedbackStatus.REFUSED
        assert "list" in outcome.detail
    after = await asyncio.to_thread(store.stats)
    assert (after.ham_messages, after.spam_messages, after.ledger_rows, after.tokens) == (
        before.ham_messages, before.spam_messages, before.ledger_rows, before.tokens,
    )  # fmt: skip
    assert (after.spam_messages, after.ledger_rows) == (0, 0)
    refused = service.metrics.registry.get_sample_value(
        "mailweir_feedback_refused_total", {"reason": "listed"}
    )
    assert refused == 2


async def test_post_reload_applies_or_refuses_behind_the_token(
    service: Service, next_hop: NextHop, tmp_path: Path
) -> None:
    assert service.http_address is not None
    url = f"http://127.0.0.1:{service.http_address.port}/reload"
    path = tmp_path / "mailweir.toml"
    auth = {"Authorization": f"Bearer {TOKEN}"}
    async with aiohttp.ClientSession() as client:
        async with client.post(url) as response:
            assert response.status == 401  # RFC 6750: no token
        write_config(path, next_hop, 'block_networks = ["127.0.0.0/8"]\n')
        async with client.post(url, headers=auth) as response:
            assert response.status == 200 and (await response.json()) == {"status": "applied"}
        assert service.settings.policy.block_networks == ("127.0.0.0/8",)
        write_config(path, next_hop, 'block_networks = ["127.0.0.0/33"]\n')
        async with client.post(url, headers=auth) as response:
            assert response.status == 409
            assert "policy.block_networks" in (await response.json())["error"]
    assert service.settings.policy.block_networks == ("127.0.0.0/8",)
    assert (reloads(service, "applied"), reloads(service, "refused")) == (1, 1)


def forward_as_attachment(original: bytes) -> bytes:
    """Maren forwards a message to the spam address, the original attached (RFC 2046 5.2.1)."""
    forward = EmailMessage()
    forward["From"] = f"Dr. Maren Okafor <{MAREN}>"
    forward["To"] = REPORT_SPAM
    forward["Subject"] = "Fwd: Your order 4411"
    forward.set_content("This one is spam.")
    forward.add_attachment(email.message_from_bytes(original))
    return forward.as_bytes()


async def test_feedback_by_mail_on_listed_mail_is_refused(
    service: Service, next_hop: NextHop
) -> None:
    port = service.smtp_address.port
    await send(port, message(), [MAREN], SUPPLIER)
    delivered = next_hop.deliveries[0].content
    sent = await send(port, forward_as_attachment(delivered), [REPORT_SPAM], MAREN)
    assert sent.data is not None and sent.data[0] == 550
    assert b"5.7.1" in sent.data[1] and b"sender list" in sent.data[1]
    stats = await asyncio.to_thread(service.store.stats)
    assert (stats.spam_messages, stats.ledger_rows) == (0, 0)
