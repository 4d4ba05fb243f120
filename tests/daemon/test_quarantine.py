"""The quarantine end to end over real SMTP sockets: a rerouted message is held, released by
command and by HTTP to its original recipients byte for byte, released once, listed in a
digest and expired by command.

The next hop is the real aiosmtpd sink of smtp_helpers; the digest is read back with the
standard library's email parser (RFC 5322 / RFC 2047 decoding as the oracle).
"""

from __future__ import annotations

import asyncio
import dataclasses
import email.policy
import email.utils
import json
import time
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager, redirect_stdout
from dataclasses import dataclass
from email.parser import BytesParser
from io import StringIO
from pathlib import Path
from typing import Any

import aiohttp
import pytest
from smtp_helpers import LOCAL, FakeJudge, FakeVerdictLog, Judged, NextHop, daemon_settings, send

from mailweir.daemon import cli, replies
from mailweir.daemon.digest import DigestSchedule, next_run
from mailweir.daemon.http_side import HttpSide
from mailweir.daemon.judge import new_tracking_id
from mailweir.daemon.metrics import Metrics
from mailweir.daemon.observing import feedback_closed
from mailweir.daemon.quarantine import Quarantine, QuarantineCollector, ReleaseFailed
from mailweir.daemon.settings import HostPort, HttpSettings, RecipientPolicy, Settings
from mailweir.daemon.smtp import FilterHandler
from mailweir.daemon.smtp_server import Connections, create_smtp_server
from mailweir.store.held_mail import HeldEnvelope

QUARANTINE = "quarantine@harbourlane.example"
PRIYA = "priya.raman@harbourlane.example"
TOBIAS = "tobias.lindqvist@harbourlane.example"
SENDER = "offers@bulkdeals.example"
TOKEN = "aGFyYm91cmxhbmUtcXVhcmFudGluZQ"
# A message the way a client sends it: CRLF lines, a body line starting with a dot (SMTP
# dot-stuffing must undo itself both ways, RFC 5321 section 4.5.2), an encoded-word subject
# (RFC 2047 section 8's style of example, our own words: "Kennel offer – 40 % off").
JUNK = (
    b"From: Kennel Offers <offers@bulkdeals.example>\r\n"
    b"To: Priya Raman <priya.raman@harbourlane.example>,\r\n"
    b" Tobias Lindqvist <tobias.lindqvist@harbourlane.example>\r\n"
    b"Subject: =?utf-8?q?Kennel_offer_=E2=80=93_40_=25_off?=\r\n"
    b"Message-ID: <k9-offer-17@bulkdeals.example>\r\n"
    b"Mailweir-Verdict: ham\r\n"
    b"\r\n"
    b"Dear practice,\r\n"
    b".this line starts with a dot\r\n"
    b"Order today.\r\n"
)


class FreshJudge(FakeJudge):
    """Judges everything spam, with a new tracking id each time."""

    async def judge(self, raw: bytes) -> Judged:
        self.seen.append(raw)
        return Judged(new_tracking_id(), "spam", 0.9987, (("kennel", 2.5),))


@dataclass
class Held:
    port: int
    settings: Settings
    quarantine: Quarantine


@asynccontextmanager
async def holding_daemon(
    tmp_path: Path, sink: NextHop, judge: FakeJudge | None = None, **policy: Any
) -> AsyncIterator[Held]:
    """mailweir's SMTP side rerouting everything to quarantine, with the held copies on."""
    policy = {"spam_action": "reroute", "quarantine_mailbox": QUARANTINE, **policy}
    base = daemon_settings(sink.address, **policy)
    settings = dataclasses.replace(
        base, state_dir=tmp_path, http=HttpSettings(listen=HostPort(LOCAL, 0), token=TOKEN)
    )
    quarantine = Quarantine(settings)
    handler = FilterHandler(settings, judge or FreshJudge(), FakeVerdictLog())
    handler.holding = quarantine
    connections = Connections(10)
    server = await create_smtp_server(settings, handler, connections=connections)
    try:
        yield Held(server.sockets[0].getsockname()[1], settings, quarantine)
    finally:
        server.close()
        connections.close_all()
        await server.wait_closed()


async def _reroute(daemon: Held, sink: NextHop) -> str:
    sent = await send(daemon.port, JUNK, [PRIYA, TOBIAS], SENDER)
    assert sent.data is not None and sent.data[0] == 250, sent
    delivered = sink.deliveries[-1]
    assert delivered.rcpt_tos == [QUARANTINE]
    (held,) = [e for e in daemon.quarantine.store.envelopes() if not e.released][-1:]
    return held.tracking_id


def _command(*argv: str) -> tuple[int, str]:
    out = StringIO()
    with redirect_stdout(out):
        code = cli.main(list(argv))
    return code, out.getvalue()


def _where(daemon: Held) -> list[str]:
    return ["--state-dir", str(daemon.settings.state_dir), "--next-hop", str(sink_of(daemon))]


def sink_of(daemon: Held) -> HostPort:
    return daemon.settings.next_hop.address


async def test_quarantine_reroute_holds_the_bytes_as_they_arrived(
    tmp_path: Path, next_hop: NextHop
) -> None:
    async with holding_daemon(tmp_path, next_hop) as daemon:
        tracking_id = await _reroute(daemon, next_hop)
        envelope = daemon.quarantine.store.envelope(tracking_id)
        # The held copy is the client's bytes, forged Mailweir-Verdict field and all; the
        # quarantine mailbox got our fields on top instead.
        assert daemon.quarantine.store.raw(tracking_id) == JUNK
        assert next_hop.deliveries[-1].content.startswith(b"Mailweir-Verdict: spam")
        assert envelope.recipients == (PRIYA, TOBIAS) and envelope.sender == SENDER
        assert envelope.band == "spam" and envelope.score == 0.9987


async def test_quarantine_records_the_verdict_that_held_it_not_the_judges_band(
    tmp_path: Path, next_hop: NextHop
) -> None:
    """Priya's own spam cut-off (0.9) makes a 0.95 "suspect" spam for her, and spam is
    rerouted: the held copy (and so the digest) says "spam", as her verdict field does."""
    suspect = FakeJudge(Judged("0123456789abcdeh", "suspect", 0.95, (("kennel", 1.5),)))
    mine = RecipientPolicy(match=PRIYA, spam_threshold=0.9)
    async with holding_daemon(tmp_path, next_hop, suspect, recipient=(mine,)) as daemon:
        sent = await send(daemon.port, JUNK, [PRIYA], SENDER)
        assert sent.data is not None and sent.data[0] == 250, sent
        (envelope,) = daemon.quarantine.store.envelopes()
    assert next_hop.deliveries[-1].rcpt_tos == [QUARANTINE]
    assert (envelope.band, envelope.score) == ("spam", 0.95)


async def test_quarantine_records_a_blocked_sender_as_such(
    tmp_path: Path, next_hop: NextHop
) -> None:
    async with holding_daemon(
        tmp_path, next_hop, block_senders=("@bulkdeals.example",), block_action="reroute"
    ) as daemon:
        sent = await send(daemon.port, JUNK, [PRIYA], SENDER)
        assert sent.data is not None and sent.data[0] == 250, sent
        (envelope,) = daemon.quarantine.store.envelopes()
    assert (envelope.band, envelope.score) == ("sender-blocked", None)


async def test_quarantine_release_by_command_reaches_original_recipients_once(
    tmp_path: Path, next_hop: NextHop
) -> None:
    async with holding_daemon(tmp_path, next_hop) as daemon:
        tracking_id = await _reroute(daemon, next_hop)
        code, out = await asyncio.to_thread(_command, "release", tracking_id, *_where(daemon))
        assert code == 0, out
        released = next_hop.deliveries[-1]
        assert released.rcpt_tos == [PRIYA, TOBIAS] and released.mail_from == SENDER
        assert released.content == JUNK  # byte for byte as the client sent it
        code, out = await asyncio.to_thread(_command, "release", tracking_id, *_where(daemon))
        assert code == 1 and "released once" in out
        assert len(next_hop.deliveries) == 2  # the quarantine copy and one release


async def test_quarantine_release_by_http_needs_the_token(
    tmp_path: Path, next_hop: NextHop
) -> None:
    async with holding_daemon(tmp_path, next_hop) as daemon:
        tracking_id = await _reroute(daemon, next_hop)
        metrics = Metrics()
        metrics.registry.register(QuarantineCollector(daemon.quarantine))
        side = HttpSide(metrics, token=TOKEN, feedback=feedback_closed, page=_page, ready_checks={})
        side.quarantine = daemon.quarantine
        await side.start(LOCAL, 0)
        url = f"http://{LOCAL}:{side.port}/quarantine"
        try:
            async with aiohttp.ClientSession() as http:
                async with http.post(f"{url}/{tracking_id}/release") as response:
                    assert response.status == 401  # RFC 6750 section 3: no token given
                    assert response.headers["WWW-Authenticate"].startswith("Bearer")
                assert len(next_hop.deliveries) == 1
                auth = {"Authorization": f"Bearer {TOKEN}"}
                async with http.get(url, headers=auth) as response:
                    listed = (await response.json())["held"]
                    assert [e["tracking_id"] for e in listed] == [tracking_id]
                async with http.post(f"{url}/{tracking_id}/release", headers=auth) as response:
                    assert response.status == 200, await response.text()
                    assert (await response.json())["delivered_to"] == [PRIYA, TOBIAS]
                async with http.post(f"{url}/{tracking_id}/release", headers=auth) as response:
                    assert response.status == 409
                    assert "released once" in (await response.json())["error"]
                async with http.post(f"{url}/0unknown00000000/release", headers=auth) as r:
                    assert r.status == 404
        finally:
            await side.stop()
        assert next_hop.deliveries[-1].content == JUNK
        assert next_hop.deliveries[-1].rcpt_tos == [PRIYA, TOBIAS]
        text = metrics.render().decode()
        assert 'mailweir_quarantine_released_total{way="http"} 1.0' in text
        assert "mailweir_quarantine_held 0.0" in text


async def _page() -> str:
    return "<p>status</p>"


async def test_quarantine_hold_failure_answers_451_and_relays_nothing(
    tmp_path: Path, next_hop: NextHop
) -> None:
    blocker = tmp_path / "state"
    blocker.write_text("a file where the state folder should be")
    async with holding_daemon(blocker, next_hop) as daemon:
        sent = await send(daemon.port, JUNK, [PRIYA], SENDER)
        assert sent.data is not None and sent.data[0] == replies.HOLD_FAILED.code
        assert next_hop.deliveries == []
        assert daemon.quarantine.hold_failures == 1


async def test_quarantine_failed_relay_leaves_no_held_copy(
    tmp_path: Path, next_hop: NextHop
) -> None:
    async with holding_daemon(tmp_path, next_hop) as daemon:
        next_hop.behaviour.data_reply = "451 4.3.0 Try later"
        sent = await send(daemon.port, JUNK, [PRIYA], SENDER)
        assert sent.data is not None and sent.data[0] == 451
        # The upstream keeps the message and sends it again: no copy of this try stays.
        assert daemon.quarantine.store.envelopes() == []


async def test_quarantine_release_with_next_hop_down_can_be_retried(
    tmp_path: Path, next_hop: NextHop
) -> None:
    async with holding_daemon(tmp_path, next_hop) as daemon:
        tracking_id = await _reroute(daemon, next_hop)
        next_hop.behaviour.refuse = {PRIYA: "450 4.2.1 Mailbox busy"}
        code, out = await asyncio.to_thread(_command, "release", tracking_id, *_where(daemon))
        assert code == 1 and "did not take" in out
        next_hop.behaviour.refuse = {}
        code, out = await asyncio.to_thread(_command, "release", tracking_id, *_where(daemon))
        assert code == 0, out
        assert next_hop.deliveries[-1].rcpt_tos == [PRIYA, TOBIAS]


async def test_quarantine_release_sent_but_not_recorded_is_never_sent_twice(
    tmp_path: Path, next_hop: NextHop, monkeypatch: pytest.MonkeyPatch
) -> None:
    """The next hop took the release but the record could not be written (a full disk): the
    claim stays, so no second release goes out, and it says where the mail went."""
    async with holding_daemon(tmp_path, next_hop) as daemon:
        tracking_id = await _reroute(daemon, next_hop)

        def disk_full(*_: object, **__: object) -> None:
            raise OSError(28, "No space left on device")

        monkeypatch.setattr(daemon.quarantine.store, "record_release", disk_full)
        with pytest.raises(ReleaseFailed, match="claim file stays"):
            await daemon.quarantine.release(tracking_id, "command")
        assert next_hop.deliveries[-1].rcpt_tos == [PRIYA, TOBIAS]
        sent = len(next_hop.deliveries)
        monkeypatch.undo()
        code, out = await asyncio.to_thread(_command, "release", tracking_id, *_where(daemon))
    assert code != 0 and len(next_hop.deliveries) == sent  # not sent a second time
    assert "sent but its release not recorded" in out, out
    assert f"by command to {PRIYA}, {TOBIAS}: 250 2.0.0" in out and "No space left" in out, out
    assert "delete" in out and f"{tracking_id}.releasing" in out


async def test_quarantine_digest_lists_each_recipients_held_mail(
    tmp_path: Path, next_hop: NextHop
) -> None:
    config = tmp_path / "mailweir.toml"
    config.write_text(
        '[policy]\nquarantine_mailbox = "quarantine@harbourlane.example"\n'
        '[feedback]\nham_address = "report-wanted@harbourlane.example"\n'
        '[quarantine]\ndigest_time = "07:30"\n'
        'digest_from = "mail-filter@harbourlane.example"\n'
    )
    async with holding_daemon(tmp_path, next_hop) as daemon:
        first = await _reroute(daemon, next_hop)
        only_priya = JUNK.replace(b"Kennel_offer", b"Grooming_offer")
        sent = await send(daemon.port, only_priya, [PRIYA], SENDER)
        assert sent.data is not None and sent.data[0] == 250
        second = [e.tracking_id for e in daemon.quarantine.store.envelopes()][-1]
        before = len(next_hop.deliveries)
        argv = ("digest", "--send", "--config", str(config), *_where(daemon))
        code, out = await asyncio.to_thread(_command, *argv)
        assert code == 0 and "sent 2 of 2" in out
    digests = {d.rcpt_tos[0]: d for d in next_hop.deliveries[before:]}
    assert sorted(digests) == [PRIYA, TOBIAS]
    assert {d.mail_from for d in digests.values()} == {"mail-filter@harbourlane.example"}
    for reader, ids in ((PRIYA, [first, second]), (TOBIAS, [first])):
        message = BytesParser(policy=email.policy.default).parsebytes(digests[reader].content)
        # RFC 5322 section 3.6: Date and From are required; Message-ID should be there.
        assert email.utils.parsedate_to_datetime(message["Date"]) is not None
        assert message["From"] == "mail-filter@harbourlane.example"
        assert message["To"] == reader
        assert message["Message-ID"].startswith("<") and message["Message-ID"].endswith(">")
        assert message["Auto-Submitted"] == "auto-generated"  # RFC 3834 section 5
        assert message.get_content_type() == "text/plain"
        assert f"{len(ids)} message" in message["Subject"]
        body = message.get_content()
        for tracking_id in ids:
            assert f"Tracking id: {tracking_id}" in body
            assert f"mailweir release {tracking_id}" in body
        assert "Kennel offer – 40 % off" in body  # decoded from the encoded word
        assert ("Grooming offer" in body) == (reader == PRIYA)
        assert "report-wanted@harbourlane.example" in body
        assert all(len(line) <= 78 for line in digests[reader].content.split(b"\r\n"))


async def test_quarantine_expire_by_command_takes_only_mail_past_retention(
    tmp_path: Path, next_hop: NextHop
) -> None:
    async with holding_daemon(tmp_path, next_hop) as daemon:
        recent = await _reroute(daemon, next_hop)
        old = HeldEnvelope("0old000000000000", SENDER, (PRIYA,), held_at=1_000.0, size=len(JUNK))
        daemon.quarantine.store.hold(JUNK, old)
        code, out = await asyncio.to_thread(_command, "held", *_where(daemon))
        assert code == 0 and "1 older than quarantine.retention_days (30 days)" in out
        assert [e.tracking_id for e in daemon.quarantine.store.envelopes()] == [
            old.tracking_id,
            recent,
        ]
        code, out = await asyncio.to_thread(_command, "held", "--expire", "--json", *_where(daemon))
        report = json.loads(out)
    assert code == 0 and report["expired"] == [old.tracking_id]
    assert [e["tracking_id"] for e in report["held"]] == [recent]
    assert daemon.quarantine.store.tally().expired == 1


async def test_quarantine_digest_schedule_sends_when_due(tmp_path: Path, next_hop: NextHop) -> None:
    async with holding_daemon(tmp_path, next_hop) as daemon:
        await _reroute(daemon, next_hop)
        q = dataclasses.replace(
            daemon.settings.quarantine,
            digest_time="07:30",
            digest_from="mail-filter@harbourlane.example",
            digest_to="admin",
            digest_admin=TOBIAS,
        )
        quarantine = Quarantine(dataclasses.replace(daemon.settings, quarantine=q))
        started = time.time()
        readings = iter([started])  # the first reading plans; every later one is past it

        def clock() -> float:
            return next(readings, next_run("07:30", started))  # due, within the day

        schedule = DigestSchedule(quarantine, clock)
        schedule.start()
        try:
            for _ in range(500):  # bounded: at most 5 s
                if len(next_hop.deliveries) == 2:
                    break
                await asyncio.sleep(0.01)
        finally:
            await schedule.stop()
    digest = next_hop.deliveries[-1]
    assert digest.rcpt_tos == [TOBIAS]
    assert b"Auto-Submitted: auto-generated" in digest.content
