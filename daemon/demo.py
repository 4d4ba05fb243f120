"""``mailweir demo``: Harbour Lane Veterinary Practice's morning mail through a real daemon.

The demo does what an admin would: trains a model from mail already sorted, starts the daemon
on the SQLite default in front of a next hop (here a small local delivery agent that writes
Maildirs), sends mail through it over SMTP, reads where each message landed, sends a
correction, and leaves the status page up.  Everything runs on 127.0.0.1.
"""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import dataclasses
import email
import mailbox
import shutil
import sys
import time
from collections.abc import Sequence
from dataclasses import dataclass
from email.message import EmailMessage, Message
from pathlib import Path

import aiosmtplib
from aiosmtpd.smtp import SMTP, Envelope, Session

from mailweir.daemon import scenario
from mailweir.daemon.learning import open_model
from mailweir.daemon.service import Service
from mailweir.daemon.settings import (
    FeedbackSettings,
    HostPort,
    HttpSettings,
    ModelSettings,
    NextHopSettings,
    PolicySettings,
    Settings,
    SmtpSettings,
)
from mailweir.model.hashing import message_digest
from mailweir.model.tokenize import tokenize
from mailweir.model.types import HAM, SPAM

LOCALHOST = "127.0.0.1"


class MaildirDelivery:
    """The demo's next hop: an SMTP server that files each recipient's copy in a Maildir."""

    def __init__(self, root: Path) -> None:
        self.root = root

    async def handle_DATA(self, server: SMTP, session: Session, envelope: Envelope) -> str:
        raw = envelope.original_content or b""
        for rcpt in envelope.rcpt_tos:
            folder = self.root / rcpt.lower()
            folder.parent.mkdir(parents=True, exist_ok=True)
            mailbox.Maildir(folder, create=True).add(raw)
        return "250 2.0.0 delivered to Maildir"


@dataclass
class Landed:
    mailbox: str
    message: Message


def read_landed(root: Path) -> dict[str, Landed]:
    """Every delivered message, by Message-ID."""
    found: dict[str, Landed] = {}
    if not root.exists():
        return found
    for folder in sorted(root.iterdir()):
        for _key, raw in mailbox.Maildir(folder, factory=None, create=False).iteritems():
            parsed = email.message_from_bytes(raw.as_bytes() if hasattr(raw, "as_bytes") else raw)
            found[str(parsed.get("Message-ID", ""))] = Landed(folder.name, parsed)
    return found


def demo_settings(run_dir: Path, sink_port: int, http_port: int) -> Settings:
    return Settings(
        state_dir=run_dir,
        smtp=SmtpSettings(listen=HostPort(LOCALHOST, 0), hostname="filter.harbourlane.example"),
        next_hop=NextHopSettings(address=HostPort(LOCALHOST, sink_port), connect_timeout=5.0),
        policy=PolicySettings(
            mode="enforce",
            ham_action="tag",  # so the demo shows every verdict; a site usually passes ham
            suspect_action="tag",
            spam_action="reroute",
            subject_prefix="[suspect]",
            quarantine_mailbox=scenario.QUARANTINE,
            min_trained=20,
        ),
        model=ModelSettings(database=str(run_dir / "model.sqlite3")),
        http=HttpSettings(listen=HostPort(LOCALHOST, http_port)),
        feedback=FeedbackSettings(
            spam_address=scenario.FEEDBACK_SPAM, ham_address=scenario.FEEDBACK_HAM
        ),
    )


def train(database: str, messages: Sequence[scenario.ScenarioMessage]) -> tuple[int, float]:
    model = open_model(database)
    started = time.monotonic()
    try:
        items = []
        for message in messages:
            hashes = tokenize(message.raw, model.options)
            label = SPAM if message.label == "spam" else HAM
            items.append((hashes, label, message_digest(hashes), "demo"))
        model.store.train_many(items)
    finally:
        model.close()
    return len(messages), time.monotonic() - started


async def send(address: HostPort, message: scenario.ScenarioMessage) -> str:
    try:
        _refused, reply = await aiosmtplib.send(
            message.raw,
            sender=message.sender,
            recipients=list(message.recipients),
            hostname=address.host,
            port=address.port,
            timeout=30,
        )
        return reply
    except aiosmtplib.SMTPException as exc:
        return f"refused: {exc}"


def print_table(rows: list[tuple[str, ...]], header: tuple[str, ...]) -> None:
    widths = [max(len(r[i]) for r in [header, *rows]) for i in range(len(header))]
    line = "  ".join(h.ljust(w) for h, w in zip(header, widths, strict=True))
    print(line)
    print("-" * len(line))
    for row in rows:
        print("  ".join(c.ljust(w) for c, w in zip(row, widths, strict=True)))


def _short(text: str, width: int) -> str:
    return text if len(text) <= width else text[: width - 1] + "…"


async def run_demo(run_dir: Path, http_port: int, keep_running: bool) -> int:
    if run_dir.exists():
        shutil.rmtree(run_dir)
    run_dir.mkdir(parents=True)
    maildirs = run_dir / "maildirs"
    print("Harbour Lane Veterinary Practice: mailweir demo\n")

    known = scenario.training_set()
    n, seconds = await asyncio.to_thread(train, str(run_dir / "model.sqlite3"), known)
    print(
        f"1. Trained the model on {n} messages the practice had already sorted "
        f"({sum(m.label == 'ham' for m in known)} wanted, "
        f"{sum(m.label == 'spam' for m in known)} junk) in {seconds:.2f} s."
    )

    loop = asyncio.get_running_loop()
    sink = await loop.create_server(
        lambda: SMTP(MaildirDelivery(maildirs), hostname="mail.harbourlane.example"),
        LOCALHOST,
        0,
    )
    sink_port = sink.sockets[0].getsockname()[1]
    service = Service(demo_settings(run_dir, sink_port, http_port))
    await service.startup()
    try:
        print(
            f"2. mailweir is listening on {service.smtp_address}; its next hop is a local "
            f"delivery agent on {LOCALHOST}:{sink_port} writing Maildirs under {maildirs}."
        )
        morning = scenario.incoming()
        replies = [await send(service.smtp_address, m) for m in morning]
        await asyncio.sleep(0.2)
        landed = read_landed(maildirs)
        rows = []
        for message, reply in zip(morning, replies, strict=True):
            msgid = email.message_from_bytes(message.raw).get("Message-ID", "")
            where = landed.get(str(msgid))
            verdict = where.message.get("Mailweir-Verdict", "-") if where else "-"
            score = where.message.get("Mailweir-Score", "-") if where else "-"
            box = where.mailbox if where else f"not delivered ({reply[:30]})"
            rows.append(
                (
                    _short(message.sender, 34),
                    _short(message.subject, 44),
                    str(verdict),
                    str(score),
                    box,
                )
            )
        print("3. The morning's mail, as it landed:\n")
        print_table(rows, ("from", "subject", "verdict", "score", "delivered to"))
        print()
        await correction(service, maildirs)
        print_held(service, run_dir)
        status = service.http_address
        if status is not None:
            print(f"\n6. Status page: http://{status}/   (metrics at http://{status}/metrics)")
        if keep_running and sys.stdin.isatty():
            print("   mailweir keeps running; press Ctrl-C to stop.")
            with contextlib.suppress(asyncio.CancelledError):
                await service.wait_for_stop()
    finally:
        await service.shutdown(grace=5.0)
        sink.close()
    print(f"\nEverything the demo made is under {run_dir}.")
    return 0


def print_held(service: Service, run_dir: Path) -> None:
    """The junk rerouted to quarantine was also kept as it arrived, ready for a release."""
    if service.quarantine is None:
        return
    held = service.quarantine.store.figures(service.settings.quarantine.retention_days).held
    print(
        f"\n5. {held} rerouted messages are held as they arrived, each releasable to its "
        f"recipients:\n   mailweir held --state-dir {run_dir}    "
        f"(then: mailweir release ID --state-dir {run_dir} --next-hop HOST:PORT)"
    )


def forward_as_attachment(landed: Message, sender: str, to: str) -> bytes:
    """What a mail client makes of "Forward as attachment": the original as message/rfc822."""
    forward = EmailMessage()
    forward["From"] = sender
    forward["To"] = to
    forward["Subject"] = f"Fwd: {landed['Subject']}"
    forward.set_content("This one is from our linen supplier; it is wanted mail.\n")
    forward.add_attachment(landed)
    return forward.as_bytes()


async def correction(service: Service, maildirs: Path) -> None:
    """The practice manager sends the supplier's reminder back to the wanted-mail address."""
    reminder = scenario.overdue_reminder()
    msgid = str(email.message_from_bytes(reminder.raw)["Message-ID"])
    landed = read_landed(maildirs)[msgid].message
    tobias = reminder.recipients[0]
    forward = scenario.ScenarioMessage(
        "ham",
        tobias,
        (scenario.FEEDBACK_HAM,),
        "Fwd",
        forward_as_attachment(landed, tobias, scenario.FEEDBACK_HAM),
    )
    reply = await send(service.smtp_address, forward)
    print(f'4. Tobias forwards "{reminder.subject}" to {scenario.FEEDBACK_HAM}:')
    print(f"   mailweir answered: {reply}")
    again = reminder.raw.replace(msgid.encode(), msgid.replace("@", ".again@").encode())
    await send(service.smtp_address, dataclasses.replace(reminder, raw=again))
    await asyncio.sleep(0.2)
    resent = read_landed(maildirs)[msgid.replace("@", ".again@")].message
    print(
        f"   The same reminder sent again now scores {resent['Mailweir-Score']} "
        f"({resent['Mailweir-Verdict']}); before the correction it scored "
        f"{landed['Mailweir-Score']} ({landed['Mailweir-Verdict']})."
    )


def add_demo_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--dir", default="demo-run", help="where the demo keeps its files")
    parser.add_argument("--http-port", type=int, default=7180, help="status page port")
    parser.add_argument("--exit", action="store_true", help="stop when done, even on a tty")


def demo_command(args: argparse.Namespace) -> int:
    try:
        return asyncio.run(run_demo(Path(args.dir).resolve(), args.http_port, not args.exit))
    except KeyboardInterrupt:
        return 0
